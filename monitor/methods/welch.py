"""Welch's heteroscedastic ANOVA, with Games-Howell pairs (also against a reference).

Drops Fisher's common variance: each segment keeps its own, and the second df is
fractional (Welch-Satterthwaite). Keeps its level under unequal variances and loses
little when they are equal. Needs only the per-segment moments.

Welch's F is referred to an F distribution by an approximation that is good when
every segment has enough records (Welch 1951, sec. 4; the approximation's error grows
with the number of segments for a given size, Hartung, Argac & Makambi 2002). With
many tiny segments it is far too liberal: measured here on identical normal data, 29%
of 20 segments of 3 records are "significant" at 5%, 60% of 50 segments, 98% of 200
(``python -m tests.sim.welch_floor``; ``docs/error_rates.md``). :data:`SIZE_FLOOR` is
the smallest segment size, by number of segments, at which the measured rate stays at
most 6% at the 5% level (1.2 times nominal: between Bradley's 1978 "stringent" 1.1 and
"liberal" 1.5 times); below it the method gives way (:meth:`WelchAnova.unusable`) to
Fisher's ANOVA (exact under equal spreads: 4.1-5.6% in the same runs), or to
Kruskal-Wallis when Brown-Forsythe finds unequal spreads and the values are there
(3.3-6.7% with sds 1 and 3 at 3 to 10 records, where Fisher's ANOVA gives 8.4-10%).

References
----------
.. [1] Welch, B. L. (1951). On the comparison of several mean values: an alternative
   approach. Biometrika 38(3/4), 330-336.
.. [2] Games, P. A. and Howell, J. F. (1976). Pairwise multiple comparison procedures
   with unequal n's and/or variances: a Monte Carlo study. Journal of Educational
   Statistics 1(2), 113-125.
.. [3] Hartung, J., Argac, D. and Makambi, K. H. (2002). Small sample properties of
   tests on homogeneity in one-way ANOVA and meta-analysis. Statistical Papers 43(2),
   197-235.
.. [4] Bradley, J. V. (1978). Robustness? British Journal of Mathematical and
   Statistical Psychology 31(2), 144-152.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Mapping, Sequence

from monitor import stats
from monitor.methods.base import Family, Segments, TestMethod, normality_matters, register

if TYPE_CHECKING:  # pragma: no cover
    from monitor.stats.diagnostics import Check
    from monitor.stats.effects import EffectSize
    from monitor.stats.flags import SegmentContrast
    from monitor.stats.omnibus import OmnibusResult
    from monitor.stats.posthoc import PostHocResult
    from monitor.stats.summary import Moments

_GAMES_HOWELL = Family("games-howell", "Games-Howell")

#: ``(segments up to, records per segment at least)``: Welch's ANOVA is used with ``k``
#: segments only when the smallest has at least the size of the first row whose bound
#: is ``>= k``. From ``python -m tests.sim.welch_floor`` (10,000 null replications a
#: cell, normal segments of equal size, equal spreads and sds 1 and 3 alternately): the
#: smallest measured size whose false-positive rate at 5% is at most 6% in both
#: (docs/error_rates.md, "Where a method keeps its level"); for 10 segments the rate is
#: at the bound at 8 records, so the next measured size is taken. Beyond 1,000 segments
#: (not measured) the size grows with the square root of ``k``, faster than the measured
#: growth between 200 and 1,000 segments.
SIZE_FLOOR: tuple[tuple[int, int], ...] = ((3, 3), (5, 5), (10, 10), (50, 20), (1000, 30))


def size_floor(k: int) -> int:
    """The fewest records per segment with which Welch's ANOVA is used for ``k`` segments."""
    for bound, n in SIZE_FLOOR:
        if k <= bound:
            return n
    bound, n = SIZE_FLOOR[-1]
    return math.ceil(n * math.sqrt(k / bound))


@register
class WelchAnova(TestMethod):
    """Welch's ANOVA: F on ``(k - 1, df2)`` df, ``df2`` fractional."""

    name = "welch"
    label = "Welch's ANOVA"
    statistic = "F"
    df_count = 2  # (k - 1, Welch's fractional df2)
    posthoc = _GAMES_HOWELL
    # Games-Howell's pairs with the reference: conservative for the smaller family, but
    # valid under unequal variances (no many-to-one procedure of its own is used)
    many_to_one = _GAMES_HOWELL

    def omnibus(self, segs: Segments) -> OmnibusResult:
        return stats.omnibus.welch_anova(segs.groups)

    def effect_size(self, res: OmnibusResult, confidence: float) -> EffectSize:
        return stats.effects.omega_squared(res, confidence=confidence)

    def other_effect_sizes(self, res: OmnibusResult) -> tuple[EffectSize, ...]:
        return (stats.effects.eta_squared(res), stats.effects.cohens_f(res))

    def pairs(self, segs: Segments, *, confidence: float, adjust: str) -> PostHocResult:
        return stats.posthoc.games_howell(segs.labels, segs.groups, confidence=confidence)

    def pairs_to_reference(self, segs: Segments, reference: str, *, confidence: float,
                           adjust: str) -> PostHocResult:
        return stats.posthoc.many_to_one(segs.labels, segs.groups, reference, self.many_to_one.name,
                                         confidence=confidence, adjust=adjust)

    def versus_rest(self, segs: Segments, *, alpha: float) -> tuple[SegmentContrast, ...]:
        return stats.stepdown.stepdown_vs_rest(segs.labels, segs.groups, None, self.name, alpha=alpha)

    def unusable(self, segs: Segments) -> str | None:
        """Why not, below :func:`size_floor` records in some segment (see the module notes)."""
        k = len(segs.groups)
        smallest = min((int(g.n) for g in segs.groups), default=0)
        floor = size_floor(k)
        if k < 2 or smallest >= floor:
            return None
        return (f"Welch's ANOVA keeps its level with {k} segments only when each has at least {floor} records "
                f"(the smallest has {smallest}; measured, docs/error_rates.md)")

    def instead(self, segs: Segments, checks: Mapping[str, Check]) -> tuple[str, ...]:
        """Fisher's ANOVA, unless Brown-Forsythe finds unequal spreads: Kruskal-Wallis first then."""
        bf = checks.get("brown_forsythe")
        return ("kruskal", "anova") if bf is not None and bf.passed is False else ("anova", "kruskal")

    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """Normality when some segment is small; unequal spreads are what it is for."""
        return ("normality",) if normality_matters(groups) else ()
