"""What the views draw, gathered from an analysis into plain arrays (no bokeh here).

:func:`view_model` reads an :class:`~peekalign.analysis.UtteranceAnalysis` (or any
object with the same fields) once; the panels and the browser-side callbacks only read
the :class:`ViewModel`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..exceptions import ParameterError

__all__ = ["ViewModel", "view_model", "window_state", "row_windows"]

_SOURCE_NAMES = {"alignment": "forced alignment"}
_OP_NAMES = {"C": "correct", "S": "substitution", "D": "deletion", "I": "insertion"}


@dataclass(eq=False)
class ViewModel:
    """Per-utterance arrays for the views.

    Frames are encoder frames; times are seconds on the utterance's frame clock.
    ``U`` reference tokens, ``W`` reference words, ``H`` hypothesis words.
    """

    uid: str
    num_frames: int
    frame_shift_s: float
    frame_offset_s: float
    right_context_s: float
    log_probs: np.ndarray
    blank: int
    token_text: object  # id -> str
    ref: str
    hyp: str | None
    # reference tokens (U,)
    tokens: np.ndarray
    token_labels: list[str]
    first: np.ndarray
    last: np.ndarray
    spike: np.ndarray
    token_word: np.ndarray  # word index of each token, -1 for separators
    # reference words (W,)
    words: list[str]
    word_first_token: np.ndarray
    word_last_token: np.ndarray
    word_start_s: np.ndarray
    word_end_s: np.ndarray
    words_source: str
    forced_word_start_s: np.ndarray
    forced_word_end_s: np.ndarray
    word_op: list[str]  # correct / substitution / deletion per reference word
    word_diagnosis: list[str]
    word_evidence: list[str]
    # hypothesis words (H,)
    hyp_words: list[str]
    hyp_start_s: np.ndarray
    hyp_end_s: np.ndarray
    hyp_op: list[str]  # correct / substitution / insertion
    hyp_times_source: str
    # streaming windows at the chosen look-ahead
    trigger: np.ndarray
    lookahead: int
    encoder_frames: int
    look_back: int | None
    # CTC state occupancy (T, U)
    occupancy: np.ndarray | None
    # greedy spikes
    spike_frames: np.ndarray
    spike_tokens: np.ndarray
    spike_probs: np.ndarray
    # attention (L, H, U', T), its rows' token ids and the row -> reference token map
    attention: np.ndarray | None = None
    attention_tokens: np.ndarray | None = None
    attention_row_token: np.ndarray | None = None  # (U',) index u or -1
    attention_trigger: np.ndarray | None = None  # (U',) trigger frame of each row
    audio: tuple[np.ndarray, int] | None = None
    extra: dict = field(default_factory=dict)
    # hypothesis branch shown (ctc, decoder, joint, hyp, search) or None
    hyp_branch: str | None = None
    # per reference token: where its trigger came from ("CTC greedy", "oracle", ...)
    trigger_src: list | None = None
    trigger_label: str = "given frames"
    # per-frame encoder right context (T,) the windows used, None when uniform
    encoder_right_context: np.ndarray | None = None

    @property
    def U(self) -> int:
        return int(self.tokens.size)

    @property
    def W(self) -> int:
        return len(self.words)

    @property
    def duration_s(self) -> float:
        return self.frame_end(self.num_frames - 1)

    def frame_time(self, frames):
        return self.frame_offset_s + np.asarray(frames, dtype=np.float64) * self.frame_shift_s

    def frame_start(self, frames):
        return self.frame_time(frames) - self.frame_shift_s / 2

    def frame_end(self, frames):
        return self.frame_time(frames) + self.frame_shift_s / 2

    @property
    def x_start(self) -> float:
        return float(min(0.0, self.frame_start(0)))

    @property
    def x_end(self) -> float:
        end = float(self.frame_end(self.num_frames - 1))
        if self.audio is not None:
            y, sr = self.audio
            end = max(end, y.shape[0] / sr)
        if self.word_end_s.size:
            end = max(end, float(self.word_end_s.max()))
        return end


def row_windows(vm: ViewModel, trigger, lookahead: int) -> dict[str, np.ndarray]:
    """Window end and heard-until time for arbitrary trigger frames (e.g. attention rows)."""
    from ..clock import FrameClock
    from ..streaming import token_windows

    clock = FrameClock(vm.frame_shift_s, vm.frame_offset_s, vm.right_context_s)
    w = token_windows(
        np.asarray(trigger, np.int64),
        num_frames=vm.num_frames,
        clock=clock,
        lookahead=int(lookahead),
        look_back=vm.look_back,
        encoder_lookahead=_encoder_ahead(vm),
    )
    return {"start": w.start, "end": w.end, "heard_until_s": np.asarray(w.heard_until_s, float)}


def _encoder_ahead(vm: ViewModel):
    """The encoder look-ahead the view's windows take: the per-frame right context
    when the windows had one, else the uniform frames."""
    rc = getattr(vm, "encoder_right_context", None)
    return int(vm.encoder_frames) if rc is None else rc


def window_state(vm: ViewModel, lookahead: int) -> dict[str, np.ndarray]:
    """Decoder window and right context of every reference token at ``lookahead``.

    Computed by :func:`peekalign.streaming.token_windows`; the browser runs the same
    formula (``_js.py``):

    - window start ``max(0, n_u - look_back)`` (0 without a look-back limit),
    - window end ``min(T - 1, n_u + lookahead)``,
    - heard-until frame ``n_u + lookahead + L * r`` (not clamped; with a per-frame
      right context ``rc`` the largest ``j + rc[j]`` over ``j <= n_u + lookahead``),
      heard-until time
      ``clock.time(that frame) + right_context_s``; the right context is that time
      minus the trigger time,
    - reach margin of word ``w``: heard-until time of its last token minus its end.
    """
    from ..clock import FrameClock
    from ..streaming import token_windows

    if (
        isinstance(lookahead, bool)
        or not isinstance(lookahead, (int, np.integer))
        or lookahead < 0
    ):
        raise ParameterError(
            f"The 'lookahead' parameter of window_state must be an int in the range "
            f"[0, inf). Got {lookahead!r} instead."
        )
    clock = FrameClock(vm.frame_shift_s, vm.frame_offset_s, vm.right_context_s)
    w = token_windows(
        vm.trigger.astype(np.int64),
        num_frames=vm.num_frames,
        clock=clock,
        lookahead=int(lookahead),
        look_back=vm.look_back,
        encoder_lookahead=_encoder_ahead(vm),
    )
    margin = w.heard_until_s[vm.word_last_token] - vm.word_end_s if vm.W else np.zeros(0)
    return {
        "start": w.start.astype(np.int64),
        "end": w.end.astype(np.int64),
        "heard_until_frame": np.asarray(w.heard_until_frame, np.int64),
        "heard_until_s": np.asarray(w.heard_until_s, np.float64),
        "word_margin_s": margin,
    }


def _format_evidence(ev) -> str:
    """Evidence of a diagnosis as one short line (dicts become ``key value`` pairs)."""
    if ev is None:
        return ""
    if isinstance(ev, dict):
        parts = []
        for k, v in ev.items():
            if isinstance(v, (bool, np.bool_)):  # "in greedy" / "not in greedy"
                parts.append(("" if v else "not ") + str(k).replace("_", " "))
                continue
            if isinstance(v, float):
                v = f"{v:.3g}"
            elif isinstance(v, (list, tuple)):
                v = "–".join(f"{x:.3g}" if isinstance(x, float) else str(x) for x in v)
            name = str(k)
            if name.endswith("_ms"):
                parts.append(f"{name[:-3].replace('_', ' ')} {v} ms")
            elif name.endswith("_s"):
                parts.append(f"{name[:-2].replace('_', ' ')} {v} s")
            else:
                parts.append(f"{name.replace('_', ' ')} {v}")
        return ", ".join(parts)
    return str(ev)


# -- building from an analysis -------------------------------------------------------


def _arr(x, dtype=np.int64) -> np.ndarray:
    return np.asarray(x, dtype=dtype).reshape(-1)


def _get(obj, *names, default=None):
    for n in names:
        if obj is not None and hasattr(obj, n):
            v = getattr(obj, n)
            if v is not None:
                return v
    return default


def _hyp_times(utt, hyp_tokens, ops, ref_start, ref_end, hyp_words):
    """Hypothesis word times: the hypothesis force-aligned to the CTC output, or,
    when that is impossible, placed under the reference words it was matched to."""
    from ..align import align_tokens, word_runs
    from ..exceptions import PeekalignError

    H = len(hyp_words)
    if H == 0:
        return np.zeros(0), np.zeros(0), "none"
    vocab = utt.vocab
    try:
        toks = hyp_tokens
        if toks is None:
            toks = vocab.encode(" ".join(hyp_words), utt=utt.id)
        a = align_tokens(utt.log_probs, toks, utt.blank, utt=utt.id)
        spans = word_runs(a, vocab)
        if len(spans) == H:
            first = np.array([s.first for s in spans])
            last = np.array([s.last for s in spans])
            shift = utt.clock.frame_shift_s
            t0 = utt.clock.time(first) - shift / 2
            t1 = utt.clock.time(last) + shift / 2
            return (
                np.asarray(t0, float),
                np.asarray(t1, float),
                "forced alignment of the hypothesis",
            )
    except PeekalignError:  # AlignmentError, ParameterError, BundleError alike
        pass  # intended: untokenisable or too long for the frames; placed by the word alignment
    # fall back: matched words sit under their reference word, insertions in the gaps
    start = np.full(H, np.nan)
    end = np.full(H, np.nan)
    for _op, ri, hj in ops:
        if hj is not None and ri is not None and ri < ref_start.size:
            start[hj], end[hj] = ref_start[ri], ref_end[ri]
    known = np.flatnonzero(~np.isnan(start))
    for j in np.flatnonzero(np.isnan(start)):
        prev = known[known < j]
        nxt = known[known > j]
        a = end[prev[-1]] if prev.size else 0.0
        b = start[nxt[0]] if nxt.size else a + 0.3
        if b <= a:
            b = a + 0.2
        start[j], end[j] = a, b
    return start, end, "placed by the word alignment"


def view_model(analysis, *, audio: bool = True) -> ViewModel:
    """Gather what the views draw from an utterance analysis.

    Parameters
    ----------
    analysis : UtteranceAnalysis
        The result of :func:`peekalign.analysis.analyze`.
    audio : bool
        Load the audio (for the spectrogram) when the utterance has some.

    Returns
    -------
    ViewModel
    """
    utt = analysis.utt
    ali = analysis.alignment
    vocab = utt.vocab
    T = int(utt.log_probs.shape[0])
    clock = utt.clock
    tokens = _arr(ali.tokens)
    U = tokens.size

    first = _arr(ali.first)
    last = _arr(ali.last)
    words, word_first, word_last, token_word = _reference_words(vocab, tokens)
    W = len(words)
    fw_start = clock.start(first[word_first]) if W else np.zeros(0)
    fw_end = clock.end(last[word_last]) if W else np.zeros(0)

    w_start, w_end, source = _word_times(analysis, utt, W, fw_start, fw_end)
    ops, hyp_words, word_op, hyp_op, diag, evid = _word_errors(analysis, utt, W)
    branch, hyp_text, hyp_words, hyp_op, h_start, h_end, h_src = _hypothesis_times(
        analysis, utt, ops, w_start, w_end, hyp_words, hyp_op
    )
    win, trigger, lookahead, enc, look_back, rc = _window_settings(analysis, utt, first)

    soft = getattr(analysis, "soft", None)
    occ = None if soft is None else soft.dense_tokens(np.float32)

    sp = _spikes(analysis, utt)
    att, att_tokens, row_token, att_trigger = _attention_rows(analysis, utt, tokens, trigger)
    audio_data = None
    if audio and getattr(utt, "audio_path", None) is not None:
        audio_data = utt.load_audio()

    labels = [vocab.token(int(t)) for t in tokens.tolist()]
    return ViewModel(
        uid=str(utt.id),
        num_frames=T,
        frame_shift_s=float(clock.frame_shift_s),
        frame_offset_s=float(clock.frame_offset_s),
        right_context_s=float(getattr(clock, "right_context_s", 0.0)),
        log_probs=utt.log_probs,
        blank=int(utt.blank),
        token_text=vocab.token,
        ref=utt.ref,
        hyp=hyp_text,
        tokens=tokens,
        token_labels=labels,
        first=first,
        last=last,
        spike=_arr(ali.spike),
        token_word=token_word,
        words=words,
        word_first_token=word_first,
        word_last_token=word_last,
        word_start_s=np.asarray(w_start, float),
        word_end_s=np.asarray(w_end, float),
        words_source=str(source),
        forced_word_start_s=np.asarray(fw_start, float),
        forced_word_end_s=np.asarray(fw_end, float),
        word_op=word_op,
        word_diagnosis=diag,
        word_evidence=evid,
        hyp_words=hyp_words,
        hyp_start_s=np.asarray(h_start, float),
        hyp_end_s=np.asarray(h_end, float),
        hyp_op=hyp_op,
        hyp_times_source=h_src,
        trigger=trigger,
        lookahead=lookahead,
        encoder_frames=int(enc),
        look_back=None if look_back is None else int(look_back),
        occupancy=occ,
        spike_frames=np.asarray(sp.frames),
        spike_tokens=np.asarray(sp.tokens),
        spike_probs=np.asarray(sp.probs),
        attention=att,
        attention_tokens=att_tokens,
        attention_row_token=row_token,
        attention_trigger=att_trigger,
        audio=audio_data,
        hyp_branch=branch,
        trigger_src=_trigger_sources(win, U),
        trigger_label=str(getattr(win, "trigger_label", "given frames")),
        encoder_right_context=rc,
    )


def _spikes(analysis, utt):
    """Every CTC spike (``find_spikes`` with no floor), from the analysis' greedy
    path when it has one rather than a second pass over the (T, V) matrix."""
    from ..align import Spikes, find_spikes

    g = getattr(analysis, "greedy", None)
    if g is None:
        return find_spikes(utt.log_probs, blank=utt.blank, floor=0.0)
    lp = np.asarray(utt.log_probs)
    probs = np.exp(lp[g.spike, g.tokens]) if g.tokens.size else np.zeros(0)
    keep = probs >= 0.0
    return Spikes(g.spike[keep], g.tokens[keep], probs[keep].astype(np.float32))


def _reference_words(vocab, tokens: np.ndarray) -> tuple:
    """The reference's words by the vocabulary's rule: ``(words, first token, last
    token, word of each token)``."""
    groups = vocab.words(tokens)
    word_first = np.array([g[1] for g in groups], dtype=np.int64)
    word_last = np.array([g[2] for g in groups], dtype=np.int64)
    words = [g[0] for g in groups]
    token_word = np.full(tokens.size, -1, np.int64)
    for w, (_, a, b) in enumerate(groups):
        token_word[a : b + 1] = w
    return words, word_first, word_last, token_word


def _word_times(analysis, utt, W: int, fw_start, fw_end) -> tuple:
    """Reference word times and their source's name: the analysis' word reach, else
    the utterance's word times, else the forced alignment's (``fw_start``, ``fw_end``)."""
    cov = getattr(analysis, "words", None)
    w_start = _get(cov, "start_s")
    w_end = _get(cov, "end_s")
    source = _get(cov, "source", default=None)
    if w_start is not None and len(w_start) == W:
        w_start = np.asarray(w_start, float)
        w_end = np.asarray(w_end, float)
    elif utt.words is not None and len(utt.words) == W:
        w_start = np.array([w[1] for w in utt.words], float)
        w_end = np.array([w[2] for w in utt.words], float)
        source = utt.words_source or "reference"
    else:
        w_start, w_end, source = np.asarray(fw_start), np.asarray(fw_end), "forced alignment"
    if isinstance(source, str):
        source = _SOURCE_NAMES.get(source, source)
    else:
        # one source per word: name the set
        uniq = sorted({str(s) for s in np.asarray(source).tolist()})
        source = ", ".join(uniq) if uniq else "forced alignment"

    return w_start, w_end, source


def _word_errors(analysis, utt, W: int) -> tuple:
    """The word alignment's operations, the hypothesis words, each reference and
    hypothesis word's operation name, and each reference word's diagnosis and evidence:
    ``(ops, hyp_words, word_op, hyp_op, diagnosis, evidence)``."""
    err = getattr(analysis, "errors", None)
    ops = list(getattr(err, "ops", []) or [])
    hyp_words = list(
        getattr(err, "hyp", ()) or getattr(analysis, "hyp_words", None) or (utt.hyp or "").split()
    )
    word_op = ["correct"] * W
    hyp_op = ["correct"] * len(hyp_words)
    for op, ri, hj in ops:
        name = _OP_NAMES.get(op, op)
        if ri is not None and ri < W:
            word_op[ri] = name
        if hj is not None and hj < len(hyp_words):
            hyp_op[hj] = name
    diag = [""] * W
    evid = [""] * W
    for row in getattr(analysis, "diagnoses", None) or []:
        wi = _get(row, "ref_index", "word_index", "index")
        if wi is None and isinstance(row, dict):
            wi = row.get("ref_index", row.get("word_index"))
        if isinstance(row, dict):
            code, ev = row.get("code", ""), row.get("evidence", "")
        else:
            code, ev = _get(row, "code", default=""), _get(row, "evidence", default="")
        if wi is not None and 0 <= int(wi) < W:
            diag[int(wi)] = str(code)
            evid[int(wi)] = _format_evidence(ev)

    return ops, hyp_words, word_op, hyp_op, diag, evid


def _hypothesis_times(analysis, utt, ops, w_start, w_end, hyp_words, hyp_op) -> tuple:
    """The hypothesis branch shown, its text, and its words' times:
    ``(branch, hyp_text, hyp_words, hyp_op, start, end, source)``."""
    branch = getattr(analysis, "branch", None) or utt.system_branch
    hyp_text = utt.hyps.get(branch, utt.hyp) if branch else utt.hyp
    if hyp_words:
        search = getattr(analysis, "search", None)
        h_tokens = utt.hyps_tokens.get(branch) if branch in utt.hyps else utt.hyp_tokens
        if h_tokens is None and hyp_text is None and search is not None:
            h_tokens = getattr(getattr(search, "best", None), "tokens", None)
        known = getattr(analysis, "hyp_word_times", None)
        if known is not None and len(known) == len(hyp_words):
            # the analysis aligned this hypothesis already (for the word errors)
            known = np.asarray(known, float)
            h_start, h_end = known[:, 0], known[:, 1]
            h_src = "forced alignment of the hypothesis"
        else:
            h_start, h_end, h_src = _hyp_times(utt, h_tokens, ops, w_start, w_end, hyp_words)
    else:
        hyp_words, hyp_op = [], []
        h_start, h_end, h_src = np.zeros(0), np.zeros(0), "none"

    return branch, hyp_text, hyp_words, hyp_op, h_start, h_end, h_src


def _window_settings(analysis, utt, first) -> tuple:
    """The decoder windows' settings: ``(windows, trigger frames, look-ahead, encoder
    frames, look-back, per-frame right context or None)``; triggers default to the
    tokens' first frames, the right context to the utterance's."""
    win = getattr(analysis, "windows", None)
    trigger = _arr(_get(win, "trigger", default=first))
    lookahead = int(_get(analysis, "lookahead", default=_get(win, "lookahead", default=0)) or 0)
    enc = _get(win, "encoder_frames", default=None)
    if enc is None:
        el = utt.encoder_lookahead
        enc = el[0] * el[1] if el else 0
    look_back = _get(win, "look_back", default=_get(analysis, "look_back"))
    if win is None:
        rc = getattr(utt, "encoder_right_context", None)
    else:
        rc = getattr(win, "encoder_right_context", None)
    if rc is not None:
        rc = np.asarray(rc, dtype=np.int64)
    return win, trigger, lookahead, enc, look_back, rc


def _attention_rows(analysis, utt, tokens, trigger) -> tuple:
    """The attention, its rows' token ids, the reference token of each row (-1: none)
    and each row's trigger frame (-1: cannot be placed in time)."""
    U = tokens.size
    att = utt.attention
    att_tokens = None if utt.attention_tokens is None else _arr(utt.attention_tokens)
    row_token = att_trigger = None
    if att is not None:
        Up = att.shape[2]
        same = att_tokens is None or (att_tokens.size == U and np.array_equal(att_tokens, tokens))
        row_token = np.arange(U) if (same and Up == U) else np.full(Up, -1)
        aw = getattr(analysis, "attention_windows", None)
        if aw is not None and len(_arr(aw.trigger)) == Up:
            att_trigger = _arr(aw.trigger)
        elif same and Up == U:
            att_trigger = trigger.copy()
        else:
            # rows that cannot be placed in time get no window edge
            att_trigger = np.full(Up, -1)
    return att, att_tokens, row_token, att_trigger


def _trigger_sources(win, U: int) -> list[str]:
    """Per token, the name of its trigger's source (oracle ones say so)."""
    from ..streaming import _SOURCE_LABELS

    src = getattr(win, "trigger_source", None)
    oracle = getattr(win, "oracle", None)
    if src is None or oracle is None or len(oracle) != U:
        return ["given"] * U
    name = _SOURCE_LABELS[src]
    return ["oracle" if o else name for o in np.asarray(oracle).tolist()]
