"""``peekalign search BUNDLE UTT``: traced CTC prefix beam search of one utterance.

Prints the n-best with every score part and how far the search followed the
reference; ``--json F`` writes the n-best (tokens with trigger frames and times), the
prune events and the prefix table they refer to; ``--partials F`` writes the best
partial hypothesis after each frame with the time it can be shown (JSON lines), those
of the triggered decoding when a decoder is given (``--decoder`` / ``--demo-decoder``).
"""

from __future__ import annotations

import argparse
import json
import math

from ..exceptions import ParameterError
from ..io.atomic import atomic_write, check_target
from ..model import Utterance, open_bundle
from ..search import SearchResult, prefix_search
from ._common import add_decoder_options, decoder_factory, print_table


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser(
        "search",
        help="traced CTC prefix beam search of one utterance",
        description="Frame-synchronous CTC prefix beam search of one utterance: the "
        "n-best with score parts and trigger frames, prune events, and the longest "
        "reference prefix the beam held.",
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle folder")
    p.add_argument("utt", metavar="UTT", help="utterance id")
    p.add_argument("--beam", type=int, default=16, metavar="N", help="beam size (default 16)")
    p.add_argument(
        "--candidates", type=int, default=20, metavar="K", help="candidate tokens per frame (20)"
    )
    p.add_argument(
        "--token-floor",
        type=float,
        default=-10.0,
        metavar="F",
        help="minimum log-posterior of a candidate token (-10)",
    )
    p.add_argument(
        "--prune-gap",
        type=float,
        default=10.0,
        metavar="F",
        help="prune prefixes this far below the best score (10)",
    )
    p.add_argument(
        "--token-bonus", type=float, default=0.0, metavar="B", help="score per token (0)"
    )
    p.add_argument("--lm", metavar="ARPA", help="word n-gram LM in ARPA format")
    p.add_argument(
        "--lm-weight",
        type=float,
        default=0.5,
        metavar="W",
        help="LM weight with --lm (0.5: lowest WER on the demo set, see DEVELOPERS.md)",
    )
    p.add_argument("--nbest", type=int, default=5, metavar="N", help="hypotheses shown (5)")
    p.add_argument("--json", metavar="F", help="write the full result as JSON")
    p.add_argument(
        "--partials",
        metavar="F",
        help='write the partial result after each frame as JSON lines {"frame", "time_s", '
        '"shown_s", "text"}',
    )
    p.add_argument(
        "--compute-s",
        type=float,
        default=0.0,
        metavar="S",
        help="compute time per step added to the shown times (0)",
    )
    p.add_argument("--chunk", type=int, default=1, metavar="N", help="encoder frames per step (1)")
    add_decoder_options(
        p,
        required=False,
        decoder_help="--partials of triggered decoding with this decoder (FACTORY(bundle) "
        "returns a peekalign.decoder.Decoder): a token is shown once its window is heard",
        demo_help="--partials of triggered decoding with the demo model's decoder (needs torch)",
    )
    p.add_argument(
        "--lookahead",
        type=int,
        metavar="N",
        help="decoder look-ahead in frames for --decoder (default: the bundle's)",
    )
    p.add_argument(
        "--overwrite", action="store_true", help="replace existing --json / --partials files"
    )
    return p


def _lm_options(args: argparse.Namespace, utt: Utterance) -> dict:
    if not args.lm:
        return {}
    from ..lm import ArpaLM

    sep = utt.vocab.separator_id
    if sep is None:
        raise ParameterError(
            f"utt {utt.id!r}: found word boundary {utt.vocab.boundary.kind!r} "
            f"({utt.vocab.boundary.symbol!r}), expected a separator token for a word LM; "
            "drop --lm or use a bundle whose words are separated by a token"
        )
    return {
        "lm": ArpaLM.from_file(args.lm),
        "lm_weight": args.lm_weight,
        "word_separator": sep,
        "vocab": list(utt.vocab.tokens),
        "lm_eos": True,
    }


def result_json(result: SearchResult, utt: Utterance) -> dict:
    """Plain-JSON form of a search result (n-best, prune events, prefix table)."""
    v, clock = utt.vocab, utt.clock

    def num(x: float) -> float | None:
        return round(float(x), 4) if math.isfinite(x) else None

    hyps = []
    for rank, h in enumerate(result.hypotheses):
        times = clock.time(h.trigger_frames) if h.tokens.size else []
        hyps.append(
            {
                "rank": rank,
                "text": v.decode(h.tokens),
                "score": num(h.score),
                "ctc_score": num(h.ctc_score),
                "lm_score": num(h.lm_score),
                "decoder_score": num(h.decoder_score),
                "token_bonus": num(h.token_bonus),
                "prefix": h.prefix,
                "tokens": [
                    {
                        "id": int(k),
                        "token": v.token(k),
                        "trigger_frame": int(f),
                        "trigger_s": round(float(s), 4),
                    }
                    for k, f, s in zip(h.tokens, h.trigger_frames, times, strict=True)
                ],
            }
        )
    out = {"id": utt.id, "params": result.params, "hypotheses": hyps}
    tr = result.trace
    if tr is not None:
        out["prune_events"] = {
            "frame": tr.prune_frame.tolist(),
            "prefix": tr.prune_prefix.tolist(),
            "rank": tr.prune_rank.tolist(),
            "gap": [round(g, 4) for g in tr.prune_gap.tolist()],
        }
        out["prefixes"] = {
            "parent": tr.parent.tolist(),
            "token": tr.token.tolist(),
            "trigger_frame": tr.trigger_frame.tolist(),
        }
        if utt.ref_tokens.size:
            m = tr.best_reference_prefix(utt.ref_tokens)
            out["reference"] = {
                "tokens": int(utt.ref_tokens.size),
                "n_matched": m.n_matched,
                "complete": m.complete,
                "last_frame_held": m.last_frame_held,
                "prune_frame": m.prune_frame,
                "prune_gap": num(m.prune_gap),
                "next_frame": m.next_frame,
                "next_gap": num(m.next_gap),
            }
    return out


def _partials(args: argparse.Namespace, bundle, utt: Utterance, result):
    """The search's partial results, or with a decoder those of triggered decoding
    (CTC-greedy triggers, the decoder's look-ahead)."""
    from ..partials import decoded_partials, partials

    timing = dict(encoder_lookahead=utt.encoder_ahead, compute_s=args.compute_s, chunk=args.chunk)
    if not (args.decoder or args.demo_decoder):
        if args.lookahead is not None:
            raise ParameterError(
                "found --lookahead without a decoder, expected --decoder MODULE:FACTORY or "
                "--demo-decoder with it (the search's partials have no decoder window)"
            )
        return partials(result, utt.vocab, utt.clock, **timing)
    from ..decoder import check_decoder, ctc_triggers, triggered_decode
    from ..redecoding import load_factory

    decoder = load_factory(decoder_factory(args))(bundle)
    check_decoder(decoder, "search --partials")
    lookahead = utt.decoder_lookahead if args.lookahead is None else args.lookahead
    trig = ctc_triggers(utt.log_probs, blank=utt.blank, utt=utt.id)
    decoded = triggered_decode(
        decoder.open(utt), trig, num_frames=utt.num_frames, lookaheads=lookahead,
        eos=decoder.eos, blank=utt.blank, utt=utt.id,
    )[0]  # fmt: skip
    return decoded_partials(
        decoded, utt.vocab, utt.clock, num_frames=utt.num_frames, utt=utt.id, **timing
    )


def run(args: argparse.Namespace) -> int:
    bundle = open_bundle(args.bundle)
    try:
        utt = bundle[args.utt]
    except KeyError as exc:
        raise ParameterError(exc.args[0] if exc.args else str(exc)) from None
    # refuse every existing target before the search, so a refusal writes nothing
    for target in (args.json, args.partials):
        if target:
            check_target(target, overwrite=args.overwrite)
    result = prefix_search(
        utt.log_probs,
        blank=utt.blank,
        beam=args.beam,
        candidates=args.candidates,
        token_floor=args.token_floor,
        prune_gap=args.prune_gap,
        token_bonus=args.token_bonus,
        nbest=args.nbest,
        utt=utt.id,
        **_lm_options(args, utt),
    )
    if args.partials:
        _partials(args, bundle, utt, result).write_jsonl(args.partials, overwrite=args.overwrite)
    if args.json:
        with atomic_write(args.json, overwrite=args.overwrite) as f:
            json.dump(result_json(result, utt), f, ensure_ascii=False)
            f.write("\n")
    rows = [
        (
            rank,
            round(h.score, 3),
            round(h.ctc_score, 3),
            round(h.lm_score, 3),
            round(h.token_bonus, 3),
            h.tokens.size,
            "".join(utt.vocab.tokens[k] for k in h.tokens),
        )
        for rank, h in enumerate(result.hypotheses)
    ]
    print(f"utt {utt.id}: {utt.num_frames} frames, beam {args.beam}")
    # raw token strings: hypotheses that differ only in separators stay distinct
    print_table(("rank", "score", "ctc", "lm", "token_bonus", "n", "tokens"), rows)
    tr = result.trace
    held = int((tr.trigger_frame[tr.prune_prefix] < tr.prune_frame).sum())
    print(
        f"prune events: {tr.prune_frame.size} ({held} of prefixes that were in the beam), "
        f"{tr.num_prefixes} prefixes"
    )
    if utt.ref_tokens.size:
        m = tr.best_reference_prefix(utt.ref_tokens)
        U = int(utt.ref_tokens.size)
        if m.complete:
            line = f"reference: all {U} tokens held in the beam"
            if m.prune_frame >= 0:
                line += f", then pruned at frame {m.prune_frame} (gap {m.prune_gap:.3f})"
        else:
            line = f"reference: {m.n_matched} of {U} tokens held in the beam"
            if m.next_frame >= 0:
                t = float(utt.clock.time(m.next_frame))
                line += (
                    f"; token {m.n_matched + 1} "
                    f"({utt.vocab.token(utt.ref_tokens[m.n_matched])!r}) closest to the "
                    f"beam at frame {m.next_frame} ({t:.2f} s), gap {m.next_gap:.3f}"
                )
            else:
                line += f"; token {m.n_matched + 1} was never proposed"
        print(line)
    return 0
