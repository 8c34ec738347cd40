"""Many metrics at once: Fisher's and Welch's ANOVA with their post-hoc pairs,
vectorised over arrays of per-segment summaries.

The per-metric routines (:mod:`monitor.stats.omnibus`, :mod:`monitor.stats.posthoc`)
are the reference implementation: exact arithmetic where it matters, one metric at a
time, with notes for every degenerate case. This module computes the same figures in
plain float64 for a whole batch of metrics in a handful of numpy operations, for
screening hundreds or thousands of metrics quickly (and for the speed benchmark in
``tests/bench_stats.py``). Inputs are arrays of shape ``(metrics, segments)``:
``n`` (counts; 0 marks a segment absent from that metric), ``mean`` and ``m2`` (sum of
squared deviations from the segment mean). Segments with ``n < 2`` are treated as
absent. A metric with fewer than two present segments, or no within-segment
variation, gets NaN.

Accuracy: float64 with the mean-deviation form of the sums of squares (never raw
power sums), so the F statistics and differences agree with the per-metric routines
to about 1e-12 relative on well-conditioned data; for data with many constant
leading digits (NIST StRD SmLs07-09) use the per-metric routines, which carry the
means' rounding error. The pairs' p-values come from the interpolation tables of
:func:`tests.support.srange_table.srange_sf_fast` (one call for the whole batch):
within 1e-9 absolute and 1e-6 relative of the exact studentized range tail for tails
above 1e-10, in practice ~1e-10 and ~1e-8.

Speed: the work per metric is a fixed number of whole-array operations over
``(metrics, pairs)``; there is no Python loop over metrics. ``tests/bench_stats.py``
measures it.

References
----------
Fisher, R. A. (1925). Statistical Methods for Research Workers. Edinburgh: Oliver & Boyd.
Welch, B. L. (1951). On the comparison of several mean values: an alternative approach.
Biometrika 38, 330-336.
Kramer, C. Y. (1956). Extension of multiple range tests to group means with unequal
numbers of replications. Biometrics 12, 307-310.
Games, P. A. and Howell, J. F. (1976). Pairwise multiple comparison procedures with
unequal n's and/or variances. Journal of Educational Statistics 1, 113-125.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from scipy import special

from tests.support.srange_table import srange_sf_fast

__all__ = ["BatchResult", "anova_tukey", "welch_games_howell"]


@dataclass(frozen=True)
class BatchResult:
    """Omnibus and pairwise results for a batch of metrics.

    Attributes
    ----------
    method : str
        ``'anova'`` (with Tukey-Kramer pairs) or ``'welch'`` (with Games-Howell pairs).
    statistic, df1, df2, p_value : ndarray, shape (metrics,)
        The F statistic, its degrees of freedom and p-value.
    omega_squared : ndarray, shape (metrics,)
        Hays' omega squared from the sums of squares (both methods).
    pairs : ndarray of int, shape (pairs, 2)
        Segment indices ``(i, j)``, ``i < j``, in column order.
    diff, p_adj : ndarray, shape (metrics, pairs)
        ``mean_i - mean_j`` and the familywise-adjusted p-value (NaN where a
        segment is absent).
    """

    method: str
    statistic: np.ndarray
    df1: np.ndarray
    df2: np.ndarray
    p_value: np.ndarray
    omega_squared: np.ndarray
    pairs: np.ndarray
    diff: np.ndarray
    p_adj: np.ndarray


def _prepare(n, mean, m2):
    n = np.atleast_2d(np.asarray(n, dtype=float))
    mean = np.atleast_2d(np.asarray(mean, dtype=float))
    m2 = np.atleast_2d(np.asarray(m2, dtype=float))
    if not (n.shape == mean.shape == m2.shape):
        raise ValueError(f"n, mean and m2 must have one shape; got {n.shape}, {mean.shape}, {m2.shape}")
    present = n >= 2
    if not present.all():
        n = np.where(present, n, 0.0)
        mean = np.where(present, mean, 0.0)
        m2 = np.where(present, m2, 0.0)
    return n, mean, m2, present


def _sums_of_squares(n, mean, m2, present):
    k = np.count_nonzero(present, axis=1).astype(float)
    big_n = n.sum(axis=1)
    with np.errstate(all="ignore"):
        grand = np.einsum("ij,ij->i", n, mean) / big_n
        dev = mean - grand[:, None]
        dev *= dev
        ssb = np.einsum("ij,ij->i", n, dev)
        ssw = m2.sum(axis=1)
        df1 = k - 1.0
        df2 = big_n - k
        msw = ssw / df2
        omega = (ssb - df1 * msw) / (ssb + ssw + msw)
    bad = (k < 2) | ~(ssw > 0)
    return k, big_n, ssb, ssw, df1, df2, msw, np.where(bad, np.nan, omega), bad


@functools.cache
def _pair_index(segments: int) -> np.ndarray:
    i, j = np.triu_indices(segments, k=1)
    idx = np.column_stack([i, j])
    idx.setflags(write=False)
    return idx


def _pair_p_values(q: np.ndarray, k: np.ndarray, df: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Studentized range tails for the (metrics, pairs) array ``q``; NaN where not ``ok``.

    ``k`` is per metric, ``df`` per metric (Tukey-Kramer) or per pair
    (Games-Howell). One call of :func:`srange_sf_fast` for the whole batch.
    """
    metrics, pairs = q.shape
    kk = np.repeat(k, pairs)
    dd = np.repeat(df, pairs) if df.ndim == 1 else df.ravel()
    if ok.all():
        return srange_sf_fast(q.ravel(), kk, dd).reshape(metrics, pairs)
    p = np.full(q.size, np.nan)
    flat = np.flatnonzero(ok.ravel())
    if flat.size:
        p[flat] = srange_sf_fast(q.ravel()[flat], kk[flat], dd[flat])
    return p.reshape(metrics, pairs)


def anova_tukey(n, mean, m2) -> BatchResult:
    """Fisher's one-way ANOVA and Tukey-Kramer pairs for every metric of a batch.

    Parameters
    ----------
    n, mean, m2 : array_like, shape (metrics, segments)
        Per-segment counts, means and sums of squared deviations.

    Returns
    -------
    BatchResult

    Notes
    -----
    Assumes independent, normally distributed values with equal variances within
    a metric (as :func:`monitor.stats.omnibus.fisher_anova`). Tukey-Kramer
    p-values use the studentized range with ``k`` present segments and ``N - k``
    degrees of freedom (:func:`monitor.stats.studentized.srange_sf`).
    """
    n, mean, m2, present = _prepare(n, mean, m2)
    k, _, ssb, _, df1, df2, msw, omega, bad = _sums_of_squares(n, mean, m2, present)
    with np.errstate(all="ignore"):
        f = (ssb / df1) / msw
        p = special.fdtrc(df1, df2, f)
    f = np.where(bad, np.nan, f)
    p = np.where(bad, np.nan, p)
    idx = _pair_index(n.shape[1])
    a, b = idx[:, 0], idx[:, 1]
    idx = idx.copy()
    with np.errstate(all="ignore"):
        inv_n = 1.0 / n  # inf for absent segments; those pairs are masked below
        diff = mean[:, a] - mean[:, b]
        se2 = inv_n[:, a] + inv_n[:, b]
        se2 *= (0.5 * msw)[:, None]
        q = np.abs(diff)
        q /= np.sqrt(se2)
    ok = present[:, a] & present[:, b]
    ok &= ~bad[:, None]
    p_adj = _pair_p_values(q, k, df2, ok)
    if not ok.all():
        diff[~ok] = np.nan
    return BatchResult("anova", f, df1, df2, p, omega, idx, diff, p_adj)


def welch_games_howell(n, mean, m2) -> BatchResult:
    """Welch's ANOVA and Games-Howell pairs for every metric of a batch.

    Parameters
    ----------
    n, mean, m2 : array_like, shape (metrics, segments)

    Returns
    -------
    BatchResult

    Notes
    -----
    Assumes independent, normally distributed values; variances may differ
    (as :func:`monitor.stats.omnibus.welch_anova`). A metric where some present
    segment has zero variance gets NaN (its weight would be infinite).
    """
    n, mean, m2, present = _prepare(n, mean, m2)
    k, _, _, _, df1, _, _, omega, bad = _sums_of_squares(n, mean, m2, present)
    with np.errstate(all="ignore"):
        var = np.where(present, m2 / (n - 1.0), np.nan)
        zero_var = (present & ~(var > 0)).any(axis=1)
        w = np.where(present, n / var, 0.0)
        wsum = w.sum(axis=1)
        wmean = np.einsum("ij,ij->i", w, mean) / wsum
        a_term = (w * (mean - wmean[:, None]) ** 2).sum(axis=1) / df1
        tmp = np.where(present, (1.0 - w / wsum[:, None]) ** 2 / (n - 1.0), 0.0).sum(axis=1)
        b_term = 1.0 + 2.0 * (k - 2.0) / (k * k - 1.0) * tmp
        f = a_term / b_term
        df2 = (k * k - 1.0) / (3.0 * tmp)
        p = special.fdtrc(df1, df2, f)
    bad = bad | zero_var
    f, p, df2 = (np.where(bad, np.nan, x) for x in (f, p, df2))
    idx = _pair_index(n.shape[1])
    a, b = idx[:, 0], idx[:, 1]
    idx = idx.copy()
    with np.errstate(all="ignore"):
        v = var / n  # squared standard error of each mean
        g = v * v / (n - 1.0)
        va, vb = v[:, a], v[:, b]
        diff = mean[:, a] - mean[:, b]
        vsum = va + vb
        q = np.abs(diff)
        q /= np.sqrt(0.5 * vsum)
        vsum *= vsum
        dfp = vsum / (g[:, a] + g[:, b])
    ok = present[:, a] & present[:, b]
    ok &= ~bad[:, None]
    p_adj = _pair_p_values(q, k, dfp, ok)
    if not ok.all():
        diff[~ok] = np.nan
    return BatchResult("welch", f, df1, df2, p, omega, idx, diff, p_adj)
