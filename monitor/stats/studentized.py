"""The studentized range distribution, fast and vectorised.

Tukey-Kramer and Games-Howell need tail probabilities and quantiles of the
studentized range ``Q = R / S``: ``R`` is the range of ``k`` independent
standard normal variables and ``S`` an independent ``sqrt(chi2_df / df)``. This
module computes them by fixed-node quadrature, so a whole vector of comparisons
(one df per pair for Games-Howell) costs a few array operations.

* :func:`srange_sf` - upper tail ``P(Q > q)`` (the p-value of a pair);
* :func:`srange_cdf` - ``P(Q <= q)``;
* :func:`srange_ppf` - the quantile ``q`` with ``P(Q <= q) = p`` (the critical
  value of simultaneous intervals).

For large batches of tail probabilities,
:func:`tests.support.srange_table.srange_sf_fast` interpolates tables built
from this module's quadrature (~1e-10 absolute instead of ~1e-12 relative,
about a hundred times faster).

Example
-------
>>> from monitor.stats.studentized import srange_ppf, srange_sf
>>> round(float(srange_ppf(0.95, 3, 10)), 3)
3.877
>>> p = srange_sf([3.0, 4.0, 5.0], 3, [10.0, 24.7, float("inf")])
>>> [round(float(x), 5) for x in p]
[0.13498, 0.02396, 0.00118]

Method
------
With ``R(w) = P(range > w)`` the upper tail of the range of ``k`` standard
normals and ``h`` the density of ``u = log S``,

``P(Q > q) = integral h(u) R(q e^u) du``,                                      (1)

``R(w) = k integral phi(z) [Phi(z)^(k-1) - (Phi(z) - Phi(z - w))^(k-1)] dz``.  (2)

This is the double integral of Copenhaver and Holland [1]_ (Gauss-Legendre
quadrature in both variables), arranged so that no tail is found as
``1 - (something near 1)``: the bracket in (2) is computed as
``-Phi(z)^(k-1) expm1((k-1) log1p(-Phi(z-w) / Phi(z)))`` and every other term
is positive, so ``P(Q > q)`` keeps its relative accuracy far into the tail.
(The bracket must keep ``Phi(z)^(k-1)``: ``k phi(z) Phi(z)^(k-1)`` is the
density of the largest value, and integrates to 1.)

* Inner integral (2), once per ``k`` (cached; ~40 ms): composite
  Gauss-Legendre in ``z`` (10 nodes on each half-unit panel of
  ``-9 <= z <= 29``; the integrand of ``R(w)`` peaks near ``z = w/2``) gives
  ``log R`` at the Chebyshev points of the unit panels of ``0 <= w <= 40``; a
  degree-20 Chebyshev series on each is then re-expanded as degree-8
  polynomials on panels of width 1/8 for fast evaluation. ``log R`` is smooth
  and at most ~400 in size there, and the table reproduces (2) to ~1e-14
  relative in ``R``. Beyond ``w = 40``, ``R(w) < 1e-170`` (any ``k <= 1000``)
  and is taken as 0. (The range up to 40 serves the far tails of large
  ``df``, where ``qS`` is large; the interpolation tables of
  :mod:`tests.support.srange_table` are built on it.)
* Outer integral (1), per value: ``h(u) = 2 a^a / Gamma(a) exp(-a g(u))``
  with ``a = df / 2`` and ``g(u) = e^(2u) - 1 - 2u``. The window
  ``a g(u) <= 60`` holds all but ``2 e^-60`` of the mass of ``S`` (Chernoff's
  bound for the gamma law) and is cut where ``q e^u = 40``. (Internally the
  window can be widened, e.g. to ``a g(u) <= 300``, for tails far below
  1e-20; the public functions keep 60.) The integrand is
  log-concave in ``u`` (``h`` is, and so is ``R(e^y)``: the order statistics
  of normal variables have a log-concave joint density, and Prekopa's theorem
  carries that to the range and on to its tail), hence has a single peak.
  The peak and its width ``sigma`` are found from ``(log R)'`` (one Newton
  step from a good start); Gauss-Legendre panels of 8 nodes are laid out from the peak with
  widths ``sigma`` times 1, 1, 1, 1.5, 2, 3, 4.5, ... (growing by ~1.5) up to
  the window ends. ``df = inf`` is ``R(q)`` itself.
* Quantiles solve ``P(Q > e^x) = 1 - p`` in ``x = log q`` by Newton's method
  (the density comes from the same nodes), safeguarded by bisection inside the
  bracket ``P(|T| > q / sqrt(2)) <= P(Q > q) <= k (k - 1) / 2 P(|T| > q / sqrt(2))``
  (``T`` Student's t on ``df``; ``Q >= |Z_1 - Z_2| / S``, and Bonferroni).
  By Prekopa's theorem again ``log P(Q > e^x)`` is concave, so Newton started
  at the upper bracket end converges monotonically.

Accuracy, as checked in ``tests/test_stats_studentized.py``: for
``2 <= k <= 100`` (spot checks to 1000) and ``df >= 2`` (integer or not, or
``inf``) the relative error of ``P(Q > q)`` is ~1e-12 for values down to
1e-12 (~1e-11 at ``df = 1``; ``df < 1`` is computed but not checked); the
truncations add at most ~2e-26 in absolute terms, so values far below 1e-20
are not resolved and may be 0. Against exact ``k = 2`` values
(``Q = sqrt(2) |T|``) the error is below 1e-12.
``srange_cdf`` is ``1 - srange_sf``, accurate in absolute terms only.
Upper quantiles are solved to ~1e-12 relative; lower ones to ~1e-14 / p
(NaN below p = 1e-9). scipy's ``studentized_range``
agrees to ~1e-10 absolute where its own integration is reliable; its
relative accuracy fails below ~1e-7, for ``df <= 3`` with very large ``q`` it
returns ~1e-16 where the tail is ~1e-7, and from ``df = 1e5`` on it uses the
``df = inf`` law (an absolute error of ~1e-6 at ``df = 1e5``; see the tests).

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

__all__ = ["srange_cdf", "srange_ppf", "srange_sf"]

logger = logging.getLogger(__name__)

# ---------------------------------------------------------------------------
# fixed nodes, computed once
# ---------------------------------------------------------------------------
#: The table of log R(w) covers 0 <= w <= _W_MAX.
_W_MAX = 40.0
#: Stage 1: a Chebyshev series of degree 20 on each unit panel of [0, 40].
_PANELS = 40
_CHEB_N = 21
#: Stage 2 (fast evaluation): degree-8 local polynomials on panels of 1/8.
_FINE_PER_UNIT = 8
_FINE_N = 9
#: Largest number of means accepted (checked against scipy up to 1000).
_K_MAX = 1000
#: Inner integral (2): z in [_Z_LO, _Z_HI], half-unit panels, 10 nodes each.
_Z_LO, _Z_HI, _Z_PANEL, _Z_NODES = -9.0, 29.0, 0.5, 10
#: Smallest lower-tail probability whose quantile is resolved (see srange_ppf).
_LOWEST_P = 1e-9
#: Outer window: all but 2 exp(-_TAIL_T) of the mass of S.
_TAIL_T = 60.0
#: Outer panels: Gauss-Legendre nodes per panel, and panel edges on each
#: side of the peak in units of the peak's width (widths grow by about 1.5).
_OUTER_NODES = 8
_GRADING = np.array([0.0, 1, 2, 3, 4.5, 6.5, 9.5, 14, 21, 32, 48, 72, 108, 162, 243, 365,
                     548, 822, 1233, 1850, 2775, 4163, 6245, 9367])


def _composite_legendre(lo: float, hi: float, width: float, nodes: int) -> tuple[np.ndarray, np.ndarray]:
    x, w = np.polynomial.legendre.leggauss(nodes)
    count = round((hi - lo) / width)
    centres = lo + width * (np.arange(count) + 0.5)
    return (centres[:, None] + 0.5 * width * x).ravel(), np.tile(0.5 * width * w, count)


def _chebyshev_points(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Points of the first kind on [-1, 1] and the matrix from values to coefficients."""
    theta = np.pi * (np.arange(n) + 0.5) / n
    transform = (2.0 / n) * np.cos(np.outer(np.arange(n), theta))
    transform[0] *= 0.5
    return np.cos(theta), transform


_Z, _Z_WEIGHT = _composite_legendre(_Z_LO, _Z_HI, _Z_PANEL, _Z_NODES)
_LOG_PHI_Z = -0.5 * _Z * _Z - 0.5 * math.log(2.0 * math.pi)
_LOG_NDTR_Z = special.log_ndtr(_Z)
_NDTR_Z = special.ndtr(_Z)

_CHEB_X, _CHEB_TRANSFORM = _chebyshev_points(_CHEB_N)
#: the w at which stage 1 samples log R, shape (panels, points)
_CHEB_W = np.arange(_PANELS)[:, None] + 0.5 * (_CHEB_X[None, :] + 1.0)

_FINE_H = 1.0 / _FINE_PER_UNIT
_FINE_COUNT = _PANELS * _FINE_PER_UNIT
_FINE_X, _FINE_TRANSFORM = _chebyshev_points(_FINE_N)
_FINE_CENTRES = (np.arange(_FINE_COUNT) + 0.5) * _FINE_H
#: Chebyshev coefficients -> powers of t = w - centre (|t| <= h/2), one matrix
_CHEB_TO_POWER = np.zeros((_FINE_N, _FINE_N))
for _j in range(_FINE_N):
    _power = np.polynomial.chebyshev.cheb2poly(np.eye(_FINE_N)[_j])
    _CHEB_TO_POWER[: _power.size, _j] = _power
_CHEB_TO_POWER *= ((2.0 / _FINE_H) ** np.arange(_FINE_N))[:, None]
del _j, _power
#: grid for the peak search (linear interpolation is plenty there)
_GRID_W = np.linspace(0.0, _W_MAX, 4001)

_GL_X, _GL_W = np.polynomial.legendre.leggauss(_OUTER_NODES)
_LOG2 = math.log(2.0)
#: Floating-point conditions met on purpose (log 0 = -inf for an empty tail,
#: underflow far out, NaN for invalid arguments), silenced whatever the
#: caller's numpy settings; every such value is mapped to a defined result.
_QUIET = {"divide": "ignore", "invalid": "ignore", "over": "ignore", "under": "ignore"}


# ---------------------------------------------------------------------------
# the range of k normals: log R(w) as piecewise polynomials
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _RangeTail:
    """``log R`` for one ``k``: local polynomials, and ``phi(w) = -w (log R)'(w)`` on a grid.

    ``value[j, i]`` and ``slope[j, i]`` are the coefficients of ``t^j`` in
    ``log R`` and ``(log R)'`` on the i-th panel of width 1/8, with
    ``t = w - centre_i`` (stored by power, so that each Horner step gathers
    one contiguous row); ``phi`` and ``dphi`` (its derivative) are sampled on
    ``_GRID_W`` for the peak search.
    """

    k: int
    value: np.ndarray
    slope: np.ndarray
    phi: np.ndarray
    dphi: np.ndarray

    def log_tail(self, w: np.ndarray, slope: bool = False) -> tuple[np.ndarray, np.ndarray | None]:
        """``log R(w)`` (and ``(log R)'(w)``) for ``0 <= w <= _W_MAX`` (trusted)."""
        panel = np.minimum((w * _FINE_PER_UNIT).astype(np.intp), _FINE_COUNT - 1)
        t = w - _FINE_CENTRES[panel]
        out = self.value[-1][panel]
        for row in self.value[-2::-1]:  # Horner
            out *= t
            out += row[panel]
        if not slope:
            return out, None
        der = self.slope[-1][panel]
        for row in self.slope[-2::-1]:
            der *= t
            der += row[panel]
        return out, der


def _log_range_tail(w: np.ndarray, k: int) -> np.ndarray:
    """``log R(w)`` by equation (2), Gauss-Legendre over z (positive terms only)."""
    km1 = float(k - 1)
    with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
        base = k * np.exp(_LOG_PHI_Z + km1 * _LOG_NDTR_Z) * _Z_WEIGHT  # k phi(z) Phi(z)^(k-1) dz
        ratio = special.ndtr(_Z[None, :] - w[:, None]) / _NDTR_Z[None, :]
        bracket = -np.expm1(km1 * np.log1p(-ratio))  # 1 - (1 - ratio)^(k-1), no cancellation
        return np.log(bracket @ base)


def _clenshaw(coef: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Stage-1 series (unit panels) at ``w``; used only while building a table."""
    panel = np.minimum(w.astype(np.intp), _PANELS - 1)
    x = 2.0 * (w - panel) - 1.0
    c = coef[panel]
    b1 = np.zeros_like(x)
    b2 = np.zeros_like(x)
    for j in range(coef.shape[1] - 1, 0, -1):
        b1, b2 = 2.0 * x * b1 - b2 + c[:, j], b1
    return x * b1 - b2 + c[:, 0]


@functools.lru_cache(maxsize=256)
def _range_tail(k: int) -> _RangeTail:
    started = time.perf_counter()
    # stage 1: equation (2) at Chebyshev points of unit panels
    values = _log_range_tail(_CHEB_W.ravel(), k).reshape(_CHEB_W.shape)
    series = values @ _CHEB_TRANSFORM.T
    slope = np.zeros_like(series)
    curve = np.zeros_like(series)
    for p in range(_PANELS):
        d1 = np.polynomial.chebyshev.chebder(series[p]) * 2.0  # d/dw = 2 d/dx
        d2 = np.polynomial.chebyshev.chebder(d1) * 2.0
        slope[p, : d1.size] = d1
        curve[p, : d2.size] = d2
    # stage 2: re-expand on panels of 1/8 as powers of t = w - centre
    fine_w = _FINE_CENTRES[:, None] + 0.5 * _FINE_H * _FINE_X[None, :]
    fine = _clenshaw(series, fine_w.ravel()).reshape(fine_w.shape)
    value = (fine @ _FINE_TRANSFORM.T) @ _CHEB_TO_POWER.T  # (panels, powers)
    power_slope = value[:, 1:] * np.arange(1, _FINE_N)
    # the peak search works with phi(w) = -w (log R)'(w), increasing in w
    l1 = _clenshaw(slope, _GRID_W)
    l2 = _clenshaw(curve, _GRID_W)
    phi = np.maximum.accumulate(np.maximum(-_GRID_W * l1, 0.0))
    dphi = np.maximum(-l1 - _GRID_W * l2, 0.0)
    logger.debug(
        "studentized range: built the range table for k=%s in %.1f ms",
        k, 1e3 * (time.perf_counter() - started),
    )
    return _RangeTail(k, np.ascontiguousarray(value.T), np.ascontiguousarray(power_slope.T), phi, dphi)


# ---------------------------------------------------------------------------
# the scale S: log-density of u = log S and the window holding its mass
# ---------------------------------------------------------------------------
def _g(u: np.ndarray, near_zero: bool) -> np.ndarray:
    """``e^(2u) - 1 - 2u``; with ``near_zero``, by its series where ``|u| < 0.1``.

    The direct form loses ``eps / |u|`` relatively, i.e. about ``2 a |u| eps``
    in ``a g(u)``; that matters only for very large ``a`` (``df > 2e5``),
    when the caller asks for the series.
    """
    if not near_zero:
        return np.expm1(2.0 * u) - 2.0 * u
    small = np.abs(u) < 0.1
    every = bool(small.all())  # usual for large a: the whole window is near 0 (no gather/scatter)
    t = 2.0 * (u if every else u[small])
    term = t * t
    term /= 2.0
    total = term.copy()
    for n in range(3, 14):  # sum_{n>=2} t^n / n!; remainder < 1e-19
        term *= t  # in place: the same operations, in the same order, as term = term * t / n
        term /= n
        total += term
    if every:
        return total
    out = np.expm1(2.0 * u) - 2.0 * u
    out[small] = total
    return out


def _log_scale_constant(a: np.ndarray) -> np.ndarray:
    """``log(2 a^a e^-a / Gamma(a))``, so that ``log h(u) = this - a g(u)``."""

    def direct(s: np.ndarray) -> np.ndarray:
        return _LOG2 + s * np.log(s) - s - special.gammaln(s)

    def stirling(b: np.ndarray) -> np.ndarray:
        # log Gamma(b) = (b - 1/2) log b - b + log(2 pi)/2 + 1/(12b) - 1/(360b^3) + ...
        inv = 1.0 / b
        inv2 = inv * inv
        series = inv * (1.0 / 12.0 - inv2 * (1.0 / 360.0 - inv2 * (1.0 / 1260.0 - inv2 / 1680.0)))
        return _LOG2 + 0.5 * np.log(b * (0.5 / math.pi)) - series

    if a.max() < 20.0:
        return direct(a)
    if a.min() >= 20.0:
        return stirling(a)
    return np.where(a < 20.0, direct(np.minimum(a, 20.0)), stirling(np.maximum(a, 20.0)))


def _scale_window(a: np.ndarray, tail_t: float = _TAIL_T) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the roots of ``a g(u) = tail_t``: a window holding S's mass.

    With ``r = tail_t / a``: on the left ``g(u) >= y^2 / (2 + y)``, ``y = -2u``;
    on the right ``g(u) >= 2 u^2`` and, for ``r >= 2.7``, ``g(u) >= e^(2u) / 2``
    at ``u = log(2r) / 2``. Both ends are therefore at or beyond the roots.
    """
    r = tail_t / a
    low = -0.25 * (r + np.sqrt(r * (r + 8.0)))
    high = np.minimum(np.sqrt(0.5 * r), np.where(r >= 2.7, 0.5 * np.log(2.0 * r), np.inf))
    return low, high


# ---------------------------------------------------------------------------
# the outer integral (1)
# ---------------------------------------------------------------------------
def _sf_pdf_one_k(
    q: np.ndarray, k: int, df: np.ndarray, want_pdf: bool, tail_t: float = _TAIL_T
) -> tuple[np.ndarray, np.ndarray | None]:
    """``P(Q > q)`` (and the density) for one ``k``; ``0 < q < inf``, ``df > 0``.

    ``tail_t`` sets the outer window (all but ``2 exp(-tail_t)`` of S's mass);
    the public functions use ``_TAIL_T``, the interpolation tables of
    :mod:`tests.support.srange_table` a wider one.
    """
    tail = _range_tail(k)
    normal = np.isinf(df)
    if normal.any():  # S = 1: P(Q > q) = R(q); the rest as below
        sf = np.zeros_like(q)
        pdf = np.zeros_like(q) if want_pdf else None
        inside = normal & (q < _W_MAX)
        log_r, l1 = tail.log_tail(q[inside], want_pdf)
        sf[inside] = np.exp(log_r)
        if want_pdf:
            pdf[inside] = -np.exp(log_r) * l1
        finite = ~normal
        if finite.any():
            s, d = _sf_pdf_scaled(tail, q[finite], 0.5 * df[finite], want_pdf, tail_t)
            sf[finite] = s
            if want_pdf:
                pdf[finite] = d
        return sf, pdf
    return _sf_pdf_scaled(tail, q, 0.5 * df, want_pdf, tail_t)


def _sf_pdf_scaled(
    tail: _RangeTail, q: np.ndarray, a: np.ndarray, want_pdf: bool, tail_t: float = _TAIL_T
) -> tuple[np.ndarray, np.ndarray | None]:
    """Equation (1) for finite ``df = 2a``."""
    low, high = _scale_window(a, tail_t)
    # beyond q S = 40 the range tail is below 1e-170; an empty window gives 0
    high = np.maximum(np.minimum(high, np.log(_W_MAX / q)), low)
    peak, sigma = _peak(tail, q, a)
    u, weight = _panels(low, np.minimum(np.maximum(peak, low), high), high, sigma)
    w = q[:, None] * np.exp(u)
    np.minimum(w, _W_MAX, out=w)
    log_r, l1 = tail.log_tail(w.ravel(), want_pdf)
    near_zero = bool(a.max() > 1e5)
    log_f = _g(u, near_zero)
    log_f *= -a[:, None]
    log_f += _log_scale_constant(a)[:, None]
    log_f += log_r.reshape(u.shape)
    integrand = np.exp(log_f)  # underflows to 0 far out, as intended
    integrand *= weight
    sf = integrand.sum(axis=1)
    if not want_pdf:
        return sf, None
    pdf = -(integrand * w * l1.reshape(u.shape)).sum(axis=1) / q
    return sf, pdf


def _peak(tail: _RangeTail, q: np.ndarray, a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Peak ``u`` of ``log h(u) + log R(q e^u)`` (concave in u) and a width there.

    At the peak ``phi(w) = 2a (1 - w^2 / q^2)`` with ``w = q e^u`` and
    ``phi(w) = -w (log R)'(w)`` increasing; one Newton step in ``w`` from the
    root for ``q -> inf`` places it well enough for the panels (a second step
    changes no result by more than 1e-13). The width is
    ``1 / sqrt(curvature)``.
    """
    two_a = 2.0 * a
    w = np.minimum(q, np.interp(two_a, tail.phi, _GRID_W))
    ratio = w / q
    gap = np.interp(w, _GRID_W, tail.phi) - two_a * (1.0 - ratio * ratio)
    slope = np.interp(w, _GRID_W, tail.dphi) + 2.0 * two_a * ratio / q
    w = np.minimum(np.maximum(w - gap / slope, 1e-3 * w), q)
    ratio = w / q
    curvature = 2.0 * two_a * ratio * ratio + w * np.interp(w, _GRID_W, tail.dphi)
    return np.log(ratio), 1.0 / np.sqrt(curvature)


@functools.cache
def _steps(n_left: int, n_right: int) -> np.ndarray:
    """Panel edges in units of the peak's width: ``n_left`` panels left, ``n_right`` right."""
    return np.concatenate([-_GRADING[n_left:0:-1], _GRADING[: n_right + 1]])


def _panels(
    low: np.ndarray, peak: np.ndarray, high: np.ndarray, sigma: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes and weights on panels graded outwards from the peak.

    Panel edges are ``peak -/+ sigma * _GRADING`` (widths 1, 1, 1, 1.5, 2, 3,
    4.5, ... times ``sigma``, growing by about 1.5), cut at the window ends.
    Near the peak the integrand is close to a normal curve of width
    ``sigma``; farther out it falls at least exponentially (log-concavity), so
    each panel's share of the integral shrinks faster than its width grows and
    8 nodes per panel keep the whole within ~1e-12 relative.
    """
    last = _GRADING.size - 1
    n_left = min(max(int(_GRADING.searchsorted(float(((peak - low) / sigma).max()))), 1), last)
    n_right = min(max(int(_GRADING.searchsorted(float(((high - peak) / sigma).max()))), 1), last)
    edges = peak[:, None] + sigma[:, None] * _steps(n_left, n_right)
    np.clip(edges, low[:, None], high[:, None], out=edges)
    edges[:, 0] = low  # reached already unless the grading ran out
    edges[:, -1] = high
    half = 0.5 * (edges[:, 1:] - edges[:, :-1])
    centre = edges[:, :-1] + half
    u = (centre[:, :, None] + half[:, :, None] * _GL_X).reshape(peak.size, -1)
    weight = (half[:, :, None] * _GL_W).reshape(peak.size, -1)
    return u, weight


def _sf_pdf(
    q: np.ndarray, k: np.ndarray, df: np.ndarray, want_pdf: bool = False, tail_t: float = _TAIL_T
) -> tuple[np.ndarray, np.ndarray | None]:
    """Group 1-D arrays by k (valid inputs, ``0 < q < inf``) and integrate."""
    first = k[0]
    if k.size == 1 or (k == first).all():
        sf, pdf = _sf_pdf_one_k(q, int(first), df, want_pdf, tail_t)
    else:
        sf = np.empty_like(q)
        pdf = np.empty_like(q) if want_pdf else None
        for kk in np.unique(k):
            at = k == kk
            s, d = _sf_pdf_one_k(q[at], int(kk), df[at], want_pdf, tail_t)
            sf[at] = s
            if want_pdf:
                pdf[at] = d
    np.clip(sf, 0.0, 1.0, out=sf)
    return sf, pdf


# ---------------------------------------------------------------------------
# the edge: argument checking and degenerate values
# ---------------------------------------------------------------------------
def _as_arrays(names: tuple[str, ...], values: tuple) -> list[np.ndarray]:
    """Real-valued float arrays broadcast to one shape, or a ValueError naming the argument."""
    arrays = []
    for name, value in zip(names, values):
        arr = np.asarray(value)
        try:
            if arr.dtype.kind not in "biufO":  # text, complex, dates, ...
                raise TypeError
            arr = arr.astype(float, copy=False)
        except (TypeError, ValueError):
            what = type(value).__name__
            if isinstance(value, np.ndarray):
                what += f" of dtype {value.dtype}"
            raise ValueError(
                f"{name} must be a real number or an array of real numbers; got {what}"
            ) from None
        arrays.append(arr)
    if all(a.shape == arrays[0].shape for a in arrays[1:]):
        return arrays
    try:
        return list(np.broadcast_arrays(*arrays))
    except ValueError:
        shapes = ", ".join(str(a.shape) for a in arrays[:-1]) + f" and {arrays[-1].shape}"
        joined = ", ".join(names[:-1]) + f" and {names[-1]}"
        raise ValueError(f"{joined} must broadcast to one shape; got shapes {shapes}") from None


def _valid_parameters(k: np.ndarray, df: np.ndarray) -> np.ndarray:
    """k a whole number in [2, _K_MAX], df > 0 (inf allowed); NaN anywhere is invalid."""
    return (k >= 2) & (k <= _K_MAX) & (np.floor(k) == k) & (df > 0)


def _finish(out: np.ndarray, shape: tuple[int, ...]):
    out = out.reshape(shape)
    return out[()] if out.ndim == 0 else out


def _sf_flat(q: np.ndarray, k: np.ndarray, df: np.ndarray) -> np.ndarray:
    """``P(Q > q)`` for 1-D arrays, degenerate values included (run under ``_QUIET``)."""
    ok = _valid_parameters(k, df)
    run = ok & (q > 0.0) & (q < np.inf)
    if run.all():
        return _sf_pdf(q, k, df)[0]
    out = np.where(q <= 0.0, 1.0, np.where(q == np.inf, 0.0, np.nan))
    out[~ok] = np.nan  # also NaN q, which fails every comparison above
    if run.any():
        out[run] = _sf_pdf(q[run], k[run], df[run])[0]
    logger.debug(
        "studentized range: %s of %s value(s) had q <= 0, q = inf or invalid arguments",
        q.size - int(run.sum()), q.size,
    )
    return out


# ---------------------------------------------------------------------------
# public functions
# ---------------------------------------------------------------------------
def srange_sf(q, k, df):
    """Upper tail ``P(Q > q)`` of the studentized range distribution.

    Parameters
    ----------
    q : array_like
        Values of the studentized range statistic.
    k : array_like
        Number of means (a whole number, ``2 <= k <= 1000``).
    df : array_like
        Degrees of freedom of the variance estimate, ``> 0``; need not be a
        whole number (Welch-Satterthwaite), ``inf`` for a known variance.

    Returns
    -------
    numpy.ndarray
        ``P(Q > q)``, broadcast over the arguments (a numpy float for scalar
        arguments).

    Notes
    -----
    Method: Copenhaver and Holland [1]_, integrating the upper tail of the
    range directly (see the module docstring for nodes, windows and the
    accuracy check). ``Q = R / S`` with ``R`` the range of ``k`` independent
    standard normal variables and ``df S^2`` an independent chi-square on
    ``df`` degrees of freedom: the assumptions of Tukey-type comparisons
    (normal errors, independent estimate of a common variance).

    Degenerate arguments give numbers, never exceptions or warnings:
    ``q <= 0`` gives 1 and ``q = inf`` gives 0; NaN in any argument, ``k``
    not a whole number in ``[2, 1000]`` or ``df <= 0`` gives NaN. A
    :class:`ValueError` is raised only for arguments that are not numbers or
    do not broadcast together.

    References
    ----------
    .. [1] Copenhaver, M. D. and Holland, B. (1988). Computation of the
       distribution of the maximum studentized range statistic with
       application to multiple significance testing of simple effects.
       Journal of Statistical Computation and Simulation 30(1), 1-15.
    """
    q, k, df = _as_arrays(("q", "k", "df"), (q, k, df))
    with np.errstate(**_QUIET):
        return _finish(_sf_flat(q.ravel(), k.ravel(), df.ravel()), q.shape)


def srange_cdf(q, k, df):
    """Lower tail ``P(Q <= q)`` of the studentized range distribution.

    Parameters
    ----------
    q, k, df : array_like
        As for :func:`srange_sf`.

    Returns
    -------
    numpy.ndarray
        ``1 - srange_sf(q, k, df)``: accurate in absolute terms (~1e-15), not
        relative to very small values near ``q = 0``.

    Notes
    -----
    Method and assumptions as for :func:`srange_sf` (Copenhaver and Holland
    [1]_). ``q <= 0`` gives 0 and ``q = inf`` gives 1; invalid ``k`` or
    ``df`` and NaN give NaN.

    References
    ----------
    .. [1] Copenhaver, M. D. and Holland, B. (1988). Journal of Statistical
       Computation and Simulation 30(1), 1-15.
    """
    q, k, df = _as_arrays(("q", "k", "df"), (q, k, df))
    with np.errstate(**_QUIET):
        return _finish(1.0 - _sf_flat(q.ravel(), k.ravel(), df.ravel()), q.shape)


def srange_ppf(p, k, df):
    """Quantile of the studentized range: ``q`` with ``P(Q <= q) = p``.

    Parameters
    ----------
    p : array_like
        Lower-tail probabilities, e.g. the confidence level 0.95.
    k, df : array_like
        As for :func:`srange_sf`.

    Returns
    -------
    numpy.ndarray
        The quantiles, broadcast over the arguments (a numpy float for scalar
        arguments).

    Notes
    -----
    Solves ``P(Q > e^x) = 1 - p`` for ``x = log q`` with Newton's method (the
    density comes from the same quadrature as the tail, see
    :func:`srange_sf` and Copenhaver and Holland [1]_), kept inside the
    bracket given by Student's t, ``P(|T| > q/sqrt(2)) <= P(Q > q) <=
    k(k-1)/2 P(|T| > q/sqrt(2))``, with bisection as the fallback.
    ``log P(Q > e^x)`` is concave in ``x``, so for ``p > 1/2`` the iteration
    converges monotonically from the upper end; lower quantiles solve
    ``log P(Q <= e^x) = log p`` from the lower end. It stops at a relative
    change below 1e-13.

    Upper quantiles carry the relative accuracy of the tail (~1e-12). Lower
    ones rest on ``P(Q <= q) = 1 - P(Q > q)``, known to ~1e-14 in absolute
    terms, so their relative error grows like ``1e-14 / p``; below
    ``p = 1e-9`` the quantile is not resolved and NaN is returned.
    ``p = 0`` gives 0 and ``p = 1`` gives ``inf``; ``p`` outside ``[0, 1]``,
    invalid ``k`` or ``df`` and NaN give NaN.

    References
    ----------
    .. [1] Copenhaver, M. D. and Holland, B. (1988). Journal of Statistical
       Computation and Simulation 30(1), 1-15.
    """
    p, k, df = _as_arrays(("p", "k", "df"), (p, k, df))
    shape = p.shape
    p, k, df = p.ravel(), k.ravel(), df.ravel()
    with np.errstate(**_QUIET):
        ok = _valid_parameters(k, df) & (p >= 0.0) & (p <= 1.0)
        run = ok & (p >= _LOWEST_P) & (p < 1.0)
        if run.all():
            return _finish(_solve_quantile(p, k, df), shape)
        out = np.where(p == 0.0, 0.0, np.where(p == 1.0, np.inf, np.nan))
        out[~ok] = np.nan
        if run.any():
            out[run] = _solve_quantile(p[run], k[run], df[run])
    unresolved = int(np.count_nonzero(ok & (p > 0.0) & (p < _LOWEST_P)))
    if unresolved:
        logger.debug("studentized range: %s quantile(s) below p = %s returned as NaN", unresolved, _LOWEST_P)
    return _finish(out, shape)


def _solve_quantile(p: np.ndarray, k: np.ndarray, df: np.ndarray) -> np.ndarray:
    """Newton in ``x = log q`` with a bisection safeguard (see :func:`srange_ppf`).

    Upper quantiles (``p > 1/2``) solve ``log(1 - p) - log P(Q > q) = 0``,
    starting at the upper bracket end; lower ones solve
    ``log P(Q <= q) - log p = 0``, starting at the lower end, where
    ``log P(Q <= q)`` is nearly linear in ``x``. Both sides increase in ``x``.
    """
    upper = p > 0.5
    pairs = 0.5 * k * (k - 1.0)
    # P(|T| > q/sqrt2) <= P(Q > q) <= pairs P(|T| > q/sqrt2)
    low = np.log(math.sqrt(2.0) * special.stdtrit(df, 1.0 - 0.5 * (1.0 - p)))
    high = np.log(math.sqrt(2.0) * special.stdtrit(df, 1.0 - 0.5 * (1.0 - p) / pairs))
    # 1% slack keeps the root inside despite rounding in the bounds
    low = np.where(np.isfinite(low), low, -700.0) - 0.01
    high = high + 0.01
    x = np.where(upper, high, low)
    goal = np.where(upper, np.log1p(-p), np.log(p))
    active = np.arange(p.size)
    for _ in range(100):
        xi = x[active]
        q = np.exp(xi)
        sf, pdf = _sf_pdf(q, k[active], df[active], want_pdf=True)
        up = upper[active]
        tail = np.where(up, sf, 1.0 - sf)
        value = np.where(up, goal[active] - np.log(tail), np.log(tail) - goal[active])
        step = -value * tail / (q * pdf)
        low[active] = np.where(value < 0.0, xi, low[active])
        high[active] = np.where(value > 0.0, xi, high[active])
        new = xi + step
        # converged: a step below 1e-13 relative, or below what the rounding of
        # the tail (~1e-16 absolute) can resolve
        resolution = 1e-13 * np.maximum(1.0, np.abs(xi)) + 1e-16 / (q * pdf)
        done = (value == 0.0) | (np.abs(step) <= resolution)
        bad = ~done & (~np.isfinite(new) | (new <= low[active]) | (new >= high[active]))
        new = np.where(bad, 0.5 * (low[active] + high[active]), new)
        done |= high[active] - low[active] <= 1e-14 * np.maximum(1.0, np.abs(xi))
        x[active] = np.where(value == 0.0, xi, new)
        active = active[~done]
        if active.size == 0:
            break
    return np.exp(x)
