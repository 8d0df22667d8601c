"""Deletion causes confirmed by their fix.

The deletion codes (:mod:`peekalign.diagnosis`) are thresholds and an order of
precedence. Each code predicts a change that should bring its word back; with the
user's decoder in the loop the change can be tried. For every deleted word of a decode
(:class:`DecodeSetup`, the recognizer as it ran) the utterance is decoded again with
each fix (DEVELOPERS.md, "Causes confirmed by their fix"):

- ``cut-off`` -> ``full-context``: the decoder sees every frame;
- ``pruned`` -> ``wider-beam``: the search beam times :data:`BEAM_FACTOR`;
- ``weak`` -> ``blank-penalty``: the blank's log-prob lowered by ``-log(floor)`` nats
  and no token floor in the search, so a token at the diagnosis floor beats the blank;
- ``decoder-drop`` -> ``no-decoder``: decoder weight 0 (triggered decoding emits the
  CTC branch's own tokens).

The cause is **confirmed** when its fix brings the word back (correct in the word
alignment of the new hypothesis). Every fix is tried on every deleted word, so a word
that comes back only under another fix says which cause it really had. Codes without
a decoding fix (``no-spike``, ``repeat-collapsed``, ``glued``, ``overlap``: the
acoustic model or the CTC collapse) are listed as not tested.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, replace

import numpy as np

from .corpus import Table
from .diagnosis import DELETION_CODES
from .exceptions import ParameterError
from .model import Utterance

__all__ = [
    "BEAM_FACTOR",
    "CONFIRM_COLUMNS",
    "FIXES",
    "CauseCheck",
    "DecodeSetup",
    "confirm_causes",
    "confirmation_summary",
    "decode_tokens",
]

#: The fix each deletion code predicts (codes not listed have no decoding fix).
FIXES = {
    "cut-off": "full-context",
    "pruned": "wider-beam",
    "weak": "blank-penalty",
    "decoder-drop": "no-decoder",
}
#: How much wider the beam of the ``wider-beam`` fix is.
BEAM_FACTOR = 4
SETUP_MODES = ("triggered", "joint", "ctc")


@dataclass(frozen=True)
class DecodeSetup:
    """How the recognizer decoded: the setting the fixes change one at a time.

    Attributes
    ----------
    mode : {"triggered", "joint", "ctc"}
        Triggered decoding (one decoder token per CTC trigger, triggered attention
        (2019)), joint decoding (the prefix search with the decoder's score, hybrid
        CTC/attention joint decoding (2017)), or the CTC prefix search alone.
    lookahead : int or None
        Decoder look-ahead in frames (None: full context).
    beam : int
        Prefix search beam (joint and ctc modes; triggered mode with
        ``triggers="search"``).
    decoder_weight : float
        Weight of the decoder in joint mode; 0 in triggered mode emits the CTC tokens.
    blank_penalty : float
        Nats subtracted from the blank's log-prob in every frame before decoding.
    token_floor : float or None
        The search's token floor (``prefix_search(token_floor=)``).
    triggers : {"greedy", "search"}
        Trigger source in triggered mode.
    search_options : dict
        Other :func:`peekalign.search.prefix_search` options (``candidates``, ...).
    """

    mode: str = "triggered"
    lookahead: int | None = 6
    beam: int = 8
    decoder_weight: float = 1.0
    blank_penalty: float = 0.0
    token_floor: float | None = -10.0
    triggers: str = "greedy"
    search_options: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        fn = "DecodeSetup"
        if self.mode not in SETUP_MODES:
            raise ParameterError(
                f"The 'mode' parameter of {fn} must be one of {SETUP_MODES}. "
                f"Got {self.mode!r} instead."
            )
        bad_la = self.lookahead is not None and (
            isinstance(self.lookahead, bool)
            or not isinstance(self.lookahead, (int, np.integer))
            or self.lookahead < 0
        )
        if bad_la:
            raise ParameterError(
                f"The 'lookahead' parameter of {fn} must be an int >= 0 or None (full "
                f"context). Got {self.lookahead!r} instead."
            )
        if isinstance(self.beam, bool) or not isinstance(self.beam, (int, np.integer)):
            raise ParameterError(f"The 'beam' parameter of {fn} must be an int >= 1.")
        if self.beam < 1:
            raise ParameterError(
                f"The 'beam' parameter of {fn} must be an int >= 1. Got {self.beam!r} instead."
            )
        if self.triggers not in ("greedy", "search"):
            raise ParameterError(
                f"The 'triggers' parameter of {fn} must be 'greedy' or 'search'. "
                f"Got {self.triggers!r} instead."
            )
        for name in ("decoder_weight", "blank_penalty"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ParameterError(
                    f"The '{name}' parameter of {fn} must be a finite float. Got {v!r} instead."
                )

    def fixed(self, fix: str, *, floor: float = 0.05) -> DecodeSetup:
        """This setup with one fix applied (see the module notes).

        Examples
        --------
        >>> DecodeSetup(beam=2).fixed("wider-beam").beam
        8
        """
        if fix == "full-context":
            return replace(self, lookahead=None)
        if fix == "wider-beam":
            return replace(self, beam=self.beam * BEAM_FACTOR)
        if fix == "blank-penalty":
            return replace(
                self, blank_penalty=self.blank_penalty - math.log(floor), token_floor=None
            )
        if fix == "no-decoder":
            return replace(self, decoder_weight=0.0)
        raise ParameterError(f"found fix {fix!r}, expected one of {sorted(set(FIXES.values()))}")


def _search(lp, utt: Utterance, setup: DecodeSetup, udec=None, eos=None):
    from .search import prefix_search

    opts = {"candidates": 20, "prune_gap": 10.0, **setup.search_options}
    joint = udec is not None and setup.decoder_weight != 0
    return prefix_search(
        lp, blank=utt.blank, beam=int(setup.beam), token_floor=setup.token_floor,
        decoder=udec if joint else None, decoder_weight=setup.decoder_weight if joint else 0.0,
        lookahead=setup.lookahead, decoder_eos=eos if joint else None, trace=True,
        nbest=1, utt=utt.id, **opts,
    )  # fmt: skip


def decode_tokens(utt: Utterance, udec, eos: int | None, setup: DecodeSetup):
    """Decode ``utt`` as ``setup`` says: the hypothesis token ids and the traced search
    (None in triggered mode with greedy triggers).

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((3, 3), 0.05); p[:, 0] = 0.9; p[1] = [0.1, 0.05, 0.85]
    >>> u = Utterance.from_arrays(np.log(p), ref="a", vocab=v)
    >>> decode_tokens(u, None, None, DecodeSetup(mode="ctc"))[0].tolist()
    [2]
    """
    from .align import greedy_decode
    from .decoder import triggered_decode

    lp = np.asarray(utt.log_probs, dtype=np.float64)
    if setup.blank_penalty:
        lp = lp.copy()
        lp[:, utt.blank] -= setup.blank_penalty
    if setup.mode in ("joint", "ctc"):
        res = _search(lp, utt, setup, udec if setup.mode == "joint" else None, eos)
        return np.asarray(res.best.tokens, np.int32), res
    if setup.triggers == "search":
        res = _search(lp, utt, setup)
        ctc_tokens, trig = res.best.tokens, res.best.trigger_frames
    else:
        res = None
        g = greedy_decode(lp, blank=utt.blank)
        ctc_tokens, trig = g.tokens, g.first
    if setup.decoder_weight == 0 or udec is None:
        return np.asarray(ctc_tokens, np.int32), res
    out = triggered_decode(
        udec, trig, num_frames=utt.num_frames, lookaheads=[setup.lookahead], eos=eos,
        blank=utt.blank, utt=utt.id,
    )  # fmt: skip
    return out[0].tokens, res


@dataclass(frozen=True)
class CauseCheck:
    """One deleted word, its diagnosed cause and what each fix did.

    Attributes
    ----------
    utt : str
    ref_index : int
        Index of the word among the reference words.
    word : str
    code : str
        Diagnosis code of the deletion (:data:`peekalign.diagnosis.DELETION_CODES`).
    fix : str or None
        The fix the code predicts (None: no decoding fix).
    confirmed : bool or None
        The fix brought the word back (None: not tested).
    fixed_by : tuple of str
        Every fix tried that brought the word back.
    """

    utt: str
    ref_index: int
    word: str
    code: str
    fix: str | None
    confirmed: bool | None
    fixed_by: tuple = ()

    def as_row(self) -> dict:
        """Flat dict for tables (``fixed_by`` joined with commas)."""
        return {
            "id": self.utt,
            "ref_index": self.ref_index,
            "word": self.word,
            "code": self.code,
            "fix": self.fix or "",
            "confirmed": "" if self.confirmed is None else ("yes" if self.confirmed else "no"),
            "fixed_by": ",".join(self.fixed_by),
        }


def _diagnose(utt, alignment, errors, search, setup: DecodeSetup, floor, spike_threshold):
    """Deletion diagnoses of a decode with ``setup`` (reach at its look-ahead)."""
    from .diagnosis import diagnose_deletions
    from .streaming import causal_triggers, token_windows, word_reach

    words = None
    if setup.lookahead is not None:
        w = token_windows(
            causal_triggers(utt, alignment, source="greedy"),
            num_frames=utt.num_frames,
            clock=utt.clock,
            lookahead=setup.lookahead,
            encoder_lookahead=utt.encoder_ahead,
        )
        words = word_reach(utt, alignment, w)
    return diagnose_deletions(
        utt, alignment, errors, words=words, search=search, floor=floor,
        spike_threshold=spike_threshold, cut_off=setup.lookahead is not None,
    )  # fmt: skip


def confirm_causes(
    utt: Utterance,
    decoder=None,
    setup: DecodeSetup | None = None,
    *,
    floor: float = 0.05,
    spike_threshold: float = 0.5,
    fixes: Sequence[str] | None = None,
) -> list[CauseCheck]:
    """Decode ``utt``, diagnose each deleted word, and try each fix on it.

    Parameters
    ----------
    utt : Utterance
    decoder : Decoder or UtteranceDecoder, optional
        The attention decoder (None: ``setup.mode`` must be ``"ctc"``, or triggered
        decoding emits the CTC tokens).
    setup : DecodeSetup, optional
        How the recognizer decoded (default ``DecodeSetup()``).
    floor, spike_threshold : float
        Of the deletion diagnosis (:func:`peekalign.diagnosis.diagnose_deletions`).
    fixes : sequence of str, optional
        Fixes to try on every deleted word (default: all of :data:`FIXES`' values).

    Returns
    -------
    list of CauseCheck
        One per deleted word of the decode, in reference order.

    Examples
    --------
    Beam 1 keeps "a|" at every frame; "b" (0.3 against a blank of 0.7 in each of three
    frames) wins only with its paths summed, which a beam of 4 keeps:

    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((7, 4), 1e-4); p[:, 0] = 1.0
    >>> p[0, 2] = p[1, 1] = 1.0; p[0, 0] = p[1, 0] = 1e-4; p[2:5, 0] = 0.7; p[2:5, 3] = 0.3
    >>> u = Utterance.from_arrays(np.log(p / p.sum(1, keepdims=True)), ref="a b", vocab=v)
    >>> [(c.word, c.code, c.confirmed, c.fixed_by) for c in confirm_causes(
    ...     u, setup=DecodeSetup(mode="ctc", beam=1), spike_threshold=0.25)]
    [('b', 'pruned', True, ('wider-beam', 'blank-penalty'))]
    """
    from .align import align_tokens
    from .errors import align_words
    from .need import open_decoder

    setup = DecodeSetup() if setup is None else setup
    if not isinstance(setup, DecodeSetup):
        raise ParameterError(
            "The 'setup' parameter of confirm_causes must be a DecodeSetup. "
            f"Got {type(setup).__name__} instead."
        )
    fixes = tuple(dict.fromkeys(FIXES.values())) if fixes is None else tuple(fixes)
    udec = None if decoder is None else open_decoder(decoder, utt)
    eos = getattr(decoder, "eos", None)
    alignment = align_tokens(utt.log_probs, utt.ref_tokens, utt.blank, utt=utt.id)
    ref_words = [w for w, _, _ in utt.vocab.words(alignment.tokens)]

    def ops_of(setup_):
        toks, res = decode_tokens(utt, udec, eos, setup_)
        errs = align_words(ref_words, [w for w, _, _ in utt.vocab.words(toks)])
        return errs, res

    errs, res = ops_of(setup)
    diag = _diagnose(utt, alignment, errs, res, setup, floor, spike_threshold)
    if not diag:
        return []
    back = {f: ops_of(setup.fixed(f, floor=floor))[0].op_of_ref() for f in fixes}
    out = []
    for d in diag:
        fixed_by = tuple(f for f in fixes if back[f][d.ref_index] == "C")
        fix = FIXES.get(d.code)
        confirmed = None if fix is None or fix not in back else fix in fixed_by
        out.append(CauseCheck(utt.id, d.ref_index, d.word, d.code, fix, confirmed, fixed_by))
    return out


#: Columns of :func:`confirmation_summary`.
CONFIRM_COLUMNS = ("code", "fix", "deleted", "tested", "confirmed", "share", "not_confirmed")


def confirmation_summary(checks: Sequence[CauseCheck]) -> Table:
    """Per deletion code: deleted words, tested, confirmed, the share confirmed and the
    words not confirmed (``id:word`` separated by spaces, with the fixes that did bring
    each back in brackets).

    Examples
    --------
    >>> t = confirmation_summary([CauseCheck("u", 1, "b", "pruned", "wider-beam", True)])
    >>> t.records()[0]["share"]
    1.0
    """
    rows = []
    for code in DELETION_CODES:
        sel = [c for c in checks if c.code == code]
        if not sel:
            continue
        tested = [c for c in sel if c.confirmed is not None]
        conf = sum(bool(c.confirmed) for c in tested)
        miss = " ".join(
            f"{c.utt}:{c.word}" + (f"[{','.join(c.fixed_by)}]" if c.fixed_by else "")
            for c in tested
            if not c.confirmed
        )
        share = conf / len(tested) if tested else float("nan")
        rows.append((code, FIXES.get(code, ""), len(sel), len(tested), conf, share, miss))
    return Table(CONFIRM_COLUMNS, rows)
