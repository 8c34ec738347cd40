"""Kruskal-Wallis' rank test, with Dunn's pairs (also against a reference).

Compares the segments' rank distributions: it asks whether one segment tends to give
larger values than another, and assumes neither normal errors nor, for that
question, equal spreads (with unequal spreads it is not a test of equal means;
Fagerland & Sandvik 2009). Needs the values themselves; without them (sums pushed
down and no sample) Welch's ANOVA is run instead.

References
----------
.. [1] Kruskal, W. H. and Wallis, W. A. (1952). Use of ranks in one-criterion
   variance analysis. JASA 47(260), 583-621.
.. [2] Dunn, O. J. (1964). Multiple comparisons using rank sums. Technometrics 6(3),
   241-252.
.. [3] Tomczak, M. and Tomczak, E. (2014). The need to report effect size estimates
   revisited. Trends in Sport Sciences 1(21), 19-25 (epsilon squared).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Sequence

from monitor import stats
from monitor.methods.base import Family, Segments, TestMethod, register

if TYPE_CHECKING:  # pragma: no cover
    from monitor.stats.effects import EffectSize
    from monitor.stats.flags import SegmentContrast
    from monitor.stats.omnibus import OmnibusResult
    from monitor.stats.posthoc import PostHocResult
    from monitor.stats.summary import Moments

_DUNN = Family("dunn", "Dunn", ranks=True)  # diffs are gaps in mean ranks


@register
class KruskalWallis(TestMethod):
    """Kruskal-Wallis: tie-corrected H on ``k - 1`` df (chi-square reference)."""

    name = "kruskal"
    label = "Kruskal-Wallis"
    statistic = "H"
    df_count = 1  # (k - 1,)
    needs_values = True
    instead_without_values = "welch"
    without_values_reason = "values were not available for ranks"
    posthoc = _DUNN
    many_to_one = _DUNN
    adjusted_covariance = None  # not with adjust_for: an additive model needs means, not ranks

    def omnibus(self, segs: Segments) -> OmnibusResult:
        return stats.omnibus.kruskal_wallis(_values(segs))

    def effect_size(self, res: OmnibusResult, confidence: float) -> EffectSize:
        return stats.effects.epsilon_squared(res)

    def pairs(self, segs: Segments, *, confidence: float, adjust: str) -> PostHocResult:
        return stats.posthoc.dunn(segs.labels, _values(segs), adjust=adjust, confidence=confidence)

    def pairs_to_reference(self, segs: Segments, reference: str, *, confidence: float,
                           adjust: str) -> PostHocResult:
        return stats.posthoc.many_to_one(segs.labels, _values(segs), reference, self.many_to_one.name,
                                         confidence=confidence, adjust=adjust)

    def versus_rest(self, segs: Segments, *, alpha: float) -> tuple[SegmentContrast, ...]:
        return stats.stepdown.stepdown_vs_rest(segs.labels, segs.groups, _values(segs), self.name, alpha=alpha)

    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """None: asked for by name, a rank test assumes neither normality nor equal spreads."""
        return ()


def _values(segs: Segments) -> list:
    if segs.samples is None:  # the analysis runs instead_without_values then; reaching here is a bug
        raise ValueError("Kruskal-Wallis ranks the values, and none were given")
    return list(segs.samples)
