"""Effect sizes against pingouin, statsmodels and the noncentral F's defining property."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pingouin as pg
import pytest
from scipy import stats
from statsmodels.stats import oneway as sm_oneway

from monitor.stats.effects import (
    EffectSize,
    cohens_f,
    effect_size_for,
    epsilon_squared,
    eta_squared,
    noncentrality_interval,
    omega_squared,
)
from monitor.stats.omnibus import OmnibusResult, fisher_anova, kruskal_wallis, welch_anova
from monitor.stats.summary import Moments

RTOL = 1e-6

# pingouin 0.7 calls a pandas API that pandas 3.1 deprecates; not ours to fix
pytestmark = pytest.mark.filterwarnings("ignore:The inplace keyword in DataFrame.dropna")


def make_groups(seed: int) -> list[np.ndarray]:
    """Generated data: unequal sizes 2..500, unequal spreads, some skew (fixed seeds)."""
    rng = np.random.default_rng(1000 + seed)
    k = int(rng.integers(2, 7))
    sizes = rng.integers(2, 501, size=k)
    effect = rng.choice([0.0, 0.05, 0.3])
    out = []
    for i, n in enumerate(sizes):
        sd = rng.uniform(0.5, 3.0)
        base = rng.lognormal(0.0, 0.5, n) if seed % 2 else rng.normal(0.0, 1.0, n)
        out.append(effect * i + sd * base)
    return out


def frame(groups) -> pd.DataFrame:
    return pd.DataFrame(
        {"segment": np.repeat([f"s{i}" for i in range(len(groups))], [g.size for g in groups]),
         "value": np.concatenate(groups)}
    )


def fisher(groups) -> OmnibusResult:
    return fisher_anova([Moments.from_values(g) for g in groups])


def welch(groups) -> OmnibusResult:
    return welch_anova([Moments.from_values(g) for g in groups])


@pytest.mark.parametrize("seed", range(8))
def test_eta_squared_matches_pingouin(seed):
    groups = make_groups(seed)
    df = frame(groups)
    table = pg.anova(data=df, dv="value", between="segment", detailed=True)
    # reference: pingouin.anova(detailed=True): SS rows and np2 (= eta^2 in a one-way design)
    res = fisher(groups)
    np.testing.assert_allclose(res.ss_between, table["SS"].iloc[0], rtol=RTOL)
    np.testing.assert_allclose(res.ss_within, table["SS"].iloc[1], rtol=RTOL)
    np.testing.assert_allclose(eta_squared(res).value, table["np2"].iloc[0], rtol=RTOL)
    # reference: pingouin.welch_anova np2, from the same sums of squares
    w = pg.welch_anova(data=df, dv="value", between="segment")
    np.testing.assert_allclose(eta_squared(welch(groups)).value, w["np2"].iloc[0], rtol=RTOL)


@pytest.mark.parametrize("seed", range(8))
def test_omega_squared_and_cohens_f_match_statsmodels(seed):
    groups = make_groups(seed)
    res = fisher(groups)
    # reference: statsmodels.stats.oneway._fstat2effectsize (private helper; omega2 is
    # Hays' estimate written in F, f2 = F df1/df2 = SSb/SSw)
    ref = sm_oneway._fstat2effectsize(res.statistic, res.df)
    np.testing.assert_allclose(omega_squared(res).value, ref.omega2, rtol=RTOL, atol=1e-12)
    np.testing.assert_allclose(cohens_f(res).value, math.sqrt(ref.f2), rtol=RTOL)
    # Welch results use the same summaries' sums of squares (documented), so same values
    np.testing.assert_allclose(omega_squared(welch(groups)).value, ref.omega2, rtol=RTOL, atol=1e-12)
    # reference: Cohen (1988) f = sqrt(eta^2 / (1 - eta^2)), with pingouin's np2 as eta^2
    np2 = pg.anova(data=frame(groups), dv="value", between="segment")["np2"].iloc[0]
    np.testing.assert_allclose(cohens_f(res).value, math.sqrt(np2 / (1 - np2)), rtol=RTOL)


@pytest.mark.parametrize("seed", range(8))
def test_omega_squared_interval_by_its_defining_property(seed):
    groups = make_groups(seed)
    res = fisher(groups)
    es = omega_squared(res, confidence=0.95)
    n_total, (df1, df2) = res.n_total, res.df
    # reference: scipy.stats.ncf; at each positive limit lam = N w / (1 - w) the
    # noncentral F cdf of the observed F is 0.975 (lower) / 0.025 (upper) (Steiger 2004)
    for limit, tail in ((es.ci_low, 0.975), (es.ci_high, 0.025)):
        assert 0.0 <= limit < 1.0
        lam = n_total * limit / (1.0 - limit)
        if lam > 0:
            np.testing.assert_allclose(stats.ncf.cdf(res.statistic, df1, df2, lam), tail, rtol=1e-7)
        else:  # the limit is 0 only when even lam = 0 cannot reach the tail
            assert stats.f.cdf(res.statistic, df1, df2) <= tail
    if es.value > 0:
        assert es.ci_low <= es.value <= es.ci_high


@pytest.mark.parametrize("seed", range(8))
def test_noncentrality_interval_matches_statsmodels(seed):
    res = fisher(make_groups(seed))
    lo, hi = noncentrality_interval(res.statistic, *res.df, confidence=0.95)
    # reference: statsmodels.stats.oneway.confint_noncentrality (scipy.special.ncfdtrinc;
    # a numerical inversion with a looser tolerance, hence 1e-3, and it drifts past that
    # for lam > 1000, which the defining-property test above covers; it does not clip at 0)
    ref = sm_oneway.confint_noncentrality(res.statistic, res.df, alpha=0.05)
    for ours, theirs in zip((lo, hi), ref):
        if theirs > 1000:
            continue
        if theirs > 0:
            np.testing.assert_allclose(ours, theirs, rtol=1e-3)
        else:
            assert ours == 0.0


def test_interval_beyond_ncfdtrinc_cap():
    # NIST StRD SmLs09 certified F = 2001 with df (8, 18000): lam ~ 16000 lies beyond
    # the 1e4 cap of scipy.special.ncfdtrinc; check the defining property with scipy.stats.ncf
    lo, hi = noncentrality_interval(2001.0, 8, 18000)
    np.testing.assert_allclose(stats.ncf.cdf(2001.0, 8, 18000, lo), 0.975, rtol=1e-7)
    np.testing.assert_allclose(stats.ncf.cdf(2001.0, 8, 18000, hi), 0.025, rtol=1e-6)
    assert lo < 8 * 2000 < hi


def test_plant_growth_effect_sizes(published_examples):
    # Dobson (1983) plant weights; R printed F = 4.846 on (2, 27) (from_memory). Hays'
    # omega^2 = (k-1)(F-1)/((k-1)(F-1)+N) evaluated by hand from those printed figures
    groups = [np.asarray(v) for v in published_examples["plant_growth"]["groups"].values()]
    res = fisher(groups)
    expected = 2 * (4.846 - 1) / (2 * (4.846 - 1) + 30)
    assert omega_squared(res).value == pytest.approx(expected, abs=5e-4)
    assert eta_squared(res).value == pytest.approx(2 * 4.846 / (2 * 4.846 + 27), abs=5e-4)


@pytest.mark.parametrize("seed", range(6))
def test_epsilon_squared(seed):
    groups = make_groups(seed)
    res = kruskal_wallis(groups)
    n_total = sum(g.size for g in groups)
    # reference: scipy.stats.kruskal H, with Tomczak & Tomczak (2014) eps^2 = H / ((N^2-1)/(N+1))
    h = stats.kruskal(*groups).statistic
    np.testing.assert_allclose(epsilon_squared(res).value, h / ((n_total**2 - 1) / (n_total + 1)), rtol=RTOL)
    assert effect_size_for(res).name == "epsilon_squared"


class TestNotApplicable:
    def test_wrong_family(self):
        kw = kruskal_wallis([[1.0, 2.0, 3.0], [4.0, 5.0]])
        an = fisher([np.array([1.0, 2.0, 3.0]), np.array([4.0, 5.0])])
        for func in (eta_squared, omega_squared, cohens_f):
            es = func(kw)
            assert math.isnan(es.value)
            assert es.note == f"{es.name} needs sums of squares from an ANOVA; use epsilon_squared for Kruskal-Wallis"
        es = epsilon_squared(an)
        assert math.isnan(es.value)
        assert es.note == "epsilon_squared is for Kruskal-Wallis; use omega_squared after an ANOVA"

    def test_undefined_statistic_passes_its_note_on(self):
        flat = fisher([np.array([2.0, 2.0]), np.array([3.0, 3.0])])
        for func in (eta_squared, omega_squared, cohens_f, effect_size_for):
            es = func(flat)
            assert math.isnan(es.value) and es.note == "no variation within segments"
        tied = kruskal_wallis([[1.0, 1.0], [1.0]])
        assert epsilon_squared(tied).note == "all values are tied"

    def test_bad_confidence(self):
        res = fisher([np.array([1.0, 2.0, 3.0]), np.array([4.0, 5.0, 7.0])])
        with pytest.raises(ValueError, match="confidence must be a number strictly between 0 and 1; got 95.0"):
            omega_squared(res, confidence=95)


def test_small_f_gives_zero_lower_limit_and_negative_estimate():
    # two identical-looking segments: F < 1, so Hays' estimate is negative (kept, not
    # truncated) and the lower limit is 0 (scipy.stats.f: cdf at lam = 0 is below 0.975)
    res = fisher([np.array([1.0, 2.0, 3.0, 4.0]), np.array([1.5, 2.5, 2.0, 3.0])])
    assert res.statistic < 1
    es = omega_squared(res)
    assert isinstance(es, EffectSize) and es.value < 0
    assert es.ci_low == 0.0 and es.ci_high > 0
