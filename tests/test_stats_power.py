"""Minimum detectable effect of Fisher's ANOVA against statsmodels and the noncentral F."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.power import FTestAnovaPower

from monitor.stats.power import anova_power, minimum_detectable_difference, minimum_detectable_f


@pytest.mark.parametrize(
    ("k", "n", "alpha", "power"),
    [(2, 10, 0.05, 0.8), (3, 20, 0.05, 0.8), (5, 100, 0.01, 0.9), (9, 2001, 0.05, 0.8), (4, 7, 0.1, 0.5), (12, 40, 0.05, 0.95)],
)
def test_matches_statsmodels_with_equal_sizes(k, n, alpha, power):
    ours = minimum_detectable_f([n] * k, alpha=alpha, power=power)
    # reference: statsmodels.stats.power.FTestAnovaPower.solve_power; its `nobs` is the
    # TOTAL sample size N = k n (noncentrality effect_size^2 * nobs, as in Cohen 1988).
    # It solves with brentq at its default tolerance, hence rtol 1e-6 not tighter.
    ref = FTestAnovaPower().solve_power(effect_size=None, nobs=k * n, alpha=alpha, power=power, k_groups=k)
    np.testing.assert_allclose(ours, ref, rtol=1e-6)


@pytest.mark.parametrize("sizes", [[5, 50, 500], [2, 3], [30, 30, 31, 2, 200], [1000, 1000]])
def test_power_at_the_answer_equals_the_target(sizes):
    f = minimum_detectable_f(sizes, alpha=0.05, power=0.8)
    k, n_total = len(sizes), sum(sizes)
    # reference: scipy.stats.ncf / scipy.stats.f; power = P(F' > F_crit), lam = f^2 N (Cohen 1988, ch. 8)
    crit = stats.f.isf(0.05, k - 1, n_total - k)
    np.testing.assert_allclose(stats.ncf.sf(crit, k - 1, n_total - k, f * f * n_total), 0.8, rtol=1e-9)
    # reference: statsmodels.stats.power.FTestAnovaPower.power (same convention)
    np.testing.assert_allclose(
        FTestAnovaPower().power(effect_size=f, nobs=n_total, alpha=0.05, k_groups=k), 0.8, rtol=1e-9
    )
    np.testing.assert_allclose(anova_power(f, sizes, alpha=0.05), 0.8, rtol=1e-9)


def test_more_data_detects_smaller_effects():
    # Cohen 1988: power rises with N at fixed f, so the detectable f falls
    fs = [minimum_detectable_f([n] * 4) for n in (5, 20, 80, 320)]
    assert all(a > b for a, b in zip(fs, fs[1:]))


def test_difference_in_metric_units():
    # relation used: sigma_m = f * pooled sd (Cohen's definition f = sigma_m / sigma);
    # statsmodels.stats.power.FTestAnovaPower gives f for the equal-size case
    f = FTestAnovaPower().solve_power(effect_size=None, nobs=60, alpha=0.05, power=0.8, k_groups=3)
    np.testing.assert_allclose(minimum_detectable_difference([20, 20, 20], 2.5), 2.5 * f, rtol=1e-6)
    assert math.isnan(minimum_detectable_difference([20, 20], float("nan")))


class TestDegenerate:
    def test_too_few_segments_or_no_residual_df(self):
        assert math.isnan(minimum_detectable_f([50]))
        assert math.isnan(minimum_detectable_f([]))
        assert math.isnan(minimum_detectable_f([1, 1]))  # N - k = 0
        assert math.isnan(minimum_detectable_f([0, 9, 0]))  # empty segments do not count
        assert math.isnan(anova_power(0.5, [3]))

    def test_power_not_above_alpha_needs_no_effect(self):
        assert minimum_detectable_f([10, 10], alpha=0.2, power=0.1) == 0.0

    def test_bad_arguments_name_the_problem(self):
        with pytest.raises(ValueError) as err:
            minimum_detectable_f([10, 10], alpha=1.5)
        assert str(err.value) == "alpha must be a number strictly between 0 and 1; got 1.5"
        with pytest.raises(ValueError) as err:
            minimum_detectable_f([10, 10], power=0)
        assert str(err.value) == "power must be a number strictly between 0 and 1; got 0.0"
        with pytest.raises(ValueError) as err:
            minimum_detectable_f([10, -2])
        assert str(err.value) == "n_per_group must hold non-negative whole numbers; got [10, -2]"
        with pytest.raises(ValueError) as err:
            minimum_detectable_difference([10, 10], -1.0)
        assert str(err.value) == "pooled_sd must be a finite number >= 0; got -1.0"
