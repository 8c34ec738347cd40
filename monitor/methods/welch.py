"""Welch's heteroscedastic ANOVA, with Games-Howell pairs (also against a reference).

Drops Fisher's common variance: each segment keeps its own, and the second df is
fractional (Welch-Satterthwaite). Keeps its level under unequal variances and loses
little when they are equal. Needs only the per-segment moments.

References
----------
.. [1] Welch, B. L. (1951). On the comparison of several mean values: an alternative
   approach. Biometrika 38(3/4), 330-336.
.. [2] Games, P. A. and Howell, J. F. (1976). Pairwise multiple comparison procedures
   with unequal n's and/or variances: a Monte Carlo study. Journal of Educational
   Statistics 1(2), 113-125.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

from monitor import stats
from monitor.methods.base import Family, Segments, TestMethod, normality_matters, register

if TYPE_CHECKING:  # pragma: no cover
    from monitor.stats.effects import EffectSize
    from monitor.stats.flags import SegmentContrast
    from monitor.stats.omnibus import OmnibusResult
    from monitor.stats.posthoc import PostHocResult
    from monitor.stats.summary import Moments

_GAMES_HOWELL = Family("games-howell", "Games-Howell")


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
        return stats.flags.segment_vs_rest(segs.labels, segs.groups, None, method=self.name, alpha=alpha)

    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """Normality when some segment is small; unequal spreads are what it is for."""
        return ("normality",) if normality_matters(groups) else ()
