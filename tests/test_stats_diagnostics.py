"""Assumption checks and the auto rule (monitor.stats.diagnostics).

Sources: scipy.stats (levene with center='median', shapiro, normaltest, skew),
statsmodels multipletests, numpy, hand computation of Tukey's fences, and the
rules of thumb in tests/reference/published_examples.json (common practice).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.stats.diagnostics import (
    CHECK_NAMES,
    Check,
    MethodChoice,
    brown_forsythe,
    _shapiro_p,
    choose_method,
    median_of_sorted,
    n_ratio,
    normality,
    outlier_share,
    quantiles_of_sorted,
    run_checks,
    sd_ratio,
)
from monitor.stats.summary import Moments

pytestmark = pytest.mark.filterwarnings("error")

REFERENCE = Path(__file__).resolve().parent / "reference"


def _summaries(samples):
    return [Moments.from_values(np.asarray(s, dtype=float)) for s in samples]


@pytest.fixture(scope="module")
def plant_growth():
    with open(REFERENCE / "published_examples.json", encoding="utf-8") as fh:
        groups = json.load(fh)["plant_growth"]["groups"]
    labels = ["ctrl", "trt1", "trt2"]
    return labels, [np.array(groups[g]) for g in labels]


@pytest.fixture(scope="module")
def mixed():
    rng = np.random.default_rng(99)
    return [rng.normal(0, 1, 25), rng.exponential(2.0, 40), rng.normal(3, 4, 12), rng.uniform(0, 1, 60)]


# ---------------------------------------------------------------------------
class TestInputValidation:
    def test_alpha(self, mixed):
        with pytest.raises(ValueError) as err:
            brown_forsythe(mixed, alpha=1.5)
        assert str(err.value) == "alpha must be a number strictly between 0 and 1; got 1.5"

    def test_max_shapiro_n(self, mixed):
        with pytest.raises(ValueError) as err:
            normality(mixed, max_shapiro_n=6000)
        assert str(err.value) == "max_shapiro_n must be a whole number from 20 to 5000; got 6000"

    def test_ratio_threshold(self, mixed):
        with pytest.raises(ValueError) as err:
            sd_ratio(_summaries(mixed), threshold=0.5)
        assert str(err.value) == "threshold must be a finite number of at least 1; got 0.5"

    def test_labels_length(self, mixed):
        with pytest.raises(ValueError) as err:
            run_checks(["a", "b"], None, mixed)
        assert str(err.value) == "labels and samples must have the same length; got 2 labels and 4 samples"

    def test_run_checks_needs_data(self):
        with pytest.raises(ValueError) as err:
            run_checks(["a"], None, None)
        assert str(err.value) == "run_checks needs groups (summaries) or samples; both are None"


# ---------------------------------------------------------------------------
class TestBrownForsythe:
    def test_against_scipy_levene_median(self, mixed, plant_growth):
        for samples in (mixed, plant_growth[1], mixed[:2]):
            check = brown_forsythe(samples)
            # reference: scipy.stats.levene(center='median') (Brown-Forsythe variant)
            ref = stats.levene(*samples, center="median")
            assert check.value == pytest.approx(ref.pvalue, rel=1e-10)
            assert check.passed is bool(ref.pvalue >= 0.05)
            assert check.threshold == 0.05 and check.name == "brown_forsythe"

    def test_detail(self, mixed):
        check = brown_forsythe(mixed)
        # reference: scipy.stats.levene(center='median'): these spreads differ
        p = stats.levene(*mixed, center="median").pvalue
        assert p < 0.05 and check.passed is False
        assert check.detail == f"Brown-Forsythe p {p:.1e} is below 0.05: spreads differ between segments."

    def test_single_record_segment_counts(self, mixed):
        samples = [mixed[0], np.array([7.0]), mixed[2]]
        # reference: scipy.stats.levene(center='median') also accepts a one-record segment
        ref = stats.levene(*samples, center="median")
        assert brown_forsythe(samples).value == pytest.approx(ref.pvalue, rel=1e-10)


class TestNormality:
    def test_shapiro_holm(self, mixed):
        check = normality(mixed, labels=["a", "b", "c", "d"])
        # reference: scipy.stats.shapiro per segment, statsmodels multipletests(holm)
        raw = [stats.shapiro(s).pvalue for s in mixed]
        adjusted = multipletests(raw, method="holm")[1]
        assert check.value == pytest.approx(min(adjusted), rel=1e-10)
        worst = int(np.argmin(raw))
        assert check.passed is bool(min(adjusted) >= 0.01)
        assert f"(segment {'abcd'[worst]!r}, Shapiro-Wilk, n={len(mixed[worst])})" in check.detail

    def test_dagostino_above_limit(self, mixed):
        check = normality(mixed, max_shapiro_n=30, labels=["a", "b", "c", "d"])
        # reference: scipy.stats.normaltest (D'Agostino-Pearson) for the segments
        # above the limit, scipy.stats.shapiro below, statsmodels multipletests(holm)
        raw = [stats.shapiro(s).pvalue if len(s) <= 30 else stats.normaltest(s).pvalue for s in mixed]
        assert check.value == pytest.approx(min(multipletests(raw, method="holm")[1]), rel=1e-10)
        worst = int(np.argmin(raw))
        assert check.detail.startswith("Smallest Holm-adjusted normality p ")
        assert f"segment {'abcd'[worst]!r}, D'Agostino-Pearson" in check.detail

    def test_plant_growth_passes(self, plant_growth):
        labels, samples = plant_growth
        check = normality(samples, labels=labels)
        # reference: scipy.stats.shapiro on each PlantGrowth group, Holm over three
        raw = [stats.shapiro(s).pvalue for s in samples]
        assert check.value == pytest.approx(min(multipletests(raw, method="holm")[1]), rel=1e-10)
        assert check.passed is True

    def test_skipped_segments(self):
        samples = [np.array([1.0, 2.0]), np.array([3.0, 3.0, 3.0]), np.array([1.0, 2.0, 4.0, 8.0])]
        check = normality(samples, labels=["x", "y", "z"])
        # reference: scipy.stats.shapiro on the only testable segment
        p = stats.shapiro(samples[2]).pvalue
        assert check.value == pytest.approx(p, rel=1e-10)
        assert check.detail == (
            f"Smallest Holm-adjusted normality p {p:.3g} (segment 'z', Shapiro-Wilk, n=4) is at or "
            "above 0.01; 2 segments with fewer than 3 records or no spread not tested."
        )


class TestRatios:
    def test_sd_ratio(self):
        samples = [np.array([0.0, 2.0]), np.array([0.0, 6.0]), np.array([1.0, 3.0, 5.0])]
        check = sd_ratio(_summaries(samples), labels=["A", "B", "C"])
        # reference: numpy std(ddof=1): sqrt(18) / sqrt(2) = 3; 2.0 is the common-practice
        # limit in published_examples.json rules_of_thumb
        assert check.value == pytest.approx(np.std(samples[1], ddof=1) / np.std(samples[0], ddof=1), rel=1e-12)
        assert check.passed is False
        assert check.detail == "Largest/smallest sd ratio 3.0 exceeds 2.0 ('B' 4.24 vs 'A' 1.41)."

    def test_sd_ratio_unbounded(self):
        check = sd_ratio(_summaries([[1.0, 1.0, 1.0], [0.0, 2.0]]), labels=["A", "B"])
        assert check.value == math.inf and check.passed is False
        assert check.detail == "Segment 'A' has no spread while segment 'B' has sd 1.41, so the sd ratio is unbounded."

    def test_n_ratio(self):
        groups = _summaries([np.arange(10.0), np.arange(50.0), np.arange(20.0)])
        check = n_ratio(groups, labels=["A", "B", "C"])
        # reference: hand arithmetic 50 / 10; 4.0 is a common-practice limit
        assert check.value == 5.0 and check.passed is False
        assert check.detail == "Largest/smallest segment size ratio 5.0 exceeds 4.0 ('B' 50 vs 'A' 10)."

    def test_n_ratio_equal_sizes_names_two_segments(self):
        check = n_ratio(_summaries([[1.0, 2.0], [3.0, 4.0]]), labels=["A", "B"])
        assert check.detail == "Largest/smallest segment size ratio 1.0 is within 4.0 ('B' 2 vs 'A' 2)."


class TestOutlierShare:
    def test_far_fences_by_hand(self):
        # reference: Tukey (1977) far fences, by hand with type-7 quartiles: for
        # 1..8 and 100, Q1 = 3, Q3 = 7, IQR = 4, upper far fence 7 + 12 = 19, so 100 is
        # far out; for 2..5, Q1 = 2.75, Q3 = 4.25, fences -1.75 and 8.75: none out
        samples = [np.array([1.0, 2, 3, 4, 5, 6, 7, 8, 100]), np.array([2.0, 3, 4, 5])]
        check = outlier_share(samples, labels=["A", "B"])
        assert check.value == pytest.approx(1 / 13)
        assert check.passed is False
        assert check.detail == (
            "7.7% of values lie beyond Tukey's far fences, above the 5.0% limit (most in segment 'A': 1 of 9)."
        )

    def test_just_inside_the_fence(self):
        # reference: hand computation, 19 is exactly on the upper far fence (not beyond)
        check = outlier_share([np.array([1.0, 2, 3, 4, 5, 6, 7, 8, 19])])
        assert check.value == 0.0 and check.passed is True
        assert check.detail == "0.0% of values lie beyond Tukey's far fences, within the 5.0% limit."


# ---------------------------------------------------------------------------
def _check(name, value, threshold, passed):
    return Check(name, value, threshold, passed, "made by hand for the rule test")


def _checks(normality_p=0.5, bf_p=0.5, sd=1.2):
    return {
        "brown_forsythe": _check("brown_forsythe", bf_p, 0.05, bf_p >= 0.05),
        "normality": _check("normality", normality_p, 0.01, normality_p >= 0.01),
        "sd_ratio": _check("sd_ratio", sd, 2.0, sd <= 2.0),
        "n_ratio": _check("n_ratio", 1.5, 4.0, True),
        "outlier_share": _check("outlier_share", 0.0, 0.05, True),
    }


class TestChooseMethod:
    """One case per branch of the auto rule (thresholds: common practice)."""

    def test_kruskal_when_normality_fails_in_small_segments(self):
        groups = _summaries([np.arange(12.0), np.arange(40.0)])
        choice = choose_method(groups, None, _checks(normality_p=0.0012), labels=["Dock", "Gate"])
        assert choice == MethodChoice(
            "kruskal",
            "Kruskal-Wallis: normality is rejected (smallest Holm-adjusted p 0.0012 < 0.01) and the "
            "smallest segment has only 12 records (under 30).",
        )

    def test_kruskal_when_a_small_segment_is_skewed(self):
        skewed = np.array([1.0] * 10 + [2.0, 30.0])
        groups = _summaries([skewed, np.arange(40.0)])
        choice = choose_method(groups, None, _checks(), labels=["Dock", "Gate"])
        # reference: scipy.stats.skew(bias=True), the g1 of Moments.skewness
        g1 = stats.skew(skewed, bias=True)
        assert g1 > 2
        assert choice.method == "kruskal"
        assert choice.reason == (
            f"Kruskal-Wallis: segment 'Dock' has only 12 records (under 30) and skewness {g1:.2f} "
            "(beyond +/-2.0)."
        )

    def test_welch_not_kruskal_when_skewed_small_segments_also_differ_in_spread(self):
        skewed = np.array([1.0] * 10 + [2.0, 30.0])
        groups = _summaries([skewed, np.arange(40.0)])
        choice = choose_method(groups, None, _checks(bf_p=0.003), labels=["Dock", "Gate"])
        assert choice.method == "welch"
        assert choice.reason.startswith("Welch's ANOVA: segment 'Dock' has only 12 records (under 30) and skewness")
        assert "but the spreads differ (Brown-Forsythe p 0.003 < 0.05)" in choice.reason
        # the same with the normality branch
        groups = _summaries([np.arange(12.0), np.arange(40.0)])
        choice = choose_method(groups, None, _checks(normality_p=0.0012, bf_p=0.003))
        assert choice.method == "welch" and "normality is rejected" in choice.reason
        # an sd ratio alone does not veto the rank test (too noisy in small skewed segments)
        choice = choose_method(groups, None, _checks(normality_p=0.0012, sd=3.5))
        assert choice.method == "kruskal"

    def test_welch_when_spreads_differ(self):
        groups = _summaries([np.arange(40.0), np.arange(40.0) * 3])
        choice = choose_method(groups, None, _checks(bf_p=0.0021, sd=3.1))
        assert choice == MethodChoice(
            "welch",
            "Welch's ANOVA: spreads look unequal (Brown-Forsythe p 0.0021 < 0.05, largest/smallest "
            "sd ratio 3.1 > 2.0).",
        )

    def test_welch_on_sd_ratio_alone(self):
        groups = _summaries([np.arange(40.0), np.arange(40.0) * 3])
        choice = choose_method(groups, None, _checks(bf_p=0.2, sd=3.0))
        assert choice.reason == (
            "Welch's ANOVA: spreads look unequal (Brown-Forsythe p 0.2 >= 0.05, largest/smallest "
            "sd ratio 3.0 > 2.0)."
        )

    def test_anova_otherwise(self):
        groups = _summaries([np.arange(40.0), np.arange(40.0) + 1])
        choice = choose_method(groups, None, _checks(bf_p=0.41, sd=1.3))
        assert choice == MethodChoice(
            "anova",
            "Fisher's ANOVA: no strong non-normality in small segments, about equal sizes and no sign of unequal spreads "
            "(Brown-Forsythe p 0.41 >= 0.05, largest/smallest sd ratio 1.3 <= 2.0).",
        )

    def test_non_normal_but_large_segments_stay_parametric(self):
        groups = _summaries([np.arange(40.0), np.arange(35.0)])
        choice = choose_method(groups, None, _checks(normality_p=1e-9))
        assert choice.method == "anova"

    def test_end_to_end_unequal_spreads(self):
        rng = np.random.default_rng(2)
        samples = [rng.normal(10, 1, 40), rng.normal(10, 6, 40)]
        choice = choose_method(_summaries(samples), samples)
        # reference: scipy.stats.levene(center='median') rejects equal spreads here
        assert stats.levene(*samples, center="median").pvalue < 0.05
        assert choice.method == "welch"
        assert choice.reason.startswith("Welch's ANOVA: spreads look unequal (Brown-Forsythe p ")

    def test_end_to_end_plant_growth(self, plant_growth):
        labels, samples = plant_growth
        choice = choose_method(_summaries(samples), samples, labels=labels)
        # reference: scipy.stats.levene(center='median') and the sd ratio of PlantGrowth
        # (0.79 / 0.44 = 1.8, within 2.0) do not suggest unequal spreads
        assert stats.levene(*samples, center="median").pvalue >= 0.05
        assert choice.method == "anova"


# ---------------------------------------------------------------------------
class TestRunChecks:
    def test_all_five(self, plant_growth):
        labels, samples = plant_growth
        checks = run_checks(labels, None, samples)
        assert tuple(checks) == CHECK_NAMES
        assert all(checks[name].name == name for name in CHECK_NAMES)
        # reference: numpy std(ddof=1) of the PlantGrowth groups
        sds = [np.std(s, ddof=1) for s in samples]
        assert checks["sd_ratio"].value == pytest.approx(max(sds) / min(sds), rel=1e-12)

    def test_without_raw_values(self, plant_growth):
        labels, samples = plant_growth
        checks = run_checks(labels, _summaries(samples), None)
        assert checks["normality"].passed is None and math.isnan(checks["normality"].value)
        assert checks["normality"].detail == "The raw values were not available, so normality could not be checked."
        assert checks["brown_forsythe"].detail == (
            "The raw values were not available, so the Brown-Forsythe test could not be checked."
        )
        assert checks["sd_ratio"].passed is True


class TestDegenerate:
    """No exceptions and no warnings (this module turns warnings into errors)."""

    @pytest.mark.parametrize(
        "samples",
        [
            [np.array([1.0, 2.0, 3.0])],                                   # one segment
            [np.array([2.0, 2.0, 2.0]), np.array([5.0, 5.0])],             # zero variance
            [np.array([1.0, 2.0, 3.0]), np.array([4.0])],                  # n = 1 segment
            [np.array([4.0, 4.0, 4.0]), np.array([4.0, 4.0])],             # all ties
            [np.array([1.0]), np.array([2.0])],                            # single records
            [np.array([1.0, 2.0, 5.0]), np.array([]), np.array([3.0, 4.0, 9.0])],  # empty
        ],
    )
    def test_no_crash_no_warning(self, samples):
        labels = [f"s{i}" for i in range(len(samples))]
        groups = _summaries(samples)
        checks = run_checks(labels, groups, samples)
        for check in checks.values():
            assert check.detail.endswith(".")
            if check.passed is None:
                assert math.isnan(check.value)
        choice = choose_method(groups, samples, checks, labels=labels)
        assert choice.method in ("anova", "welch", "kruskal")

    def test_messages(self):
        one = run_checks(["a"], None, [np.array([1.0, 2.0, 3.0])])
        assert one["brown_forsythe"].detail == "Brown-Forsythe test needs at least two segments with records; found 1."
        assert one["sd_ratio"].detail == "The sd ratio needs at least two segments with 2 or more records; found 1."
        flat = run_checks(["a", "b"], None, [np.array([2.0, 2.0, 2.0]), np.array([5.0, 5.0])])
        assert flat["brown_forsythe"].detail == (
            "Brown-Forsythe test is undefined because the distances from the median do not vary within any segment."
        )
        assert flat["normality"].detail == (
            "Normality could not be checked: no segment has 3 or more records with some spread."
        )
        assert flat["sd_ratio"].detail == "The sd ratio is undefined because no segment has any spread."
        singles = run_checks(["a", "b"], None, [np.array([1.0]), np.array([2.0])])
        assert singles["brown_forsythe"].detail == (
            "Brown-Forsythe test is undefined because every segment has a single record."
        )


class TestSortedOnce:
    """run_checks sorts each sample once and reads medians, quartiles and Shapiro-Wilk off
    the sorted copy; every number must be the very one numpy and scipy give (exact equality,
    not a tolerance: the sorted path is the same arithmetic)."""

    @staticmethod
    def _samples():
        rng = np.random.default_rng(20260309)
        out = [rng.normal(0, 1, n) for n in (1, 2, 3, 4, 5, 7, 10, 31, 100, 999, 5000)]
        out.append(np.round(rng.exponential(2.0, 400), 1))  # many ties
        out.append(np.array([0.0, -0.0, 1.5, -2.25, 0.0, 3.0]))  # signed zeros
        out.append(np.full(6, 4.5))  # no spread
        return out

    def test_quantiles_match_numpy_quantile_and_percentile(self):
        levels = np.array([0.0, 0.05, 0.25, 0.5, 0.75, 0.95, 1.0])  # numpy's default method='linear'
        for a in self._samples():
            got = quantiles_of_sorted(np.sort(a), levels)
            assert got.tolist() == np.quantile(a, levels).tolist()
            assert quantiles_of_sorted(np.sort(a), np.array([0.25, 0.75])).tolist() == \
                np.percentile(a, [25.0, 75.0]).tolist()

    def test_median_matches_numpy_median(self):
        for a in self._samples():
            assert median_of_sorted(np.sort(a)) == np.median(a)

    def test_no_values_and_nan_give_nan_as_numpy(self):
        assert np.isnan(quantiles_of_sorted(np.empty(0), np.array([0.5]))).all()
        assert math.isnan(median_of_sorted(np.empty(0)))
        with_nan = np.sort(np.array([1.0, np.nan, 3.0]))
        assert np.isnan(quantiles_of_sorted(with_nan, np.array([0.25, 0.5]))).all()
        assert np.isnan(np.quantile(np.array([1.0, np.nan, 3.0]), [0.25, 0.5])).all()  # numpy agrees
        assert math.isnan(median_of_sorted(with_nan))

    def test_shapiro_on_sorted_values_is_scipy_shapiro(self):
        for a in self._samples():
            if a.size < 3 or a.min() == a.max():
                continue  # not tested by normality()
            assert _shapiro_p(a, np.sort(a)) == float(stats.shapiro(a).pvalue)  # scipy.stats.shapiro
            assert _shapiro_p(a, None) == float(stats.shapiro(a).pvalue)

    def test_checks_with_and_without_a_sorted_copy_are_identical(self):
        rng = np.random.default_rng(7)
        samples = [rng.normal(10, 2, 40), rng.lognormal(1, 0.8, 55), np.round(rng.normal(9, 1, 33), 1)]
        labels = ["North", "Port", "Ridge"]
        ordered = [np.sort(a) for a in samples]
        # the public checks alone use numpy.median / numpy.percentile / scipy.stats.shapiro
        assert brown_forsythe(samples, labels=labels, presorted=ordered) == brown_forsythe(samples, labels=labels)
        assert normality(samples, labels=labels, presorted=ordered) == normality(samples, labels=labels)
        assert outlier_share(samples, labels=labels, presorted=ordered) == outlier_share(samples, labels=labels)
        checks = run_checks(labels, None, samples)
        assert checks["brown_forsythe"] == brown_forsythe(samples, labels=labels)
        assert checks["normality"] == normality(samples, labels=labels)
        assert checks["outlier_share"] == outlier_share(samples, labels=labels)
