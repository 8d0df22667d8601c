"""The benchmark figures: each returns table rows (ours, reference, ratio, target, pass)
and checks the fast result against a reference value."""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import synth
from timing import child_env, interleaved, python_child, run_child

NA = "n/a (module not there yet)"


@dataclass
class Row:
    figure: str
    ours: str
    ref: str
    ratio: str
    target: str
    ok: bool | None  # None: not measured
    check: str = ""
    wall: str = ""  # wall-clock of the same runs, for the record


@dataclass
class Config:
    repeat: int = 15
    cache: Path = Path(tempfile.gettempdir()) / "peekalign-bench"
    quick: bool = False


def fmt_s(x: float) -> str:
    if x >= 1:
        return f"{x:.2f} s"
    if x >= 1e-3:
        return f"{x * 1e3:.1f} ms"
    return f"{x * 1e6:.0f} us"


def _wall(t, ref: str | None = "ref") -> str:
    if ref is None or ref not in t:
        return fmt_s(t["ours"].wall)
    return f"{fmt_s(t['ours'].wall)} / {fmt_s(t[ref].wall)}"


def _na(figure: str, target: str, why: str = NA) -> Row:
    return Row(figure, why, "", "", target, None)


# ----------------------------------------------------------------------------------
# references written here, independent of peekalign's kernels
# ----------------------------------------------------------------------------------


def numpy_viterbi_score(lp: np.ndarray, tokens: np.ndarray, blank: int = 0) -> float:
    """CTC Viterbi score with numpy, one frame at a time over all states (float64).

    The recursion of Graves et al. (2006) with max in place of sum; no band, no
    backpointers; a plain reference for the compiled kernel.
    """
    ext = np.full(2 * tokens.size + 1, blank, dtype=np.int64)
    ext[1::2] = tokens
    S = ext.size
    skip = np.zeros(S, dtype=bool)
    skip[2:] = (ext[2:] != blank) & (ext[2:] != ext[:-2])
    d = np.full(S, -np.inf)
    d[0] = lp[0, ext[0]]
    if S > 1:
        d[1] = lp[0, ext[1]]
    cand = np.empty((3, S))
    for t in range(1, lp.shape[0]):
        cand[0] = d
        cand[1, 0] = -np.inf
        cand[1, 1:] = d[:-1]
        cand[2, :2] = -np.inf
        cand[2, 2:] = np.where(skip[2:], d[:-2], -np.inf)
        d = cand.max(axis=0) + lp[t, ext]
    return float(d[-1] if S == 1 else max(d[-1], d[-2]))


def path_checks(lp, tokens, ali) -> str | None:
    """None when the path re-scores to its score and collapses to the tokens."""
    labels = ali.frame_labels()
    rescored = float(lp[np.arange(lp.shape[0]), labels].astype(np.float64).sum())
    if abs(rescored - ali.score) > 1e-6 * max(1.0, abs(ali.score)):
        return f"path re-scores to {rescored:.6f}, score says {ali.score:.6f}"
    keep = np.r_[True, labels[1:] != labels[:-1]] & (labels != 0)
    if not np.array_equal(labels[keep], tokens):
        return "path does not collapse to the reference"
    return None


def _torch():
    import torch

    torch.set_num_threads(1)
    return torch


def _ctc_inputs(torch, lp, tokens):
    T = lp.shape[0]
    return (
        torch.from_numpy(lp)[:, None, :],
        torch.from_numpy(tokens.astype(np.int64))[None, :],
        torch.tensor([T]),
        torch.tensor([tokens.size]),
    )


# ----------------------------------------------------------------------------------
# figures
# ----------------------------------------------------------------------------------


def main_utterance(seed: int = 7):
    """T = 1,500 (60 s at 40 ms), U = 300, V = 5,000, float32."""
    rng = np.random.default_rng(seed)
    return synth.utterance_arrays(rng, 1500, 300, 5000)


def fig_align(cfg: Config) -> list[Row]:
    from peekalign import align_tokens

    torch = _torch()
    tokens, lp = main_utterance()
    x, y, xl, yl = _ctc_inputs(torch, lp, tokens)

    def ref():
        return torch.nn.functional.ctc_loss(x, y, xl, yl, reduction="sum")

    ali = align_tokens(lp, tokens)
    ref()
    t = interleaved({"ours": lambda: align_tokens(lp, tokens), "ref": ref}, repeat=cfg.repeat)
    # reference: numpy Viterbi recursion above; the score must agree to 1e-3
    expect = numpy_viterbi_score(lp, tokens)
    problems = [p for p in [path_checks(lp, tokens, ali)] if p]
    if abs(ali.score - expect) > 1e-3:
        problems.append(f"score {ali.score:.4f} != numpy Viterbi {expect:.4f}")
    ratio = t["ours"].best / t["ref"].best
    check = "; ".join(problems) or (
        f"score = numpy Viterbi ({abs(ali.score - expect):.1e}); path re-scores, collapses"
    )
    return [
        Row(
            "align_tokens T=1500 U=300 V=5000 vs torch ctc_loss fwd",
            fmt_s(t["ours"].best),
            fmt_s(t["ref"].best),
            f"{ratio:.3f}x",
            "<= 0.08x",
            ratio <= 0.08 and not problems,
            check,
            _wall(t),
        )
    ]


def fig_forward_backward(cfg: Config) -> list[Row]:
    from peekalign import forward_backward
    from peekalign.align import extend_labels

    torch = _torch()
    tokens, lp = main_utterance()
    x, y, xl, yl = _ctc_inputs(torch, lp, tokens)
    leaf = x.clone().requires_grad_()

    def ref():
        leaf.grad = None
        loss = torch.nn.functional.ctc_loss(leaf, y, xl, yl, reduction="sum")
        loss.backward()
        return loss

    sa = forward_backward(lp, tokens)
    ref()
    t = interleaved({"ours": lambda: forward_backward(lp, tokens), "ref": ref}, repeat=cfg.repeat)
    # reference: torch's loss is -log P(l|x); its gradient w.r.t. the log-probs is
    # exp(y) - (occupancy summed over the states of each token id). Checked in float64
    # (torch's float32 pass drifts by ~1e-2 over 1,500 frames).
    leaf = x.double().requires_grad_()
    loss = ref()
    sa0 = forward_backward(lp, tokens, floor=0.0)  # every entry, for the comparison
    problems = []
    d_ll = abs(sa.log_likelihood + loss.item())
    if d_ll > 1e-3:
        problems.append(f"log P {sa.log_likelihood:.4f} != torch {-loss.item():.4f}")
    occ = np.zeros(lp.shape)
    np.add.at(occ, (slice(None), extend_labels(tokens)), sa0.dense_states())
    grad = leaf.grad[:, 0, :].numpy().astype(np.float64)
    d_occ = float(np.abs(np.exp(lp.astype(np.float64)) - grad - occ).max())
    if d_occ > 1e-3:
        problems.append(f"occupancy differs from torch's gradient by {d_occ:.2e}")
    ratio = t["ours"].best / t["ref"].best
    check = "; ".join(problems) or (
        f"log P = torch ({d_ll:.1e}); occupancy = exp(y) - torch grad ({d_occ:.1e})"
    )
    return [
        Row(
            "forward-backward + occupancy vs torch ctc_loss fwd+bwd",
            fmt_s(t["ours"].best),
            fmt_s(t["ref"].best),
            f"{ratio:.3f}x",
            "<= 0.1x",
            ratio <= 0.1 and not problems,
            check,
            _wall(t),
        )
    ]


def fig_search(cfg: Config) -> list[Row]:
    target_rtf, target_mb = "RTF <= 0.003", "<= 20 MB"
    try:
        from peekalign.search import prefix_search
    except ImportError:
        return [_na("traced prefix search, beam 16, 20 candidates (RTF)", target_rtf)]
    tokens, lp = main_utterance()
    duration = lp.shape[0] * 0.04

    def ours():
        return prefix_search(lp, beam=16, candidates=20, trace=True)

    res = ours()
    t = interleaved({"ours": ours}, repeat=max(3, cfg.repeat // 3))
    rtf = t["ours"].best / duration
    mb = res.trace.nbytes / 1e6
    # reference: the best hypothesis' CTC score against log P(tokens|x) from torch's
    # ctc_loss (float64): a prefix search sums over a subset of the same paths, so it
    # may fall short by what the beam pruned but never exceed it
    best = res.best
    torch = _torch()
    x, y, xl, yl = _ctc_inputs(torch, lp.astype(np.float64), np.asarray(best.tokens))
    ll = -torch.nn.functional.ctc_loss(x, y, xl, yl, reduction="sum").item()
    gap = ll - best.ctc_score
    problems = []
    if gap < -1e-3:
        problems.append(f"CTC score {best.ctc_score:.3f} above log P {ll:.3f} (torch)")
    same = np.array_equal(np.asarray(best.tokens), tokens)
    check = "; ".join(problems) or (
        f"best CTC score {gap:.1e} below torch log P(hyp|x); "
        f"best {'=' if same else '!='} reference tokens"
    )
    return [
        Row(
            "traced prefix search, beam 16, 20 candidates, 60 s (RTF)",
            fmt_s(t["ours"].best),
            f"{duration:.0f} s audio",
            f"{rtf:.4f}",
            target_rtf,
            rtf <= 0.003 and not problems,
            check,
            _wall(t, None),
        ),
        Row("  trace size", f"{mb:.2f} MB", "", "", target_mb, mb <= 20, repr(res.trace)),
    ]


def _views_bundle(cfg: Config) -> Path:
    """One 60 s utterance with audio and attention (6, 4, 300, 1500)."""
    path = cfg.cache / "views-60s"
    if (path / ".complete").exists():
        return path
    from peekalign import BundleWriter, Vocabulary, WordBoundary

    if path.exists():
        shutil.rmtree(path)
    rng = np.random.default_rng(7)
    tokens, lp = main_utterance()
    vocab = synth.vocabulary(lp.shape[1])
    voc = Vocabulary(vocab, boundary=WordBoundary("prefix", "\u2581"))
    spikes = lp[:, tokens].argmax(axis=0)  # each token's best frame
    att = synth.attention(rng, (6, 4, tokens.size, lp.shape[0]), spikes)
    words = voc.words(tokens)
    hyp = [int(t) for k, w in enumerate(words) if k % 20 != 7 for t in tokens[w[1] : w[2] + 1]]
    with BundleWriter(
        path,
        vocab=vocab,
        frame_shift_s=0.04,
        word_boundary={"kind": "prefix", "symbol": "\u2581"},
        sample_rate=16000,
        encoder={"layers": 12, "lookahead_per_layer": 1},
        decoder={"lookahead": 6},
        overwrite=True,
    ) as w:
        w.add(
            "dispatch-60s",
            lp,
            ref=voc.decode(tokens),
            ref_tokens=tokens,
            hyp_tokens=hyp,
            attention=att,
            attention_tokens=tokens,
            audio=synth.audio(rng, 60.0),
        )
    (path / ".complete").write_text("ok\n")
    return path


def fig_views(cfg: Config) -> list[Row]:
    target = "<= 5x"
    try:
        from peekalign.analysis import analyze
        from peekalign.views import utterance_view
    except ImportError:
        return [_na("all views, document ready, 60 s + attention", target)]
    import json

    import librosa
    import soundfile as sf

    from peekalign import open_bundle
    from peekalign.views._document import to_document
    from peekalign.views._serialize import document_json
    from peekalign.views._static import canonical_ids

    utt = open_bundle(_views_bundle(cfg))["dispatch-60s"]
    y, sr = sf.read(str(utt.audio_path), dtype="float32")

    def ref():
        # the least any view must do: the log-mel spectrogram of the audio
        S = librosa.feature.melspectrogram(
            y=y, sr=sr, n_fft=512, win_length=400, hop_length=160, n_mels=80
        )
        return librosa.power_to_db(S, ref=np.max)

    def ours():
        # what a page waits for: analysis, every panel, the document's JSON
        return document_json(to_document(utterance_view(analyze(utt), static=True)))

    def live():
        # bokeh's own models (the peek widget's path), serialised the same way
        return document_json(to_document(utterance_view(analyze(utt))))

    doc = ours()
    ref()
    t = interleaved({"ours": ours, "ref": ref, "live": live}, repeat=max(3, cfg.repeat // 3))
    a = analyze(utt)
    panels = sorted(utterance_view(a, static=True).panels)
    # reference: bokeh's serialisation of its own models of the same view
    same = canonical_ids(document_json(to_document(utterance_view(a)))) == canonical_ids(
        document_json(to_document(utterance_view(a, static=True)))
    )
    payload = len(json.dumps(doc).encode())
    ratio = t["ours"].best / t["ref"].best
    live_ratio = t["live"].best / t["ref"].best
    mb = payload / 1e6
    return [
        Row(
            "all views, document ready, 60 s + attention vs librosa log-mel",
            fmt_s(t["ours"].best),
            fmt_s(t["ref"].best),
            f"{ratio:.2f}x",
            target,
            ratio <= 5 and same,
            ("document = bokeh's serialisation of its models" if same else "DIFFERS from bokeh's")
            + "; panels: "
            + ", ".join(panels),
            _wall(t),
        ),
        Row(
            "  same with bokeh's models (peek widget's path)",
            fmt_s(t["live"].best),
            fmt_s(t["ref"].best),
            f"{live_ratio:.2f}x",
            "report",
            None,
            "",
            _wall(t, "live"),
        ),
        Row("  document data payload", f"{mb:.2f} MB", "", "", "<= 2 MB", mb <= 2, ""),
        _beam_lane_row(utt, payload),
    ]


def _beam_lane_row(utt, payload: int) -> Row:
    """What the beam lane (beam 16) adds to the 60 s page (DEVELOPERS.md, the replay's
    data budget: at most 1 MB)."""
    import json

    from peekalign.analysis import analyze
    from peekalign.views import utterance_view
    from peekalign.views._document import to_document
    from peekalign.views._serialize import document_json

    searched = analyze(utt, search={"beam": 16, "candidates": 20})
    view = utterance_view(searched, static=True)
    with_lane = len(json.dumps(document_json(to_document(view))).encode())
    added = (with_lane - payload) / 1e6
    trace = searched.search.trace
    return Row(
        "  beam lane (beam 16) added to the page",
        f"{added:.2f} MB",
        "",
        "",
        "<= 1 MB",
        0 < added <= 1 and "beam" in view.panels,
        f"{trace.num_frames} frames; trace {trace.nbytes / 1e6:.1f} MB in Python",
    )


_SCAN_CHILD = textwrap.dedent(
    """
    import hashlib, json, resource, sys, time
    from peekalign.corpus import scan
    path, workers = sys.argv[1], int(sys.argv[2])
    def cpu():
        a = resource.getrusage(resource.RUSAGE_SELF)
        b = resource.getrusage(resource.RUSAGE_CHILDREN)  # the pool, once shut down
        return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime
    t0, c0 = time.perf_counter(), cpu()
    s = scan(path, workers=workers, progress=False)
    dt, dc = time.perf_counter() - t0, cpu() - c0
    h = hashlib.sha256()
    for name in ("utterances", "words"):
        tab = getattr(s, name, None)
        h.update(repr(tab.rows if hasattr(tab, "rows") else tab).encode())
    if len(sys.argv) > 3:
        with open(sys.argv[3], "w", encoding="utf-8") as f:
            f.write(s.utterances.csv_text())
    print(json.dumps({"seconds": dt, "cpu": dc, "digest": h.hexdigest()}))
    """
)


def fig_scan(cfg: Config) -> list[Row]:
    targets = ("RTF <= 0.002", ">= 1.7x", "<= 1.5 GB", "RTF <= 0.005", "<= 250 KB")
    names = (
        "scan() tables, 1000 x 8 s, 2 workers (RTF)",
        "  2 workers vs 1",
        "  peak memory, all processes",
        "scan --out report, 2 workers (RTF)",
        "  report size per utterance",
    )
    try:
        import peekalign.corpus  # noqa: F401
    except ImportError:
        return [_na(n, t) for n, t in zip(names, targets, strict=True)]
    n = 100 if cfg.quick else 1000
    seconds = 8.0
    audio_s = n * seconds
    bundle = synth.write_corpus(
        cfg.cache / f"scan-{n}x8s-v5000", n=n, seconds=seconds, V=5000, seed=11
    )
    rows = []
    runs = {}
    table = cfg.cache / f"scan-{n}-utterances.csv"
    for workers in (1, 2):
        extra = [str(table)] if workers == 2 else []
        r = run_child([sys.executable, "-c", _SCAN_CHILD, str(bundle), str(workers), *extra])
        runs[workers] = (r, r.json())
    (_, j1), (r2, j2) = runs[1], runs[2]
    rtf = j2["seconds"] / audio_s
    same = j1["digest"] == j2["digest"]
    wer_note = _check_scan_wer(bundle, table)
    rows.append(
        Row(
            names[0].replace("1000", str(n)),
            fmt_s(j2["seconds"]),
            f"{audio_s:.0f} s audio",
            f"{rtf:.4f}",
            targets[0],
            rtf <= 0.002 and same and not wer_note.startswith("WER differs"),
            ("tables identical with 1 and 2 workers" if same else "1 vs 2 workers differ!")
            + f"; {wer_note}"
            + f"; CPU {j2['cpu']:.1f} s in all processes ({j2['cpu'] / audio_s:.4f} per audio s)"
            + f", 1 worker {j1['cpu']:.1f} s",
            fmt_s(j2["seconds"]),
        )
    )
    speed = j1["seconds"] / j2["seconds"]
    rows.append(
        Row(
            names[1],
            fmt_s(j2["seconds"]),
            fmt_s(j1["seconds"]),
            f"{speed:.2f}x",
            targets[1],
            speed >= 1.7,
            "",
        )
    )
    gb = r2.peak_tree_bytes / 1e9
    rows.append(
        Row(names[2], f"{gb:.2f} GB", "", "", targets[2], gb <= 1.5, "RSS summed over tree")
    )
    out = Path(tempfile.mkdtemp(prefix="scan-report-", dir=cfg.cache))
    try:
        r = run_child(
            [sys.executable, "-m", "peekalign", "scan", str(bundle), "--out", str(out / "r")]
            + ["--workers", "2"]
        )
        if r.returncode not in (0, 1):
            rows.append(_na(names[3], targets[3], f"failed (exit {r.returncode})"))
            return rows
        files = [p for p in (out / "r").rglob("*") if p.is_file()]
        size = sum(p.stat().st_size for p in files)
        per_utt = size / n / 1e3
        js = [p for p in files if p.suffix == ".js" and "bokeh" in p.name.lower()]
        pages = [p for p in files if p.suffix == ".html"]
        remote = sum(1 for p in pages[:50] if "://cdn" in p.read_text(errors="replace"))
        rtf_r = r.seconds / audio_s
        rows.append(
            Row(
                names[3],
                fmt_s(r.seconds),
                f"{audio_s:.0f} s audio",
                f"{rtf_r:.4f}",
                targets[3],
                rtf_r <= 0.005,
                f"exit {r.returncode}; {len(pages)} pages",
            )
        )
        rows.append(
            Row(
                names[4],
                f"{per_utt:.0f} KB",
                "",
                "",
                targets[4],
                per_utt <= 250 and remote == 0 and len({p.parent for p in js}) == 1,
                f"BokehJS once: {', '.join(sorted(p.name for p in js))} in "
                f"{len({p.parent for p in js})} folder; {remote} of 50 pages load from a CDN",
            )
        )
    finally:
        shutil.rmtree(out, ignore_errors=True)
    return rows


def _check_scan_wer(bundle: Path, table: Path) -> str:
    """Every 50th utterance's WER in the scan table against jiwer's (reference)."""
    import csv

    try:
        import jiwer
    except ImportError:
        return "jiwer missing: WER not checked"
    from peekalign import open_bundle

    b = open_bundle(bundle)
    with open(table, encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    worst = 0.0
    for r in rows[::50]:
        utt = b[r["id"]]
        # reference: jiwer's word error rate of the same reference and hypothesis text
        worst = max(worst, abs(float(r["wer"]) - jiwer.wer(utt.ref, utt.hyp)))
    if worst > 1e-6:  # the CSV keeps 7 significant digits
        return f"WER differs from jiwer by {worst:.2e}"
    return f"WER of {len(rows[::50])} utterances = jiwer's ({worst:.0e})"


_SCALE_CHILD = textwrap.dedent(
    """
    import hashlib, json, sys, time
    from peekalign.corpus import scan

    class Hashed:  # a text file that only hashes what is written to it
        def __init__(self):
            self.h = hashlib.sha256()
        def write(self, text):
            self.h.update(text.encode())

    def digest(s):
        # the tables' CSV text as write_csv writes it (4,096 rows at a time), hashed
        # as it is written: the check holds no copy of the tables, so the peak memory
        # is the scan's
        f = Hashed()
        for name in ("utterances", "words"):
            getattr(s, name)._write(f)
        return f.h.hexdigest()

    def cpu():
        return time.process_time()

    if __name__ == "__main__":
        path, mode, tmp = sys.argv[1], sys.argv[2], sys.argv[3]
        out = {}
        if mode == "dask":
            import dask
            import distributed
            t0 = time.perf_counter()
            # as the README advises for a scan: no statistical profiler sampling the
            # workers' threads every 10 ms
            conf = {"temporary-directory": tmp, "distributed.worker.profile.enabled": False}
            with (
                dask.config.set(conf),
                distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                         dashboard_address=":0") as cluster,
                distributed.Client(cluster) as client,
            ):
                out["startup"] = time.perf_counter() - t0
                w0, c0 = client.run(cpu), time.process_time()
                t0 = time.perf_counter()
                s = scan(path, executor=client.get_executor(), progress=False)
                out["seconds"] = time.perf_counter() - t0
                # CPU seconds of the scan: this process (client, scheduler, nannies) and
                # each worker process
                out["cpu_client"] = time.process_time() - c0
                out["cpu_workers"] = [t - w0[k] for k, t in sorted(client.run(cpu).items())]
                out["batches"] = s.stats["batches"]
        else:
            t0 = time.perf_counter()
            s = scan(path, workers=2, progress=False)
            out["seconds"] = time.perf_counter() - t0
        out["digest"] = digest(s)
        out["n"] = len(s.utterances.rows) if hasattr(s.utterances, "rows") else None
        # what the returned tables hold (arrays and distinct objects; an id str is
        # counted in both tables, ~60 bytes an utterance)
        out["table_bytes"] = s.utterances.nbytes() + s.words.nbytes()
        out["problems"] = len(s.problems)
        print(json.dumps(out))
    """
)


def _scale_bundle(cfg: Config, n: int, distinct: int) -> Path:
    """``n`` utterances of 8 s (V = 5,000, float16, no audio) whose posteriors come
    from ``distinct`` synthesised files, each listed ``n / distinct`` times under its
    own id: the manifest is as long as a real set's, the disk holds ``distinct`` files
    (hard-linked into the bundle)."""
    import json

    base = synth.write_corpus(
        cfg.cache / f"scale-{distinct}x8s-v5000", n=distinct, seconds=8.0, V=5000, seed=13,
        with_audio=False,
    )  # fmt: skip
    path = cfg.cache / f"scale-{n}-of-{distinct}"
    if (path / ".complete").exists():
        return path
    if path.exists():
        shutil.rmtree(path)
    path.mkdir(parents=True)
    for name in ("bundle.json", "vocab.txt"):
        shutil.copyfile(base / name, path / name)
    # hard links: the reader refuses paths that resolve outside the bundle
    (path / "arrays").mkdir()
    for f in (base / "arrays").iterdir():
        os.link(f, path / "arrays" / f.name)
    lines = (base / "utts.jsonl").read_text(encoding="utf-8").splitlines()
    with open(path / "utts.jsonl", "w", encoding="utf-8") as f:
        for i in range(n):
            entry = json.loads(lines[i % len(lines)])
            entry["id"] = f"{entry['id']}-r{i // len(lines)}"
            f.write(json.dumps(entry, ensure_ascii=False) + "\n")
    (path / ".complete").write_text("ok\n")
    return path


def fig_scale(cfg: Config) -> list[Row]:
    """scan() on a Dask LocalCluster of 2 worker processes at two set sizes."""
    sizes = (100, 1000) if cfg.quick else (1000, 10000)
    names = (
        f"scan() on Dask LocalCluster, 2 workers, {sizes[1]:,} x 8 s (RTF)",
        f"  peak memory, all processes, {sizes[0]:,} -> {sizes[1]:,} utterances",
    )
    targets = ("RTF <= 0.002", "<= 1.5 GB, flat")
    try:
        import distributed  # noqa: F401
    except ImportError:
        return [_na(n, t, "dask.distributed missing") for n, t in zip(names, targets, strict=True)]
    runs = {}
    with tempfile.TemporaryDirectory(prefix="pk-dask-", dir=cfg.cache) as tmp:
        for n in sizes:
            path = _scale_bundle(cfg, n, min(n, 1000))
            r = run_child([sys.executable, "-c", _SCALE_CHILD, str(path), "dask", tmp])
            runs[n] = (r, r.json())
        big = sizes[1]
        pool = run_child(
            [sys.executable, "-c", _SCALE_CHILD, str(_scale_bundle(cfg, big, 1000)), "pool", tmp]
        ).json()
    (r_small, j_small), (r_big, j_big) = runs[sizes[0]], runs[big]
    audio_s = big * 8.0
    rtf = j_big["seconds"] / audio_s
    same = j_big["digest"] == pool["digest"]
    gb_small, gb_big = r_small.peak_tree_bytes / 1e9, r_big.peak_tree_bytes / 1e9
    flat, growth = _scale_growth(r_small.peak_tree_bytes, r_big.peak_tree_bytes, j_small,
                                 j_big, sizes)  # fmt: skip
    return [
        Row(
            names[0],
            fmt_s(j_big["seconds"]),
            f"{audio_s:,.0f} s audio",
            f"{rtf:.4f}",
            targets[0],
            rtf <= 0.002 and same and not j_big["problems"] and j_big["n"] == big,
            f"{j_big['n']} utterances, {j_big['problems']} problems; "
            + (
                "tables identical to the process pool's"
                if same
                else "tables DIFFER from the pool's"
            )
            + f" (pool {fmt_s(pool['seconds'])}); cluster start-up {fmt_s(j_big['startup'])}"
            f" not counted; {sizes[0]:,}: {fmt_s(j_small['seconds'])}; CPU: client and "
            f"scheduler {j_big['cpu_client']:.1f} s, workers "
            + " + ".join(f"{c:.1f}" for c in j_big["cpu_workers"])
            + f" s, {j_big['batches']} tasks; load {os.getloadavg()[0]:.1f} at the end",
            fmt_s(r_big.seconds),
        ),
        Row(
            names[1],
            f"{gb_small:.2f} -> {gb_big:.2f} GB",
            "",
            "",
            targets[1],
            gb_big <= 1.5 and flat,
            "RSS summed over the process tree (client, scheduler, nannies, workers); " + growth,
        ),
    ]


#: Growth of a scan's peak memory from the small set to the large one, besides its
#: returned tables' own growth, still called flat (a share of the small run's peak).
FLAT_TOLERANCE = 0.05


def _scale_growth(peak_small: int, peak_big: int, j_small: dict, j_big: dict, sizes) -> tuple:
    """Whether the peak stays flat once the returned tables are set aside, and the
    figures that say so: the tables are the result, O(N) by nature; everything else
    (workers, scheduler, the client's own records) must not grow with the set."""
    n = sizes[1] - sizes[0]
    growth = peak_big - peak_small
    tables = j_big["table_bytes"] - j_small["table_bytes"]
    rest, tol = growth - tables, FLAT_TOLERANCE * peak_small
    return rest <= tol, (
        f"grows {growth / n:,.0f} B per utterance, of which the returned tables "
        f"{tables / n:,.0f} B (they hold {j_small['table_bytes'] / 1e6:.1f} -> "
        f"{j_big['table_bytes'] / 1e6:.1f} MB); the rest {rest / 1e6:+.1f} MB "
        f"({rest / n:,.0f} B per utterance), flat when within {FLAT_TOLERANCE:.0%} of the "
        f"{sizes[0]:,}-utterance peak ({tol / 1e6:.0f} MB)"
    )


_HOUR_CHILD = textwrap.dedent(
    """
    import json, resource, sys, time
    import numpy as np
    sys.path.insert(0, sys.argv[1])
    import synth
    from peekalign import align_tokens
    rng = np.random.default_rng(3)
    T, U, V = 90_000, 15_000, 500
    tokens, lp = synth.utterance_arrays(rng, T, U, V)
    def hwm():
        # peak RSS of this process image: VmHWM, not ru_maxrss, which after a
        # fork+exec from a large parent starts at the parent's size
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    small = align_tokens(lp[:400], tokens[:60])  # load the compiled code first
    before = hwm()
    t0, c0 = time.perf_counter(), time.process_time()
    ali = align_tokens(lp, tokens)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak = hwm()
    out = {"seconds": dt, "cpu": cpu, "peak": peak, "before": min(before, peak),
           "input": lp.nbytes, "score": ali.score}
    if sys.argv[2] == "check":
        sys.path.insert(0, sys.argv[3])
        from figures import numpy_viterbi_score, path_checks
        out["ref_score"] = numpy_viterbi_score(lp, tokens)
        out["path"] = path_checks(lp, tokens, ali)
    print(json.dumps(out))
    """
)


_HOUR_ANALYZE_CHILD = textwrap.dedent(
    """
    import json, sys, time
    import numpy as np
    sys.path.insert(0, sys.argv[1])
    import synth
    from peekalign import FrameClock, Utterance, Vocabulary, WordBoundary, analyze
    rng = np.random.default_rng(3)
    T, U, V = 90_000, 15_000, 500
    tokens, lp = synth.utterance_arrays(rng, T, U, V)
    vocab = Vocabulary(synth.vocabulary(V), boundary=WordBoundary("prefix", "\u2581"))
    words = [w for w, _, _ in vocab.words(tokens)]
    hyp = " ".join(w for i, w in enumerate(words) if i % 20 != 7)  # 5 % deleted
    utt = Utterance.from_arrays(lp, ref=" ".join(words), ref_tokens=tokens, vocab=vocab,
                                hyp=hyp, clock=FrameClock(0.04), decoder_lookahead=6)
    def hwm():
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    small = Utterance.from_arrays(lp[:400], ref=" ".join(words[:30]),
                                  ref_tokens=tokens[:len(vocab.encode(" ".join(words[:30])))],
                                  vocab=vocab, hyp=" ".join(words[:29]))
    analyze(small)  # load the compiled code first
    before = hwm()
    t0, c0 = time.perf_counter(), time.process_time()
    a = analyze(utt)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak = hwm()
    s = a.summary()
    out = {"seconds": dt, "cpu": cpu, "peak": peak, "before": min(before, peak),
           "input": lp.nbytes, "kept": int(a.soft.values.size), "D": int(s["D"]),
           "diagnosed": len(a.diagnoses), "deleted": len(words) - len(hyp.split()),
           "row_sum_err": float(np.abs(np.bincount(a.soft.frames, a.soft.values,
                                        minlength=T) - 1).max())}
    print(json.dumps(out))
    """
)


def fig_hour_analyze(cfg: Config) -> list[Row]:
    here = str(Path(__file__).parent)
    r = run_child([sys.executable, "-c", _HOUR_ANALYZE_CHILD, here])
    j = r.json()
    problems = []
    # reference: the hypothesis was built by deleting every 20th word (the count is
    # known by construction); occupancy rows sum to 1 less what the floor dropped
    if j["D"] != j["deleted"] or j["diagnosed"] != j["deleted"]:
        problems.append(f"{j['D']} deletions found, {j['deleted']} made")
    if j["row_sum_err"] > 1e-3:
        problems.append(f"occupancy rows off 1 by {j['row_sum_err']:.1e}")
    note = "; ".join(problems) or (
        f"{j['deleted']} deletions found and diagnosed; occupancy {j['kept']:,} entries "
        f"above 1e-6, rows sum to 1 within {j['row_sum_err']:.0e}"
    )
    return _hour_rows("analyze()", j, r, 60, not problems, note)


def _hour_rows(what: str, j: dict, r, limit_s: float, ok: bool, note: str) -> list[Row]:
    """The time and peak-memory rows of a one-hour run (T=90000, U=15000) in a child."""
    gb = j["peak"] / 1e9
    return [
        Row(
            f"1-hour {what} T=90000 U=15000 (time)",
            fmt_s(j["cpu"]),
            "",
            "",
            f"<= {limit_s} s",
            j["cpu"] <= limit_s and ok,
            note,
            fmt_s(j["seconds"]),
        ),
        Row(
            "  peak RSS of the process (VmHWM)",
            f"{gb:.2f} GB",
            "",
            "",
            "<= 1 GB",
            gb <= 1.0,
            f"{(j['peak'] - j['before']) / 1e6:.0f} MB above the state before the call; "
            f"sampled from outside: {r.peak_tree_bytes / 1e9:.2f} GB",
        ),
    ]


def fig_hour(cfg: Config) -> list[Row]:
    here = str(Path(__file__).parent)
    check = "nocheck" if cfg.quick else "check"
    r = run_child([sys.executable, "-c", _HOUR_CHILD, here, check, here])
    j = r.json()
    problems = []
    note = f"V=500 float32 input {j['input'] / 1e6:.0f} MB; checkpointed Viterbi"
    if "ref_score" in j:
        if abs(j["score"] - j["ref_score"]) > 1e-3:
            problems.append(f"score {j['score']:.3f} != numpy Viterbi {j['ref_score']:.3f}")
        if j["path"]:
            problems.append(j["path"])
        note += "; " + ("; ".join(problems) or "score = numpy Viterbi, path re-scores")
    return _hour_rows("align_tokens", j, r, 30, not problems, note)


_FIRST_USE = textwrap.dedent(
    """
    import json, sys, time
    import numpy as np
    sys.path.insert(0, sys.argv[1])
    import synth
    rng = np.random.default_rng(5)
    tokens, lp = synth.utterance_arrays(rng, 1500, 300, 5000)
    t0, c0 = time.perf_counter(), time.process_time()
    import peekalign
    t1, c1 = time.perf_counter(), time.process_time()
    peekalign.align_tokens(lp, tokens)
    t2, c2 = time.perf_counter(), time.process_time()
    print(json.dumps({"import": c1 - c0, "align": c2 - c1, "total": c2 - c0,
                      "wall": t2 - t0}))
    """
)

FORBIDDEN = ("bokeh", "librosa", "ipywidgets", "torch", "dask", "jupyter_bokeh", "scipy")


def fig_startup(cfg: Config) -> list[Row]:
    here = str(Path(__file__).parent)
    warm = []
    python_child(_FIRST_USE.replace("sys.argv[1]", repr(here)))  # fill the cache
    for _ in range(3 if cfg.quick else 5):
        warm.append(python_child(_FIRST_USE.replace("sys.argv[1]", repr(here))).json())
    best = min(warm, key=lambda j: j["total"])
    cold_dir = tempfile.mkdtemp(prefix="numba-cold-", dir=cfg.cache)
    try:
        cold = python_child(
            _FIRST_USE.replace("sys.argv[1]", repr(here)),
            env=child_env(NUMBA_CACHE_DIR=cold_dir),
        ).json()
    finally:
        shutil.rmtree(cold_dir, ignore_errors=True)
    code = (
        "import sys, json; import peekalign; "
        "print(json.dumps({'m': sorted({m.split('.')[0] for m in sys.modules})}))"
    )
    mods = sorted(set(python_child(code).json()["m"]) & set(FORBIDDEN))
    heavy = [m for m in mods if m != "scipy"]
    return [
        Row(
            "first use: import peekalign + align_tokens (cached)",
            fmt_s(best["total"]),
            "",
            "",
            "<= 1.5 s",
            best["total"] <= 1.5,
            f"import {fmt_s(best['import'])}, first call {fmt_s(best['align'])}",
            fmt_s(min(j["wall"] for j in warm)),
        ),
        Row(
            "  cold (nothing cached: numba compiles)",
            fmt_s(cold["total"]),
            "",
            "",
            "report",
            None,
            f"import {fmt_s(cold['import'])}, first call {fmt_s(cold['align'])}",
            fmt_s(cold["wall"]),
        ),
        Row(
            "  heavy modules imported by `import peekalign`",
            ", ".join(mods) or "none",
            "",
            "",
            "none of bokeh, librosa, ipywidgets, torch, dask",
            not heavy,
            "",
        ),
    ]


# ----------------------------------------------------------------------------------
# in the browser
# ----------------------------------------------------------------------------------

#: Debian's Chromium, headless, no network chatter (never a downloaded browser)
_CHROMIUM = "/usr/bin/chromium"
_CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking"]

#: Installed before any page script: records when BokehJS first reports the document
#: idle (every view built and drawn), in ms since navigation started.
_RENDER_PROBE = """
(() => {
  const poll = () => {
    const B = window.Bokeh;
    if (B && B.documents && B.documents.length > 0 && B.documents[0].is_idle) {
      window.__rendered_ms = performance.now();
      return;
    }
    requestAnimationFrame(poll);
  };
  requestAnimationFrame(poll);
})();
"""

#: Change one model (by name) and resolve with the ms until BokehJS has redrawn:
#: the paint it requests runs in the next animation frame, then every view is idle.
_REDRAW = """
async ([name, attr, value]) => {
  const doc = Bokeh.documents[0];
  const model = doc.get_model_by_name(name);
  const frame = () => new Promise((r) => requestAnimationFrame(r));
  const t0 = performance.now();
  model[attr] = value;
  await frame();
  while (!doc.is_idle) await frame();
  return performance.now() - t0;
}
"""


_INFO = "Bokeh.documents[0].get_model_by_name('info').text"


def _reference_page(utt, a) -> str:
    """The same arrays as one plain bokeh figure: the images (log-mel, occupancy,
    attention) and the lines (blank, reference tokens' curves), no callbacks."""
    from bokeh.embed import file_html
    from bokeh.plotting import figure
    from bokeh.resources import INLINE

    from peekalign.views._data import log_mel, reference_curves
    from peekalign.views._model import view_model

    vm = view_model(a)
    mel = log_mel(*vm.audio)
    occ = np.ascontiguousarray(vm.occupancy.T).astype(np.float32)
    att = vm.attention.mean(axis=(0, 1)).astype(np.float32)
    t = vm.frame_time(np.arange(vm.num_frames))
    blank = np.exp(vm.log_probs[:, vm.blank]).astype(np.float32)
    cf, cp, _ = reference_curves(vm.log_probs, vm.tokens, vm.first, vm.last, pad=8)
    p = figure(width=900, height=700, title="reference: plain image and lines")
    y0 = 0.0
    for img in (mel.db.astype(np.float32), occ, att):
        p.image(image=[img], x=0, y=y0, dw=vm.duration_s, dh=img.shape[0], palette="Greys256")
        y0 += img.shape[0] + 10
    p.line(t, blank * 50 + y0)
    p.line(vm.frame_time(cf), cp * 50 + y0)
    return file_html(p, INLINE, "reference")


def fig_browser(cfg: Config) -> list[Row]:
    names = (
        "browser: 60 s page, navigation to first complete render, vs plain bokeh page",
        "browser: token selection, change to redraw, vs page load",
        "browser: look-ahead change, change to redraw, vs page load",
    )
    targets = ("<= 2x", "<= 0.1x", "<= 0.1x")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        return [_na(n, t, "playwright missing") for n, t in zip(names, targets, strict=True)]
    if not Path(_CHROMIUM).exists():
        return [_na(n, t, "no Chromium") for n, t in zip(names, targets, strict=True)]
    from peekalign import open_bundle
    from peekalign.analysis import analyze
    from peekalign.views import standalone_html, utterance_view

    utt = open_bundle(_views_bundle(cfg))["dispatch-60s"]
    a = analyze(utt)
    view = utterance_view(a, static=True)
    repeat = 3 if cfg.quick else 7
    with tempfile.TemporaryDirectory(prefix="pk-", dir="/tmp") as tmp:
        pages = {"ours": Path(tmp) / "ours.html", "ref": Path(tmp) / "ref.html"}
        pages["ours"].write_text(standalone_html(view), encoding="utf-8")
        pages["ref"].write_text(_reference_page(utt, a), encoding="utf-8")
        load = {k: [] for k in pages}
        busy = {k: [] for k in pages}
        redraw = {"token": [], "lookahead": []}
        errors: list[str] = []
        with sync_playwright() as pw:
            browser = pw.chromium.launch(
                executable_path=_CHROMIUM, headless=True, args=_CHROMIUM_ARGS
            )
            try:
                for i in range(repeat):
                    for k, path in pages.items():
                        page = browser.new_page(viewport={"width": 1400, "height": 900})
                        page.on("pageerror", lambda e: errors.append(str(e)))
                        page.add_init_script(_RENDER_PROBE)
                        cdp = page.context.new_cdp_session(page)
                        cdp.send("Performance.enable")
                        page.goto(path.as_uri())
                        page.wait_for_function(
                            "window.__rendered_ms !== undefined", timeout=60_000
                        )
                        load[k].append(page.evaluate("window.__rendered_ms") / 1e3)
                        m = {
                            x["name"]: x["value"]
                            for x in cdp.send("Performance.getMetrics")["metrics"]
                        }
                        busy[k].append(m.get("TaskDuration", float("nan")))
                        if k == "ours":
                            u, e = (i * 37 + 11) % view.vm.U, 7 + i % 5
                            redraw["token"].append(
                                page.evaluate(_REDRAW, ["token_select", "value", str(u)]) / 1e3
                            )
                            redraw["lookahead"].append(
                                page.evaluate(_REDRAW, ["lookahead", "value", e]) / 1e3
                            )
                            # the info line says what the page now shows
                            info = page.evaluate(_INFO)
                            if f"token #{u}" not in info or f"look-ahead {e} " not in info:
                                errors.append(f"info line after token {u}, look-ahead {e}: {info}")
                        page.close()
            finally:
                browser.close()
    lo, lr = min(load["ours"]), min(load["ref"])
    bo, br = min(busy["ours"]), min(busy["ref"])
    ratio = lo / lr
    note = "; ".join(errors[:1]) or "no script errors, info line follows each change"
    rows = [
        Row(
            names[0],
            fmt_s(lo),
            fmt_s(lr),
            f"{ratio:.2f}x",
            targets[0],
            ratio <= 2 and not errors,
            f"{note}; main-thread busy until then {fmt_s(bo)} vs {fmt_s(br)} "
            f"({bo / br:.2f}x); min of {repeat}",
            f"median {fmt_s(float(np.median(load['ours'])))} / "
            f"{fmt_s(float(np.median(load['ref'])))}",
        )
    ]
    for name, key, target in zip(names[1:], ("token", "lookahead"), targets[1:], strict=True):
        r = min(redraw[key])
        rows.append(
            Row(
                name,
                fmt_s(r),
                fmt_s(lo),
                f"{r / lo:.3f}x",
                target,
                r / lo <= 0.1 and not errors,
                f"max of {repeat}: {fmt_s(max(redraw[key]))}",
                f"median {fmt_s(float(np.median(redraw[key])))}",
            )
        )
    return rows


# ----------------------------------------------------------------------------------
# the decoder in the loop: redecode of the demo set with the shipped demo decoder
# ----------------------------------------------------------------------------------


def _redecode_run(bundle, *, mode: str, lookaheads, workers: int, beam: int | None = None):
    """One redecode of the demo set: the run, its wall clock (pool start-up included)
    and the CPU seconds of this process and its finished workers."""
    import resource
    import time

    from peekalign.redecoding import redecode

    def cpu() -> float:
        own = resource.getrusage(resource.RUSAGE_SELF)
        kids = resource.getrusage(resource.RUSAGE_CHILDREN)  # the pool's reaped workers
        return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime

    c0 = cpu()
    t0 = time.perf_counter()
    r = redecode(
        bundle,
        "peekalign.demo_model:demo_decoder",
        lookaheads=lookaheads,
        mode=mode,
        workers=workers,
        search_options=None if beam is None else {"beam": beam},
        progress=False,
    )
    return r, time.perf_counter() - t0, cpu() - c0


def _check_redecode_wer(r, bundle) -> str:
    """Every row's WER against jiwer's on the written hypotheses (reference: jiwer)."""
    import json as _json

    try:
        import jiwer
    except ImportError:
        return "jiwer missing: WER not checked"
    refs = {u.id: u.ref for u in bundle}
    folder = Path(tempfile.mkdtemp(prefix="redecode-hyps-"))
    try:
        path = r.write_hyps(folder / "hyps.jsonl")
        by: dict = {}
        for line in path.read_text(encoding="utf-8").splitlines():
            h = _json.loads(line)
            by.setdefault(h["lookahead_frames"], {})[h["id"]] = h["hyp"]
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    worst = 0.0
    for row, e in zip(r.table, [*r.lookaheads, None], strict=True):
        ids = list(by[e])
        # reference: jiwer's word error rate of the written hypotheses
        want = jiwer.wer([refs[u] for u in ids], [by[e][u] for u in ids])
        worst = max(worst, abs(row["wer"] - want))
    if worst > 1e-12:
        return f"WER differs from jiwer by {worst:.2e}"
    return f"WER of all {len(r.table)} rows = jiwer's on the written hypotheses"


def fig_redecode(cfg: Config) -> list[Row]:
    """``redecode`` of the demo set (24 utterances, 107 s) with the shipped demo decoder:
    triggered mode at look-aheads 0..30 and joint mode with beam 8, 2 workers; RTF per
    look-ahead = wall clock / audio / (look-aheads + full context)."""
    names = (
        "redecode, triggered, demo set, look-aheads 0-30 + full, 2 workers (RTF per look-ahead)",
        "  2 workers vs 1",
        "redecode, joint, beam 8, demo set, look-aheads 0-30 step 6 + full, 2 workers "
        "(RTF per look-ahead)",
    )
    targets = ("RTF <= 0.02", "report", "RTF <= 0.2")
    try:
        import torch  # noqa: F401

        from peekalign import open_bundle
        from peekalign.data import demo_path
    except ImportError:
        return [_na(n, t, "n/a (needs torch)") for n, t in zip(names, targets, strict=True)]
    bundle = open_bundle(demo_path("full"))
    audio_s = sum(u.duration_s for u in bundle)
    trig_eps = list(range(31))
    r2, t2, c2 = _redecode_run(bundle, mode="triggered", lookaheads=trig_eps, workers=2)
    r1, t1, c1 = _redecode_run(bundle, mode="triggered", lookaheads=trig_eps, workers=1)
    same = r1.table.equals(r2.table) and r1.utterances.equals(r2.utterances)
    note = _check_redecode_wer(r2, bundle)
    rtf = t2 / audio_s / (len(trig_eps) + 1)
    rows = [
        Row(
            names[0],
            fmt_s(t2),
            f"{audio_s:.0f} s audio x {len(trig_eps) + 1}",
            f"{rtf:.4f}",
            targets[0],
            rtf <= 0.02 and same and note.startswith("WER of all"),
            ("tables identical with 1 and 2 workers" if same else "1 vs 2 workers differ!")
            + f"; {note}; CPU {c2:.1f} s in all processes, RTF per look-ahead of CPU / 2 "
            f"{c2 / 2 / audio_s / (len(trig_eps) + 1):.4f}",
            fmt_s(t2),
        ),
        Row(
            names[1],
            fmt_s(t2),
            fmt_s(t1),
            f"{t1 / t2:.2f}x",
            targets[1],
            None,
            f"CPU {c1:.1f} s with 1 worker",
        ),  # fmt: skip
    ]
    joint_eps = list(range(0, 31, 6))
    rj, tj, cj = _redecode_run(bundle, mode="joint", lookaheads=joint_eps, workers=2, beam=8)
    note_j = _check_redecode_wer(rj, bundle)
    rtf_j = tj / audio_s / (len(joint_eps) + 1)
    rows.append(
        Row(
            names[2],
            fmt_s(tj),
            f"{audio_s:.0f} s audio x {len(joint_eps) + 1}",
            f"{rtf_j:.4f}",
            targets[2],
            rtf_j <= 0.2 and note_j.startswith("WER of all"),
            f"{note_j}; CPU {cj:.1f} s in all processes",
            fmt_s(tj),
        )
    )
    return rows


FIGURES = {
    "align": fig_align,
    "fb": fig_forward_backward,
    "search": fig_search,
    "views": fig_views,
    "browser": fig_browser,
    "scan": fig_scan,
    "scale": fig_scale,
    "hour": fig_hour,
    "hour-analyze": fig_hour_analyze,
    "startup": fig_startup,
    "redecode": fig_redecode,
}
