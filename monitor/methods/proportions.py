"""Proportions: the test of homogeneity of proportions for a 0/1 metric, with pairs of
proportions in percentage points.

A metric whose every value is 0 or 1 (on time or late, claimed or not) is a count of
1s per segment, and its mean is the share of 1s. Comparing means with an F test then
mostly re-tests the proportions through their variances ``p (1 - p)``: Welch's ANOVA
on such data is liberal with small expected counts and undefined when a segment has no
1s (or no 0s). This method treats the ``k`` segments as a ``k x 2`` table instead:

* omnibus: Pearson's chi-square test of homogeneity on ``k - 1`` df, with an exact
  (``k = 2``: Fisher's) or Monte Carlo conditional p-value when expected counts are
  small (Cochran's rule, common practice); see
  :func:`monitor.stats.proportions.homogeneity`;
* effect size: Cohen's w, ``sqrt(X^2 / N)`` (Cohen 1988; equal to Cramér's V for a
  ``k x 2`` table), with a noncentral chi-square interval;
* pairs: every pair's difference of proportions (written in percentage points) with
  Newcombe's hybrid score interval at the Bonferroni level and two-proportion tests
  adjusted within the metric (Holm by default: ``posthoc.dunn_adjust``);
* many-to-one: each segment against the ``reference`` segment, Holm over the
  ``k - 1`` comparisons (:func:`monitor.stats.proportions.to_reference`);
* against the rest (many segments): the step-down two-proportion contrast of
  :func:`monitor.stats.stepdown.proportion_vs_rest`.

It needs only the counts, which come from the pushed-down sums: a segment's summary
gives ``n`` and its mean, so ``x = n * mean`` is its count of 1s (the sum of the
column), and :func:`monitor.stats.proportions.counts_from_moments` recognises 0/1 data
from the summary alone (``min`` and ``max`` in {0, 1} and ``M2 = n p (1 - p)``, i.e.
the sum of squares equals the sum).

Assumption checks: none is watched. The equal-spread check on 0/1 data tests whether
``p (1 - p)`` differs, i.e. the proportions again, and normality does not apply; the
small-expected-count condition is handled by the test itself (its p-value becomes the
exact or Monte Carlo one) and said in the metric's note.

References
----------
.. [1] Agresti, A. (2013). Categorical Data Analysis, 3rd ed. Wiley, sec. 3.2.
.. [2] Cochran, W. G. (1954). Some methods for strengthening the common chi-square
   tests. Biometrics 10(4), 417-451.
.. [3] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd
   ed. Hillsdale, NJ: Erlbaum, ch. 7.
.. [4] Newcombe, R. G. (1998). Interval estimation for the difference between
   independent proportions: comparison of eleven methods. Statistics in Medicine
   17(8), 873-890.
.. [5] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
   Scandinavian Journal of Statistics 6(2), 65-70.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Sequence

from monitor import stats
from monitor.methods.base import Family, Segments, TestMethod, register

if TYPE_CHECKING:  # pragma: no cover
    from monitor.model import EffectSize
    from monitor.stats.flags import SegmentContrast
    from monitor.stats.proportions import HomogeneityResult, ProportionPairs
    from monitor.stats.summary import Moments

#: The pairs of proportions: two-proportion tests adjusted within the metric, Newcombe intervals.
_NEWCOMBE = Family("newcombe", "two-proportion tests with Newcombe intervals", points=True)


def counts(segs: Segments) -> tuple[list[int], list[int]] | str:
    """``(ones, records)`` per segment, or why the values are not all 0 or 1 (a sentence)."""
    ones, totals, odd = [], [], []
    for label, g in zip(segs.labels, segs.groups):
        c = stats.proportions.counts_from_moments(g)
        if c is None:
            odd.append(f"{label} (values {_num(g.min)} to {_num(g.max)})")
            continue
        ones.append(c[0])
        totals.append(c[1])
    if odd:
        shown = ", ".join(odd[:3]) + (f" and {len(odd) - 3} more" if len(odd) > 3 else "")
        return (f"the proportions test needs values that are all 0 or 1, and some segments have others: {shown}; "
                "use test: auto or a test of means for this column")
    return ones, totals


@register
class Proportions(TestMethod):
    """Homogeneity of proportions: Pearson's X^2 on ``k - 1`` df of the ``k x 2`` table."""

    name = "proportions"
    label = "test of homogeneity of proportions"
    statistic = "χ²"
    df_count = 1  # (k - 1,)
    posthoc = _NEWCOMBE
    many_to_one = _NEWCOMBE
    adjusted_covariance = None  # with adjust_for: no additive model of proportions is offered
    checks_apply = False  # the mean-based checks only re-test the proportions (see the module notes)
    transforms = False  # log(0) is undefined and log(1) = 0: a transform would destroy the counts

    def omnibus(self, segs: Segments) -> HomogeneityResult:
        c = counts(segs)
        if isinstance(c, str):
            k = len(segs.groups)
            return stats.proportions.HomogeneityResult(
                method=self.name, statistic=math.nan, df=(float(k - 1),), p_value=math.nan, note=c,
                n_total=sum(int(g.n) for g in segs.groups), k=k)
        return stats.proportions.homogeneity(*c)

    def effect_size(self, res: HomogeneityResult, confidence: float) -> EffectSize:
        """Cohen's w with its noncentral chi-square interval (NaN with the result's note)."""
        from monitor.model import EffectSize  # numpy-bearing: loaded when a result is made

        if not math.isfinite(res.statistic):
            return EffectSize("cohens_w", math.nan, note=res.note or "the test statistic is undefined")
        lo, hi = stats.proportions.cohens_w_interval(res.statistic, res.df[0], res.n_total, confidence)
        return EffectSize("cohens_w", res.effect, lo, hi)

    def pairs(self, segs: Segments, *, confidence: float, adjust: str) -> ProportionPairs:
        ones, totals = self._counts(segs)
        return stats.proportions.pairwise(segs.labels, ones, totals, confidence=confidence, adjust=adjust)

    def pairs_to_reference(self, segs: Segments, reference: str, *, confidence: float,
                           adjust: str) -> ProportionPairs:
        ones, totals = self._counts(segs)
        return stats.proportions.to_reference(segs.labels, ones, totals, reference, confidence=confidence,
                                              adjust=adjust)

    def versus_rest(self, segs: Segments, *, alpha: float) -> tuple[SegmentContrast, ...]:
        ones, totals = self._counts(segs)
        return stats.stepdown.proportion_vs_rest(segs.labels, ones, totals, alpha=alpha)

    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """None: the equal-spread check re-tests the proportions, normality does not apply."""
        return ()

    @staticmethod
    def _counts(segs: Segments) -> tuple[list[int], list[int]]:
        c = counts(segs)
        if isinstance(c, str):  # pairs run only after a computed omnibus; reaching here is a bug
            raise ValueError(c)
        return c


def _num(x) -> str:
    try:
        return f"{float(x):g}"
    except (TypeError, ValueError):
        return str(x)
