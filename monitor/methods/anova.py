"""Fisher's one-way ANOVA, with Tukey-Kramer pairs and Dunnett's many-to-one family.

Assumes normal errors with one common variance; robust to non-normality in large
segments and, with about equal sizes, to moderately unequal variances (Glass,
Peckham & Sanders 1972). Needs only the per-segment moments, so it runs on sums
pushed down to the database.

References
----------
.. [1] Fisher, R. A. (1925). Statistical Methods for Research Workers. Edinburgh:
   Oliver and Boyd.
.. [2] Kramer, C. Y. (1956). Extension of multiple range tests to group means with
   unequal numbers of replications. Biometrics 12(3), 307-310.
.. [3] Dunnett, C. W. (1955). A multiple comparison procedure for comparing several
   treatments with a control. JASA 50(272), 1096-1121.
.. [4] Hays, W. L. (1963). Statistics for Psychologists. New York: Holt, Rinehart
   and Winston (omega squared).
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


@register
class FisherAnova(TestMethod):
    """Fisher's ANOVA: F on ``(k - 1, N - k)`` df from the pooled within-segment variance."""

    name = "anova"
    label = "Fisher's ANOVA"
    statistic = "F"
    df_count = 2  # (k - 1, N - k)
    posthoc = Family("tukey-kramer", "Tukey-Kramer")
    many_to_one = Family("dunnett", "Dunnett")
    adjusted_covariance = "classic"  # with adjust_for: one spread in every cell

    def omnibus(self, segs: Segments) -> OmnibusResult:
        return stats.omnibus.fisher_anova(segs.groups)

    def effect_size(self, res: OmnibusResult, confidence: float) -> EffectSize:
        return stats.effects.omega_squared(res, confidence=confidence)

    def other_effect_sizes(self, res: OmnibusResult) -> tuple[EffectSize, ...]:
        return (stats.effects.eta_squared(res), stats.effects.cohens_f(res))

    def pairs(self, segs: Segments, *, confidence: float, adjust: str) -> PostHocResult:
        return stats.posthoc.tukey_kramer(segs.labels, segs.groups, confidence=confidence)

    def pairs_to_reference(self, segs: Segments, reference: str, *, confidence: float,
                           adjust: str) -> PostHocResult:
        return stats.posthoc.many_to_one(segs.labels, segs.groups, reference, self.many_to_one.name,
                                         confidence=confidence, adjust=adjust)

    def versus_rest(self, segs: Segments, *, alpha: float) -> tuple[SegmentContrast, ...]:
        return stats.stepdown.stepdown_vs_rest(segs.labels, segs.groups, None, self.name, alpha=alpha)

    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """Equal spreads (Brown-Forsythe) always; normality when some segment is small."""
        return ("brown_forsythe",) + (("normality",) if normality_matters(groups) else ())
