"""Sensitivity of Fisher's one-way ANOVA: the smallest effect it would likely detect.

For a monitored metric, "not significant" is only informative together with what
*would* have been detected with the segment sizes at hand. :func:`minimum_detectable_f`
answers in Cohen's f, :func:`minimum_detectable_difference` in the metric's units.

Degenerate sizes (fewer than 2 non-empty segments, or no residual degrees of
freedom, ``N - k < 1``) give NaN: no effect is detectable then. Bad ``alpha`` or
``power`` values are programming errors and raise ``ValueError``.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence

import numpy as np
from scipy import optimize, special, stats

__all__ = ["minimum_detectable_f", "minimum_detectable_difference", "anova_power"]

logger = logging.getLogger(__name__)

_NAN = float("nan")


def _check_sizes(n_per_group: Sequence[int]) -> tuple[int, int]:
    """Validate segment sizes; return ``(k, N)`` counting non-empty segments only."""
    sizes = np.asarray(n_per_group, dtype=np.float64).ravel()
    if np.any(~np.isfinite(sizes)) or np.any(sizes < 0) or np.any(sizes != np.round(sizes)):
        shown = ", ".join(f"{v:g}" for v in sizes)
        raise ValueError(f"n_per_group must hold non-negative whole numbers; got [{shown}]")
    sizes = sizes[sizes > 0]
    return int(sizes.size), int(sizes.sum())


def _check_probability(value: float, name: str) -> None:
    if not (0.0 < value < 1.0):
        raise ValueError(f"{name} must be a number strictly between 0 and 1; got {float(value)!r}")


def anova_power(f: float, n_per_group: Sequence[int], alpha: float = 0.05) -> float:
    """Power of Fisher's ANOVA at Cohen's effect size ``f``.

    Parameters
    ----------
    f : float
        Cohen's f (spread of the segment means over the within-segment sd).
    n_per_group : sequence of int
        Segment sizes.
    alpha : float, optional
        Significance level.

    Returns
    -------
    float
        ``P(F' > F_crit)`` with ``F'`` noncentral F with noncentrality
        ``lam = f^2 N`` and ``(k - 1, N - k)`` degrees of freedom; NaN for
        degenerate sizes (see the module docstring).

    Notes
    -----
    Cohen [1]_, ch. 8. See :func:`minimum_detectable_f`.

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Lawrence Erlbaum.
    """
    _check_probability(alpha, "alpha")
    k, n_total = _check_sizes(n_per_group)
    if k < 2 or n_total - k < 1 or not math.isfinite(f) or f < 0:
        return _NAN
    df1, df2 = k - 1, n_total - k
    crit = stats.f.isf(alpha, df1, df2)
    with np.errstate(all="ignore"):
        return float(1.0 - special.ncfdtr(df1, df2, f * f * n_total, crit))


def minimum_detectable_f(
    n_per_group: Sequence[int], alpha: float = 0.05, power: float = 0.8
) -> float:
    """Smallest Cohen's f at which Fisher's ANOVA reaches the given power.

    Parameters
    ----------
    n_per_group : sequence of int
        Segment sizes (empty segments are ignored).
    alpha : float, optional
        Significance level of the test, in (0, 1).
    power : float, optional
        Required probability of rejecting, in (0, 1).

    Returns
    -------
    float
        Cohen's f; 0 if ``power <= alpha`` (any effect, even none, suffices); NaN
        if fewer than 2 segments are non-empty or ``N - k < 1``.

    Raises
    ------
    ValueError
        If ``alpha`` or ``power`` is not in (0, 1), or a size is negative or
        fractional.

    Notes
    -----
    Cohen [1]_, ch. 8: with ``k`` segments and ``N`` observations, the F statistic
    follows a noncentral F with ``(k - 1, N - k)`` degrees of freedom and
    noncentrality ``lam = f^2 N``, where ``f = sigma_m / sigma``, ``sigma_m^2 =
    sum (n_i / N)(mu_i - mu)^2`` and ``sigma`` the common within-segment sd. This
    holds for unequal sizes too, so the answer depends on the sizes only through
    ``N`` and ``k``. The power ``P(F' > F_{1-alpha})`` increases with ``lam``; the
    ``lam`` giving the required power is found by Brent's method after bracketing,
    and ``f = sqrt(lam / N)``.

    Assumptions: those of Fisher's ANOVA (normal errors, equal variances,
    independence).

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Lawrence Erlbaum.
    """
    _check_probability(alpha, "alpha")
    _check_probability(power, "power")
    k, n_total = _check_sizes(n_per_group)
    if k < 2 or n_total - k < 1:
        return _NAN
    if power <= alpha:
        return 0.0
    df1, df2 = k - 1, n_total - k
    crit = float(stats.f.isf(alpha, df1, df2))

    def shortfall(lam: float) -> float:
        with np.errstate(all="ignore"):
            return float(1.0 - special.ncfdtr(df1, df2, lam, crit)) - power

    upper = 1.0
    for _ in range(200):
        if shortfall(upper) > 0:
            break
        upper *= 2.0
    else:  # pragma: no cover - power tends to 1 as lam grows
        logger.warning("power bracket not found for k=%s N=%s", k, n_total)
        return _NAN
    lam = optimize.brentq(shortfall, 0.0, upper, xtol=1e-12, rtol=1e-12)
    return math.sqrt(lam / n_total)


def minimum_detectable_difference(
    n_per_group: Sequence[int],
    pooled_sd: float,
    alpha: float = 0.05,
    power: float = 0.8,
) -> float:
    """Minimum detectable spread of segment means, in the metric's units.

    Parameters
    ----------
    n_per_group : sequence of int
        Segment sizes.
    pooled_sd : float
        Within-segment standard deviation in the metric's units, e.g.
        ``sqrt(sum(m2_i) / (N - k))`` from the segments' summaries.
    alpha, power : float, optional
        As for :func:`minimum_detectable_f`.

    Returns
    -------
    float
        ``f_min * pooled_sd``: the smallest n-weighted standard deviation of the
        segment means, ``sigma_m = sqrt(sum (n_i/N)(mu_i - mu)^2)``, that Fisher's
        ANOVA detects with the given power. NaN if ``pooled_sd`` is NaN or the
        sizes are degenerate.

    Raises
    ------
    ValueError
        If ``pooled_sd`` is negative or infinite, or as for
        :func:`minimum_detectable_f`.

    Notes
    -----
    The relation used is Cohen's definition ``f = sigma_m / sigma`` [1]_ (ch. 8),
    so ``sigma_m = f sigma``. To read it as a gap between segments: if one pair of
    segments sits ``d`` apart and all others midway between them (Cohen's "minimum
    variability" pattern), with equal sizes ``sigma_m = d / sqrt(2 k)``, so the
    minimum detectable gap is ``d = sqrt(2 k) * f_min * pooled_sd``; for two
    segments, ``d = 2 f_min pooled_sd``.

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Lawrence Erlbaum.
    """
    if math.isnan(pooled_sd):
        return _NAN
    if pooled_sd < 0 or math.isinf(pooled_sd):
        raise ValueError(f"pooled_sd must be a finite number >= 0; got {float(pooled_sd)!r}")
    return minimum_detectable_f(n_per_group, alpha, power) * pooled_sd
