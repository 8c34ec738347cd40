"""Proportions: do the segments' shares of 1s differ, and which pairs differ by how much?

For a 0/1 metric (on time or late, claimed or not) a segment is summarised by two
counts: its records ``n`` and its 1s ``x`` (the sum of the column, so the database can
compute both). The ``k`` segments then form a ``k x 2`` table, and the question "do
the segments differ?" is the test of homogeneity of proportions.

* :func:`homogeneity` - Pearson's chi-square test of the ``k x 2`` table, with an
  exact (``k = 2``: Fisher's) or a Monte Carlo conditional p-value (``k > 2``) when
  expected counts are small.
* :func:`pairwise` - every pair of segments: the difference of proportions (in
  percentage points through :attr:`ProportionPair.diff_pp`), a two-proportion test
  with Holm's adjustment within the family, and Newcombe's hybrid score interval at
  the Bonferroni level, so that the intervals hold simultaneously.
* :func:`to_reference` - every other segment against one reference segment, with
  Holm's adjustment over those ``k - 1`` comparisons and Bonferroni-level Newcombe
  intervals.
* :func:`cohens_w_interval` - a confidence interval for Cohen's w from the
  noncentral chi-square distribution.
* :func:`counts_from_moments` - the counts of a segment whose values are all 0 or 1,
  recognised from its pushed-down summary alone.

Everything takes counts only; nothing here needs the values themselves.

Degenerate data policy
----------------------
As in :mod:`monitor.stats.omnibus`: nothing raises because of the data; a quantity
that cannot be computed is NaN with the reason in ``note``. For :func:`homogeneity`:

1. fewer than 2 segments: ``"fewer than 2 segments to compare (got k)"``;
2. a segment without records: ``"segment(s) at position(s) ... have no records;
   leave segments with n = 0 out before the test"``;
3. no variation: every value 0 (``"every value is 0 ..."``) or every value 1: the
   proportions are all equal and no statistic exists (Pearson's X^2 is 0/0).

A segment with no 1s (or no 0s) while others have some is *not* degenerate: its
proportion is 0 (or 1), the table has a zero cell and the test is computed (this is
where Welch's ANOVA on the same 0/1 values fails, because that segment's variance is
0). In :func:`pairwise` a pair whose two segments are both all 0 (or both all 1) has
difference 0 and p = 1 from Fisher's exact test; its interval is still defined.

:class:`ValueError` is raised only for wrong arguments (counts that are not whole
numbers, ``x > n``, mismatched lengths, a confidence outside (0, 1)).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from monitor.stats import multiplicity

__all__ = [
    "HomogeneityResult",
    "ProportionPair",
    "ProportionPairs",
    "MONTE_CARLO_RESAMPLES",
    "cohens_w_interval",
    "counts_from_moments",
    "homogeneity",
    "pairwise",
    "small_expected",
    "to_reference",
]

logger = logging.getLogger(__name__)

_NAN = float("nan")

#: Resampled tables for the Monte Carlo p-value of :func:`homogeneity` (``k > 2``, small
#: expected counts). Its standard error is ``sqrt(p (1 - p) / B)``: 0.0002 at p = 0.001.
MONTE_CARLO_RESAMPLES = 20_000

#: Expected counts below this count as small (Cochran 1954; common practice).
SMALL_EXPECTED = 5.0

#: ``R``'s tolerance when counting resampled statistics at least as large as the observed
#: one (``chisq.test`` compares with ``STATISTIC * (1 - 64 * .Machine$double.eps)``).
_ALMOST_ONE = 1.0 - 64 * np.finfo(float).eps


# ---------------------------------------------------------------------------
# result types
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class HomogeneityResult:
    """The test of homogeneity of proportions of one ``k x 2`` table.

    Attributes
    ----------
    method : str
        Always ``"proportions"``.
    statistic : float
        Pearson's X^2 (no continuity correction); NaN when undefined.
    df : tuple of float
        ``(k - 1,)``.
    p_value : float
        From ``p_method``; NaN when the statistic is.
    p_method : str
        ``"chi-square"`` (the asymptotic chi-square distribution), ``"fisher-exact"``
        (``k = 2`` with small expected counts) or ``"monte-carlo"`` (``k > 2`` with
        small expected counts; :attr:`resamples` tables).
    note : str or None
        Why the statistic is NaN (see the module's degenerate data policy), or why the
        p-value is not the asymptotic one.
    n_total, k : int
        Records and segments in the table.
    successes : int
        1s in the table (the sum of the column).
    min_expected : float
        Smallest expected count of the ``2k`` cells under homogeneity.
    effect : float
        Cohen's w, ``sqrt(X^2 / N)`` (for a ``k x 2`` table the same as Cramér's V);
        NaN when the statistic is.
    resamples : int
        Tables drawn for a Monte Carlo p-value, else 0.
    """

    method: str
    statistic: float
    df: tuple[float, ...]
    p_value: float
    p_method: str = "chi-square"
    note: str | None = None
    n_total: int = 0
    k: int = 0
    successes: int = 0
    min_expected: float = _NAN
    effect: float = _NAN
    resamples: int = 0

    @property
    def is_defined(self) -> bool:
        """True if the statistic could be computed."""
        return math.isfinite(self.statistic)

    def __str__(self) -> str:
        if not self.is_defined:
            return f"proportions: X^2 undefined ({self.note})"
        return (f"proportions: X^2 = {self.statistic:.6g}, df = {self.df[0]:g}, p = {self.p_value:.4g} "
                f"({self.p_method})")


@dataclass(frozen=True)
class ProportionPair:
    """One comparison of segment ``a``'s proportion with segment ``b``'s.

    Field names follow :class:`monitor.stats.posthoc.Pair`, so code reading pairs reads
    these too; ``diff``, ``se``, ``ci_low`` and ``ci_high`` are proportions (0 to 1).

    Attributes
    ----------
    a, b : str
    p_a, p_b : float
        The two proportions ``x / n``.
    diff : float
        ``p_a - p_b``.
    se : float
        The pooled standard error of ``diff`` under equal proportions.
    statistic : float
        The two-proportion z (pooled); NaN where the pooled proportion is 0 or 1.
    df : float
        ``inf`` (normal reference), kept for the field names of ``Pair``.
    p_raw, p_adj : float
        Unadjusted and family-adjusted p-values.
    ci_low, ci_high : float
        Newcombe's hybrid score interval for ``diff`` at the family's Bonferroni level.
    test : str
        ``"z"`` (pooled two-proportion z test) or ``"fisher-exact"`` (small expected
        counts in this pair's 2 x 2 table).
    """

    a: str
    b: str
    p_a: float
    p_b: float
    diff: float
    se: float
    statistic: float
    df: float
    p_raw: float
    p_adj: float
    ci_low: float
    ci_high: float
    test: str

    @property
    def diff_pp(self) -> float:
        """``diff`` in percentage points."""
        return 100.0 * self.diff

    @property
    def ci_pp(self) -> tuple[float, float]:
        """The interval in percentage points."""
        return 100.0 * self.ci_low, 100.0 * self.ci_high


@dataclass(frozen=True)
class ProportionPairs:
    """All pairs of segments of one table.

    Attributes
    ----------
    method : str
        ``"newcombe"`` (the interval) with the test adjustment in ``adjust``.
    pairs : tuple of ProportionPair
        For ``i < j`` in the given order, ``a = labels[i]``, ``b = labels[j]``.
    confidence : float
        Simultaneous confidence of the intervals (Bonferroni over the pairs).
    adjust : str
        The adjustment of ``p_adj`` (see :func:`monitor.stats.multiplicity.adjust`).
    note : str or None
    reference : str or None
        The reference segment of :func:`to_reference` (``b`` of every pair), else None.
    """

    method: str
    pairs: tuple[ProportionPair, ...]
    confidence: float
    adjust: str
    note: str | None = None
    reference: str | None = None

    def __str__(self) -> str:
        lines = [f"pairs of proportions (Newcombe intervals, {100 * self.confidence:g}% simultaneous; "
                 f"p adjusted by {self.adjust})"]
        for p in self.pairs:
            lo, hi = p.ci_pp
            lines.append(f"{p.a} - {p.b}: {p.diff_pp:+.2f} pp [{lo:+.2f}, {hi:+.2f}], p_adj = {p.p_adj:.4g}")
        if self.note:
            lines.append(f"note: {self.note}")
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# input validation (the edge of this module)
# ---------------------------------------------------------------------------
def _whole(values, name: str) -> np.ndarray:
    arr = np.asarray([float(v) for v in values], dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a sequence of counts")
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must be non-negative whole numbers; got {list(values)!r}")
    rounded = np.round(arr)
    if np.any(np.abs(arr - rounded) > 1e-6 * np.maximum(1.0, arr)):
        raise ValueError(f"{name} must be whole numbers (counts); got {list(values)!r}")
    return rounded.astype(np.int64)


def _check_counts(successes, totals) -> tuple[np.ndarray, np.ndarray]:
    x = _whole(successes, "successes")
    n = _whole(totals, "totals")
    if x.shape != n.shape:
        raise ValueError(f"successes has {x.size} entries for {n.size} totals")
    if np.any(x > n):
        i = int(np.flatnonzero(x > n)[0])
        raise ValueError(f"successes[{i}] = {x[i]} exceeds totals[{i}] = {n[i]}")
    return x, n


def _check_confidence(confidence: float) -> float:
    if not (0.0 < float(confidence) < 1.0):
        raise ValueError(f"confidence must lie strictly between 0 and 1; got {confidence!r}")
    return float(confidence)


# ---------------------------------------------------------------------------
# the omnibus test
# ---------------------------------------------------------------------------
def _check_family(labels, successes, totals, confidence: float,
                  adjust: str) -> tuple[tuple[str, ...], np.ndarray, np.ndarray, float]:
    """The arguments of a family of pairs, checked: labels as text (one per segment), counts,
    the confidence and the adjustment's name."""
    x, n = _check_counts(successes, totals)
    labels = tuple(str(s) for s in labels)
    if len(labels) != x.size:
        raise ValueError(f"labels has {len(labels)} entries for {x.size} segments")
    confidence = _check_confidence(confidence)
    if adjust not in multiplicity.METHODS:
        raise ValueError(f"unknown adjustment {adjust!r}; accepted: {', '.join(multiplicity.METHODS)}")
    return labels, x, n, confidence


def _expected(x: np.ndarray, n: np.ndarray) -> np.ndarray:
    share = x.sum() / n.sum()
    return np.concatenate([n * share, n * (1.0 - share)])


def small_expected(expected: np.ndarray) -> bool:
    """Whether the chi-square approximation is doubtful for these expected counts.

    Cochran's (1954) rule, common practice: no expected count below 1 and at most 20%
    of them below 5 (:data:`SMALL_EXPECTED`); otherwise the counts are "small".

    References
    ----------
    .. [1] Cochran, W. G. (1954). Some methods for strengthening the common chi-square
       tests. Biometrics 10(4), 417-451.
    """
    e = np.asarray(expected, dtype=float)
    return bool(e.min() < 1.0 or np.mean(e < SMALL_EXPECTED) > 0.2)


def _pearson(x: np.ndarray, n: np.ndarray, share: float) -> np.ndarray:
    """Pearson's X^2 of ``k x 2`` tables with rows ``x`` (last axis the segments).

    For a ``k x 2`` table the two cells of a row contribute together
    ``(x_j - n_j s)^2 / (n_j s (1 - s))`` with ``s`` the pooled proportion.
    """
    return np.sum((x - n * share) ** 2 / (n * share * (1.0 - share)), axis=-1)


def _monte_carlo_p(x: np.ndarray, n: np.ndarray, observed: float, resamples: int) -> float:
    """The conditional p-value of X^2 by resampling tables with the observed margins.

    Given both margins, the 1s of the table are spread over the segments by the
    multivariate hypergeometric distribution (the null distribution of Fisher's and
    Freeman-Halton's exact tests). The generator is seeded by the table itself, so the
    same counts always give the same p-value.
    """
    seed = np.random.SeedSequence([int(v) for v in np.concatenate([n, x])] + [resamples])
    rng = np.random.default_rng(seed)
    total = int(x.sum())
    draws = rng.multivariate_hypergeometric(n, total, size=resamples, method="marginals")
    share = total / n.sum()
    simulated = _pearson(draws.astype(float), n.astype(float), share)
    hits = int(np.count_nonzero(simulated >= observed * _ALMOST_ONE))
    return (1 + hits) / (resamples + 1)


def homogeneity(successes: Sequence[float], totals: Sequence[float], *,
                exact: str = "auto", resamples: int = MONTE_CARLO_RESAMPLES) -> HomogeneityResult:
    """Test whether ``k`` segments share one proportion of 1s.

    Parameters
    ----------
    successes, totals : sequence of whole numbers
        Per segment: the 1s (the column's sum) and the records.
    exact : {'auto', 'never', 'always'}
        When to replace the chi-square p-value by the exact (``k = 2``) or Monte Carlo
        (``k > 2``) conditional one: ``'auto'`` when expected counts are small
        (:func:`small_expected`), or always, or never.
    resamples : int
        Tables drawn for the Monte Carlo p-value (at least 999).

    Returns
    -------
    HomogeneityResult

    Notes
    -----
    Pearson's statistic for the ``k x 2`` table of ``x_j`` 1s and ``n_j - x_j`` 0s,
    with pooled proportion ``s = sum x / sum n``, is
    ``X^2 = sum_j (x_j - n_j s)^2 / (n_j s (1 - s))`` on ``k - 1`` degrees of freedom
    [1]_ (Agresti 2013, sec. 3.2; for ``k = 2`` it is the square of the pooled
    two-proportion z). It is the same number as R's ``prop.test(x, n, correct =
    FALSE)`` and ``chisq.test(cbind(x, n - x), correct = FALSE)``, and scipy's
    ``chi2_contingency(..., correction=False)``.

    Small expected counts. The chi-square approximation is held doubtful by
    Cochran's rule (:func:`small_expected`, common practice). Then the p-value is
    conditional on both margins of the table:

    * ``k = 2``: Fisher's exact test, two-sided by summing the probabilities of the
      tables no more probable than the observed one (as R's ``fisher.test``) [2]_;
    * ``k > 2``: Monte Carlo estimate of the exact conditional p-value of X^2,
      ``(1 + #{X^2_b >= X^2}) / (B + 1)`` over ``B`` tables drawn with the observed
      margins (as R's ``chisq.test(simulate.p.value = TRUE)``, Hope 1968 [3]_; the
      ``+1`` keeps the estimate a valid p-value, Davison & Hinkley 1997, sec. 4.2).
      An exact enumeration (Freeman-Halton) is not used: its number of tables grows
      quickly with ``k`` (a week of 50 depots with 70 late parcels is beyond reach),
      while the Monte Carlo value costs ``B x k`` draws. The draws are seeded by the
      counts, so the p-value is a function of the table.

    Yates' continuity correction is not offered: it is defined for 2 x 2 tables only
    and is conservative there (Agresti 2013, sec. 3.5.6); the exact test replaces it
    where the approximation is in doubt.

    References
    ----------
    .. [1] Agresti, A. (2013). Categorical Data Analysis, 3rd ed. Wiley, sec. 3.2 and 3.5.
    .. [2] Fisher, R. A. (1935). The logic of inductive inference. Journal of the
       Royal Statistical Society 98(1), 39-82.
    .. [3] Hope, A. C. A. (1968). A simplified Monte Carlo significance test
       procedure. Journal of the Royal Statistical Society B 30(3), 582-598.
    """
    x, n = _check_counts(successes, totals)
    if exact not in ("auto", "never", "always"):
        raise ValueError(f"exact must be 'auto', 'never' or 'always'; got {exact!r}")
    if int(resamples) < 999:
        raise ValueError(f"resamples must be at least 999; got {resamples!r}")
    k = int(x.size)
    df = (float(k - 1),) if k >= 1 else (_NAN,)
    base = dict(method="proportions", df=df, n_total=int(n.sum()), k=k, successes=int(x.sum()))
    if k < 2:
        return HomogeneityResult(statistic=_NAN, p_value=_NAN,
                                 note=f"fewer than 2 segments to compare (got {k})", **base)
    empty = np.flatnonzero(n == 0)
    if empty.size:
        pos = ", ".join(str(i + 1) for i in empty)
        return HomogeneityResult(statistic=_NAN, p_value=_NAN,
                                 note=f"segment(s) at position(s) {pos} have no records; "
                                      "leave segments with n = 0 out before the test", **base)
    total = int(x.sum())
    if total == 0 or total == int(n.sum()):
        value = 0 if total == 0 else 1
        return HomogeneityResult(statistic=_NAN, p_value=_NAN,
                                 note=f"every value is {value} in every segment: the proportions are all "
                                      f"{value} and cannot differ", **base)
    nf = n.astype(float)
    share = total / nf.sum()
    expected = _expected(x.astype(float), nf)
    statistic = float(_pearson(x.astype(float), nf, share))
    effect = math.sqrt(statistic / nf.sum())
    small = small_expected(expected)
    use_exact = exact == "always" or (exact == "auto" and small)
    note = None
    if not use_exact:
        p = float(stats.chi2.sf(statistic, k - 1))
        how, drawn = "chi-square", 0
    elif k == 2:
        table = np.array([[x[0], n[0] - x[0]], [x[1], n[1] - x[1]]])
        p = float(stats.fisher_exact(table, alternative="two-sided").pvalue)
        how, drawn = "fisher-exact", 0
    else:
        p = _monte_carlo_p(x, n, statistic, int(resamples))
        how, drawn = "monte-carlo", int(resamples)
    if use_exact and small:
        note = (f"small expected counts (smallest {expected.min():.3g}; Cochran's rule): "
                f"p-value from the {'exact' if how == 'fisher-exact' else 'Monte Carlo conditional'} test")
    return HomogeneityResult(statistic=statistic, p_value=min(1.0, p), p_method=how, note=note,
                             min_expected=float(expected.min()), effect=effect, resamples=drawn, **base)


# ---------------------------------------------------------------------------
# pairs
# ---------------------------------------------------------------------------
def _wilson(x: float, n: float, z: float) -> tuple[float, float]:
    """Wilson's (1927) score interval for one proportion."""
    p = x / n
    denom = n + z * z
    centre = (x + z * z / 2.0) / denom
    half = z * math.sqrt(n) / denom * math.sqrt(p * (1.0 - p) + z * z / (4.0 * n))
    return max(0.0, centre - half), min(1.0, centre + half)


def newcombe_interval(x1: float, n1: float, x2: float, n2: float, confidence: float) -> tuple[float, float]:
    """Newcombe's hybrid score interval for ``x1/n1 - x2/n2``.

    Notes
    -----
    Method 10 of Newcombe (1998) [1]_: with Wilson intervals ``(l_i, u_i)`` for the two
    proportions at the same level, the interval is
    ``d - sqrt((p1 - l1)^2 + (u2 - p2)^2)`` to ``d + sqrt((u1 - p1)^2 + (p2 - l2)^2)``.
    It keeps close to its nominal coverage for small counts and proportions near 0 or
    1, where the Wald interval fails (Newcombe 1998; Agresti & Caffo 2000 [2]_), and
    stays inside [-1, 1]. statsmodels calls it ``method='newcomb'`` in
    ``confint_proportions_2indep``.

    References
    ----------
    .. [1] Newcombe, R. G. (1998). Interval estimation for the difference between
       independent proportions: comparison of eleven methods. Statistics in Medicine
       17(8), 873-890.
    .. [2] Agresti, A. & Caffo, B. (2000). Simple and effective confidence intervals
       for proportions and differences of proportions result from adding two
       successes and two failures. The American Statistician 54(4), 280-288.
    """
    z = float(stats.norm.isf((1.0 - confidence) / 2.0))
    p1, p2 = x1 / n1, x2 / n2
    l1, u1 = _wilson(x1, n1, z)
    l2, u2 = _wilson(x2, n2, z)
    d = p1 - p2
    return d - math.sqrt((p1 - l1) ** 2 + (u2 - p2) ** 2), d + math.sqrt((u1 - p1) ** 2 + (p2 - l2) ** 2)


def _pair_test(x1: int, n1: int, x2: int, n2: int) -> tuple[float, float, float, str]:
    """(se, z, p, test) for one pair: pooled z, or Fisher's exact with small expected counts."""
    pooled = (x1 + x2) / (n1 + n2)
    se = math.sqrt(pooled * (1.0 - pooled) * (1.0 / n1 + 1.0 / n2))
    exp = np.array([n1 * pooled, n1 * (1 - pooled), n2 * pooled, n2 * (1 - pooled)])
    z = (x1 / n1 - x2 / n2) / se if se > 0 else _NAN
    if exp.min() < SMALL_EXPECTED:
        p = float(stats.fisher_exact([[x1, n1 - x1], [x2, n2 - x2]]).pvalue)
        return se, z, min(1.0, p), "fisher-exact"
    return se, z, float(2.0 * stats.norm.sf(abs(z))), "z"


def pairwise(labels: Sequence[str], successes: Sequence[float], totals: Sequence[float], *,
             confidence: float = 0.95, adjust: str = "holm") -> ProportionPairs:
    """Compare every pair of segments' proportions.

    Parameters
    ----------
    labels : sequence of str
    successes, totals : sequence of whole numbers
        Per segment, 1s and records (every ``n >= 1``; leave empty segments out).
    confidence : float
        Simultaneous confidence of the family of intervals.
    adjust : {'holm', 'bonferroni', 'bh', 'by', 'none'}
        Adjustment of the pairs' p-values within the family.

    Returns
    -------
    ProportionPairs

    Notes
    -----
    * Test: the pooled two-proportion z test (the score test of equal proportions;
      its square is Pearson's X^2 of the pair's 2 x 2 table, R's ``prop.test(...,
      correct = FALSE)``), or Fisher's exact test when an expected count of the pair's
      table is below 5 (common practice; Campbell 2007 [2]_ compares the choices).
    * Adjustment: Holm's (1979) step-down by default [1]_, which controls the
      probability of any false pair within the metric.
    * Intervals: Newcombe's hybrid score interval (:func:`newcombe_interval`) at the
      Bonferroni level ``1 - (1 - confidence) / m`` for the ``m = k (k - 1) / 2``
      pairs, so that all hold together with probability at least ``confidence``
      (Holm's procedure has no matching intervals). Test and interval are different
      constructions: near the boundary a pair can be significant while its interval
      just touches 0, or the reverse.

    References
    ----------
    .. [1] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
       Scandinavian Journal of Statistics 6(2), 65-70.
    .. [2] Campbell, I. (2007). Chi-squared and Fisher-Irwin tests of two-by-two
       tables with small sample recommendations. Statistics in Medicine 26(19),
       3661-3675.
    .. [3] Newcombe, R. G. (1998). Interval estimation for the difference between
       independent proportions: comparison of eleven methods. Statistics in Medicine
       17(8), 873-890.
    """
    labels, x, n, confidence = _check_family(labels, successes, totals, confidence, adjust)
    k = x.size
    if k < 2:
        return ProportionPairs("newcombe", (), confidence, adjust, note=f"fewer than 2 segments to compare (got {k})")
    index = [(i, j) for i in range(k) for j in range(i + 1, k)]
    m = len(index)
    level = 1.0 - (1.0 - confidence) / m
    raw = []
    for i, j in index:
        if n[i] == 0 or n[j] == 0:
            raw.append(None)
            continue
        raw.append(_pair_test(int(x[i]), int(n[i]), int(x[j]), int(n[j])))
    p_raw = np.array([r[2] if r is not None else np.nan for r in raw])
    p_adj = multiplicity.adjust(p_raw, adjust)
    pairs = []
    empty = set()
    for (i, j), r, pa in zip(index, raw, p_adj):
        if r is None:
            empty.update(s for s in (i, j) if n[s] == 0)
            pairs.append(ProportionPair(labels[i], labels[j], *(_NAN,) * 5, float("inf"), *(_NAN,) * 4, "none"))
            continue
        se, z, p, test = r
        lo, hi = newcombe_interval(float(x[i]), float(n[i]), float(x[j]), float(n[j]), level)
        pi, pj = x[i] / n[i], x[j] / n[j]
        pairs.append(ProportionPair(labels[i], labels[j], float(pi), float(pj), float(pi - pj), se, z,
                                    float("inf"), p, float(pa), lo, hi, test))
    note = None
    if empty:
        note = ("no records in " + ", ".join(labels[s] for s in sorted(empty))
                + ": their pairs are NaN; leave segments with n = 0 out before the comparison")
    return ProportionPairs("newcombe", tuple(pairs), confidence, adjust, note)


def to_reference(labels: Sequence[str], successes: Sequence[float], totals: Sequence[float], reference: str, *,
                 confidence: float = 0.95, adjust: str = "holm") -> ProportionPairs:
    """Compare every other segment's proportion with the ``reference`` segment's.

    Parameters
    ----------
    labels : sequence of str
        Segment names; ``reference`` must be one of them.
    successes, totals : sequence of whole numbers
        Per segment, 1s and records.
    reference : str
    confidence : float
        Simultaneous confidence of the ``k - 1`` intervals.
    adjust : {'holm', 'bonferroni', 'bh', 'by', 'none'}
        Adjustment of the p-values over the ``k - 1`` comparisons.

    Returns
    -------
    ProportionPairs
        One pair per other segment in label order, ``a`` = that segment, ``b`` =
        ``reference``, ``diff = p_a - p_reference``; ``reference`` is set.

    Notes
    -----
    Each comparison is the pair test of :func:`pairwise` (pooled two-proportion z, or
    Fisher's exact test when an expected count of the pair's 2 x 2 table is below 5).
    The family is the ``k - 1`` comparisons with the reference only, so Holm's (1979)
    step-down over ``k - 1`` p-values controls the chance of any false gap [1]_; the
    tests share the reference's counts and are positively correlated, where Holm's
    procedure stays valid (it needs no independence) but is conservative against a
    Dunnett-type joint distribution. The Newcombe (1998) hybrid score intervals are at
    the Bonferroni level ``1 - (1 - confidence) / (k - 1)`` [2]_, so that they hold
    together with probability at least ``confidence``.

    References
    ----------
    .. [1] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
       Scandinavian Journal of Statistics 6(2), 65-70.
    .. [2] Newcombe, R. G. (1998). Interval estimation for the difference between
       independent proportions: comparison of eleven methods. Statistics in Medicine
       17(8), 873-890.
    """
    labels, x, n, confidence = _check_family(labels, successes, totals, confidence, adjust)
    if reference not in labels:
        known = ", ".join(repr(v) for v in labels) or "none"
        raise ValueError(f"reference {reference!r} is not one of the labels ({known})")
    ref = labels.index(reference)
    others = [i for i in range(x.size) if i != ref]
    if not others:
        return ProportionPairs("newcombe", (), confidence, adjust,
                               note="no segment besides the reference to compare", reference=reference)
    level = 1.0 - (1.0 - confidence) / len(others)
    raw = [None if n[i] == 0 or n[ref] == 0 else _pair_test(int(x[i]), int(n[i]), int(x[ref]), int(n[ref]))
           for i in others]
    p_adj = multiplicity.adjust(np.array([r[2] if r is not None else np.nan for r in raw]), adjust)
    pairs, empty = [], []
    for i, r, pa in zip(others, raw, p_adj):
        if r is None:
            empty.extend(s for s in (i, ref) if n[s] == 0 and labels[s] not in empty)
            pairs.append(ProportionPair(labels[i], reference, *(_NAN,) * 5, float("inf"), *(_NAN,) * 4, "none"))
            continue
        se, z, p, test = r
        lo, hi = newcombe_interval(float(x[i]), float(n[i]), float(x[ref]), float(n[ref]), level)
        pi, pr = x[i] / n[i], x[ref] / n[ref]
        pairs.append(ProportionPair(labels[i], reference, float(pi), float(pr), float(pi - pr), se, z,
                                    float("inf"), p, float(pa), lo, hi, test))
    note = None
    if empty:
        note = ("no records in " + ", ".join(labels[s] for s in sorted(set(empty)))
                + ": their comparisons are NaN; leave segments with n = 0 out before the comparison")
    return ProportionPairs("newcombe", tuple(pairs), confidence, adjust, note, reference)


def cohens_w_interval(statistic: float, df: float, n_total: int,
                      confidence: float = 0.95) -> tuple[float, float]:
    """A confidence interval for Cohen's w from Pearson's X^2.

    Notes
    -----
    Cohen's w is ``sqrt(X^2 / N)`` (Cohen 1988, ch. 7 [1]_; for a ``k x 2`` table it
    equals Cramér's V, and its square is the eta squared of a one-way ANOVA of the
    0/1 values). Under a fixed effect X^2 is approximately noncentral chi-square on
    ``df`` degrees of freedom with noncentrality ``lambda = N w^2``; the interval
    inverts that distribution function in ``lambda`` ("pivoting the cdf", Smithson
    2003 [2]_, Steiger 2004) and returns ``sqrt(lambda / N)`` at both ends (a limit
    is 0 when even ``lambda = 0`` leaves too little probability below X^2).

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Erlbaum.
    .. [2] Smithson, M. (2003). Confidence Intervals. Thousand Oaks, CA: Sage
       (noncentral chi-square intervals, ch. 5).
    """
    from scipy import optimize, special

    confidence = _check_confidence(confidence)
    if not (math.isfinite(statistic) and statistic >= 0 and df > 0 and n_total > 0):
        return _NAN, _NAN

    def cdf(lam: float) -> float:
        return float(special.chndtr(statistic, df, lam)) if lam > 0 else float(stats.chi2.cdf(statistic, df))

    def solve(target: float) -> float:
        if cdf(0.0) <= target:
            return 0.0
        upper = max(1.0, 2.0 * statistic)
        for _ in range(200):
            if cdf(upper) < target:
                break
            upper *= 2.0
        else:  # pragma: no cover - the cdf tends to 0 as lambda grows
            return _NAN
        return float(optimize.brentq(lambda lam: cdf(lam) - target, 0.0, upper, xtol=1e-10, rtol=1e-12))

    lo, hi = solve((1.0 + confidence) / 2.0), solve((1.0 - confidence) / 2.0)
    return math.sqrt(lo / n_total), math.sqrt(hi / n_total)


# ---------------------------------------------------------------------------
# recognising 0/1 data from a summary
# ---------------------------------------------------------------------------
def counts_from_moments(moments) -> tuple[int, int] | None:
    """``(ones, n)`` of a segment whose values are all 0 or 1, from its summary; else None.

    Parameters
    ----------
    moments : monitor.stats.summary.Moments

    Notes
    -----
    For values in [0, 1], ``x^2 <= x`` with equality exactly at 0 and 1, so
    ``sum x^2 = sum x`` if and only if every value is 0 or 1. In central moments, with
    ``p`` the mean, ``sum x - sum x^2 = n p (1 - p) - M2``: the values are all 0/1 when
    the smallest is at least 0, the largest at most 1 and ``M2 = n p (1 - p)`` (to
    rounding). The count of 1s is then ``n p``. A summary of no values gives None.
    """
    n = int(moments.n)
    if n == 0:
        return None
    lo, hi, mean, m2 = (float(moments.min), float(moments.max), float(moments.mean), float(moments.m2))
    if not all(math.isfinite(v) for v in (lo, hi, mean, m2)):
        return None
    if lo not in (0.0, 1.0) or hi not in (0.0, 1.0):
        return None
    ones = n * mean
    if abs(ones - round(ones)) > 1e-6 * max(1.0, n):
        return None
    if abs(n * mean * (1.0 - mean) - m2) > 1e-9 * max(1.0, n):
        return None
    return int(round(ones)), n
