"""Omnibus tests: do the segments differ at all?

Three one-way tests, each returning an :class:`OmnibusResult`:

* :func:`fisher_anova` - Fisher's one-way ANOVA (equal variances assumed), from
  per-segment :class:`~monitor.stats.summary.Moments` only.
* :func:`welch_anova` - Welch's (1951) heteroscedastic ANOVA, also from summaries.
* :func:`kruskal_wallis` - Kruskal-Wallis H on the raw values (ranks), tie-corrected.

Degenerate data policy
----------------------
These functions never raise because of the data and never let numpy warn; when a
statistic cannot be computed they return it as NaN (p-value NaN too) with a
human-readable reason in ``note``. The cases, checked in this order:

1. Fewer than 2 segments: ``"fewer than 2 segments to compare (got k)"``.
2. Segments too small. The ANOVAs need ``n >= 2`` in every segment and the
   *caller* leaves smaller segments out (and reports them); if one is passed in
   anyway the result is NaN with ``"... fewer than 2 observations; leave segments
   with n < 2 out before the test"``. Kruskal-Wallis accepts ``n = 1`` but not
   empty samples (``"... no observations ..."``).
3. Non-finite input (a NaN or infinite value or summary field):
   ``"non-finite values ..."``.
4. No variation:

   * ANOVA with every segment constant (within sum of squares 0):
     ``"no variation within segments"``, even if the segment means differ (F
     would be infinite, which is no honest number to act on).
   * Welch with every segment constant: the same note; with *some* segments
     constant: ``"no variation within segment(s) at position(s) ...; Welch's ANOVA
     needs a positive variance in every segment"`` (its weights ``n/s^2`` are
     infinite).
   * Kruskal-Wallis with every value tied: ``"all values are tied"``.

Positions in notes count from 1 in the order the segments were given.

Programming errors (a group that is not a ``Moments``) raise ``TypeError``.

Arithmetic
----------
:func:`fisher_anova` and :func:`welch_anova` work on a handful of summaries, so they
do all their arithmetic in ``Decimal`` with
:data:`~monitor.stats.summary.DECIMAL_PRECISION` digits: float summaries convert
exactly (their mean including ``mean_residual``), exact summaries are used as they
are, and only the final statistic, degrees of freedom and sums of squares become
floats. The accuracy is then that of the summaries, which is what carries NIST StRD
SmLs07-09 to full accuracy from exact (``Decimal``) data, and to the accuracy the
data keep as doubles from float data.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from decimal import Decimal

import numpy as np
from scipy import stats

from monitor.stats.summary import Moments, decimal_context

__all__ = ["OmnibusResult", "fisher_anova", "welch_anova", "kruskal_wallis", "METHODS"]

logger = logging.getLogger(__name__)

#: The omnibus methods, as written in ``OmnibusResult.method``.
METHODS = ("anova", "welch", "kruskal")

_NAN = float("nan")

NO_WITHIN_VARIATION = "no variation within segments"
ALL_TIED = "all values are tied"


@dataclass(frozen=True)
class OmnibusResult:
    """Outcome of one omnibus test.

    Attributes
    ----------
    method : str
        ``"anova"``, ``"welch"`` or ``"kruskal"``.
    statistic : float
        F (ANOVA, Welch) or tie-corrected H (Kruskal-Wallis); NaN if undefined.
    df : tuple of float
        ``(df1, df2)`` for the ANOVAs (Welch's df2 is fractional), ``(k - 1,)`` for
        Kruskal-Wallis. An entry that cannot be formed is NaN.
    p_value : float
        Upper-tail p-value; NaN when the statistic is.
    note : str or None
        Why the statistic is NaN (see the module's degenerate data policy).
    ss_between, ss_within : float
        Fisher's sums of squares from the same summaries (ANOVA and Welch; NaN for
        Kruskal-Wallis). Effect sizes are computed from them.
    n_total : int
        Total number of observations.
    k : int
        Number of segments.
    mean_ranks : tuple of float or None
        Kruskal-Wallis only: mean rank of each segment, in input order.
    tie_correction : float or None
        Kruskal-Wallis only: ``C = 1 - sum(t^3 - t) / (N^3 - N)``; H was divided by it.
    """

    method: str
    statistic: float
    df: tuple[float, ...]
    p_value: float
    note: str | None = None
    ss_between: float = _NAN
    ss_within: float = _NAN
    n_total: int = 0
    k: int = 0
    mean_ranks: tuple[float, ...] | None = None
    tie_correction: float | None = None

    @property
    def is_defined(self) -> bool:
        """True if the statistic could be computed."""
        return math.isfinite(self.statistic)

    def __str__(self) -> str:
        name = {"anova": "F", "welch": "F", "kruskal": "H"}.get(self.method, "statistic")
        if not self.is_defined:
            return f"{self.method}: {name} undefined ({self.note})"
        dfs = ", ".join(f"{d:.6g}" for d in self.df)
        return f"{self.method}: {name} = {self.statistic:.6g}, df = ({dfs}), p = {self.p_value:.4g}"


# --------------------------------------------------------------------------- checks
def _positions(indices: Sequence[int]) -> str:
    return ", ".join(str(i + 1) for i in indices)


def _check_summaries(groups: Sequence[Moments]) -> str | None:
    """Validate ANOVA input; return the reason it cannot be tested, or None."""
    for g in groups:
        if not isinstance(g, Moments):
            raise TypeError(
                f"groups must be Moments summaries (monitor.stats.summary.Moments), got {type(g).__name__}"
            )
    k = len(groups)
    if k < 2:
        return f"fewer than 2 segments to compare (got {k})"
    small = [i for i, g in enumerate(groups) if g.n < 2]
    if small:
        which = "segment at position" if len(small) == 1 else "segments at positions"
        verb = "has" if len(small) == 1 else "have"
        return (
            f"{which} {_positions(small)} {verb} fewer than 2 observations; "
            "leave segments with n < 2 out before the test"
        )
    bad = [i for i, g in enumerate(groups) if not g.is_finite]
    if bad:
        huge = [i for i in bad if all(math.isfinite(float(x)) for x in (groups[i].mean, groups[i].min, groups[i].max))]
        if len(huge) == len(bad):
            # finite values whose squared deviations overflow double precision (beyond ~1.3e154)
            return (f"values too large for double precision in segment(s) at position(s) {_positions(bad)}: "
                    "their squared deviations overflow; record the metric in a larger unit")
        return f"non-finite values in segment(s) at position(s) {_positions(bad)}"
    return None


def _exact_parts(groups: Sequence[Moments]) -> list[tuple[int, Decimal, Decimal]]:
    """Return ``[(n, mean, m2), ...]`` as ``Decimal`` (float fields convert exactly)."""
    with decimal_context():
        return [
            (g.n, g.mean_decimal, g.m2 if isinstance(g.m2, Decimal) else Decimal(g.m2))
            for g in groups
        ]


def _df_anova(groups: Sequence[Moments]) -> tuple[float, float]:
    k = len(groups)
    n_total = sum(max(g.n, 0) for g in groups)
    df1 = float(k - 1) if k >= 2 else _NAN
    df2 = float(n_total - k) if n_total - k >= 1 else _NAN
    return df1, df2


def _fisher_ss(parts) -> tuple[object, object]:
    """Sums of squares between and within (Fisher's form, from summaries)."""
    n_total = sum(n for n, _, _ in parts)
    grand = sum(n * mean for n, mean, _ in parts) / n_total
    ss_between = sum(n * (mean - grand) ** 2 for n, mean, _ in parts)
    ss_within = sum(m2 for _, _, m2 in parts)
    return ss_between, ss_within


# --------------------------------------------------------------------------- tests
def fisher_anova(groups: Sequence[Moments]) -> OmnibusResult:
    """Fisher's one-way analysis of variance from per-segment summaries.

    Parameters
    ----------
    groups : sequence of Moments
        One summary per segment, each with ``n >= 2``.

    Returns
    -------
    OmnibusResult
        ``method="anova"``, ``df=(k - 1, N - k)``, with ``ss_between``,
        ``ss_within``, ``n_total`` and ``k`` filled.

    Notes
    -----
    ``SS_between = sum n_i (mean_i - grand)^2`` with ``grand`` the n-weighted mean
    of the segment means, ``SS_within = sum m2_i``, ``F = (SS_between/(k-1)) /
    (SS_within/(N-k))``, p-value from the F distribution [1]_. Working from
    centred sums rather than raw sums of squares avoids the cancellation that makes
    textbook formulas fail on NIST StRD SmLs07-09 [2]_.

    Assumptions: independent observations, normal errors, equal variances in all
    segments. With unequal variances and unequal sizes use :func:`welch_anova`;
    with strongly non-normal data and small segments, :func:`kruskal_wallis`.

    References
    ----------
    .. [1] Fisher, R. A. (1925). Statistical Methods for Research Workers. Edinburgh:
       Oliver and Boyd.
    .. [2] Simon, S. D. and Lesage, J. P. (1989). Assessing the accuracy of ANOVA
       calculations in statistical software. Computational Statistics & Data
       Analysis 8, 325-332.
    """
    note = _check_summaries(groups)
    k = len(groups)
    n_total = sum(max(g.n, 0) for g in groups)
    df = _df_anova(groups)
    if note is not None:
        logger.debug("anova undefined: %s", note)
        return OmnibusResult("anova", _NAN, df, _NAN, note, n_total=n_total, k=k)
    parts = _exact_parts(groups)
    with decimal_context():
        ss_between, ss_within = _fisher_ss(parts)
        if ss_within == 0:
            statistic = None
        else:
            statistic = (ss_between / (k - 1)) / (ss_within / (n_total - k))
    ssb, ssw = float(ss_between), float(ss_within)
    if statistic is None:
        return OmnibusResult(
            "anova", _NAN, df, _NAN, NO_WITHIN_VARIATION, ssb, ssw, n_total, k
        )
    f_value = float(statistic)
    p_value = float(stats.f.sf(f_value, df[0], df[1]))
    return OmnibusResult("anova", f_value, df, p_value, None, ssb, ssw, n_total, k)


def welch_anova(groups: Sequence[Moments]) -> OmnibusResult:
    """Welch's heteroscedastic one-way ANOVA from per-segment summaries.

    Parameters
    ----------
    groups : sequence of Moments
        One summary per segment, each with ``n >= 2`` and a positive variance.

    Returns
    -------
    OmnibusResult
        ``method="welch"``, ``df=(k - 1, df2)`` with Welch's fractional ``df2``.
        ``ss_between`` and ``ss_within`` hold Fisher's sums of squares of the same
        summaries, for the effect sizes (which assume a common variance).

    Notes
    -----
    With weights ``w_i = n_i / s_i^2``, ``W = sum w_i`` and the weighted mean
    ``m = sum w_i mean_i / W`` (Welch [1]_)::

        A = sum w_i (mean_i - m)^2 / (k - 1)
        t = sum (1 - w_i / W)^2 / (n_i - 1)
        F = A / (1 + 2 (k - 2) t / (k^2 - 1)),   df2 = (k^2 - 1) / (3 t)

    Assumptions: independent observations, normal errors within each segment;
    variances may differ. The approximation is poor for very small segments
    (n < 6 or so, common practice); :func:`kruskal_wallis` is the usual fallback.

    References
    ----------
    .. [1] Welch, B. L. (1951). On the comparison of several mean values: an
       alternative approach. Biometrika 38(3/4), 330-336.
    """
    note = _check_summaries(groups)
    k = len(groups)
    n_total = sum(max(g.n, 0) for g in groups)
    df1 = float(k - 1) if k >= 2 else _NAN
    if note is None:
        flat = [i for i, g in enumerate(groups) if g.m2 == 0]
        if len(flat) == k:
            note = NO_WITHIN_VARIATION
        elif flat:
            note = (
                f"no variation within segment(s) at position(s) {_positions(flat)}; "
                "Welch's ANOVA needs a positive variance in every segment"
            )
    if note is not None:
        logger.debug("welch undefined: %s", note)
        ssb = ssw = _NAN
        if not math.isnan(df1) and all(g.n >= 2 and g.is_finite for g in groups):
            with decimal_context():
                ssb, ssw = (float(v) for v in _fisher_ss(_exact_parts(groups)))
        return OmnibusResult("welch", _NAN, (df1, _NAN), _NAN, note, ssb, ssw, n_total, k)
    parts = _exact_parts(groups)
    with decimal_context():
        weights = [n * (n - 1) / m2 for n, _, m2 in parts]  # n / s^2
        w_sum = sum(weights)
        m_w = sum(w * mean for w, (_, mean, _) in zip(weights, parts)) / w_sum
        a = sum(w * (mean - m_w) ** 2 for w, (_, mean, _) in zip(weights, parts)) / (k - 1)
        t = sum((1 - w / w_sum) ** 2 / (n - 1) for w, (n, _, _) in zip(weights, parts))
        b = 1 + 2 * (k - 2) * t / (k * k - 1)
        statistic = a / b
        df2 = (k * k - 1) / (3 * t)
        ss_between, ss_within = _fisher_ss(parts)
    f_value, df2 = float(statistic), float(df2)
    p_value = float(stats.f.sf(f_value, df1, df2))
    return OmnibusResult(
        "welch", f_value, (df1, df2), p_value, None, float(ss_between), float(ss_within), n_total, k
    )


def kruskal_wallis(samples: Sequence[np.ndarray]) -> OmnibusResult:
    """Kruskal-Wallis H test on ranks, corrected for ties.

    Parameters
    ----------
    samples : sequence of array_like
        The raw values of each segment (each at least one value).

    Returns
    -------
    OmnibusResult
        ``method="kruskal"``, ``df=(k - 1,)``, with ``mean_ranks`` (input order)
        and ``tie_correction`` filled.

    Notes
    -----
    All values are ranked together (ties get their average rank). With ``N`` values
    and mean ranks ``R_i`` (Kruskal and Wallis [1]_, with their
    correction for ties)::

        H = 12 / (N (N + 1)) * sum n_i (R_i - (N + 1) / 2)^2
        C = 1 - sum(t^3 - t) / (N^3 - N)      (t: size of each group of ties)
        H_corrected = H / C,   p = P(chi2_{k-1} > H_corrected)

    Assumptions: independent observations, an ordinal scale; under the null
    hypothesis all segments have the same distribution. The chi-square
    approximation is commonly trusted once every segment has at least 5
    observations (common practice). A small p says some segment tends to have
    larger values than another, not necessarily that medians differ.

    References
    ----------
    .. [1] Kruskal, W. H. and Wallis, W. A. (1952). Use of ranks in one-criterion
       variance analysis. Journal of the American Statistical Association 47(260),
       583-621.
    """
    arrays = [np.asarray(s, dtype=np.float64).ravel() for s in samples]
    k = len(arrays)
    sizes = [a.size for a in arrays]
    n_total = int(sum(sizes))
    df = (float(k - 1) if k >= 2 else _NAN,)

    def undefined(note: str, **extra) -> OmnibusResult:
        logger.debug("kruskal undefined: %s", note)
        return OmnibusResult("kruskal", _NAN, df, _NAN, note, n_total=n_total, k=k, **extra)

    if k < 2:
        return undefined(f"fewer than 2 segments to compare (got {k})")
    empty = [i for i, size in enumerate(sizes) if size == 0]
    if empty:
        return undefined(f"no observations in segment(s) at position(s) {_positions(empty)}")
    bad = [i for i, a in enumerate(arrays) if not np.isfinite(a).all()]
    if bad:
        return undefined(f"non-finite values in segment(s) at position(s) {_positions(bad)}")

    values = np.concatenate(arrays)
    ranks = stats.rankdata(values)
    bounds = np.cumsum([0, *sizes])
    mean_ranks = tuple(float(ranks[lo:hi].mean()) for lo, hi in zip(bounds[:-1], bounds[1:]))
    _, counts = np.unique(values, return_counts=True)
    tie_sum = sum(int(t) ** 3 - int(t) for t in counts if t > 1)  # exact integers
    denom = n_total**3 - n_total
    if tie_sum == denom:
        return undefined(ALL_TIED, mean_ranks=mean_ranks, tie_correction=0.0)
    correction = 1.0 - tie_sum / denom
    centre = (n_total + 1) / 2.0
    h = 12.0 / (n_total * (n_total + 1.0)) * sum(
        n * (r - centre) ** 2 for n, r in zip(sizes, mean_ranks)
    )
    h /= correction
    p_value = float(stats.chi2.sf(h, k - 1))
    return OmnibusResult(
        "kruskal",
        float(h),
        df,
        p_value,
        None,
        n_total=n_total,
        k=k,
        mean_ranks=mean_ranks,
        tie_correction=float(correction),
    )
