"""Segment-versus-rest flags (monitor.stats.flags) held against outside references.

Sources: statsmodels OLS contrasts (t_test) and multipletests, scipy.stats.ttest_ind,
scipy.stats.kruskal and scikit_posthocs.posthoc_dunn. The random data are inputs
for those references, or a planted shift whose flags are known by construction.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import scikit_posthocs
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.stats.flags import SegmentContrast, segment_vs_rest
from monitor.stats.summary import Moments

pytestmark = pytest.mark.filterwarnings("error")

LABELS = ["Dock", "Gate", "Yard", "Pier"]


def _summaries(samples):
    return [Moments.from_values(np.asarray(s, dtype=float)) for s in samples]


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(31)
    spec = [(20.0, 3.0, 12), (22.5, 5.0, 30), (19.0, 2.0, 9), (21.0, 4.0, 18)]
    return [rng.normal(m, s, n) for m, s, n in spec]


@pytest.fixture(scope="module")
def tied():
    rng = np.random.default_rng(5)
    return [
        rng.integers(0, 4, 15).astype(float),
        rng.integers(1, 6, 22).astype(float),
        rng.integers(0, 3, 11).astype(float),
        rng.integers(0, 5, 16).astype(float),
    ]


# ---------------------------------------------------------------------------
class TestInputValidation:
    def test_unknown_method(self, data):
        with pytest.raises(ValueError) as err:
            segment_vs_rest(LABELS, _summaries(data), None, "tukey")
        assert str(err.value) == "method must be one of 'anova', 'welch', 'kruskal'; got 'tukey'"

    @pytest.mark.parametrize("alpha", [0, 1, -0.1, True])
    def test_alpha(self, data, alpha):
        with pytest.raises(ValueError) as err:
            segment_vs_rest(LABELS, _summaries(data), None, "anova", alpha=alpha)
        assert str(err.value) == f"alpha must be a number strictly between 0 and 1; got {alpha!r}"

    def test_kruskal_needs_samples(self, data):
        with pytest.raises(ValueError) as err:
            segment_vs_rest(LABELS, _summaries(data), None, "kruskal")
        assert str(err.value) == "method 'kruskal' ranks the raw values, so samples must be given"

    def test_needs_something(self):
        with pytest.raises(ValueError) as err:
            segment_vs_rest(LABELS, None, None, "welch")
        assert str(err.value) == "method 'welch' needs groups (summaries) or samples; both are None"

    def test_unknown_adjust(self, data):
        with pytest.raises(ValueError) as err:
            segment_vs_rest(LABELS, _summaries(data), None, "anova", adjust="hommel")
        assert str(err.value) == (
            "adjust must be one of 'holm', 'bonferroni', 'bh', 'by', 'none'; got 'hommel'"
        )


# ---------------------------------------------------------------------------
class TestAnovaContrast:
    def test_against_statsmodels_ols_contrast(self, data):
        result = segment_vs_rest(LABELS, _summaries(data), None, "anova", adjust="none")
        frame = pd.DataFrame({
            "y": np.concatenate(data),
            "g": pd.Categorical(np.repeat(LABELS, [len(s) for s in data]), categories=LABELS),
        })
        # reference: statsmodels OLS cell-means model y ~ C(g) - 1 and its t_test of
        # the contrast "segment i minus the n-weighted mean of the others"
        fit = smf.ols("y ~ C(g) - 1", data=frame).fit()
        sizes = np.array([len(s) for s in data], dtype=float)
        for i, contrast in enumerate(result):
            c = -sizes / (sizes.sum() - sizes[i])
            c[i] = 1.0
            ref = fit.t_test(c)
            assert contrast.segment == LABELS[i]
            assert contrast.diff == pytest.approx(float(ref.effect[0]), rel=1e-9)
            assert contrast.se == pytest.approx(float(ref.sd[0, 0]), rel=1e-9)
            assert contrast.statistic == pytest.approx(float(ref.tvalue[0, 0]), rel=1e-9)
            assert contrast.df == ref.df_denom
            assert contrast.p_adj == pytest.approx(float(ref.pvalue), rel=1e-7)

    def test_rest_mean_is_pooled_records(self, data):
        result = segment_vs_rest(LABELS, _summaries(data), None, "anova")
        # reference: numpy mean of the pooled records of the other segments
        rest = np.concatenate(data[1:])
        assert result[0].diff == pytest.approx(np.mean(data[0]) - np.mean(rest), rel=1e-12)

    def test_holm_against_statsmodels(self, data):
        raw = segment_vs_rest(LABELS, _summaries(data), None, "anova", adjust="none")
        holm = segment_vs_rest(LABELS, _summaries(data), None, "anova", adjust="holm")
        # reference: statsmodels multipletests(method="holm")
        expected = multipletests([c.p_adj for c in raw], method="holm")[1]
        assert [c.p_adj for c in holm] == pytest.approx(list(expected), rel=1e-12)

    def test_samples_only_gives_same_answer(self, data):
        from_groups = segment_vs_rest(LABELS, _summaries(data), None, "anova")
        from_samples = segment_vs_rest(LABELS, None, data, "anova")
        assert [c.p_adj for c in from_groups] == pytest.approx([c.p_adj for c in from_samples], rel=1e-12)


class TestWelchContrast:
    def test_two_segments_is_welch_t_test(self, data):
        result = segment_vs_rest(LABELS[:2], _summaries(data[:2]), None, "welch", adjust="none")
        # reference: scipy.stats.ttest_ind(equal_var=False); with two segments the
        # rest is the other segment
        ref = stats.ttest_ind(data[0], data[1], equal_var=False)
        first, second = result
        assert first.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert first.df == pytest.approx(ref.df, rel=1e-10)
        assert first.p_adj == pytest.approx(ref.pvalue, rel=1e-9)
        assert second.statistic == pytest.approx(-ref.statistic, rel=1e-10)

    def test_variance_of_the_rest(self, data):
        result = segment_vs_rest(LABELS, _summaries(data), None, "welch")
        # reference: hand formula of the brief, var(rest mean) =
        # sum_j (n_j/N_r)^2 s_j^2/n_j, with numpy's var(ddof=1)
        sizes = np.array([len(s) for s in data], dtype=float)
        var = np.array([np.var(s, ddof=1) for s in data])
        n_rest = sizes[1:].sum()
        expected = var[0] / sizes[0] + np.sum((sizes[1:] / n_rest) ** 2 * var[1:] / sizes[1:])
        assert result[0].se == pytest.approx(math.sqrt(expected), rel=1e-12)


class TestKruskalContrast:
    def test_against_kruskal_on_the_split(self, tied):
        result = segment_vs_rest(LABELS, None, tied, "kruskal", adjust="none")
        for i, contrast in enumerate(result):
            rest = np.concatenate([s for j, s in enumerate(tied) if j != i])
            # reference: scipy.stats.kruskal on the two groups {segment, rest}; with two
            # groups the tie-corrected H equals z^2 and the p-values agree
            ref = stats.kruskal(tied[i], rest)
            assert contrast.statistic**2 == pytest.approx(ref.statistic, rel=1e-10)
            assert contrast.p_adj == pytest.approx(ref.pvalue, rel=1e-9)
            assert contrast.df == math.inf

    def test_against_scikit_posthocs_dunn(self, tied):
        result = segment_vs_rest(LABELS, None, tied, "kruskal", adjust="none")
        # reference: scikit_posthocs.posthoc_dunn on the relabelled split; the pooled
        # ranks are unchanged by relabelling
        ref = scikit_posthocs.posthoc_dunn([list(tied[2]), list(np.concatenate([tied[0], tied[1], tied[3]]))])
        assert result[2].p_adj == pytest.approx(ref.loc[1, 2], rel=1e-9)


# ---------------------------------------------------------------------------
class TestFlags:
    @pytest.mark.parametrize("method", ["anova", "welch", "kruskal"])
    def test_planted_high_and_low(self, method):
        rng = np.random.default_rng(11)
        labels = ["North", "South", "East", "West", "Port", "Hub"]
        shifts = [0.0, 0.0, 3.0, 0.0, -3.0, 0.0]  # East planted high, Port low
        samples = [rng.normal(50.0 + 4.0 * shift, 4.0, 60) for shift in shifts]
        result = segment_vs_rest(labels, _summaries(samples), samples, method)
        flags = {c.segment: c.direction for c in result}
        assert flags == {"North": None, "South": None, "East": "high", "West": None, "Port": "low", "Hub": None}

    def test_direction_follows_alpha(self, data):
        raw = segment_vs_rest(LABELS, _summaries(data), None, "anova")
        smallest = min(c.p_adj for c in raw)
        strict = segment_vs_rest(LABELS, _summaries(data), None, "anova", alpha=smallest * 0.999)
        loose = segment_vs_rest(LABELS, _summaries(data), None, "anova", alpha=min(0.999, smallest * 1.001))
        assert all(c.direction is None for c in strict)
        assert sum(c.direction is not None for c in loose) >= 1


# ---------------------------------------------------------------------------
class TestDegenerate:
    """No exceptions and no warnings (this module turns warnings into errors)."""

    @pytest.mark.parametrize("method", ["anova", "welch", "kruskal"])
    def test_one_segment(self, method):
        (only,) = segment_vs_rest(["a"], None, [np.array([1.0, 2.0, 3.0])], method)
        assert math.isnan(only.p_adj) and only.direction is None
        assert only.note == "Fewer than two segments have records, so there is no rest to compare with."

    @pytest.mark.parametrize("method", ["anova", "welch"])
    def test_zero_variance(self, method):
        samples = [np.array([2.0, 2.0, 2.0]), np.array([5.0, 5.0])]
        a, b = segment_vs_rest(["a", "b"], None, samples, method)
        assert a.diff == -3.0 and math.isnan(a.p_adj) and a.direction is None
        assert a.note == "No segment varies within itself (zero variance), so the contrast is undefined."

    def test_single_record_segment_breaks_welch_only(self):
        samples = [np.array([1.0, 2.0, 4.0]), np.array([3.0]), np.array([2.0, 5.0, 6.0, 7.0])]
        welch = segment_vs_rest(["a", "b", "c"], None, samples, "welch")
        assert all(math.isnan(c.p_adj) for c in welch)
        assert welch[0].note == (
            "Segment 'b' has a single record, so the variance Welch's contrast needs is undefined."
        )
        anova = segment_vs_rest(["a", "b", "c"], None, samples, "anova")
        assert all(not math.isnan(c.p_adj) and c.note is None for c in anova)

    def test_all_ties(self):
        samples = [np.array([4.0, 4.0, 4.0]), np.array([4.0, 4.0])]
        for contrast in segment_vs_rest(["a", "b"], None, samples, "kruskal"):
            assert math.isnan(contrast.p_adj) and contrast.direction is None
            assert contrast.note == "Every value is tied, so the ranks carry no information."

    def test_empty_segment(self, data):
        samples = [data[0], np.array([]), data[2]]
        result = segment_vs_rest(["a", "b", "c"], None, samples, "anova")
        assert result[1].note == "This segment has no records, so it cannot be compared."
        assert math.isnan(result[1].diff)
        # reference: with b empty, a vs rest is a vs c: scipy.stats.ttest_ind pooled
        ref = stats.ttest_ind(data[0], data[2], equal_var=True)
        assert result[0].statistic == pytest.approx(ref.statistic, rel=1e-10)

    def test_result_type(self, data):
        result = segment_vs_rest(LABELS, _summaries(data), None, "anova")
        assert isinstance(result, tuple) and all(isinstance(c, SegmentContrast) for c in result)


# ---------------------------------------------------------------------------
# majority_of_pairs: the flag rule used by the pipeline
# ---------------------------------------------------------------------------

from monitor.stats.flags import majority_of_pairs  # noqa: E402


def _tukey_pairs(labels, samples, reference=True):
    if reference:
        # reference: scipy.stats.tukey_hsd supplies the adjusted family (pvalue[i, j], diff = mean_i - mean_j)
        res = stats.tukey_hsd(*samples)
        p = lambda i, j: float(res.pvalue[i, j])  # noqa: E731
    else:
        # our Tukey-Kramer, itself checked against scipy.stats.tukey_hsd in test_stats_posthoc.py (faster)
        from monitor.stats.posthoc import tukey_kramer

        fam = {(x.a, x.b): x.p_adj for x in tukey_kramer(labels, [Moments.from_values(v) for v in samples]).pairs}
        p = lambda i, j: fam[(labels[i], labels[j])]  # noqa: E731
    out = []
    for i in range(len(labels)):
        for j in range(i + 1, len(labels)):
            out.append((labels[i], labels[j], float(np.mean(samples[i]) - np.mean(samples[j])), p(i, j)))
    return out


class TestMajorityOfPairs:
    def test_one_segment_far_above_does_not_make_the_others_low(self):
        rng = np.random.default_rng(11)
        labels = [f"s{i}" for i in range(8)]
        samples = [rng.normal(10.0, 1.0, 120) for _ in labels]
        samples[3] = samples[3] + 1.5  # only s3 differs
        v = {x.segment: x for x in majority_of_pairs(labels, _tukey_pairs(labels, samples), 0.05)}
        assert v["s3"].direction == "high" and v["s3"].above == 7
        assert all(v[s].direction is None for s in labels if s != "s3")
        # the segment-vs-rest contrast, by contrast, may call ordinary segments low here
        assert all(v[s].below <= 1 for s in labels if s != "s3")

    def test_null_data_flags_rarely(self):
        # under the complete null the familywise error of the Tukey family bounds any flag at alpha
        rng = np.random.default_rng(5)
        flagged = 0
        reps = 150
        labels = ["a", "b", "c", "d"]
        for _ in range(reps):
            samples = [rng.normal(0, 1, 30) for _ in labels]
            if any(x.direction for x in majority_of_pairs(labels, _tukey_pairs(labels, samples, False), 0.05)):
                flagged += 1
        # 0.05 + 3 Monte Carlo standard errors (sqrt(0.05*0.95/150) ~ 0.0178)
        assert flagged / reps <= 0.05 + 3 * 0.0178

    def test_conflicting_directions_are_not_flagged(self):
        pairs = [("a", "b", 2.0, 0.001), ("a", "c", -2.0, 0.001), ("b", "c", -4.0, 0.001)]
        v = {x.segment: x for x in majority_of_pairs(["a", "b", "c"], pairs, 0.05)}
        assert v["a"].direction is None and (v["a"].above, v["a"].below) == (1, 1)
        assert v["b"].direction == "low" and v["c"].direction == "high"
        # below one of two others is not a majority: without the b-c pair, b is not flagged
        v = {x.segment: x for x in majority_of_pairs(["a", "b", "c"], pairs[:2], 0.05)}
        assert v["b"].direction is None and v["c"].direction is None

    def test_nan_pairs_count_as_not_significant(self):
        pairs = [("a", "b", float("nan"), float("nan"))]
        v = majority_of_pairs(["a", "b"], pairs, 0.05)
        assert [x.direction for x in v] == [None, None]


def test_one_segment_far_above_invents_no_low_flags_among_three():
    # A far above B and C, which are equal: only A stands apart. With the earlier "at least half"
    # rule, B and C (each below A, 1 of their 2 others) were both flagged low.
    from monitor.stats.flags import majority_of_pairs

    verdicts = majority_of_pairs(["A", "B", "C"], [("A", "B", 3.0, 1e-10), ("A", "C", 3.0, 1e-10),
                                                   ("B", "C", 0.01, 0.9)])
    assert [v.direction for v in verdicts] == ["high", None, None]


def test_the_contrast_with_the_rest_invents_no_flags_either():
    # too many segments for pairs: each method flags against the rest step by step
    # (monitor/stats/stepdown.py); one segment far above must not make the others low
    from monitor import methods
    from monitor.methods import Segments
    from monitor.stats.summary import Moments

    rng = np.random.default_rng(11)
    values = [rng.normal(10.0, 1.0, 400) for _ in range(6)]
    values[0] = values[0] + 3.0
    segs = Segments.of([f"S{i}" for i in range(6)], [Moments.from_values(v) for v in values], values)
    for name in ("anova", "welch", "kruskal"):
        found = {c.segment: c.direction for c in methods.get(name).versus_rest(segs, alpha=0.05)}
        assert found["S0"] == "high", name
        assert [found[f"S{i}"] for i in range(1, 6)] == [None] * 5, (name, found)
