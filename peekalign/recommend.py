"""Which decoder look-ahead to use, and what decided it.

Three criteria, strongest evidence first (DEVELOPERS.md, "Look-ahead recommendation"):

``measured WER``
    With the decoder in the loop (:func:`peekalign.redecode`): the smallest look-ahead
    whose WER exceeds full context's by at most ``tolerance`` at the upper bound of the
    paired-bootstrap interval (:meth:`peekalign.redecoding.Redecode.recommend`).
``reach``
    From the dumps only: the smallest look-ahead whose reach (share of words whose end
    the decoder's view reaches) is at least the sweep's target.
``attention``
    From the dumps only, when reach is already at its target at look-ahead 0 (it then
    says nothing about the look-ahead): the smallest look-ahead keeping at least
    ``attention_share`` of the full-context attention mass inside the windows.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

from .exceptions import ParameterError

if TYPE_CHECKING:  # pragma: no cover
    from .significance import PairedBootstrap
    from .streaming import Sweep

__all__ = [
    "DEFAULT_ATTENTION_SHARE",
    "DEFAULT_TOLERANCE",
    "Recommendation",
    "attention_lookahead",
    "choose",
    "from_redecode_table",
    "from_sweep",
]

#: Share of the full-context attention mass the attention criterion keeps.
DEFAULT_ATTENTION_SHARE = 0.9

#: Default tolerance of the measured-WER criterion: WER may exceed full context's by at
#: most this much (absolute, 0.005 = 0.5 points) at the upper bound of its interval.
DEFAULT_TOLERANCE = 0.005


@dataclass(frozen=True)
class Recommendation:
    """A recommended decoder look-ahead and what decided it.

    Attributes
    ----------
    lookahead : int or None
        Frames; None when no look-ahead of the curve qualifies.
    criterion : str
        ``"measured WER"``, ``"reach"`` or ``"attention"``.
    rule : str
        The rule in words, with its numbers.
    latency_ms : float
        Algorithmic latency at that look-ahead (NaN when none).
    interval : PairedBootstrap or None
        For ``"measured WER"``: ``WER(e) - WER(full context)`` (``delta``) and its
        interval (``lo``, ``hi``).
    """

    lookahead: int | None
    criterion: str
    rule: str
    latency_ms: float = float("nan")
    interval: PairedBootstrap | None = None

    def line(self) -> str:
        """``criterion: <name> - <rule>`` (the line the commands print).

        Examples
        --------
        >>> Recommendation(4, "reach", "smallest look-ahead with reach >= 95 %").line()
        'criterion: reach - smallest look-ahead with reach >= 95 %'
        """
        return f"criterion: {self.criterion} - {self.rule}"


def _check_share(share) -> float:
    ok = isinstance(share, (int, float)) and not isinstance(share, bool)
    if not (ok and 0 < share <= 1):
        raise ParameterError(
            "The 'attention_share' parameter must be a float in the range (0, 1]. "
            f"Got {share!r} instead; write 0.9 for 90 %."
        )
    return float(share)


def attention_lookahead(sweep: Sweep, share: float = DEFAULT_ATTENTION_SHARE) -> Recommendation:
    """The smallest look-ahead whose windows keep ``share`` of the attention mass.

    ``kept_attention`` of a sweep row is already a share of each row's full-context
    mass, so this is the first row with ``kept_attention >= share``.

    Examples
    --------
    >>> from peekalign.streaming import Sweep, SweepRow
    >>> rows = [SweepRow(e, 40.0 * e, 1.0, k, 10, 10) for e, k in enumerate([.5, .8, .93])]
    >>> attention_lookahead(Sweep(rows, 0, 0.95), 0.9).lookahead
    2
    """
    share = _check_share(share)
    rule = f"smallest look-ahead keeping >= {100 * share:g} % of the full-context attention mass"
    kept = [r.kept_attention for r in sweep.rows]
    if not kept or all(math.isnan(k) for k in kept):
        return Recommendation(None, "attention", rule + "; the bundle holds no attention")
    for r in sweep.rows:
        if r.kept_attention >= share:
            return Recommendation(r.lookahead_frames, "attention", rule, r.latency_ms)
    best = max(k for k in kept if not math.isnan(k))
    return Recommendation(
        None,
        "attention",
        rule + f"; none up to {sweep.rows[-1].lookahead_frames} frames (best {100 * best:.1f} %)",
    )


def reach_lookahead(sweep: Sweep) -> Recommendation:
    """The sweep's own recommendation (smallest look-ahead reaching its target reach).

    Examples
    --------
    >>> from peekalign.streaming import Sweep, SweepRow
    >>> rows = [SweepRow(e, 40.0 * e, r, .5, 10, 10) for e, r in enumerate([.8, .96])]
    >>> reach_lookahead(Sweep(rows, 1, 0.95)).lookahead
    1
    """
    rule = f"smallest look-ahead whose reach is >= {100 * sweep.target:g} %"
    r = sweep.recommended_row
    if r is None:
        return Recommendation(None, "reach", rule + "; none in the sweep")
    return Recommendation(r.lookahead_frames, "reach", rule, r.latency_ms)


def from_sweep(
    sweep: Sweep, *, attention_share: float = DEFAULT_ATTENTION_SHARE
) -> tuple[Recommendation, dict[str, Recommendation]]:
    """Recommend from the dumps only: reach, or attention when reach is saturated at 0.

    Returns the deciding recommendation and both candidates (``"reach"``,
    ``"attention"``). Reach decides unless it is already at its target at look-ahead 0
    and the bundle holds attention; then the attention criterion decides.

    Examples
    --------
    >>> from peekalign.streaming import Sweep, SweepRow
    >>> rows = [SweepRow(e, 40.0 * e, 1.0, k, 10, 10) for e, k in enumerate([.5, .95])]
    >>> best, both = from_sweep(Sweep(rows, 0, 0.95))
    >>> best.criterion, best.lookahead, both["reach"].lookahead
    ('attention', 1, 0)
    """
    reach = reach_lookahead(sweep)
    att = attention_lookahead(sweep, attention_share)
    both = {"reach": reach, "attention": att}
    has_attention = any(not math.isnan(r.kept_attention) for r in sweep.rows)
    saturated = reach.lookahead == 0
    if saturated and has_attention:
        return att, both
    return reach, both


def measured_rule(tolerance: float, confidence: float = 0.95, how: str = "") -> str:
    """The measured-WER rule in words (``how``: the bootstrap's details, in brackets).

    Examples
    --------
    >>> measured_rule(0.005)
    "smallest look-ahead whose WER exceeds full context's by at most 0.5 points at the upper 95 % bound"
    """
    return (
        f"smallest look-ahead whose WER exceeds full context's by at most {100 * tolerance:g} "
        f"points at the upper {100 * confidence:g} % bound" + (f" ({how})" if how else "")
    )


def _check_tolerance(tolerance) -> float:
    ok = isinstance(tolerance, (int, float)) and not isinstance(tolerance, bool)
    if not (ok and math.isfinite(tolerance) and tolerance >= 0):
        raise ParameterError(
            "The 'tolerance' parameter must be a float in the range [0, inf) "
            f"(absolute WER, 0.005 = 0.5 points). Got {tolerance!r} instead."
        )
    return float(tolerance)


def from_redecode_table(table, *, tolerance: float = DEFAULT_TOLERANCE) -> Recommendation:
    """The measured-WER recommendation read off a re-decoding table.

    ``table`` has the columns of :attr:`peekalign.redecoding.Redecode.table` (or of the
    CSV ``redecode --csv`` writes): one row per look-ahead, then the full-context row
    (``lookahead_frames`` inf). Its ``wer_delta_high`` column is the upper 95 % bound of
    the paired bootstrap, so this is the rule of
    :meth:`peekalign.redecoding.Redecode.recommend` at its default resampling (the CSV
    keeps 7 significant digits: a bound within 1e-9 of the tolerance counts as inside).

    Examples
    --------
    >>> from peekalign.corpus import Table
    >>> inf = float("inf")
    >>> t = Table(("lookahead_frames", "latency_ms", "wer_delta_high"),
    ...           [(0, 200.0, 0.03), (4, 360.0, 0.004), (8, 520.0, 0.0), (inf, inf, 0.0)])
    >>> from_redecode_table(t).lookahead, from_redecode_table(t, tolerance=0.0).lookahead
    (4, 8)
    """
    tolerance = _check_tolerance(tolerance)
    how = "paired bootstrap over utterances, as re-decoded"
    rows = [r for r in table if math.isfinite(float(r["lookahead_frames"]))]
    for r in rows:
        if float(r["wer_delta_high"]) <= tolerance + 1e-9:
            rule = measured_rule(tolerance, how=how)
            e = int(r["lookahead_frames"])
            return Recommendation(e, "measured WER", rule, float(r["latency_ms"]))
    last = f"; none up to {int(rows[-1]['lookahead_frames'])} frames qualifies" if rows else ""
    return Recommendation(None, "measured WER", measured_rule(tolerance, how=how) + last)


def choose(
    sweep: Sweep,
    measured=None,
    *,
    tolerance: float = DEFAULT_TOLERANCE,
    attention_share: float = DEFAULT_ATTENTION_SHARE,
) -> tuple[Recommendation, dict[str, Recommendation]]:
    """All three recommendations and the one that decides (strongest evidence first).

    ``measured`` is a :class:`peekalign.redecoding.Redecode` or its table (None: no
    decoder in the loop). The measured WER decides whenever it is given; otherwise
    :func:`from_sweep` does. The dict holds ``"reach"``, ``"attention"`` and, with a
    measured curve, ``"measured WER"``.

    Examples
    --------
    >>> from peekalign.streaming import Sweep, SweepRow
    >>> from peekalign.corpus import Table
    >>> rows = [SweepRow(e, 40.0 * e, 1.0, k, 10, 10) for e, k in enumerate([.5, .95])]
    >>> wer = Table(("lookahead_frames", "latency_ms", "wer_delta_high"),
    ...             [(0, 0.0, 0.02), (1, 40.0, 0.001), (float("inf"), float("inf"), 0.0)])
    >>> best, all3 = choose(Sweep(rows, 0, 0.95), wer)
    >>> best.criterion, best.lookahead, sorted(all3)
    ('measured WER', 1, ['attention', 'measured WER', 'reach'])
    """
    decided, out = from_sweep(sweep, attention_share=attention_share)
    if measured is not None:
        if hasattr(measured, "recommend"):
            decided = measured.recommend(tolerance=tolerance)
        else:
            decided = from_redecode_table(measured, tolerance=tolerance)
        out["measured WER"] = decided
    return decided, out
