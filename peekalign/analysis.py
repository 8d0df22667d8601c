"""One call that runs every analysis of an utterance: :func:`analyze`.

Views, the peek widget, the corpus scan and the report read :class:`UtteranceAnalysis`;
a notebook user gets the same object::

    from peekalign import analyze, open_bundle
    a = analyze(open_bundle("bundle")["utt-1"], lookahead=6)
    a.summary(), a.word_table()[:3]
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .align import Alignment, Greedy, StateOccupancy, align_tokens, forward_backward, greedy_decode
from .diagnosis import DELETION_CODES, Diagnosis, diagnose_deletions
from .errors import (
    EmissionDelay,
    ErrorAlignment,
    align_words,
    align_words_timed,
    emission_delay,
)
from .exceptions import ParameterError, PeekalignError
from .model import BRANCHES, LEGACY_BRANCH, Utterance
from .streaming import (
    _RULES,
    TRIGGER_SOURCES,
    Consistency,
    CutMass,
    Windows,
    WordReach,
    _as_int,
    _check_float,
    _check_int,
    attention_windows,
    causal_triggers,
    cut_mass_and_consistency,
    token_windows,
    word_reach,
)

__all__ = ["SCORED_BRANCHES", "UtteranceAnalysis", "analyze"]

#: Branches scored side by side (``wer_<branch>`` in summaries): the three of a
#: bundle's ``hyps`` and the legacy single ``hyp`` of unstated branch.
SCORED_BRANCHES = (*BRANCHES, LEGACY_BRANCH)


@dataclass(eq=False)
class UtteranceAnalysis:
    """Everything peekalign computes for one utterance.

    Attributes
    ----------
    utt : Utterance
    alignment : Alignment
        CTC forced alignment of the reference tokens.
    soft : StateOccupancy or None
        Forward-backward occupancy of the reference tokens (``soft=True``).
    greedy : Greedy
        Best-path decoding of the log-probs.
    windows : Windows
        Decoder windows and right contexts of the reference tokens; ``windows.oracle``
        marks the tokens whose trigger is an oracle one, ``windows.trigger_label`` says
        where the triggers came from.
    words : WordReach
        Reference words with times (and their source), heard-until time and reach margin.
    cut_mass : CutMass or None
        Attention mass outside the windows of the attention rows (when there is
        attention); rows follow ``utt.attention_tokens``.
    consistency : Consistency or None
        The same attention checked against those windows (meaningful for attention
        dumped from a streaming run).
    errors : ErrorAlignment or None
        Reference words against the hypothesis words (None without a hypothesis).
    diagnoses : list of Diagnosis
        One per deleted reference word.
    lookahead : int
    trigger_rule : str
    look_back : int or None
    attention_windows : Windows or None
        Windows of the attention rows' tokens (forced alignment of
        ``utt.attention_tokens``; the reference windows when the tokens are the same).
    attention_alignment : Alignment or None
    search : SearchResult or None
        The traced prefix search, when asked for.
    hyp_words : tuple of str or None
    hyp_source : {"utterance", "search"} or None
        Where the hypothesis came from: the utterance's own hypotheses, else the best
        hypothesis of the search.
    branch : str or None
        The branch whose hypothesis ``errors`` and the diagnoses use (``"ctc"``,
        ``"decoder"``, ``"joint"``, ``"hyp"`` for a legacy hypothesis of unstated
        branch, ``"search"`` for the search's best).
    branch_errors : dict of str to ErrorAlignment
        Reference words against every branch the utterance carries.
    hyp_word_times : ndarray, shape (W_hyp, 2), or None
        Start and end (s) of the words of ``errors``' hypothesis from a forced
        alignment of its tokens to the frames (the times the word alignment used);
        None when it could not be aligned or the unit-cost alignment was used.
    emission : EmissionDelay
        Per reference word: spike time of its last token minus its start and end;
        NaN (with ``emission.reason``) unless the words have reference times.
    notes : list of str
        Parts that were skipped and why (e.g. attention tokens that cannot be aligned).
    """

    utt: Utterance
    alignment: Alignment
    soft: StateOccupancy | None
    greedy: Greedy
    windows: Windows
    words: WordReach
    cut_mass: CutMass | None
    consistency: Consistency | None
    errors: ErrorAlignment | None
    diagnoses: list
    lookahead: int
    trigger_rule: str
    look_back: int | None = None
    attention_windows: Windows | None = None
    attention_alignment: Alignment | None = None
    search: object | None = None
    hyp_words: tuple | None = None
    hyp_source: str | None = None
    emission: EmissionDelay | None = None
    notes: list = field(default_factory=list)
    branch: str | None = None
    branch_errors: dict = field(default_factory=dict)
    hyp_word_times: np.ndarray | None = None

    def diagnosis_of(self, ref_index: int) -> Diagnosis | None:
        """Diagnosis of reference word ``ref_index`` (None if it was not deleted)."""
        for d in self.diagnoses:
            if d.ref_index == ref_index:
                return d
        return None

    def word_table(self) -> list[dict]:
        """One row per reference word.

        Keys: ``index, word, first_token, last_token, first_frame, last_frame,
        start_s, end_s, source, trigger_frame, window_end, heard_until_s, margin_s,
        reached, spike_frame, spike_s, emission_delay_s`` (spike time of the last token
        minus the word's reference end; NaN without reference word times), ``confidence`` (smallest per-token forward-backward
        confidence; NaN without ``soft``), ``op`` (C/S/D, "" without a hypothesis),
        ``hyp_word``, ``code`` (deletion code or ""), ``alignment`` (how words were
        paired: ``"time"`` or ``"unit"``, "" without a hypothesis) and
        ``trigger_source`` (the source of the last token's trigger: ``"greedy"``,
        ``"search"``, or ``"oracle"`` for a forced-alignment trigger).
        """
        w = self.words
        a = self.alignment
        clock = self.utt.clock
        ops = self.errors.op_of_ref() if self.errors is not None else [""] * len(w)
        hyp_of = self.errors.hyp_index_of_ref() if self.errors is not None else None
        conf = self.soft.confidence() if self.soft is not None else None
        codes = {d.ref_index: d.code for d in self.diagnoses}
        src = self.windows.trigger_source or "oracle"
        oracle = self.windows.oracle
        rows = []
        for i, word in enumerate(w.words):
            u1 = int(w.last_token[i])
            u0 = int(w.first_token[i])
            spike = int(a.spike[u1])
            h = -1 if hyp_of is None else int(hyp_of[i])
            rows.append(
                {
                    "index": i,
                    "word": word,
                    "first_token": u0,
                    "last_token": u1,
                    "first_frame": int(w.first_frame[i]),
                    "last_frame": int(w.last_frame[i]),
                    "start_s": float(w.start_s[i]),
                    "end_s": float(w.end_s[i]),
                    "source": w.source,
                    "trigger_frame": int(self.windows.trigger[u1]),
                    "window_end": int(self.windows.end[u1]),
                    "heard_until_s": float(w.heard_until_s[i]),
                    "margin_s": float(w.margin_s[i]),
                    "reached": bool(w.reached[i]),
                    "spike_frame": spike,
                    "spike_s": float(clock.time(spike)),
                    "emission_delay_s": float(self.emission.after_end[i]),
                    "confidence": float(conf[u0 : u1 + 1].min()) if conf is not None else np.nan,
                    "op": ops[i],
                    "hyp_word": self.hyp_words[h] if h >= 0 and self.hyp_words else "",
                    "code": codes.get(i, ""),
                    "alignment": getattr(self.errors, "method", "") if self.errors else "",
                    "trigger_source": "oracle"
                    if oracle is None or oracle[u1] or src == "oracle"
                    else src,
                }
            )
        return rows

    def summary(self) -> dict:
        """One flat dict for corpus tables.

        Keys: ``id, duration_s, frames, n_words, words_source, lookahead, reach,
        branch, wer, S, D, I`` (None without a hypothesis; of ``branch``),
        ``wer_<b>`` and ``errors_<b>`` for every ``b`` of :data:`SCORED_BRANCHES`
        (NaN / None when the utterance lacks it), ``del_<code>`` for every deletion code,
        ``worst_margin_s, median_emission_delay_s, mean_cut_mass`` (NaN without
        attention), ``window_ok`` (None without attention), ``score_per_frame``,
        ``triggers`` (source of the trigger frames) and ``oracle_triggers`` (words
        whose last token's trigger is an oracle one).
        """
        e = self.errors
        w = self.words
        out = {
            "id": self.utt.id,
            "duration_s": round(self.utt.duration_s, 6),
            "frames": self.utt.num_frames,
            "n_words": len(w),
            "words_source": w.source,
            "lookahead": self.lookahead,
            "reach": w.reach,
            "branch": self.branch,
            "wer": e.wer if e is not None else np.nan,
            "S": e.S if e is not None else None,
            "D": e.D if e is not None else None,
            "I": e.I if e is not None else None,
        }
        for b in SCORED_BRANCHES:
            be = self.branch_errors.get(b)
            out[f"wer_{b}"] = be.wer if be is not None else np.nan
            out[f"errors_{b}"] = be.errors if be is not None else None
        for code in DELETION_CODES:
            out[f"del_{code}"] = sum(1 for d in self.diagnoses if d.code == code)
        out["worst_margin_s"] = float(w.margin_s.min()) if len(w) else np.nan
        out["median_emission_delay_s"] = self.emission.median()
        cm = self.cut_mass
        out["mean_cut_mass"] = (
            float(np.nanmean(cm.mean)) if cm is not None and np.isfinite(cm.mean).any() else np.nan
        )
        out["window_ok"] = None if self.consistency is None else self.consistency.ok
        out["score_per_frame"] = self.alignment.score / max(self.utt.num_frames, 1)
        win = self.windows
        out["triggers"] = win.trigger_source or "oracle"
        oracle = win.oracle if win.oracle is not None else np.ones(len(win), bool)
        out["oracle_triggers"] = int(np.count_nonzero(oracle[w.last_token])) if len(w) else 0
        return out

    def __repr__(self) -> str:
        s = self.summary()
        wer = "-" if self.errors is None else f"{s['wer']:.3f} ({self.branch})"
        return (
            f"UtteranceAnalysis({self.utt.id!r}, words={s['n_words']}, "
            f"lookahead={self.lookahead}, reach={s['reach']:.3f}, wer={wer}, "
            f"deletions={len(self.diagnoses)})"
        )


#: Why the emission delay is left empty without reference word times.
NO_DELAY_REASON = (
    "the word times come from a forced alignment of the same posteriors, which puts "
    "each word where its spike is, so the delay would be about 0 by construction; give "
    'reference word times ("words" in utts.jsonl) to measure it'
)


def _emission(utt: Utterance, alignment: Alignment, words: WordReach) -> EmissionDelay:
    """Spike time of each word's last token minus the word's reference times.

    Only against word times independent of the posteriors (DEVELOPERS.md, "Emission
    delay"): without them the delay is NaN and ``reason`` says why.
    """
    if words.source != "reference":
        return EmissionDelay.unmeasured(len(words), NO_DELAY_REASON)
    emit = utt.clock.time(alignment.spike[words.last_token]) if len(words) else np.zeros(0)
    return emission_delay(np.stack([words.start_s, words.end_s], axis=1), emit)


def _text_words(text: str, vocab) -> tuple[str, ...]:
    """Hypothesis text as words, lower-cased like the vocabulary tokenises text."""
    if not any(t != t.lower() for t in vocab.tokens):
        text = text.lower()
    return tuple(text.split())


_WORD_ALIGNMENTS = ("auto", "time", "unit")


def _hyp_word_times(utt, hyp_words, tokens) -> np.ndarray | None:
    """(W, 2) start/end seconds of the hypothesis words from a forced alignment of
    the hypothesis tokens (``tokens``, else the tokenised words) to the utterance's
    frames; None when that cannot be had."""
    if tokens is None:
        try:
            tokens = utt.vocab.encode(" ".join(hyp_words), utt=utt.id)
        except PeekalignError:
            return None
    tokens = np.asarray(tokens)
    try:
        hyp_al = align_tokens(utt.log_probs, tokens, utt.blank, utt=utt.id)
    except PeekalignError:
        return None
    spans = utt.vocab.words(hyp_al.tokens)
    if [w for w, _, _ in spans] != list(hyp_words):
        return None
    # frame edges, as the forced-alignment times of the reference words
    first = utt.clock.start(np.array([hyp_al.first[u0] for _, u0, _ in spans], np.int64))
    last = utt.clock.end(np.array([hyp_al.last[u1] for _, _, u1 in spans], np.int64))
    return np.stack([first, last], axis=1).reshape(-1, 2)


def _word_errors(utt, words, hyp_words, tokens, how: str, notes: list) -> tuple:
    """Word alignment of the reference and the hypothesis (token ids ``tokens`` when
    known): time-mediated when the hypothesis word times can be had (and ``how``
    allows), else unit cost. Returns ``(ErrorAlignment, hypothesis word times or
    None)``."""
    if how != "unit" and len(words):
        ht = _hyp_word_times(utt, hyp_words, tokens)
        if ht is not None:
            rt = np.stack([words.start_s, words.end_s], axis=1)
            return align_words_timed(list(words.words), list(hyp_words), rt, ht), ht
        if how == "time":
            notes.append(
                "word errors use the unit-cost alignment: the hypothesis could not be "
                "aligned to the frames, so its word times are unknown"
            )
    return align_words(list(words.words), list(hyp_words)), None


def _branch_words(utt: Utterance, branch: str) -> tuple[str, ...]:
    """A branch's hypothesis as words: from its token ids when given, else its text."""
    _, text, toks = utt.hypothesis(branch)
    if toks is not None:
        return tuple(w for w, _, _ in utt.vocab.words(toks))
    return _text_words(text, utt.vocab)


def _search_options(search, lookahead: int) -> dict | None:
    if search is False or search is None:
        return None
    if search is True:
        opts = {}
    elif isinstance(search, dict):
        opts = dict(search)
    else:
        raise ParameterError(
            "The 'search' parameter of analyze must be a bool or a dict of prefix_search "
            f"options. Got {type(search).__name__} instead."
        )
    for k in ("log_probs", "trace", "utt", "blank"):
        if k in opts:
            raise ParameterError(
                f"The 'search' parameter of analyze must not set {k!r} (analyze passes "
                f"the utterance's own). Got {k}={opts[k]!r} instead."
            )
    if opts.get("decoder") is not None:
        opts.setdefault("lookahead", lookahead)
    return opts


def analyze(
    utt: Utterance,
    *,
    lookahead: int | None = None,
    look_back: int | None = None,
    trigger_rule: str = "first",
    encoder_lookahead=None,
    floor: float = 0.05,
    spike_threshold: float = 0.5,
    search=False,
    soft: bool = True,
    word_alignment: str = "auto",
    branch: str | None = None,
    triggers: str = "greedy",
) -> UtteranceAnalysis:
    """Run the analyses of one utterance.

    Forced alignment of the reference, forward-backward occupancy, greedy decoding,
    trigger windows and right contexts, word reach, cut attention mass and window
    consistency (when the utterance has attention), word errors (when it has a
    hypothesis, or a search was asked for), emission delay and the deletion
    diagnosis.

    Parameters
    ----------
    utt : Utterance
    lookahead : int, optional
        Decoder look-ahead in frames; default ``utt.decoder_lookahead`` or 0.
    look_back : int, optional
        Decoder look-back in frames (None: full history).
    trigger_rule : {"first", "spike"}
    encoder_lookahead : int or (layers, per_layer), optional
        Default ``utt.encoder_ahead`` (the per-frame right context when the bundle has
        one, else its layers and per-layer look-ahead).
    floor, spike_threshold : float
        Posterior floors of the deletion diagnosis (spike exists / clear spike).
    search : bool or dict
        Run the traced prefix search (:func:`peekalign.search.prefix_search`); a dict
        gives its options (e.g. ``{"beam": 8}``). Its best hypothesis is used when the
        utterance has none, and its trace feeds the ``pruned`` code.
    soft : bool
        Compute the forward-backward occupancy.
    word_alignment : {"auto", "time", "unit"}
        How reference and hypothesis words are paired. ``"time"``: time-mediated
        (:func:`peekalign.errors.align_words_timed`), with the reference word times of
        the forced alignment and hypothesis word times from a forced alignment of the
        hypothesis tokens to the same frames; ``"unit"``: unit-cost Levenshtein.
        ``"auto"`` (default) uses time whenever the hypothesis can be aligned to the
        frames. ``errors.method`` says which was used.
    branch : str, optional
        Hypothesis branch the word errors and the diagnoses run against (``"ctc"``,
        ``"decoder"``, ``"joint"`` or ``"hyp"``); default the system's output,
        ``utt.system_branch``. Every branch the utterance has is scored anyway
        (``branch_errors``).
    triggers : {"greedy", "search", "oracle"}
        Source of the trigger frames of the windows, reach margins, cut attention
        mass and ``cut-off`` diagnoses (:func:`peekalign.streaming.causal_triggers`):
        the CTC greedy path (default) or the traced prefix search (needs ``search``),
        both causal, with reference tokens they never emitted falling back to the
        forced alignment (marked oracle); or ``"oracle"``, the forced alignment of
        the whole reference (DEVELOPERS.md, "Causal triggers").

    Returns
    -------
    UtteranceAnalysis

    Notes
    -----
    ``cut-off`` is diagnosed only when a streaming set-up is known: a ``lookahead`` or
    ``encoder_lookahead`` passed here or given by the bundle. Attention rows are
    matched to windows through a forced alignment of ``utt.attention_tokens``; when
    that fails (the tokens do not fit the frames) the attention parts are None and
    ``notes`` says why.

    Examples
    --------
    >>> import numpy as np
    >>> from peekalign import Utterance, Vocabulary, WordBoundary
    >>> v = Vocabulary(["-", "|", "a", "b"], boundary=WordBoundary("separator", "|"))
    >>> p = np.full((10, 4), 0.01); p[:, 0] = 0.97
    >>> p[2] = [0.04, 0.01, 0.94, 0.01]; p[5] = [0.04, 0.94, 0.01, 0.01]
    >>> p[7] = [0.04, 0.01, 0.01, 0.94]
    >>> u = Utterance.from_arrays(np.log(p), ref="a b", vocab=v, hyp="a")
    >>> a = analyze(u, lookahead=2)
    >>> a.summary()["D"], [d.code for d in a.diagnoses]
    (1, ['decoder-drop'])
    """
    checked = _check_analyze_options(
        utt, lookahead, encoder_lookahead, trigger_rule, word_alignment, triggers, search,
        floor, spike_threshold,
    )  # fmt: skip
    streaming_known, lookahead, encoder_lookahead, floor, spike_threshold, opts = checked

    lp = utt.log_probs
    alignment = align_tokens(lp, utt.ref_tokens, utt.blank, utt=utt.id)
    sa = forward_backward(lp, utt.ref_tokens, utt.blank, utt=utt.id) if soft else None
    greedy = greedy_decode(lp, blank=utt.blank)
    result = None
    if opts is not None:
        from .search import prefix_search

        result = prefix_search(lp, blank=utt.blank, trace=True, utt=utt.id, **opts)
    stream = dict(source=triggers, rule=trigger_rule, greedy=greedy, search=result)
    windows = token_windows(
        causal_triggers(utt, alignment, **stream),
        num_frames=utt.num_frames,
        clock=utt.clock,
        lookahead=lookahead,
        look_back=look_back,
        encoder_lookahead=encoder_lookahead,
    )
    words = word_reach(utt, alignment, windows)
    notes: list[str] = []
    if words.source_note:
        notes.append(words.source_note)
    aw, aa, cm, cons = _attention_parts(
        utt, windows, trigger_rule, alignment, greedy, result, notes
    )
    branch_errors, branch, hyp_words, hyp_source, errors, hyp_times = _hypothesis_errors(
        utt, words, branch, result, word_alignment, notes
    )
    diagnoses = None
    if hyp_words is not None:
        diagnoses = diagnose_deletions(
            utt,
            alignment,
            errors,
            words=words,
            search=result,
            floor=floor,
            spike_threshold=spike_threshold,
            cut_off=streaming_known,
        )
    emission = _emission(utt, alignment, words)
    if emission.reason:
        notes.append(f"emission delay not measured: {emission.reason}")
    return UtteranceAnalysis(
        utt=utt,
        alignment=alignment,
        soft=sa,
        greedy=greedy,
        windows=windows,
        words=words,
        cut_mass=cm,
        consistency=cons,
        errors=errors,
        diagnoses=diagnoses or [],
        lookahead=lookahead,
        trigger_rule=trigger_rule,
        look_back=look_back,
        attention_windows=aw,
        attention_alignment=aa,
        search=result,
        hyp_words=hyp_words,
        hyp_source=hyp_source,
        emission=emission,
        notes=notes,
        branch=branch,
        branch_errors=branch_errors,
        hyp_word_times=hyp_times,
    )


def _check_analyze_options(
    utt, lookahead, encoder_lookahead, trigger_rule, word_alignment, triggers, search, floor,
    spike_threshold,
) -> tuple:  # fmt: skip
    """Check :func:`analyze`'s options and fill in the utterance's defaults.

    Returns ``(streaming_known, lookahead, encoder_lookahead, floor, spike_threshold,
    search_options)``; ``streaming_known`` says whether a look-ahead was given here or
    by the bundle (``cut-off`` is diagnosed only then).
    """
    fn = "analyze"
    if not isinstance(utt, Utterance):
        raise ParameterError(
            f"The 'utt' parameter of {fn} must be an Utterance. Got {type(utt).__name__} "
            "instead; use bundle[utt_id] or Utterance.from_arrays."
        )
    streaming_known = any(
        x is not None
        for x in (lookahead, encoder_lookahead, utt.decoder_lookahead, utt.encoder_lookahead)
    )
    if lookahead is None:
        lookahead = utt.decoder_lookahead or 0
    lookahead = _check_int("lookahead", _as_int(lookahead), fn)
    if encoder_lookahead is None:
        encoder_lookahead = utt.encoder_ahead
    if trigger_rule not in _RULES:
        raise ParameterError(
            f"The 'trigger_rule' parameter of {fn} must be one of {_RULES}. "
            f"Got {trigger_rule!r} instead."
        )
    if word_alignment not in _WORD_ALIGNMENTS:
        raise ParameterError(
            f"The 'word_alignment' parameter of {fn} must be one of {_WORD_ALIGNMENTS}. "
            f"Got {word_alignment!r} instead."
        )
    if triggers not in TRIGGER_SOURCES:
        raise ParameterError(
            f"The 'triggers' parameter of {fn} must be one of {TRIGGER_SOURCES}. "
            f"Got {triggers!r} instead."
        )
    if triggers == "search" and not search:
        raise ParameterError(
            f"The 'triggers' parameter of {fn} is 'search' but no search was asked for; "
            "pass search=True (or a dict of its options) too."
        )
    floor = _check_float("floor", floor, fn)
    spike_threshold = _check_float("spike_threshold", spike_threshold, fn)
    opts = _search_options(search, lookahead)
    return streaming_known, lookahead, encoder_lookahead, floor, spike_threshold, opts


def _attention_parts(utt, windows, trigger_rule, alignment, greedy, result, notes) -> tuple:
    """Attention windows, their alignment, cut mass and window consistency.

    All None when the utterance has no attention, or (with a note) when its attention
    rows cannot be matched to windows.
    """
    if utt.attention is None:
        return None, None, None, None
    try:
        aw, aa = attention_windows(
            utt,
            windows,
            trigger_rule=trigger_rule,
            alignment=alignment,
            greedy=greedy,
            search=result,
        )
        # one pass over the attention, summed in float64 without a float64 copy
        return aw, aa, *cut_mass_and_consistency(utt.attention, aw)
    except PeekalignError as exc:
        notes.append(f"attention not analysed: {exc}")
        return None, None, None, None


def _hypothesis_errors(utt, words, branch, result, word_alignment, notes) -> tuple:
    """Word errors of every branch, and of the hypothesis the analysis runs against.

    Returns ``(branch_errors, branch, hyp_words, hyp_source, errors, hyp_times)``: the
    hypothesis is the branch asked for (default the system's output), else the search's
    best (``branch`` and ``hyp_source`` ``"search"``), else none (all four None);
    ``hyp_times`` are its words' times when it could be aligned to the frames.
    """
    branch_errors = {}
    times = {}
    for b in utt.hyps:
        # the picked branch's notes are the analysis'; the others' would repeat them
        said = notes if b == (branch or utt.system_branch) else []
        b_words = _branch_words(utt, b)
        toks = utt.hyps_tokens.get(b)
        branch_errors[b], times[b] = _word_errors(utt, words, b_words, toks, word_alignment, said)
    hyp_words = hyp_source = None
    if utt.hyps or branch is not None:
        branch, _, _ = utt.hypothesis(branch)  # a branch it lacks: a clear error
        hyp_words = _branch_words(utt, branch)
        hyp_source = "utterance"
    elif result is not None:
        hyp_words = tuple(w for w, _, _ in utt.vocab.words(result.best.tokens))
        hyp_source = branch = "search"
    errors = hyp_times = None
    if hyp_words is not None:
        errors, hyp_times = branch_errors.get(branch), times.get(branch)
        if errors is None:  # the search's best hypothesis
            toks = result.best.tokens
            errors, hyp_times = _word_errors(utt, words, hyp_words, toks, word_alignment, notes)
    return branch_errors, branch, hyp_words, hyp_source, errors, hyp_times
