"""Effect sizes for the omnibus tests: how large is the difference between segments?

* :func:`eta_squared`, :func:`omega_squared`, :func:`cohens_f` - for Fisher's and
  Welch's ANOVA, from the sums of squares stored on the
  :class:`~monitor.stats.omnibus.OmnibusResult`.
* :func:`epsilon_squared` - for Kruskal-Wallis, from H.
* :func:`effect_size_for` - the one segwatch reports by default for a result
  (omega squared after an ANOVA, epsilon squared after Kruskal-Wallis).

All of them return an :class:`EffectSize`. An effect size of a result whose statistic
is undefined is NaN with the result's note; asking for an ANOVA effect size of a
Kruskal-Wallis result (or the reverse) is NaN with a note saying which one to use.

Welch results
-------------
``welch_anova`` fills ``ss_between``/``ss_within`` with Fisher's sums of squares from
the same summaries, and the ANOVA effect sizes (including omega squared and its
confidence interval) are computed from those, i.e. as for Fisher's ANOVA. They
describe the share of variance between segments under a pooled within-segment
variance, which is what these effect sizes mean; Welch's F itself is not used.
"""

from __future__ import annotations

import logging
import math

import numpy as np
from scipy import optimize, special

from monitor.model import EffectSize
from monitor.stats.omnibus import OmnibusResult

__all__ = [
    "EffectSize",
    "eta_squared",
    "omega_squared",
    "cohens_f",
    "epsilon_squared",
    "effect_size_for",
    "noncentrality_interval",
]

logger = logging.getLogger(__name__)

_NAN = float("nan")


def _anova_note(res: OmnibusResult, name: str) -> str | None:
    """Return why an ANOVA effect size cannot be computed from ``res``, or None."""
    if res.method == "kruskal":
        return f"{name} needs sums of squares from an ANOVA; use epsilon_squared for Kruskal-Wallis"
    if not res.is_defined:
        return res.note or "the test statistic is undefined"
    if not (math.isfinite(res.ss_between) and math.isfinite(res.ss_within)) or res.ss_within <= 0:
        return "the result carries no sums of squares"
    return None


def eta_squared(res: OmnibusResult) -> EffectSize:
    """Eta squared, the share of the total sum of squares lying between segments.

    Parameters
    ----------
    res : OmnibusResult
        A Fisher or Welch ANOVA result.

    Returns
    -------
    EffectSize
        ``SS_between / (SS_between + SS_within)``.

    Notes
    -----
    Pearson's correlation ratio, used as an ANOVA effect size by Cohen [1]_ (sec.
    8.2). In a one-way design it equals partial eta squared. It is biased upwards
    in small samples; :func:`omega_squared` corrects that.

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Lawrence Erlbaum.
    """
    note = _anova_note(res, "eta_squared")
    if note is not None:
        return EffectSize("eta_squared", _NAN, note=note)
    return EffectSize("eta_squared", res.ss_between / (res.ss_between + res.ss_within))


def omega_squared(res: OmnibusResult, confidence: float = 0.95) -> EffectSize:
    """Hays' omega squared with a confidence interval from the noncentral F.

    Parameters
    ----------
    res : OmnibusResult
        A Fisher or Welch ANOVA result (see the module docstring for Welch).
    confidence : float, optional
        Confidence level of the two-sided interval, in (0, 1).

    Returns
    -------
    EffectSize
        Point estimate ``(SS_b - (k-1) MS_w) / (SS_T + MS_w)`` and interval.

    Raises
    ------
    ValueError
        If ``confidence`` is not strictly between 0 and 1.

    Notes
    -----
    Point estimate: Hays [1]_, with ``MS_w = SS_within / (N - k)`` and
    ``SS_T = SS_between + SS_within``. It equals ``lam / (lam + N)`` with
    ``lam = (k - 1)(F - 1)``, and is negative when F < 1; it is reported as
    computed, not truncated at 0, because truncation biases it upwards and makes
    periods harder to compare. A negative value means no detectable effect.

    Interval: Steiger [2]_. The noncentrality ``lam`` of the F distribution is
    inverted from the observed Fisher F (see :func:`noncentrality_interval`) and
    each limit mapped to ``lam / (lam + N)``, the population omega squared for
    noncentrality ``lam = f^2 N``. Limits are clipped at 0 (a limit is 0 when even
    ``lam = 0`` cannot reach its tail probability).

    Assumptions are those of Fisher's ANOVA (normal errors, equal variances).

    References
    ----------
    .. [1] Hays, W. L. (1963). Statistics for Psychologists. New York: Holt,
       Rinehart and Winston.
    .. [2] Steiger, J. H. (2004). Beyond the F test: effect size confidence
       intervals and tests of close fit in the analysis of variance and contrast
       analysis. Psychological Methods 9(2), 164-182.
    """
    if not (0.0 < confidence < 1.0):
        raise ValueError(f"confidence must be a number strictly between 0 and 1; got {float(confidence)!r}")
    note = _anova_note(res, "omega_squared")
    if note is not None:
        return EffectSize("omega_squared", _NAN, note=note)
    k, n_total = res.k, res.n_total
    df1, df2 = k - 1, n_total - k
    ms_within = res.ss_within / df2
    value = (res.ss_between - df1 * ms_within) / (res.ss_between + res.ss_within + ms_within)
    f_fisher = (res.ss_between / df1) / ms_within
    lam_low, lam_high = noncentrality_interval(f_fisher, df1, df2, confidence)
    return EffectSize(
        "omega_squared",
        float(value),
        lam_low / (lam_low + n_total),
        lam_high / (lam_high + n_total),
    )


def cohens_f(res: OmnibusResult) -> EffectSize:
    """Cohen's f, the spread of segment means in units of the within-segment sd.

    Parameters
    ----------
    res : OmnibusResult
        A Fisher or Welch ANOVA result.

    Returns
    -------
    EffectSize
        ``sqrt(SS_between / SS_within)``, i.e. ``sqrt(eta^2 / (1 - eta^2))``.

    Notes
    -----
    Cohen [1]_, ch. 8 (f from eta squared); the same f drives the power
    calculation in :mod:`monitor.stats.power`. Cohen's conventions: 0.10 small,
    0.25 medium, 0.40 large. The sample estimate is biased upwards.

    References
    ----------
    .. [1] Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences,
       2nd ed. Hillsdale, NJ: Lawrence Erlbaum.
    """
    note = _anova_note(res, "cohens_f")
    if note is not None:
        return EffectSize("cohens_f", _NAN, note=note)
    return EffectSize("cohens_f", math.sqrt(res.ss_between / res.ss_within))


def epsilon_squared(res: OmnibusResult) -> EffectSize:
    """Epsilon squared for Kruskal-Wallis, ``H / ((N^2 - 1) / (N + 1))``.

    Parameters
    ----------
    res : OmnibusResult
        A Kruskal-Wallis result.

    Returns
    -------
    EffectSize
        ``H / (N - 1)``, between 0 and 1.

    Notes
    -----
    Tomczak and Tomczak [1]_. With the tie-corrected H
    of :func:`~monitor.stats.omnibus.kruskal_wallis`.

    References
    ----------
    .. [1] Tomczak, M. and Tomczak, E. (2014). The need to report effect size
       estimates revisited. An overview of some recommended measures of effect
       size. Trends in Sport Sciences 1(21), 19-25.
    """
    if res.method != "kruskal":
        return EffectSize(
            "epsilon_squared",
            _NAN,
            note="epsilon_squared is for Kruskal-Wallis; use omega_squared after an ANOVA",
        )
    if not res.is_defined:
        return EffectSize("epsilon_squared", _NAN, note=res.note or "the test statistic is undefined")
    n = res.n_total
    return EffectSize("epsilon_squared", res.statistic / ((n * n - 1) / (n + 1)))


def effect_size_for(res: OmnibusResult, confidence: float = 0.95) -> EffectSize:
    """The effect size segwatch reports for a result.

    Omega squared (with its interval) after ``anova`` or ``welch``, epsilon squared
    after ``kruskal``.
    """
    if res.method == "kruskal":
        return epsilon_squared(res)
    return omega_squared(res, confidence)


def noncentrality_interval(
    f_value: float, df1: float, df2: float, confidence: float = 0.95
) -> tuple[float, float]:
    """Confidence interval for the noncentrality of an F distribution.

    Parameters
    ----------
    f_value : float
        Observed F statistic.
    df1, df2 : float
        Its degrees of freedom.
    confidence : float, optional
        Two-sided confidence level.

    Returns
    -------
    (float, float)
        ``(lam_low, lam_high)`` with ``P(F' <= f_value; lam_low) = (1 + confidence)/2``
        and ``P(F' <= f_value; lam_high) = (1 - confidence)/2``, each 0 if even
        ``lam = 0`` leaves less probability than that below ``f_value``.

    Notes
    -----
    Inversion of the noncentral F distribution function in its noncentrality
    ("pivoting the cdf", Steiger [1]_); the cdf decreases in ``lam``, so each
    limit is a bracketed root (Brent's method) after doubling an upper bracket.
    ``scipy.special.ncfdtrinc`` does the same inversion but caps ``lam`` at 1e4, too
    small for large segments.

    References
    ----------
    .. [1] Steiger, J. H. (2004). Beyond the F test: effect size confidence
       intervals and tests of close fit in the analysis of variance and contrast
       analysis. Psychological Methods 9(2), 164-182.
    """
    if not math.isfinite(f_value) or f_value < 0:
        return _NAN, _NAN
    tail_high = (1.0 + confidence) / 2.0
    tail_low = (1.0 - confidence) / 2.0

    def cdf(lam: float) -> float:
        with np.errstate(all="ignore"):
            return float(special.ncfdtr(df1, df2, lam, f_value))

    def solve(target: float) -> float:
        if cdf(0.0) <= target:
            return 0.0
        upper = max(1.0, df1 * f_value)
        for _ in range(200):
            if cdf(upper) < target:
                break
            upper *= 2.0
        else:  # pragma: no cover - the cdf tends to 0 as lam grows
            logger.warning("noncentrality bracket not found for F=%s df=(%s, %s)", f_value, df1, df2)
            return _NAN
        return float(optimize.brentq(lambda lam: cdf(lam) - target, 0.0, upper, xtol=1e-12, rtol=1e-12))

    return solve(tail_high), solve(tail_low)
