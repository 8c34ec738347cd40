"""Studentized range tail probabilities from per-k interpolation tables.

:func:`srange_sf_fast` returns ``P(Q > q)`` for the studentized range ``Q`` on
``k`` means and ``df`` degrees of freedom, like
:func:`monitor.stats.studentized.srange_sf`, but about a hundred times faster
for large vectors: the exact double integral is computed once per ``k`` on a
few thousand nodes, and every later value is a short polynomial evaluation.
Use it where many p-values are needed at once (the batch routines of
:mod:`tests.support.batch`); the exact routine stays the reference and the
place to go for quantiles and for accuracy beyond ~1e-10.

Example
-------
>>> from tests.support.srange_table import srange_sf_fast
>>> p = srange_sf_fast([3.0, 4.0, 5.0], 3, [10.0, 24.7, float("inf")])
>>> [round(float(x), 5) for x in p]
[0.13498, 0.02396, 0.00118]

Method
------
Coordinates. With ``y = 1/df`` (0 for ``df = inf``) let

``tau = log(1 + q^2 y / 2) / (2 y)``  (``q^2 / 4`` at ``y = 0``),
``s = sqrt(tau)``,  ``eta = log2(1 + 128 y)``,

and tabulate ``G(s, eta) = log P(Q > q) + tau``. ``tau`` is the exponent of
Student's t tail at ``t = q / sqrt(2)`` (``Q = sqrt(2) |T|`` for ``k = 2``),
so ``G`` stays of order one over the whole range where ``log P`` falls to
-200: for finite ``df`` the tail of ``Q`` is ``C q^-df`` and ``G`` tends to a
constant, for ``df = inf`` it is ``-q^2/4`` plus a logarithm. ``eta`` is a
graded coordinate in ``y``: ``G`` is smooth but not analytic at ``y = 0``
(the expansion in ``1/df`` is asymptotic), and the cells of constant width in
``eta`` shrink geometrically towards ``y = 0``, which keeps the interpolation
error uniform.

Table (lazily built and cached per ``k``): the region ``0 <= s <= 14`` (``tau``
up to 196, tails down to ~1e-85) by ``0 <= eta <= 4.25`` (``df >= 7.5``) is
cut into 25 cells, each carrying a tensor Chebyshev interpolant with 12 to 16
nodes in each variable (``_STAGE1``; 4,264 nodes in all). The nodes are
computed with the quadrature of :mod:`monitor.stats.studentized` (Copenhaver
and Holland [1]_) on a window wide enough that the far tail is not cut. That
interpolant is then re-expanded on a uniform grid of ``1/16`` by ``1/8`` cells
as local polynomials of degree 6 in ``s`` and 4 in ``eta`` (power basis about
the cell centre; 2.1 MB per ``k``), which an evaluation gathers and sums by
Horner's rule. Building takes ~0.1 s per ``k``. (Smaller ``df`` would need
much finer cells near ``q = 0``: there ``G`` is analytic only in a narrow
strip, as the scale ``S`` has heavy upper tails.)

Outside the table:

* ``s > 14`` (``P(Q > q) < ~1e-84``) with ``df >= 8``: Bonferroni's value
  ``U = k (k - 1) P(T_df > q / sqrt(2))`` where it is provably within
  ``1e-10`` relative of the tail. Given ``S``, the range exceeds ``w = qS``
  when one of the ``k (k - 1)`` events ``{Z_i - Z_j > w}`` happens; any two of
  them overlap with probability at most ``P(Z > w sqrt(2/3))`` (for two of
  the differences ``X, Y``, correlated 1/2, 0 or -1/2, ``P(X > w, Y > w) <=
  P(X + Y > 2w)``, largest at correlation 1/2), and averaging over ``S`` turns
  normal tails ``P(Z > cS)`` into Student's ``P(T_df > c)``. Counting the
  overlapping pairs, ``U (1 - e) <= P(Q > q) <= U`` with
  ``e = k^2 P(T_df > q sqrt(2/3)) / P(T_df > q / sqrt(2))``, which is tiny
  when ``df`` is large (Tukey-Kramer with many records).
* everything else (``df < 8``, ``k > 50``, the far tail where the bound is not
  tight): the exact quadrature, :func:`monitor.stats.studentized.srange_sf`
  (with the wide window for the far tail).

Accuracy, as checked in ``tests/test_stats_studentized.py`` against the exact
routine on dense random samples for every ``k`` from 2 to 50, ``df`` from 2 to
``inf`` (whole or not) and ``q`` over the whole range: absolute error below
~1e-10 and relative error below ~1e-8 (for ``df >= 8`` down to tails of
~1e-85, checked against Student's t for ``k = 2`` and an independent nested
quadrature; for ``df < 8`` it is the exact routine's own, ~1e-12 down to
~1e-20). The guarantee stated and tested is looser: ``1e-9`` absolute and
``1e-6`` relative for tails above ``1e-10``.

References
----------
.. [1] Copenhaver, M. D. and Holland, B. (1988). Computation of the
   distribution of the maximum studentized range statistic with application to
   multiple significance testing of simple effects. Journal of Statistical
   Computation and Simulation 30(1), 1-15.
"""

from __future__ import annotations

import functools
import logging
import math
import time
from dataclasses import dataclass

import numpy as np
from scipy import special

from monitor.stats import studentized as _exact

__all__ = ["srange_sf_fast"]

logger = logging.getLogger(__name__)

# ---------------------------------------------------------------------------
# the table's layout
# ---------------------------------------------------------------------------
#: Largest number of means with a table (validated range); larger k is exact.
K_TABLE_MAX = 50
#: Smallest df served by the table (eta = log2(1 + 128/8) = 4.09 < _ETA_MAX).
DF_TABLE_MIN = 8.0
#: eta = log2(1 + y / _Y0)
_Y0 = 1.0 / 128.0
#: extent of the table in s = sqrt(tau) and in eta
_S_MAX = 14.0
_ETA_MAX = 4.25
#: window of the exact quadrature used to build the table (all but 2 e^-300 of S's mass)
_BUILD_TAIL_T = 300.0
#: Bonferroni's value is used where its relative error bound is below this
_BONFERRONI_TOL = 1e-10
#: df at or above this is treated as infinite (y = 1/df is then below 1e-30)
_DF_HUGE = 1e30

#: Stage 1: (s0, s1, eta0, eta1, nodes in s, nodes in eta) of each Chebyshev cell.
#: Edges are multiples of the stage-2 cell sizes, so fine cells nest inside.
_STAGE1 = (
    (0.0, 0.5, 0.0, 2.0, 12, 12), (0.0, 0.5, 2.0, 4.25, 14, 14),
    (0.5, 1.0, 0.0, 2.0, 14, 12), (0.5, 1.0, 2.0, 4.25, 14, 14),
    (1.0, 1.5, 0.0, 2.0, 14, 12), (1.0, 1.5, 2.0, 4.25, 14, 12),
    (1.5, 2.0, 0.0, 2.0, 14, 12), (1.5, 2.0, 2.0, 4.25, 14, 12),
    (2.0, 3.0, 0.0, 2.0, 16, 14), (2.0, 3.0, 2.0, 4.25, 14, 12),
    (3.0, 4.5, 0.0, 2.0, 12, 12), (3.0, 4.5, 2.0, 4.25, 12, 14),
    (4.5, 6.0, 0.0, 2.0, 12, 14), (4.5, 6.0, 2.0, 4.25, 12, 16),
    (6.0, 8.0, 0.0, 2.0, 12, 16), (6.0, 8.0, 2.0, 4.25, 12, 16),
    (8.0, 10.0, 0.0, 1.0, 12, 12), (8.0, 10.0, 1.0, 2.0, 12, 12), (8.0, 10.0, 2.0, 4.25, 12, 16),
    (10.0, 12.0, 0.0, 1.0, 12, 12), (10.0, 12.0, 1.0, 2.0, 12, 12), (10.0, 12.0, 2.0, 4.25, 12, 16),
    (12.0, 14.0, 0.0, 1.0, 12, 12), (12.0, 14.0, 1.0, 2.0, 12, 12), (12.0, 14.0, 2.0, 4.25, 12, 16),
)
#: Stage 2: uniform cells of _HS by _HE, local polynomials with _MS x _ME coefficients.
_HS, _HE = 1.0 / 16.0, 1.0 / 8.0
_MS, _ME = 7, 5
_NS = round(_S_MAX / _HS)
_NE = round(_ETA_MAX / _HE)
_INV_HS, _INV_HE = 1.0 / _HS, 1.0 / _HE
_S_CENTRES = (np.arange(_NS) + 0.5) * _HS
_E_CENTRES = (np.arange(_NE) + 0.5) * _HE
_INV_LOG2 = 1.0 / math.log(2.0)
#: values per evaluation call (bounds the working memory of the gathers)
_CHUNK = 8192


def _chebyshev_points(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Points of the first kind on [-1, 1] and the matrix from values to coefficients."""
    theta = np.pi * (np.arange(n) + 0.5) / n
    transform = (2.0 / n) * np.cos(np.outer(np.arange(n), theta))
    transform[0] *= 0.5
    return np.cos(theta), transform


def _cheb_to_power(n: int, width: float) -> np.ndarray:
    """Chebyshev coefficients on a cell of ``width`` -> powers of (x - centre)."""
    out = np.zeros((n, n))
    for j in range(n):
        power = np.polynomial.chebyshev.cheb2poly(np.eye(n)[j])
        out[: power.size, j] = power
    return out * ((2.0 / width) ** np.arange(n))[:, None]


_S_POINTS, _S_TRANSFORM = _chebyshev_points(_MS)
_E_POINTS, _E_TRANSFORM = _chebyshev_points(_ME)
_S_TO_POWER = _cheb_to_power(_MS, _HS) @ _S_TRANSFORM  # values -> power coefficients
_E_TO_POWER = _cheb_to_power(_ME, _HE) @ _E_TRANSFORM


# ---------------------------------------------------------------------------
# coordinates
# ---------------------------------------------------------------------------
def _y_of_eta(eta: np.ndarray) -> np.ndarray:
    return _Y0 * np.expm1(eta * math.log(2.0))


def _q_of(s: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Inverse of the coordinates: ``q`` with ``tau(q, y) = s^2`` (``y > 0``)."""
    return np.sqrt((2.0 / y) * np.expm1(2.0 * s * s * y))


# ---------------------------------------------------------------------------
# building a table
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _Table:
    """Local polynomials of ``G`` for one ``k``.

    ``coef[a * _ME + b, i * _NE + j]`` is the coefficient of
    ``(s - s_i)^a (eta - eta_j)^b`` on cell ``(i, j)`` (centres ``s_i``,
    ``eta_j``): one row per power, so an evaluation gathers each power's
    coefficients for all its points with one ``take`` (read-only: the table is
    shared through the cache).
    """

    k: int
    coef: np.ndarray


def _exact_g(s: np.ndarray, eta: np.ndarray, k: int) -> np.ndarray:
    """``G = log P(Q > q) + s^2`` at table nodes, from the exact quadrature.

    The window must hold the tail's own size, ``P(Q > q) >= e^-(tau + 3)``
    (``G >= -3`` over the table): nodes with ``tau <= 36`` use ``e^-100``, the
    others ``e^-300``; the cut then costs less than 1e-17 relative.
    """
    y = _y_of_eta(eta)
    q = _q_of(s, y)
    sf = np.empty(q.size)
    shallow = s <= 6.0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
        for part, tail_t in ((shallow, 100.0), (~shallow, _BUILD_TAIL_T)):
            sf[part] = _exact._sf_pdf(q[part], np.full(int(part.sum()), k), 1.0 / y[part], False, tail_t)[0]
        return np.log(sf) + s * s


@functools.lru_cache(maxsize=16)
def _table(k: int) -> _Table | None:
    """The table for ``k`` (built on first use), or None if its nodes were not all finite."""
    started = time.perf_counter()
    # stage 1: Chebyshev cells from exact values (interior nodes: s > 0, eta > 0)
    grids = []
    for s0, s1, e0, e1, ns, ne in _STAGE1:
        xs, _ = _chebyshev_points(ns)
        xe, _ = _chebyshev_points(ne)
        grids.append((s0 + 0.5 * (s1 - s0) * (xs + 1.0), e0 + 0.5 * (e1 - e0) * (xe + 1.0)))
    s_nodes = np.concatenate([np.repeat(gs, ge.size) for gs, ge in grids])
    e_nodes = np.concatenate([np.tile(ge, gs.size) for gs, ge in grids])
    values = _exact_g(s_nodes, e_nodes, k)
    if not np.isfinite(values).all():  # not seen for 2 <= k <= 50; then use the exact routine
        logger.warning("studentized range: no interpolation table for k=%s (non-finite nodes)", k)
        return None
    # stage 2: sample each stage-1 cell's interpolant on the fine cells inside it
    fine = np.empty((_NS, _MS, _NE, _ME))
    start = 0
    for (s0, s1, e0, e1, ns, ne), (gs, ge) in zip(_STAGE1, grids):
        _, ts = _chebyshev_points(ns)
        _, te = _chebyshev_points(ne)
        cheb = ts @ values[start : start + ns * ne].reshape(ns, ne) @ te.T
        start += ns * ne
        i0, i1 = round(s0 * _INV_HS), round(s1 * _INV_HS)
        j0, j1 = round(e0 * _INV_HE), round(e1 * _INV_HE)
        fs = (_S_CENTRES[i0:i1, None] + 0.5 * _HS * _S_POINTS).ravel()
        fe = (_E_CENTRES[j0:j1, None] + 0.5 * _HE * _E_POINTS).ravel()
        vs = np.polynomial.chebyshev.chebvander(2.0 * (fs - s0) / (s1 - s0) - 1.0, ns - 1)
        ve = np.polynomial.chebyshev.chebvander(2.0 * (fe - e0) / (e1 - e0) - 1.0, ne - 1)
        fine[i0:i1, :, j0:j1, :] = (vs @ cheb @ ve.T).reshape(i1 - i0, _MS, j1 - j0, _ME)
    # values at the fine nodes -> power coefficients, stored (a, b) x (i, j)
    fine = np.matmul(_S_TO_POWER, fine.reshape(_NS, _MS, _NE * _ME)).reshape(_NS, _MS, _NE, _ME)
    fine = np.matmul(fine, _E_TO_POWER.T)  # (i, a, j, b)
    coef = np.ascontiguousarray(fine.transpose(1, 3, 0, 2).reshape(_MS * _ME, _NS * _NE))
    coef.setflags(write=False)
    logger.debug(
        "studentized range: built the interpolation table for k=%s in %.1f ms",
        k, 1e3 * (time.perf_counter() - started),
    )
    return _Table(k, coef)


# ---------------------------------------------------------------------------
# evaluation
# ---------------------------------------------------------------------------
def _tau(q: np.ndarray, y: np.ndarray) -> np.ndarray:
    """``log1p(q^2 y / 2) / (2 y)``; callers pass ``y >= 1e-30`` (then it is ``q^2/4``)."""
    return np.log1p(0.5 * q * q * y) / (2.0 * y)


def _eval_table(table: _Table, s: np.ndarray, eta: np.ndarray) -> np.ndarray:
    """``G`` at points inside the table (trusted): gather and Horner's rule."""
    i = (s * _INV_HS).astype(np.intp)
    np.minimum(i, _NS - 1, out=i)
    j = (eta * _INV_HE).astype(np.intp)
    np.minimum(j, _NE - 1, out=j)
    ts = s - _S_CENTRES[i]
    te = eta - _E_CENTRES[j]
    i *= _NE
    i += j
    rows = np.take(table.coef, i, axis=1)
    out = None
    for a in range(_MS - 1, -1, -1):
        base = a * _ME
        part = rows[base + _ME - 1].copy()
        for b in range(_ME - 2, -1, -1):
            part *= te
            part += rows[base + b]
        if out is None:
            out = part
        else:
            out *= ts
            out += part
    return out


def _bonferroni(q: np.ndarray, k: int, df: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``U = k (k-1) P(T > q/sqrt2)`` and the relative error bound ``e`` (see module notes)."""
    upper = special.stdtr(df, -q / math.sqrt(2.0))
    bound = k * k * special.stdtr(df, -q * math.sqrt(2.0 / 3.0)) / upper
    return k * (k - 1.0) * upper, bound


def _fast_one_k(q: np.ndarray, k: int, df: np.ndarray) -> np.ndarray:
    """``P(Q > q)`` for one ``k`` (valid inputs, ``0 < q < inf``)."""
    table = _table(k) if k <= K_TABLE_MAX else None
    if table is None:
        return _exact._sf_pdf(q, np.full(q.size, k), df)[0]
    out = np.empty(q.size)
    for start in range(0, q.size, _CHUNK):
        sl = slice(start, start + _CHUNK)
        out[sl] = _fast_chunk(table, q[sl], k, df[sl])
    return out


def _fast_chunk(table: _Table, q: np.ndarray, k: int, df: np.ndarray) -> np.ndarray:
    """Route one chunk: the table inside it, Bonferroni or wide-window quadrature
    beyond its tail, the exact routine for ``df < DF_TABLE_MIN``."""
    y = 1.0 / np.minimum(df, _DF_HUGE)
    tau = _tau(q, y)
    s = np.sqrt(tau)
    eta = np.log1p(y * (1.0 / _Y0)) * _INV_LOG2
    inside = (s < _S_MAX) & (df >= DF_TABLE_MIN)
    if inside.all():
        g = _eval_table(table, s, eta)
        g -= tau
        return np.exp(g)
    out = np.empty(q.size)
    if inside.any():
        g = _eval_table(table, s[inside], eta[inside])
        out[inside] = np.exp(g - tau[inside])
    rest = ~inside
    far = rest & (df >= DF_TABLE_MIN)  # beyond the table's tail
    exact = rest & ~far
    if far.any():
        upper, bound = _bonferroni(q[far], k, df[far])
        tight = (bound <= _BONFERRONI_TOL) | (upper == 0.0)
        value = np.where(tight, upper, np.nan)
        if not tight.all():
            loose = ~tight
            tail_t = min(_exact._TAIL_T + float(tau[far][loose].max()), 800.0)
            value[loose] = _exact._sf_pdf(
                q[far][loose], np.full(int(loose.sum()), k), df[far][loose], False, tail_t
            )[0]
        out[far] = value
    if exact.any():
        out[exact] = _exact._sf_pdf(q[exact], np.full(int(exact.sum()), k), df[exact])[0]
    return out


def _fast_flat(q: np.ndarray, k: np.ndarray, df: np.ndarray) -> np.ndarray:
    """1-D arrays, degenerate values included (same policy as ``srange_sf``)."""
    ok = _exact._valid_parameters(k, df)
    run = ok & (q > 0.0) & (q < np.inf)
    if run.all():
        out = np.empty(q.size)
        idx = None
    else:
        out = np.where(q <= 0.0, 1.0, np.where(q == np.inf, 0.0, np.nan))
        out[~ok] = np.nan
        idx = np.flatnonzero(run)
        if idx.size == 0:
            return out
        q, k, df = q[idx], k[idx], df[idx]
    first = k[0]
    if (k == first).all():
        values = _fast_one_k(q, int(first), df)
    else:
        values = np.empty(q.size)
        for kk in np.unique(k):
            at = k == kk
            values[at] = _fast_one_k(q[at], int(kk), df[at])
    np.clip(values, 0.0, 1.0, out=values)
    if idx is None:
        return values
    out[idx] = values
    return out


# ---------------------------------------------------------------------------
# public function
# ---------------------------------------------------------------------------
def srange_sf_fast(q, k, df):
    """Upper tail ``P(Q > q)`` of the studentized range, by table interpolation.

    Parameters
    ----------
    q : array_like
        Values of the studentized range statistic.
    k : array_like
        Number of means (a whole number, ``2 <= k <= 1000``; tables for
        ``k <= 50``, the exact routine above).
    df : array_like
        Degrees of freedom, ``> 0``, whole or not, ``inf`` for a known variance.

    Returns
    -------
    numpy.ndarray
        ``P(Q > q)``, broadcast over the arguments (a numpy float for scalar
        arguments).

    Notes
    -----
    Same distribution, arguments and degenerate-value policy as
    :func:`monitor.stats.studentized.srange_sf` (``q <= 0`` gives 1,
    ``q = inf`` gives 0, invalid ``k``, ``df`` or NaN give NaN; a
    :class:`ValueError` only for non-numbers or shapes that do not broadcast).
    Method: the double integral of Copenhaver and Holland [1]_, tabulated per
    ``k`` in the coordinates ``s = sqrt(tau)``, ``eta = log2(1 + 128/df)`` and
    interpolated by local polynomials; ``df < 8``, ``k > 50`` and tails too
    deep for the table and for Bonferroni's bound are computed exactly (see
    the module docstring). The first call for a ``k`` builds its table
    (~0.1 s); tables for the 16 most recent ``k`` are kept.

    Accuracy: within ``1e-9`` absolute and ``1e-6`` relative of the exact
    routine for tails above ``1e-10`` (in practice ~1e-10 and ~1e-8, down to
    tails of ~1e-85). Assumptions are those of the distribution: normal
    errors, an independent variance estimate on ``df`` degrees of freedom.

    References
    ----------
    .. [1] Copenhaver, M. D. and Holland, B. (1988). Journal of Statistical
       Computation and Simulation 30(1), 1-15.
    """
    q, k, df = _exact._as_arrays(("q", "k", "df"), (q, k, df))
    with np.errstate(**_exact._QUIET):
        return _exact._finish(_fast_flat(q.ravel(), k.ravel(), df.ravel()), q.shape)
