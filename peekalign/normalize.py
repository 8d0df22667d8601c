"""Clean scoring: text normalisation, GLM alternates, MER and word-boundary errors.

Before two systems are compared, both sides of every pair go through the same
steps, in this order:

1. :func:`normalize_text`: case folded, punctuation dropped (apostrophes inside a
   word kept, hyphens between words become spaces), digit strings spelt out.
2. A filter file in the NIST GLM format (:func:`read_glm`, :func:`apply_glm`): rules
   ``LHS => RHS / [ ] __ [ ]``, where ``RHS`` may be an alternation
   ``{ oh / zero }`` and ``@`` stands for "nothing". The text is read once from left
   to right; at each word the first rule in file order whose left side matches is
   used, and its output is not read again (what sctk's ``rfilter1`` does).
3. The alignment (:func:`align_alternates`) takes, for every alternation on either
   side, the alternative that costs least; the reference words counted are those
   of the chosen alternatives.

:func:`score` runs both the raw and the clean scoring and says how many errors the
clean-up removed. Beside WER it gives the match error rate (MER, Morris et al.,
2004: ``(S + D + I) / (C + S + D + I)``) and the character error rate, and it
counts word-boundary (spacing) errors apart: "at dunmere" recognised as
"atdunmere" (a merge) or "tramstop" as "tram stop" (a split).
"""

from __future__ import annotations

import os
import re
import unicodedata
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from .errors import ErrorAlignment, ErrorTotals, align_chars, align_words
from .exceptions import ParameterError, describe
from .io._text import read_option_file

__all__ = [
    "GlmRule",
    "BoundaryError",
    "UtteranceScore",
    "ScoreReport",
    "normalize_text",
    "spell_number",
    "read_glm",
    "apply_glm",
    "align_alternates",
    "boundary_errors",
    "mer",
    "score",
]

_ONES = (
    "zero one two three four five six seven eight nine ten eleven twelve thirteen "
    "fourteen fifteen sixteen seventeen eighteen nineteen"
).split()
_TENS = "_ _ twenty thirty forty fifty sixty seventy eighty ninety".split()
_SCALES = ((10**12, "trillion"), (10**9, "billion"), (10**6, "million"), (1000, "thousand"))
_NUMBER = re.compile(r"^(\d{1,3}(?:,\d{3})+|\d+)(?:\.(\d+))?$")


def _below_thousand(n: int) -> list[str]:
    """Words of ``0 < n < 1000``."""
    out: list[str] = []
    if n >= 100:
        out += [_ONES[n // 100], "hundred"]
        n %= 100
    if n >= 20:
        out.append(_TENS[n // 10])
        n %= 10
    if n:
        out.append(_ONES[n])
    return out


def spell_number(token: str) -> str:
    """Spell a digit string in English words; other tokens come back unchanged.

    Integers (with or without thousands commas) are read as cardinals; a decimal
    part is read digit by digit after "point"; a leading zero ("007") makes the
    whole integer read digit by digit, as call signs and codes are spoken.

    Examples
    --------
    >>> spell_number("42")
    'forty two'
    >>> spell_number("1,905")
    'one thousand nine hundred five'
    >>> spell_number("3.25")
    'three point two five'
    >>> spell_number("07")
    'zero seven'
    >>> spell_number("depot")
    'depot'
    """
    m = _NUMBER.match(token)
    if m is None:
        return token
    digits = m.group(1).replace(",", "")
    if len(digits) > 1 and digits[0] == "0" or int(digits) >= 10**15:
        words = [_ONES[int(c)] for c in digits]
    else:
        n = int(digits)
        words = [] if n else ["zero"]
        for size, name in _SCALES:
            if n >= size:
                words += _below_thousand(n // size) + [name]
                n %= size
        words += _below_thousand(n)
    if m.group(2):
        words += ["point"] + [_ONES[int(c)] for c in m.group(2)]
    return " ".join(words)


def _strip_punctuation(text: str) -> str:
    """Drop punctuation; keep apostrophes inside words, make inner hyphens spaces."""
    out = []
    n = len(text)
    for k, ch in enumerate(text):
        if not unicodedata.category(ch).startswith("P"):
            out.append(ch)
            continue
        inside = 0 < k < n - 1 and text[k - 1].isalnum() and text[k + 1].isalnum()
        if ch in "'\u2019" and inside:
            out.append("'")
        elif ch in "-\u2010\u2011" and inside:
            out.append(" ")
        elif ch in ".," and inside and text[k - 1].isdigit() and text[k + 1].isdigit():
            out.append(ch)  # 3.25 and 1,905 stay numbers
        else:
            out.append(" ")
    return "".join(out)


def normalize_text(
    text: str, *, case: bool = True, punctuation: bool = True, numbers: bool = True
) -> str:
    """Normalise one transcript before scoring.

    Parameters
    ----------
    text : str
    case : bool
        Fold case (``str.casefold``).
    punctuation : bool
        Drop punctuation. An apostrophe between two letters stays ("you're"); a
        hyphen between two letters or digits becomes a space ("tram-stop" ->
        "tram stop").
    numbers : bool
        Spell digit strings out with :func:`spell_number`.

    Returns
    -------
    str
        Words separated by single spaces.

    Examples
    --------
    >>> normalize_text("Tram 42, you're clear to the Depot-Yard.")
    "tram forty two you're clear to the depot yard"
    """
    if case:
        text = text.casefold()
    if punctuation:
        text = _strip_punctuation(text)
    words = text.split()
    if numbers:
        words = [spell_number(w) for w in words]
    return " ".join(words)


@dataclass(frozen=True)
class GlmRule:
    """One rule of a GLM filter file.

    Attributes
    ----------
    lhs : tuple of str
        The words matched (lower case).
    alternatives : tuple of tuple of str
        What they become: one alternative is a plain replacement, several make an
        alternation; an empty tuple is the empty alternative (``@``).
    line : int
        Line number in the file (1-based), for messages.
    """

    lhs: tuple
    alternatives: tuple
    line: int = 0


_RULE = re.compile(r"^(?P<lhs>.*?)=>(?P<rhs>.*?)(?:/(?P<ctx>[^/]*__[^/]*))?$")


def _parse_rhs(rhs: str, where: str) -> tuple:
    """``{ a / b c / @ }`` or ``a b`` -> tuple of alternatives."""
    rhs = rhs.strip()
    if rhs.startswith("{"):
        if not rhs.endswith("}"):
            raise ParameterError(
                describe(
                    repr(rhs), "an alternation closed by '}'", "close the braces", where=where
                )
            )
        parts = rhs[1:-1].split("/")
    else:
        parts = [rhs]
    alts = []
    for part in parts:
        words = tuple(w.lower() for w in part.split() if w != "@")
        alts.append(words)
    return tuple(alts)


def _parse_rule(text: str, lineno: int, name: str) -> GlmRule:
    """Parse one ``LHS => RHS / [ ] __ [ ]`` line."""
    where = f"{name}, line {lineno}"
    m = _RULE.match(text)
    lhs = m.group("lhs").split() if m else []
    if m is None or not lhs:
        raise ParameterError(
            describe(
                repr(text),
                "a rule 'WORDS => REPLACEMENT / [ ] __ [ ]'",
                "write one rule a line, or start comment lines with ';;'",
                where=where,
            )
        )
    ctx = (m.group("ctx") or "[ ] __ [ ]").replace(" ", "")
    if ctx != "[]__[]":
        raise ParameterError(
            describe(
                f"the context {m.group('ctx').strip()!r}",
                "the context-free form '/ [ ] __ [ ]'",
                "write the rule without a left or right context",
                where=where,
            )
        )
    return GlmRule(tuple(w.lower() for w in lhs), _parse_rhs(m.group("rhs"), where), lineno)


def read_glm(source: str | os.PathLike) -> list[GlmRule]:
    """Read a filter file in the NIST GLM format.

    Lines starting with ``;;`` are comments, lines starting with ``*`` are header
    settings (ignored: matching is always case-insensitive, as sctk's
    ``csrfilt.sh`` upcases everything first), a trailing ``;; ...`` is a comment.

    Parameters
    ----------
    source : str or path
        A path, or the file's text when it contains ``=>``.

    Returns
    -------
    list of GlmRule
        In file order (the order decides between rules matching at the same word).

    Examples
    --------
    >>> rules = read_glm("YOU'RE => { YOU ARE / YOU'RE } / [ ] __ [ ]")
    >>> rules[0].alternatives
    (('you', 'are'), ("you're",))
    """
    if isinstance(source, str) and "=>" in source:
        text, name = source, "GLM text"
    else:
        text = read_option_file(source, what="GLM filter file")
        name = str(Path(source))
    rules = []
    for lineno, raw in enumerate(text.splitlines(), 1):
        line = raw.split(";;", 1)[0].strip()
        if not line or line.startswith("*"):
            continue
        rules.append(_parse_rule(line, lineno, name))
    return rules


def apply_glm(words: str | Sequence[str], rules: Sequence[GlmRule]) -> list:
    """Apply GLM rules to one transcript.

    Parameters
    ----------
    words : str or sequence of str
    rules : sequence of GlmRule

    Returns
    -------
    list
        Plain words (str) and alternations (tuple of alternatives, each a tuple of
        words). A rule with a single alternative puts plain words.

    Examples
    --------
    >>> rules = read_glm("OH => { OH / ZERO } / [ ] __ [ ]")
    >>> apply_glm("tram oh nine", rules)
    ['tram', (('oh',), ('zero',)), 'nine']
    """
    seq = words.split() if isinstance(words, str) else list(words)
    low = [w.lower() for w in seq]
    out: list = []
    k = 0
    while k < len(seq):
        rule = next((r for r in rules if tuple(low[k : k + len(r.lhs)]) == r.lhs), None)
        if rule is None:
            out.append(seq[k])
            k += 1
            continue
        if len(rule.alternatives) == 1:
            out.extend(rule.alternatives[0])
        else:
            out.append(rule.alternatives)
        k += len(rule.lhs)
    return out


def _lattice(items: Sequence) -> tuple[int, list[list[tuple[int, str | None]]]]:
    """Word lattice of a transcript with alternations.

    Returns the number of nodes and, per node, its incoming edges
    ``(from_node, word)``; ``word`` None is an empty step. Nodes are numbered in
    topological order, node 0 is the start and the last node the end.
    """
    incoming: list[list[tuple[int, str | None]]] = [[]]
    cur = 0
    for item in items:
        if isinstance(item, str):
            incoming.append([(cur, item)])
            cur = len(incoming) - 1
            continue
        ends = []
        for alt in item:
            node = cur
            if not alt:
                ends.append((node, None))
                continue
            for w in alt[:-1]:
                incoming.append([(node, w)])
                node = len(incoming) - 1
            ends.append((node, alt[-1]))
        incoming.append(ends)
        cur = len(incoming) - 1
    return len(incoming), incoming


def _lattice_dp(ref_in, hyp_in, weights):
    """Fill the alignment table over two lattices.

    ``cost[i][j]`` is ``(weighted cost, errors, substitutions, -ref words)`` of the
    best path to ref node ``i`` and hyp node ``j``, compared in that order; ties
    keep the longer reference reading (sclite reads ``{ you are / you're }``
    matched on both sides as two words).
    """
    ws, wi, wd = weights
    inf = (float("inf"), 0, 0, 0)
    nr, nh = len(ref_in), len(hyp_in)
    cost = [[inf] * nh for _ in range(nr)]
    back: list[list[tuple | None]] = [[None] * nh for _ in range(nr)]
    cost[0][0] = (0.0, 0, 0, 0)

    def offer(i, j, c, step):
        if c < cost[i][j]:
            cost[i][j] = c
            back[i][j] = step

    for i in range(nr):
        for j in range(nh):
            for u, a in ref_in[i]:
                for v, b in hyp_in[j]:
                    if a is None or b is None:
                        continue
                    w, e, s, n = cost[u][v]
                    if a == b:
                        offer(i, j, (w, e, s, n - 1), ("C", u, v, a, b))
                    else:
                        offer(i, j, (w + ws, e + 1, s + 1, n - 1), ("S", u, v, a, b))
                w, e, s, n = cost[u][j]
                if a is None:
                    offer(i, j, (w, e, s, n), ("", u, j, None, None))
                else:
                    offer(i, j, (w + wd, e + 1, s, n - 1), ("D", u, j, a, None))
            for v, b in hyp_in[j]:
                w, e, s, n = cost[i][v]
                if b is None:
                    offer(i, j, (w, e, s, n), ("", i, v, None, None))
                else:
                    offer(i, j, (w + wi, e + 1, s, n), ("I", i, v, None, b))
    return back


def _backtrace(back, nr: int, nh: int) -> ErrorAlignment:
    """Walk the table back from the end into an :class:`ErrorAlignment`."""
    steps = []
    i, j = nr - 1, nh - 1
    while (i, j) != (0, 0):
        op, u, v, a, b = back[i][j]
        if op:
            steps.append((op, a, b))
        i, j = u, v
    steps.reverse()
    ref, hyp, ops = [], [], []
    for op, a, b in steps:
        r = h = None
        if a is not None:
            r = len(ref)
            ref.append(a)
        if b is not None:
            h = len(hyp)
            hyp.append(b)
        ops.append((op, r, h))
    return ErrorAlignment(tuple(ref), tuple(hyp), ops, "word")


def _has_alternation(items: Sequence) -> bool:
    return any(not isinstance(x, str) for x in items)


def align_alternates(
    ref: Sequence, hyp: Sequence, *, weights: tuple[float, float, float] = (1, 1, 1)
) -> ErrorAlignment:
    """Word alignment where either side may hold alternations.

    Parameters
    ----------
    ref, hyp : sequence
        Output of :func:`apply_glm`: words and alternations.
    weights : (substitution, insertion, deletion)
        Costs of the three errors. ``(1, 1, 1)`` is the plain Levenshtein alignment
        (ties go to the fewest substitutions, as :func:`peekalign.align_words`);
        sclite's defaults are ``(4, 3, 3)``.

    Returns
    -------
    ErrorAlignment
        Over the chosen alternatives: ``ref`` and ``hyp`` hold the words read.

    Examples
    --------
    >>> rules = read_glm("OH => { OH / ZERO } / [ ] __ [ ]\\nZERO => { OH / ZERO } / [ ] __ [ ]")
    >>> e = align_alternates(apply_glm("tram zero nine", rules), apply_glm("tram oh five", rules))
    >>> e.ref, e.ops
    (('tram', 'oh', 'nine'), [('C', 0, 0), ('C', 1, 1), ('S', 2, 2)])
    """
    if len(weights) != 3 or min(weights) <= 0:
        raise ParameterError(
            describe(
                f"weights {tuple(weights)!r}",
                "three positive costs (substitution, insertion, deletion)",
                "pass e.g. (1, 1, 1) or sclite's (4, 3, 3)",
            )
        )
    if tuple(weights) == (1, 1, 1) and not (_has_alternation(ref) or _has_alternation(hyp)):
        return align_words(list(ref), list(hyp))
    nr, ref_in = _lattice(ref)
    nh, hyp_in = _lattice(hyp)
    return _backtrace(_lattice_dp(ref_in, hyp_in, tuple(weights)), nr, nh)


@dataclass(frozen=True)
class BoundaryError:
    """A word-boundary (spacing) error.

    Attributes
    ----------
    kind : {"merge", "split"}
        ``merge``: several reference words came out as one ("at dunmere" ->
        "atdunmere"); ``split``: one reference word came out as several.
    ref, hyp : tuple of str
    ops : int
        Alignment errors it accounts for (one substitution plus the deletions or
        insertions).
    """

    kind: str
    ref: tuple
    hyp: tuple
    ops: int


def boundary_errors(alignment: ErrorAlignment) -> list[BoundaryError]:
    """Find word-boundary (spacing) errors in a word alignment.

    A merge is a substitution whose hypothesis word is the concatenation of its
    reference word and reference words deleted right beside it; a split is the
    mirror image with insertions.

    Examples
    --------
    >>> e = align_words("tram at dunmere now", "tram atdunmere now")
    >>> [(b.kind, b.ref, b.hyp, b.ops) for b in boundary_errors(e)]
    [('merge', ('at', 'dunmere'), ('atdunmere',), 2)]
    """
    ops = alignment.ops
    ref, hyp = alignment.ref, alignment.hyp
    found: list[BoundaryError] = []
    used: set[int] = set()
    for p, (op, r, h) in enumerate(ops):
        if op != "S" or p in used:
            continue
        for kind, other, side, target, words in (
            ("merge", "D", 1, hyp[h], ref),
            ("split", "I", 2, ref[r], hyp),
        ):
            span = _window(ops, p, other, side, words, target, used)
            if span is None:
                continue
            a, b = span
            used.update(range(a, b + 1))
            parts = tuple(words[ops[k][side]] for k in range(a, b + 1))
            pair = (parts, (target,)) if kind == "merge" else ((target,), parts)
            found.append(BoundaryError(kind, pair[0], pair[1], b - a + 1))
            break
    return found


def _window(ops, p, other_op, side, words, target, used):
    """Widest run of ``other_op`` ops beside the substitution at ``p`` whose words
    on ``side`` (1 = ref, 2 = hyp), joined in order with the substituted word,
    spell ``target``. Returns ``(first, last)`` op positions or None."""
    lo = p
    while lo > 0 and ops[lo - 1][0] == other_op and lo - 1 not in used:
        lo -= 1
    hi = p
    while hi + 1 < len(ops) and ops[hi + 1][0] == other_op:
        hi += 1
    for width in range(hi - lo + 1, 1, -1):
        for a in range(max(lo, p - width + 1), min(p, hi - width + 1) + 1):
            joined = "".join(words[ops[k][side]] for k in range(a, a + width))
            if joined == target:
                return a, a + width - 1
    return None


def mer(totals: ErrorTotals | ErrorAlignment) -> float:
    """Match error rate ``(S + D + I) / (C + S + D + I)`` (Morris et al., 2004).

    Unlike the WER it stays within [0, 1]: insertions raise the denominator too.

    Examples
    --------
    >>> mer(align_words("call depot four", "call the depot"))
    0.5
    """
    den = totals.C + totals.S + totals.D + totals.I
    return totals.errors / den if den else 0.0


@dataclass(frozen=True, eq=False)
class UtteranceScore:
    """Raw and clean scoring of one pair."""

    raw: ErrorAlignment
    clean: ErrorAlignment
    boundary: tuple
    chars: ErrorAlignment

    @property
    def removed(self) -> int:
        """Errors the clean-up removed (negative if it added some)."""
        return self.raw.errors - self.clean.errors


def _totals(aligns: Iterable[ErrorAlignment], unit: str = "word") -> ErrorTotals:
    S = D = I = N = C = n = 0  # noqa: E741
    for e in aligns:
        S, D, I, N, C = S + e.S, D + e.D, I + e.I, N + e.N, C + e.C  # noqa: E741
        n += 1
    return ErrorTotals(S, D, I, N, C, n, unit)


@dataclass(frozen=True, eq=False)
class ScoreReport:
    """Scoring of many pairs before and after clean-up.

    Attributes
    ----------
    utterances : list of UtteranceScore
    raw, clean : ErrorTotals
        Word totals on the text as given and after normalisation and the GLM.
    chars : ErrorTotals
        Character totals after normalisation (alternations read as chosen).
    steps : dict
        What the clean-up did (``case``, ``punctuation``, ``numbers``, ``glm``).
    """

    utterances: list
    raw: ErrorTotals
    clean: ErrorTotals
    chars: ErrorTotals
    steps: dict = field(default_factory=dict)

    @property
    def removed(self) -> int:
        """Errors the clean-up removed: ``raw.errors - clean.errors``."""
        return self.raw.errors - self.clean.errors

    @property
    def wer(self) -> float:
        return self.clean.rate

    @property
    def mer(self) -> float:
        return mer(self.clean)

    @property
    def cer(self) -> float:
        return self.chars.rate

    @property
    def boundary(self) -> dict:
        """Word-boundary errors: ``{"merge": events, "split": events, "ops": errors}``."""
        out = {"merge": 0, "split": 0, "ops": 0}
        for u in self.utterances:
            for b in u.boundary:
                out[b.kind] += 1
                out["ops"] += b.ops
        return out

    def summary(self) -> str:
        """One paragraph for a console or a slide.

        Examples
        --------
        >>> r = score([("Tram 42 at Dunmere.", "tram forty two atdunmere")])
        >>> print(r.summary())
        WER 40.00 % (raw 100.00 %), MER 40.00 %, CER 4.00 %; clean-up removed 2 errors of 4; word-boundary errors: 1 merge, 0 splits (2 of the errors)
        """
        b = self.boundary
        return (
            f"WER {100 * self.wer:.2f} % (raw {100 * self.raw.rate:.2f} %), "
            f"MER {100 * self.mer:.2f} %, CER {100 * self.cer:.2f} %; "
            f"clean-up removed {self.removed} error{'s' * (self.removed != 1)} of "
            f"{self.raw.errors}; word-boundary errors: {b['merge']} "
            f"merge{'s' * (b['merge'] != 1)}, {b['split']} split{'s' * (b['split'] != 1)} "
            f"({b['ops']} of the errors)"
        )


def _clean(text, steps: dict, rules) -> list:
    words = normalize_text(
        text, case=steps["case"], punctuation=steps["punctuation"], numbers=steps["numbers"]
    )
    return apply_glm(words, rules) if rules else words.split()


def score(
    pairs: Iterable[tuple[str, str]],
    *,
    case: bool = True,
    punctuation: bool = True,
    numbers: bool = True,
    glm: str | os.PathLike | Sequence[GlmRule] | None = None,
    weights: tuple[float, float, float] = (1, 1, 1),
) -> ScoreReport:
    """Score ``(ref, hyp)`` pairs raw and after clean-up.

    Parameters
    ----------
    pairs : iterable of (ref, hyp) strings
    case, punctuation, numbers : bool
        Normalisation steps (see :func:`normalize_text`).
    glm : path, GLM text or list of GlmRule, optional
        Alternates applied to both sides after normalisation.
    weights : (substitution, insertion, deletion)
        Alignment costs (see :func:`align_alternates`).

    Returns
    -------
    ScoreReport

    Examples
    --------
    >>> r = score([("You're at Depot 4.", "you are at depot four")],
    ...           glm="YOU'RE => YOU ARE / [ ] __ [ ]")
    >>> r.raw.errors, r.clean.errors, r.removed
    (4, 0, 4)
    """
    rules = read_glm(glm) if isinstance(glm, (str, os.PathLike)) else list(glm or [])
    steps = {"case": case, "punctuation": punctuation, "numbers": numbers, "glm": len(rules)}
    utts = []
    for k, pair in enumerate(pairs):
        if not (isinstance(pair, tuple | list) and len(pair) == 2):
            raise ParameterError(
                describe(f"pairs[{k}] = {pair!r}", "(ref, hyp) pairs", "pass zip(refs, hyps)")
            )
        ref, hyp = pair
        raw = align_words(ref, hyp)
        clean = align_alternates(
            _clean(ref, steps, rules), _clean(hyp, steps, rules), weights=weights
        )
        chars = align_chars(" ".join(clean.ref), " ".join(clean.hyp))
        utts.append(UtteranceScore(raw, clean, tuple(boundary_errors(clean)), chars))
    return ScoreReport(
        utts,
        _totals(u.raw for u in utts),
        _totals(u.clean for u in utts),
        _totals((u.chars for u in utts), "char"),
        steps,
    )
