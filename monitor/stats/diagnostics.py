"""Assumption checks behind the choice of omnibus test, and the ``auto`` rule.

Fisher's one-way ANOVA assumes normal errors with one common variance; Welch's
ANOVA drops the common variance; Kruskal-Wallis drops normality. Five checks
describe how far one period's data are from those assumptions, each as a small
:class:`Check` with a value, the threshold it was held against, a verdict and
one plain sentence:

==================  ==============================================  ============
name                value                                           passes when
==================  ==============================================  ============
``brown_forsythe``  p of Brown-Forsythe's test of equal spreads      p >= alpha
``normality``       smallest Holm-adjusted per-segment normality p   p >= alpha
``sd_ratio``        largest / smallest segment standard deviation    <= 2.0
``n_ratio``         largest / smallest segment size                  <= 4.0
``outlier_share``   share of values beyond Tukey's far fences        <= 0.05
==================  ==============================================  ============

:func:`choose_method` turns the checks into the ``auto`` method: strong
non-normality in small segments -> ``'kruskal'``; else unequal spreads ->
``'welch'``; else ``'anova'``.

A check that cannot be computed (too few segments or records, no spread, no raw
values) has ``passed=None``, ``value`` NaN and says why in ``detail``; it never
raises on data.

Example
-------
>>> import numpy as np
>>> from monitor.stats.summary import Moments
>>> rng = np.random.default_rng(0)
>>> samples = [rng.normal(10, 1, 40), rng.normal(10, 5, 40)]
>>> groups = [Moments.from_values(s) for s in samples]
>>> checks = run_checks(["North", "Port"], groups, samples)
>>> checks["sd_ratio"].passed
False
>>> choose_method(groups, samples, checks).method
'welch'
"""

from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import stats

from monitor.model import Check
from monitor.stats.posthoc import (
    _as_float_groups,
    _check_groups,
    _check_labels,
    _check_samples,
    adjust_family,
)
from monitor.stats.proportions import counts_from_moments

if TYPE_CHECKING:  # pragma: no cover - typing only
    from monitor.stats.summary import Moments

try:  # the Fortran routine behind scipy.stats.shapiro (AS R94), used on values sorted once here
    from scipy.stats import _morestats as _scipy_morestats

    _SWILK = getattr(_scipy_morestats, "swilk", None)
except ImportError:  # pragma: no cover - another scipy layout: scipy.stats.shapiro is used instead
    _SWILK = None

__all__ = [
    "CHECK_NAMES",
    "Check",
    "MethodChoice",
    "SMALL_SEGMENT_N",
    "SKEWNESS_LIMIT",
    "brown_forsythe",
    "choose_method",
    "median_of_sorted",
    "n_ratio",
    "normality",
    "outlier_share",
    "quantiles_of_sorted",
    "run_checks",
    "sd_ratio",
]

logger = logging.getLogger(__name__)

_NAN = float("nan")

#: Keys of :func:`run_checks`'s result, in order.
CHECK_NAMES = ("brown_forsythe", "normality", "sd_ratio", "n_ratio", "outlier_share")

#: A segment smaller than this is "small" for the ``auto`` rule (common practice:
#: below about 30 records the central limit theorem cannot be leaned on).
SMALL_SEGMENT_N = 30

#: |skewness| above this in a small segment is "strong" (common practice).
FISHER_SIZE_RATIO = 1.5  # Fisher's ANOVA only when the largest/smallest segment size is at most this
SKEWNESS_LIMIT = 2.0


@dataclass(frozen=True)
class MethodChoice:
    """The omnibus method picked by the ``auto`` rule, and why.

    Attributes
    ----------
    method : {'anova', 'welch', 'kruskal'}
    reason : str
        One plain sentence citing the check values that decided.
    """

    method: str
    reason: str


# ---------------------------------------------------------------------------
# the checks
# ---------------------------------------------------------------------------
def brown_forsythe(
    samples: Sequence[np.ndarray],
    alpha: float = 0.05,
    *,
    labels: Sequence[str] | None = None,
    presorted: Sequence[np.ndarray] | None = None,
) -> Check:
    """Brown-Forsythe test of equal spreads across segments.

    Parameters
    ----------
    samples : sequence of 1-D arrays
        Raw finite values per segment; empty segments are left out.
    alpha : float, optional
        Level of the test (default 0.05).
    labels : sequence of str, optional
        Segment names, for messages.
    presorted : sequence of 1-D arrays, optional
        The same samples, each sorted ascending (``numpy.sort``), when the
        caller has them: the medians are then read off instead of found
        again. Trusted, not checked. The result is the same either way.

    Returns
    -------
    Check
        ``name='brown_forsythe'``, ``value`` = p-value, ``threshold`` = alpha,
        ``passed = p >= alpha``.

    Notes
    -----
    Levene's test [1]_ with the median as centre, as proposed by Brown and
    Forsythe [2]_: the one-way ANOVA F test applied to
    ``z_ij = |x_ij - median_i|``, on ``k - 1`` and ``N - k`` df. Robust to
    non-normal (skewed, heavy-tailed) data, where Bartlett's test is not.
    Assumes independent records. It is a test, so with many records it finds
    trivial differences; read it with :func:`sd_ratio`.

    Not computed (``passed=None``): fewer than two segments with records,
    ``N - k < 1``, or absolute deviations constant within every segment.

    References
    ----------
    .. [1] Levene, H. (1960). Robust tests for equality of variances. In
       Contributions to Probability and Statistics (I. Olkin, ed.), 278-292.
       Stanford University Press.
    .. [2] Brown, M. B. and Forsythe, A. B. (1974). Robust tests for the
       equality of variances. JASA 69(346), 364-367.
    """
    _check_alpha(alpha, "alpha")
    labels, arrays = _labelled_samples(samples, labels)
    name = "brown_forsythe"
    if presorted is not None:
        medians = [median_of_sorted(s) for a, s in zip(arrays, presorted) if a.size > 0]
    arrays = [a for a in arrays if a.size > 0]
    k = len(arrays)
    big_n = sum(a.size for a in arrays)
    if k < 2:
        return Check(name, _NAN, alpha, None,
                     "Brown-Forsythe test needs at least two segments with records; "
                     f"found {k}.")
    if big_n - k < 1:
        return Check(name, _NAN, alpha, None,
                     "Brown-Forsythe test is undefined because every segment has a single record.")
    if presorted is None:
        medians = [np.median(a) for a in arrays]
    z = [np.abs(a - m) for a, m in zip(arrays, medians)]
    # F is unchanged when every distance is divided by one constant: divide by the largest,
    # so that the squares below cannot overflow for finite data of any size (1e300 and up)
    top = max(float(zi.max()) for zi in z)
    if 0 < top < math.inf:
        z = [zi / top for zi in z]
    z_means = np.array([zi.mean() for zi in z])
    sizes = np.array([zi.size for zi in z], dtype=float)
    grand = float(np.sum(sizes * z_means) / big_n)
    ss_between = float(np.sum(sizes * (z_means - grand) ** 2))
    ss_within = float(sum(np.sum((zi - m) ** 2) for zi, m in zip(z, z_means)))
    scale = float(sum(np.sum(zi**2) for zi in z))
    if not ss_within > 1e-12 * scale:
        return Check(name, _NAN, alpha, None,
                     "Brown-Forsythe test is undefined because the distances from the median "
                     "do not vary within any segment.")
    f_stat = (ss_between / (k - 1)) / (ss_within / (big_n - k))
    p = float(stats.f.sf(f_stat, k - 1, big_n - k))
    passed = p >= alpha
    verdict = "is below" if not passed else "is at or above"
    meaning = "spreads differ between segments" if not passed else "no sign of unequal spreads"
    return Check(name, p, alpha, passed,
                 f"Brown-Forsythe p {_p(p)} {verdict} {_num(alpha)}: {meaning}.")


def normality(
    samples: Sequence[np.ndarray],
    alpha: float = 0.01,
    max_shapiro_n: int = 5000,
    *,
    labels: Sequence[str] | None = None,
    presorted: Sequence[np.ndarray] | None = None,
) -> Check:
    """Per-segment normality tests, combined with Holm's adjustment.

    Parameters
    ----------
    samples : sequence of 1-D arrays
        Raw finite values per segment.
    alpha : float, optional
        Level for the combined verdict (default 0.01).
    max_shapiro_n : int, optional
        Largest segment tested with Shapiro-Wilk (default 5000, scipy's limit);
        larger segments use D'Agostino-Pearson. From 20 to 5000.
    labels : sequence of str, optional
        Segment names, for messages.
    presorted : sequence of 1-D arrays, optional
        The same samples, each sorted ascending (``numpy.sort``), when the
        caller has them: Shapiro-Wilk then skips its own sort. Trusted, not
        checked. The p-values are the same either way (see :func:`_shapiro_p`).

    Returns
    -------
    Check
        ``name='normality'``; ``value`` is the smallest Holm-adjusted p-value
        over the tested segments (equivalently: Holm's procedure rejects
        normality in some segment iff ``value < alpha``); ``threshold`` = alpha.

    Notes
    -----
    Segments with 3 to ``max_shapiro_n`` records: Shapiro-Wilk [1]_
    (``scipy.stats.shapiro``). Larger ones: D'Agostino-Pearson's omnibus K^2
    [2]_ (``scipy.stats.normaltest``). Segments with fewer than 3 records or no
    spread are not tested. The per-segment p-values are adjusted with Holm [3]_
    over the tested segments, so the check's false alarm rate is at most
    ``alpha`` whatever ``k`` is.

    With thousands of records every test rejects trivially small departures,
    and with a handful none rejects anything; this is why :func:`choose_method`
    acts on a failed normality check only when some segment is small.

    References
    ----------
    .. [1] Shapiro, S. S. and Wilk, M. B. (1965). An analysis of variance test
       for normality (complete samples). Biometrika 52(3/4), 591-611.
    .. [2] D'Agostino, R. B. and Pearson, E. S. (1973). Tests for departure from
       normality. Empirical results for the distributions of b2 and sqrt(b1).
       Biometrika 60(3), 613-622.
    .. [3] Holm, S. (1979). A simple sequentially rejective multiple test
       procedure. Scandinavian Journal of Statistics 6(2), 65-70.
    """
    _check_alpha(alpha, "alpha")
    if isinstance(max_shapiro_n, bool) or not isinstance(max_shapiro_n, (int, np.integer)) or not (
        20 <= max_shapiro_n <= 5000
    ):
        raise ValueError(f"max_shapiro_n must be a whole number from 20 to 5000; got {max_shapiro_n!r}")
    labels, arrays = _labelled_samples(samples, labels)
    name = "normality"
    tested: list[tuple[str, int, str, float]] = []  # label, n, test, p
    skipped = 0
    for i, (label, a) in enumerate(zip(labels, arrays)):
        if presorted is not None:
            ordered = presorted[i]
            flat = a.size < 3 or float(ordered[0]) == float(ordered[-1])
        else:
            ordered = None
            flat = a.size < 3 or float(a.min()) == float(a.max())
        if flat:
            skipped += 1
            continue
        if a.size <= max_shapiro_n:
            tested.append((label, a.size, "Shapiro-Wilk", _shapiro_p(a, ordered)))
        else:
            tested.append((label, a.size, "D'Agostino-Pearson", float(stats.normaltest(a).pvalue)))
    if not tested:
        return Check(name, _NAN, alpha, None,
                     "Normality could not be checked: no segment has 3 or more records with some spread.")
    adjusted = adjust_family([t[3] for t in tested], "holm")
    worst = int(np.argmin([t[3] for t in tested]))
    value = float(adjusted[worst])
    passed = value >= alpha
    label, n, test, _ = tested[worst]
    verdict = "is below" if not passed else "is at or above"
    text = (f"smallest Holm-adjusted normality p {_p(value)} (segment {label!r}, {test}, n={n}) "
            f"{verdict} {_num(alpha)}")
    if skipped:
        text += (f"; {skipped} segment{'s' if skipped != 1 else ''} with fewer than 3 records "
                 "or no spread not tested")
    return Check(name, value, alpha, passed, _sentence(text))


def sd_ratio(
    groups: Sequence[Moments], threshold: float = 2.0, *, labels: Sequence[str] | None = None
) -> Check:
    """Ratio of the largest to the smallest segment standard deviation.

    Parameters
    ----------
    groups : sequence of Moments
        Per-segment summaries; segments with fewer than 2 records are left out.
    threshold : float, optional
        Largest acceptable ratio (default 2.0, common practice).
    labels : sequence of str, optional
        Segment names, for messages.

    Returns
    -------
    Check
        ``name='sd_ratio'``, ``passed = ratio <= threshold``.

    Notes
    -----
    A rule of thumb (common practice, no single source): a ratio above about 2
    is read as a sign of unequal variances, and Fisher's ANOVA is then
    trustworthy only when the segment sizes are about equal. Unlike a test, the
    ratio does not grow more sensitive with more records. If some segment has
    no spread while another has, the ratio is ``inf`` and the check fails; if
    no segment has any spread it is not computed.
    """
    _check_positive(threshold, "threshold")
    labels, summaries = _labelled_groups(groups, labels)
    name = "sd_ratio"
    sds = [(label, math.sqrt(s.var) if not s.flat else 0.0)
           for label, s in zip(labels, summaries) if s.n >= 2]
    if len(sds) < 2:
        return Check(name, _NAN, threshold, None,
                     "The sd ratio needs at least two segments with 2 or more records; "
                     f"found {len(sds)}.")
    ordered = sorted(sds, key=lambda t: t[1])
    small, big = ordered[0], ordered[-1]
    if big[1] == 0.0:
        return Check(name, _NAN, threshold, None,
                     "The sd ratio is undefined because no segment has any spread.")
    if small[1] == 0.0:
        return Check(name, math.inf, threshold, False,
                     f"Segment {small[0]!r} has no spread while segment {big[0]!r} has sd "
                     f"{_num(big[1])}, so the sd ratio is unbounded.")
    ratio = big[1] / small[1]
    passed = ratio <= threshold
    verdict = "is within" if passed else "exceeds"
    return Check(name, ratio, threshold, passed,
                 f"Largest/smallest sd ratio {_num(ratio)} {verdict} {_num(threshold)} "
                 f"({big[0]!r} {_num(big[1])} vs {small[0]!r} {_num(small[1])}).")


def n_ratio(
    groups: Sequence[Moments], threshold: float = 4.0, *, labels: Sequence[str] | None = None
) -> Check:
    """Ratio of the largest to the smallest segment size.

    Parameters
    ----------
    groups : sequence of Moments
        Per-segment summaries; empty segments are left out.
    threshold : float, optional
        Largest acceptable ratio (default 4.0, common practice).
    labels : sequence of str, optional
        Segment names, for messages.

    Returns
    -------
    Check
        ``name='n_ratio'``, ``passed = ratio <= threshold``.

    Notes
    -----
    Common practice: Fisher's ANOVA tolerates unequal variances when segment
    sizes are about equal; with very unequal sizes it does not (a large segment
    with a small variance makes it liberal), so Welch's ANOVA is safer. The
    ratio is informative only: :func:`choose_method` does not act on it.
    """
    _check_positive(threshold, "threshold")
    labels, summaries = _labelled_groups(groups, labels)
    name = "n_ratio"
    sizes = [(label, s.n) for label, s in zip(labels, summaries) if s.n >= 1]
    if len(sizes) < 2:
        return Check(name, _NAN, threshold, None,
                     f"The size ratio needs at least two segments with records; found {len(sizes)}.")
    ordered = sorted(sizes, key=lambda t: t[1])
    small, big = ordered[0], ordered[-1]
    ratio = big[1] / small[1]
    passed = ratio <= threshold
    verdict = "is within" if passed else "exceeds"
    return Check(name, ratio, threshold, passed,
                 f"Largest/smallest segment size ratio {_num(ratio)} {verdict} {_num(threshold)} "
                 f"({big[0]!r} {big[1]} vs {small[0]!r} {small[1]}).")


def outlier_share(
    samples: Sequence[np.ndarray],
    threshold: float = 0.05,
    *,
    labels: Sequence[str] | None = None,
    presorted: Sequence[np.ndarray] | None = None,
) -> Check:
    """Share of values beyond Tukey's far fences of their own segment.

    Parameters
    ----------
    samples : sequence of 1-D arrays
        Raw finite values per segment.
    threshold : float, optional
        Largest acceptable share (default 0.05).
    labels : sequence of str, optional
        Segment names, for messages.
    presorted : sequence of 1-D arrays, optional
        The same samples, each sorted ascending (``numpy.sort``), when the
        caller has them: the quartiles are then read off instead of found
        again. Trusted, not checked. The result is the same either way.

    Returns
    -------
    Check
        ``name='outlier_share'``; ``value`` = values outside
        ``[Q1 - 3 IQR, Q3 + 3 IQR]`` of their own segment, over all values;
        ``passed = value <= threshold``.

    Notes
    -----
    Tukey's [1]_ far fences ("far out" values), with quartiles by linear
    interpolation (``numpy.percentile``'s default, Hyndman-Fan type 7) rather
    than Tukey's hinges; the two differ little except in tiny segments. With
    heavily tied data (IQR 0) every value off the common value is outside the
    fences, which is the rule working as designed: such data are not
    near-normal. The share is informative only: :func:`choose_method` does not
    act on it.

    References
    ----------
    .. [1] Tukey, J. W. (1977). Exploratory Data Analysis. Reading, MA:
       Addison-Wesley.
    """
    _check_fraction(threshold, "threshold")
    labels, arrays = _labelled_samples(samples, labels)
    name = "outlier_share"
    total = sum(a.size for a in arrays)
    if total == 0:
        return Check(name, _NAN, threshold, None,
                     "The outlier share could not be computed because there are no records.")
    counts = []
    for i, (label, a) in enumerate(zip(labels, arrays)):
        if a.size == 0:
            continue
        if presorted is not None:
            q1, q3 = quantiles_of_sorted(presorted[i], _QUARTILES)
        else:
            q1, q3 = np.percentile(a, [25.0, 75.0])
        iqr = q3 - q1
        outside = int(np.count_nonzero((a < q1 - 3.0 * iqr) | (a > q3 + 3.0 * iqr)))
        counts.append((label, outside, a.size))
    n_out = sum(c[1] for c in counts)
    share = n_out / total
    passed = share <= threshold
    verdict = "within" if passed else "above"
    text = f"{_pct(share)} of values lie beyond Tukey's far fences, {verdict} the {_pct(threshold)} limit"
    if n_out:
        label, outside, size = max(counts, key=lambda c: (c[1] / c[2], c[1]))
        text += f" (most in segment {label!r}: {outside} of {size})"
    return Check(name, share, threshold, passed, _sentence(text))


def run_checks(
    labels: Sequence[str],
    groups: Sequence[Moments] | None,
    samples: Sequence[np.ndarray] | None,
    *,
    presorted: Sequence[np.ndarray] | None = None,
) -> dict[str, Check]:
    """Run all five checks with their default thresholds.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique.
    groups : sequence of Moments or None
        Per-segment summaries; built from ``samples`` when None.
    samples : sequence of 1-D arrays or None
        Per-segment raw values; without them the sample-based checks
        (``brown_forsythe``, ``normality``, ``outlier_share``) are not
        computed (``passed=None``).
    presorted : sequence of 1-D arrays, optional
        ``numpy.sort`` of each sample, when the caller has them (trusted, not
        checked); otherwise each sample is sorted here, once, and the sorted
        copy serves the medians, the quartiles and Shapiro-Wilk.

    Returns
    -------
    dict of str to Check
        Keyed by :data:`CHECK_NAMES`, in that order.
    """
    if groups is None and samples is None:
        raise ValueError("run_checks needs groups (summaries) or samples; both are None")
    if samples is not None:
        labels = _check_labels(labels, samples, "samples")
        samples = _check_samples(labels, samples)
    if groups is None:
        from monitor.stats.summary import Moments

        groups = [Moments.from_values(a) for a in samples]
    labels = _check_labels(labels, groups, "groups")
    checks: dict[str, Check] = {}
    if samples is not None:
        if presorted is None:
            presorted = [np.sort(a) for a in samples]  # once, for medians, quartiles and Shapiro-Wilk
        checks["brown_forsythe"] = brown_forsythe(samples, labels=labels, presorted=presorted)
        checks["normality"] = normality(samples, labels=labels, presorted=presorted)
    else:
        checks["brown_forsythe"] = _no_samples("brown_forsythe", 0.05, "the Brown-Forsythe test")
        checks["normality"] = _no_samples("normality", 0.01, "normality")
    checks["sd_ratio"] = sd_ratio(groups, labels=labels)
    checks["n_ratio"] = n_ratio(groups, labels=labels)
    if samples is not None:
        checks["outlier_share"] = outlier_share(samples, labels=labels, presorted=presorted)
    else:
        checks["outlier_share"] = _no_samples("outlier_share", 0.05, "the outlier share")
    for check in checks.values():
        logger.debug("check %s: %s", check.name, check.detail)
    return checks


def choose_method(
    groups: Sequence[Moments],
    samples: Sequence[np.ndarray] | None,
    checks: Mapping[str, Check] | None = None,
    *,
    labels: Sequence[str] | None = None,
) -> MethodChoice:
    """Pick the omnibus test for ``test: auto``.

    Parameters
    ----------
    groups : sequence of Moments
        Per-segment summaries.
    samples : sequence of 1-D arrays or None
        Per-segment raw values (used only when ``checks`` is None).
    checks : mapping of str to Check, optional
        Result of :func:`run_checks`; computed when None.
    labels : sequence of str, optional
        Segment names, for the reason text.

    Returns
    -------
    MethodChoice

    Notes
    -----
    The rule, in order (the thresholds are common practice, not a theorem):

    0. ``'proportions'`` when every value of every segment is 0 or 1, recognised
       from the summaries alone (:func:`monitor.stats.proportions.counts_from_moments`:
       smallest and largest value in {0, 1} and ``M2 = n p (1 - p)``, i.e. the sum of
       squares equals the sum). The segments are then shares of 1s, compared by the
       test of homogeneity of proportions (Agresti 2013, sec. 3.2); an F test of their
       means would mostly re-test the proportions through their spreads ``p (1 - p)``
       and fails when a segment has no 1s.
    1. ``'kruskal'`` when normality is strongly doubted where it matters: the
       normality check failed and the smallest segment has fewer than
       :data:`SMALL_SEGMENT_N` (30) records, or some segment with 3 to 29
       records has ``|skewness| >`` :data:`SKEWNESS_LIMIT` (2). With 30 or more
       records per segment the means are close to normal anyway (central limit
       theorem) and the F tests stay valid. **Unless** the Brown-Forsythe check
       failed as well: then ``'welch'``. Kruskal-Wallis asks whether one segment
       tends to give larger values than another, and with unequal spreads it
       rejects equal means far beyond its level (Fagerland & Sandvik 2009 [2]_;
       measured here: 53% and 81% false alarms at the 5% level for skewed
       segments of unequal size and spread, against 14% and 8% for Welch's ANOVA,
       ``docs/error_rates.md``). The sd-ratio check is not used for this veto:
       sample standard deviations of small skewed segments vary too much (it
       sent equal-spread skewed data to Welch and doubled their false alarms).
    2. ``'welch'`` when spreads look unequal: the Brown-Forsythe check failed
       or the sd ratio exceeds its threshold. Welch's ANOVA [1]_ keeps its
       level under unequal variances and loses little when they are equal.
    3. ``'welch'`` when segment sizes differ by more than
       :data:`FISHER_SIZE_RATIO`, ``'anova'`` otherwise.

    A check that could not be computed counts as not failed. Skewness is the
    moment coefficient ``g1`` of :class:`~monitor.stats.summary.Moments`.

    The names returned are registered test methods: :func:`monitor.methods.choose`
    resolves them (and runs Welch's ANOVA for ``'kruskal'`` when no values are
    available); what each method then runs is in its module of :mod:`monitor.methods`.

    References
    ----------
    .. [1] Welch, B. L. (1951). On the comparison of several mean values: an
       alternative approach. Biometrika 38(3/4), 330-336.
    .. [2] Fagerland, M. W. and Sandvik, L. (2009). The Wilcoxon-Mann-Whitney test
       under scrutiny. Statistics in Medicine 28(10), 1487-1497.
    """
    groups = _check_groups(groups)
    if labels is None:
        labels = tuple(str(i + 1) for i in range(len(groups)))
    labels = _check_labels(labels, groups, "groups")
    if checks is None:
        checks = run_checks(labels, groups, samples)
    summaries = _as_float_groups(groups)

    present = [g for g in groups if g.n > 0]
    if present and all(counts_from_moments(g) is not None for g in present):
        ones = sum(counts_from_moments(g)[0] for g in present)
        records = sum(int(g.n) for g in present)
        return MethodChoice(
            "proportions",
            f"test of homogeneity of proportions: every value is 0 or 1 ({ones} ones in {records} records), "
            "so the segments are compared as shares of 1s (a test of means would re-test the shares "
            "through their spreads).",
        )

    norm = checks.get("normality")
    bf = checks.get("brown_forsythe")
    sdr = checks.get("sd_ratio")
    sizes = [s.n for s in summaries if s.n > 0]
    min_n = min(sizes) if sizes else 0

    rank_reason = None
    if norm is not None and norm.passed is False and min_n < SMALL_SEGMENT_N:
        rank_reason = (
            f"normality is rejected (smallest Holm-adjusted p {_p(norm.value)} "
            f"< {_num(norm.threshold)}) and the smallest segment has only {min_n} records "
            f"(under {SMALL_SEGMENT_N})"
        )
    else:
        skewed = []
        for label, g, s in zip(labels, groups, summaries):
            if 3 <= s.n < SMALL_SEGMENT_N and not s.flat:
                skew = float(g.skewness)
                if math.isfinite(skew) and abs(skew) > SKEWNESS_LIMIT:
                    skewed.append((abs(skew), label, s.n, skew))
        if skewed:
            _, label, n, skew = max(skewed)
            rank_reason = (
                f"segment {label!r} has only {n} records (under {SMALL_SEGMENT_N}) "
                f"and skewness {skew:.2f} (beyond +/-{_num(SKEWNESS_LIMIT)})"
            )
    if rank_reason is not None:
        if bf is not None and bf.passed is False:
            return MethodChoice(
                "welch",
                f"Welch's ANOVA: {rank_reason}, but the spreads differ ({_bf_text(bf)}), and "
                "Kruskal-Wallis would then flag unequal spreads as a difference; consider transform: log "
                "for skewed, positive values.",
            )
        return MethodChoice("kruskal", f"Kruskal-Wallis: {rank_reason}.")

    spread_text = f"{_bf_text(bf)}, {_sd_text(sdr)}"
    if (bf is not None and bf.passed is False) or (sdr is not None and sdr.passed is False):
        return MethodChoice("welch", f"Welch's ANOVA: spreads look unequal ({spread_text}).")
    if sizes and max(sizes) / min(sizes) > FISHER_SIZE_RATIO:
        # Fisher's ANOVA is robust to unequal spreads only with about equal sizes (common
        # practice; Glass, Peckham & Sanders 1972); a pre-test that misses a moderate spread
        # difference would otherwise inflate its Type I error (measured in docs/error_rates.md).
        return MethodChoice(
            "welch",
            f"Welch's ANOVA: segment sizes differ (largest/smallest {max(sizes) / min(sizes):.2f} > "
            f"{_num(FISHER_SIZE_RATIO)}), where Fisher's ANOVA is not robust to spreads the checks may miss "
            f"({spread_text}).",
        )
    return MethodChoice(
        "anova",
        "Fisher's ANOVA: no strong non-normality in small segments, about equal sizes and no sign of "
        f"unequal spreads ({spread_text}).",
    )


# ---------------------------------------------------------------------------
# order statistics of sorted values (one sort serves every check)
# ---------------------------------------------------------------------------
_QUARTILES = np.array([0.25, 0.75])


def quantiles_of_sorted(ordered: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Quantiles of values already sorted ascending, exactly as ``numpy.quantile``.

    Parameters
    ----------
    ordered : 1-D float array
        ``numpy.sort`` of the values (trusted, not checked).
    levels : 1-D float array
        Probabilities in ``[0, 1]``.

    Returns
    -------
    numpy.ndarray
        One quantile per level; all NaN when the values hold a NaN (as numpy).

    Notes
    -----
    Linear interpolation between order statistics (Hyndman & Fan 1996 [1]_,
    definition 7; numpy's default ``method='linear'``), with numpy's own
    arithmetic step for step (virtual index ``(n - 1) p``, and the two-sided
    ``lerp`` that is exact at both ends), so the values agree bit for bit with
    ``numpy.quantile`` / ``numpy.percentile`` on the unsorted values (checked
    in ``tests/test_stats_diagnostics.py``). Reading them off a sorted copy
    avoids a partition per call.

    References
    ----------
    .. [1] Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical
       packages. The American Statistician 50(4), 361-365.
    """
    n = ordered.size
    if n == 0:
        return np.full(levels.shape, _NAN)
    if math.isnan(ordered[-1]):  # NaN sorts last; numpy returns NaN for every level
        return np.full(levels.shape, _NAN)
    virtual = (n - 1) * levels
    previous = np.floor(virtual)
    following = previous + 1
    above = virtual >= n - 1
    previous[above] = -1
    following[above] = -1
    below = virtual < 0
    previous[below] = 0
    following[below] = 0
    previous = previous.astype(np.intp)
    following = following.astype(np.intp)
    gamma = virtual - previous
    a = ordered[previous]
    b = ordered[following]
    diff = b - a
    out = a + diff * gamma
    np.subtract(b, diff * (1 - gamma), out=out, where=gamma >= 0.5)
    return out


def median_of_sorted(ordered: np.ndarray) -> float:
    """The median of values already sorted ascending, exactly as ``numpy.median``.

    The middle value, or the mean of the two middle values (their sum halved,
    as ``numpy.mean`` of two numbers); NaN for no values or when a NaN is
    present (it sorts last), as numpy.
    """
    n = ordered.size
    if n == 0 or math.isnan(ordered[-1]):
        return _NAN
    half = n // 2
    if n % 2:
        return ordered[half]
    return (ordered[half - 1] + ordered[half]) / 2.0


def _shapiro_p(values: np.ndarray, ordered: np.ndarray | None) -> float:
    """Shapiro-Wilk p-value of ``values`` (3 to 5000 of them, not all equal).

    ``scipy.stats.shapiro`` sorts the values, subtracts the one at position
    ``n // 2`` of the *unsorted* input and calls the Fortran routine of Royston
    (1995, Applied Statistics algorithm AS R94). With the values already
    sorted this does the same steps without the second sort and without the
    argument-handling layer, so the p-value is the very same number
    (checked against ``scipy.stats.shapiro`` in
    ``tests/test_stats_diagnostics.py``). Without a sorted copy, or if the
    routine is not where this scipy keeps it, or it reports anything but
    success, ``scipy.stats.shapiro`` itself is called.
    """
    if ordered is not None and _SWILK is not None:
        n = values.size
        shifted = ordered - values[n // 2]
        try:
            _w, pw, ifault = _SWILK(shifted, np.zeros(n // 2, dtype=np.float64), 0)
        except (TypeError, ValueError):  # pragma: no cover - a scipy whose routine changed
            pass
        else:
            if ifault in (0, 2):
                return float(pw)
    return float(stats.shapiro(values).pvalue)


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
def _labelled_samples(samples, labels):
    samples = list(samples)
    if labels is None:
        labels = tuple(str(i + 1) for i in range(len(samples)))
    labels = _check_labels(labels, samples, "samples")
    return labels, _check_samples(labels, samples)


def _labelled_groups(groups, labels):
    groups = _check_groups(groups)
    if labels is None:
        labels = tuple(str(i + 1) for i in range(len(groups)))
    labels = _check_labels(labels, groups, "groups")
    return labels, _as_float_groups(groups)


def _check_alpha(value, what):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.0 < value < 1.0:
        raise ValueError(f"{what} must be a number strictly between 0 and 1; got {value!r}")


def _check_fraction(value, what):
    _check_alpha(value, what)


def _check_positive(value, what):
    if (isinstance(value, bool) or not isinstance(value, (int, float))
            or not math.isfinite(value) or value < 1.0):
        raise ValueError(f"{what} must be a finite number of at least 1; got {value!r}")


def _no_samples(name: str, threshold: float, what: str) -> Check:
    return Check(name, _NAN, threshold, None,
                 f"The raw values were not available, so {what} could not be checked.")


def _bf_text(check: Check | None) -> str:
    if check is None or check.passed is None:
        return "Brown-Forsythe not computed"
    op = "<" if check.passed is False else ">="
    return f"Brown-Forsythe p {_p(check.value)} {op} {_num(check.threshold)}"


def _sd_text(check: Check | None) -> str:
    if check is None or check.passed is None:
        return "sd ratio not computed"
    op = ">" if check.passed is False else "<="
    return f"largest/smallest sd ratio {_num(check.value)} {op} {_num(check.threshold)}"


def _num(x: float) -> str:
    """Three significant digits, always with a decimal point: 3.0, 0.05, 4.24, 1234."""
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "inf"
    if abs(x) >= 1000:
        return f"{x:.0f}"
    text = f"{x:.3g}"
    if "." not in text and "e" not in text:
        text += ".0"
    return text


def _p(p: float) -> str:
    if math.isnan(p):
        return "n/a"
    if p < 1e-4:
        return f"{p:.1e}"
    return f"{p:.3g}"


def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


def _sentence(text: str) -> str:
    return text[0].upper() + text[1:] + "."
