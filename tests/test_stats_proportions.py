"""Homogeneity of proportions and pairs of proportions against outside references.

References: R 4.x (``prop.test``, ``chisq.test``, ``fisher.test``; the producing
commands are in the comments beside the frozen values), scipy (``chi2_contingency``,
``fisher_exact``, ``multivariate_hypergeom``) and statsmodels (``proportions_chisquare``,
``proportion_confint``, ``confint_proportions_2indep``, ``test_proportions_2indep``,
``multipletests``).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import (
    confint_proportions_2indep,
    proportion_confint,
    proportions_chisquare,
    test_proportions_2indep as sm_test_2indep,
)

from monitor.stats import omnibus
from monitor.stats.proportions import (
    counts_from_moments,
    homogeneity,
    newcombe_interval,
    pairwise,
    small_expected,
)
from monitor.stats.summary import Moments


class TestValidation:
    def test_more_ones_than_records(self):
        with pytest.raises(ValueError, match=r"successes\[1\] = 5 exceeds totals\[1\] = 4"):
            homogeneity([1, 5], [3, 4])

    def test_counts_must_be_whole(self):
        with pytest.raises(ValueError, match="whole numbers"):
            homogeneity([1.5, 2], [3, 4])

    def test_negative_counts(self):
        with pytest.raises(ValueError, match="non-negative"):
            homogeneity([-1, 2], [3, 4])

    def test_lengths(self):
        with pytest.raises(ValueError, match="2 entries for 3 totals"):
            homogeneity([1, 2], [3, 4, 5])

    def test_exact_option(self):
        with pytest.raises(ValueError, match="exact must be"):
            homogeneity([1, 2], [3, 4], exact="yes")

    def test_pair_confidence(self):
        with pytest.raises(ValueError, match="confidence"):
            pairwise(["a", "b"], [1, 2], [3, 4], confidence=95)

    def test_pair_labels(self):
        with pytest.raises(ValueError, match="labels has 1 entries for 2"):
            pairwise(["a"], [1, 2], [3, 4])


class TestAgainstR:
    def test_four_segments_large_counts(self):
        # R: prop.test(c(83, 91, 77, 102), c(97, 104, 95, 110), correct = FALSE)
        #    X-squared = 6.33691154097101, df = 3, p-value = 0.0963210363621485
        res = homogeneity([83, 91, 77, 102], [97, 104, 95, 110])
        assert res.p_method == "chi-square"
        assert res.statistic == pytest.approx(6.33691154097101, rel=1e-12)
        assert res.df == (3.0,)
        assert res.p_value == pytest.approx(0.0963210363621485, rel=1e-10)

    def test_a_segment_without_a_single_zero(self):
        # The case that breaks Welch's ANOVA on 0/1 values: one depot has no late parcel.
        # R: prop.test(c(120, 88, 112, 130, 99), c(130, 95, 120, 130, 106), correct = FALSE)
        #    X-squared = 9.95580604556924, df = 4, p-value = 0.0411787397456113
        res = homogeneity([120, 88, 112, 130, 99], [130, 95, 120, 130, 106])
        assert res.statistic == pytest.approx(9.95580604556924, rel=1e-12)
        assert res.p_value == pytest.approx(0.0411787397456113, rel=1e-10)
        moments = [Moments.from_values(np.r_[np.ones(x), np.zeros(n - x)])
                   for x, n in zip([120, 88, 112, 130, 99], [130, 95, 120, 130, 106])]
        assert math.isnan(omnibus.welch_anova(moments).p_value)  # what the proportions test replaces

    def test_two_by_two_small_is_fisher(self):
        # R: fisher.test(matrix(c(1, 9, 7, 3), 2, byrow = TRUE))$p.value = 0.0197666110978804
        res = homogeneity([1, 7], [10, 10])
        assert res.p_method == "fisher-exact"
        assert res.p_value == pytest.approx(0.0197666110978804, rel=1e-10)
        assert "Cochran" in res.note

    def test_two_by_two_zero_cell_small(self):
        # R: fisher.test(matrix(c(0, 12, 5, 9), 2, byrow = TRUE))$p.value = 0.0424749163879599
        assert homogeneity([0, 5], [12, 14]).p_value == pytest.approx(0.0424749163879599, rel=1e-10)

    def test_small_table_monte_carlo(self):
        # R: set.seed(1); chisq.test(cbind(x, n - x), simulate.p.value = TRUE, B = 200000)
        #    with x = c(0, 2, 1, 5), n = c(12, 10, 15, 11): X-squared = 10.1236363636364,
        #    p-value = 0.0139849300753496 (Monte Carlo se about 0.0003)
        res = homogeneity([0, 2, 1, 5], [12, 10, 15, 11])
        assert res.p_method == "monte-carlo" and res.resamples == 20_000
        assert res.statistic == pytest.approx(10.1236363636364, rel=1e-12)
        se = math.sqrt(0.014 * 0.986 / 20_000) + math.sqrt(0.014 * 0.986 / 200_000)
        assert abs(res.p_value - 0.0139849300753496) < 4 * se

    def test_pair_two_by_two(self):
        # R: prop.test(c(45, 30), c(120, 115), correct = FALSE)
        #    X-squared = 3.52021059782609, p-value = 0.0606247436711601
        out = pairwise(["a", "b"], [45, 30], [120, 115], adjust="none")
        (pair,) = out.pairs
        assert pair.test == "z"
        assert pair.statistic ** 2 == pytest.approx(3.52021059782609, rel=1e-12)
        assert pair.p_raw == pytest.approx(0.0606247436711601, rel=1e-10)


class TestAgainstPythonReferences:
    @pytest.mark.parametrize("seed", range(8))
    def test_chi_square_matches_scipy_and_statsmodels(self, seed):
        rng = np.random.default_rng(seed)
        k = int(rng.integers(2, 12))
        n = rng.integers(40, 400, size=k)
        x = rng.binomial(n, rng.uniform(0.05, 0.95))
        res = homogeneity(x, n, exact="never")
        table = np.column_stack([x, n - x])
        chi2, p, dof, _ = stats.chi2_contingency(table, correction=False)
        assert res.statistic == pytest.approx(chi2, rel=1e-10)
        assert res.p_value == pytest.approx(p, rel=1e-8, abs=1e-300)
        assert res.df == (float(dof),)
        sm_chi2, sm_p, _ = proportions_chisquare(x, n)
        assert res.statistic == pytest.approx(sm_chi2, rel=1e-10)
        # Cohen's w equals Cramer's V for k x 2 (scipy.stats.contingency.association)
        assert res.effect == pytest.approx(stats.contingency.association(table, method="cramer"), rel=1e-10)

    def test_exact_conditional_distribution_by_enumeration(self):
        # The Monte Carlo p estimates P(X^2 >= observed) under the multivariate
        # hypergeometric law of the 1s given both margins; enumerate that law exactly
        # with scipy.stats.multivariate_hypergeom for a small 3 x 2 table.
        x, n = np.array([0, 3, 5]), np.array([8, 9, 7])
        res = homogeneity(x, n)
        total = int(x.sum())
        share = total / n.sum()
        exact = 0.0
        for cells in itertools.product(*(range(min(int(m), total) + 1) for m in n)):
            if sum(cells) != total:
                continue
            c = np.array(cells, float)
            stat = np.sum((c - n * share) ** 2 / (n * share * (1 - share)))
            if stat >= res.statistic * (1 - 1e-12):
                exact += stats.multivariate_hypergeom.pmf(cells, n, total)
        assert res.p_method == "monte-carlo"
        se = math.sqrt(exact * (1 - exact) / res.resamples)
        assert abs(res.p_value - exact) < 4 * se + 1 / res.resamples

    def test_monte_carlo_is_a_function_of_the_table(self):
        assert homogeneity([0, 2, 1, 5], [12, 10, 15, 11]).p_value == homogeneity([0, 2, 1, 5], [12, 10, 15, 11]).p_value

    @pytest.mark.parametrize("seed", range(6))
    def test_pairs_match_statsmodels(self, seed):
        rng = np.random.default_rng(100 + seed)
        k = int(rng.integers(3, 7))
        n = rng.integers(60, 300, size=k)
        x = rng.binomial(n, rng.uniform(0.2, 0.8, size=k))
        labels = [f"s{j}" for j in range(k)]
        out = pairwise(labels, x, n, confidence=0.95, adjust="holm")
        m = k * (k - 1) // 2
        raw = []
        for pair, (i, j) in zip(out.pairs, itertools.combinations(range(k), 2)):
            assert (pair.a, pair.b) == (labels[i], labels[j])
            assert pair.diff == pytest.approx(x[i] / n[i] - x[j] / n[j], rel=1e-12)
            assert pair.test == "z"
            # pooled z = score test without the N/(N-1) factor
            sm = sm_test_2indep(x[i], n[i], x[j], n[j], method="score", compare="diff",
                                         correction=False)
            assert pair.statistic == pytest.approx(sm.statistic, rel=1e-9)
            assert pair.p_raw == pytest.approx(sm.pvalue, rel=1e-9)
            lo, hi = confint_proportions_2indep(x[i], n[i], x[j], n[j], method="newcomb", compare="diff",
                                                alpha=0.05 / m)
            assert (pair.ci_low, pair.ci_high) == pytest.approx((lo, hi), rel=1e-9, abs=1e-12)
            raw.append(pair.p_raw)
        holm = multipletests(raw, method="holm")[1]
        assert [p.p_adj for p in out.pairs] == pytest.approx(list(holm), rel=1e-12)

    def test_wilson_parts_match_statsmodels(self):
        lo, hi = newcombe_interval(0, 20, 0, 30, 0.95)
        l1, u1 = proportion_confint(0, 20, alpha=0.05, method="wilson")
        l2, u2 = proportion_confint(0, 30, alpha=0.05, method="wilson")
        assert lo == pytest.approx(-u2, rel=1e-12) and hi == pytest.approx(u1, rel=1e-12)


class TestDegenerateData:
    def test_all_zero(self):
        res = homogeneity([0, 0, 0], [10, 12, 9])
        assert math.isnan(res.statistic) and math.isnan(res.p_value)
        assert "every value is 0" in res.note

    def test_all_one(self):
        res = homogeneity([10, 12], [10, 12])
        assert math.isnan(res.p_value) and "every value is 1" in res.note

    def test_empty_segment(self):
        res = homogeneity([3, 0, 4], [10, 0, 9])
        assert math.isnan(res.p_value) and "position(s) 2" in res.note

    def test_one_segment(self):
        res = homogeneity([3], [10])
        assert math.isnan(res.p_value) and "fewer than 2" in res.note

    def test_segment_with_no_ones_is_computed(self):
        res = homogeneity([0, 30, 28], [100, 110, 95])
        assert res.is_defined and res.p_value < 1e-6

    def test_pair_both_all_zero_is_p_one(self):
        out = pairwise(["a", "b", "c"], [0, 0, 9], [40, 50, 45])
        ab = out.pairs[0]
        assert ab.diff == 0 and ab.p_raw == 1.0 and ab.test == "fisher-exact"
        assert ab.ci_low < 0 < ab.ci_high

    def test_pair_with_empty_segment(self):
        out = pairwise(["a", "b"], [0, 3], [0, 10])
        assert math.isnan(out.pairs[0].p_adj) and "no records in a" in out.note


class TestSmallExpected:
    def test_cochran_rule(self):
        # Cochran (1954): none below 1, at most 20% below 5 (common practice)
        assert not small_expected(np.array([5, 6, 7, 8, 9, 10, 11, 12, 13, 4.9]))
        assert small_expected(np.array([5, 6, 7, 8, 9, 10, 11, 4.9, 4.9, 4.9]))  # 30% below 5
        assert small_expected(np.array([0.9, 30, 30, 30, 30, 30, 30, 30, 30, 30]))


class TestRecognise01:
    def test_zero_one_values(self):
        v = np.r_[np.ones(17), np.zeros(40)]
        assert counts_from_moments(Moments.from_values(v)) == (17, 57)

    def test_all_zero(self):
        assert counts_from_moments(Moments.from_values(np.zeros(9))) == (0, 9)

    def test_from_shifted_sums_like_a_database(self):
        # what the push-down gives for a 0/1 column: n, sum, sum of squares (equal)
        v = np.r_[np.ones(7), np.zeros(93)]
        mom = Moments.from_values(v)
        assert counts_from_moments(mom.as_float()) == (7, 100)

    @pytest.mark.parametrize("values", [[0.0, 0.5, 1.0], [0.0, 1.0, 2.0], [1.0, 1.0, 0.999], [0.2, 0.2]])
    def test_not_binary(self, values):
        assert counts_from_moments(Moments.from_values(np.array(values))) is None

    def test_empty(self):
        assert counts_from_moments(Moments.empty()) is None
