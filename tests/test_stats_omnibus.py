"""Omnibus tests (Fisher's ANOVA, Welch's ANOVA, Kruskal-Wallis) against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.oneway import anova_oneway

from monitor.stats.omnibus import OmnibusResult, fisher_anova, kruskal_wallis, welch_anova
from monitor.stats.summary import Moments

RTOL = 1e-6  # agreement with reference libraries (same closed-form formulas)


def make_groups(seed: int, shape: str) -> list[np.ndarray]:
    """Generated test data of a few shapes (fixed seeds; invented, reference-checked)."""
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 9))
    sizes = rng.integers(2, 501, size=k)
    if shape == "unequal_n":
        return [rng.normal(10 + 0.1 * i, 2.0, n) for i, n in enumerate(sizes)]
    if shape == "unequal_spread":
        return [rng.normal(5.0, rng.uniform(0.1, 10.0), n) for n in sizes]
    if shape == "heavy_ties":
        return [rng.integers(0, 4, n).astype(float) for n in sizes]
    if shape == "skew":
        return [rng.lognormal(0.2 * i, 1.5, n) for i, n in enumerate(sizes)]
    if shape == "tiny":
        return [rng.normal(0.0, 1.0, rng.integers(2, 4)) for _ in range(k)]
    if shape == "large_offset":
        return [1e6 + rng.normal(0.01 * i, 1.0, n) for i, n in enumerate(sizes)]
    raise ValueError(shape)


SHAPES = ["unequal_n", "unequal_spread", "heavy_ties", "skew", "tiny", "large_offset"]
CASES = [(seed, shape) for shape in SHAPES for seed in range(4)]


def summaries(groups) -> list[Moments]:
    return [Moments.from_values(g) for g in groups]


# --------------------------------------------------------------------- published example
class TestPlantGrowth:
    """Dobson (1983) plant weights (R's PlantGrowth), values printed by R.

    The published_examples.json entry is marked from_memory: the figures were recalled,
    then cross-checked against scipy/statsmodels before being written there.
    """

    @pytest.fixture()
    def groups(self, published_examples):
        return [np.asarray(v) for v in published_examples["plant_growth"]["groups"].values()]

    @pytest.fixture()
    def expected(self, published_examples):
        return published_examples["plant_growth"]["expected"]

    def test_anova(self, groups, expected):
        res = fisher_anova(summaries(groups))
        # reference: R anova(lm(weight ~ group, PlantGrowth)), from_memory
        assert round(res.statistic, 3) == expected["anova"]["F"]
        assert res.df == tuple(float(d) for d in expected["anova"]["df"])
        assert float(f"{res.p_value:.4g}") == expected["anova"]["p"]
        assert res.method == "anova" and res.note is None

    def test_welch(self, groups, expected):
        res = welch_anova(summaries(groups))
        # reference: R oneway.test(weight ~ group, PlantGrowth), from_memory
        assert round(res.statistic, 3) == expected["welch"]["F"]
        assert res.df[0] == expected["welch"]["df"][0]
        assert round(res.df[1], 3) == expected["welch"]["df"][1]
        assert float(f"{res.p_value:.4g}") == expected["welch"]["p"]

    def test_kruskal(self, groups, expected):
        res = kruskal_wallis(groups)
        # reference: R kruskal.test(weight ~ group, PlantGrowth), from_memory
        assert round(res.statistic, 4) == expected["kruskal"]["H"]
        assert res.df == (float(expected["kruskal"]["df"]),)
        assert float(f"{res.p_value:.4g}") == expected["kruskal"]["p"]


# --------------------------------------------------------------------- reference libraries
@pytest.mark.parametrize(("seed", "shape"), CASES)
def test_fisher_matches_scipy(seed, shape):
    groups = make_groups(seed, shape)
    res = fisher_anova(summaries(groups))
    ref = stats.f_oneway(*groups)  # reference: scipy.stats.f_oneway
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(res.p_value, ref.pvalue, rtol=RTOL)
    n_total = sum(g.size for g in groups)
    assert res.df == (len(groups) - 1.0, float(n_total - len(groups)))
    assert (res.n_total, res.k) == (n_total, len(groups))


@pytest.mark.parametrize(("seed", "shape"), CASES)
def test_welch_matches_statsmodels(seed, shape):
    groups = make_groups(seed, shape)
    res = welch_anova(summaries(groups))
    # reference: statsmodels.stats.oneway.anova_oneway(use_var="unequal") (Welch 1951)
    ref = anova_oneway(groups, use_var="unequal", welch_correction=True)
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(res.df, ref.df, rtol=RTOL)
    np.testing.assert_allclose(res.p_value, ref.pvalue, rtol=RTOL)
    # Welch results carry Fisher's sums of squares of the same data
    # reference: scipy.stats.f_oneway F = (SSb/df1)/(SSw/df2)
    f_from_ss = (res.ss_between / res.df[0]) / (res.ss_within / (res.n_total - res.k))
    np.testing.assert_allclose(f_from_ss, stats.f_oneway(*groups).statistic, rtol=RTOL)


@pytest.mark.parametrize(("seed", "shape"), CASES)
def test_kruskal_matches_scipy(seed, shape):
    groups = make_groups(seed, shape)
    res = kruskal_wallis(groups)
    ref = stats.kruskal(*groups)  # reference: scipy.stats.kruskal (tie-corrected H)
    np.testing.assert_allclose(res.statistic, ref.statistic, rtol=RTOL)
    np.testing.assert_allclose(res.p_value, ref.pvalue, rtol=RTOL)
    ranks = stats.rankdata(np.concatenate(groups))  # reference: scipy.stats.rankdata
    bounds = np.cumsum([0] + [g.size for g in groups])
    expected = [ranks[a:b].mean() for a, b in zip(bounds[:-1], bounds[1:])]
    np.testing.assert_allclose(res.mean_ranks, expected, rtol=RTOL)
    # reference: scipy.stats.tiecorrect
    np.testing.assert_allclose(res.tie_correction, stats.tiecorrect(ranks), rtol=RTOL)


# --------------------------------------------------------------------- degenerate inputs
class TestDegenerate:
    """The written policy (module docstring): NaN statistic and p-value, reason in note."""

    @staticmethod
    def assert_undefined(res: OmnibusResult, words: str) -> None:
        assert np.isnan(res.statistic)
        assert np.isnan(res.p_value)
        assert res.note is not None and words in res.note, res.note

    def test_one_group(self):
        one = [Moments.from_values([1.0, 2.0, 3.0])]
        for test in (fisher_anova, welch_anova):
            self.assert_undefined(test(one), "fewer than 2 segments to compare (got 1)")
        self.assert_undefined(kruskal_wallis([[1.0, 2.0]]), "fewer than 2 segments to compare (got 1)")

    def test_empty(self):
        for test in (fisher_anova, welch_anova, kruskal_wallis):
            res = test([])
            self.assert_undefined(res, "fewer than 2 segments to compare (got 0)")
            assert res.k == 0 and res.n_total == 0

    def test_all_constant(self):
        flat = [Moments.from_values([2.0, 2.0]), Moments.from_values([5.0, 5.0, 5.0])]
        res = fisher_anova(flat)
        self.assert_undefined(res, "no variation within segments")
        assert res.ss_within == 0.0 and res.ss_between > 0  # sums of squares still reported
        self.assert_undefined(welch_anova(flat), "no variation within segments")

    def test_welch_one_constant_segment(self):
        groups = [Moments.from_values([1.0, 2.0, 3.0]), Moments.from_values([4.0, 4.0])]
        res = welch_anova(groups)
        self.assert_undefined(
            res,
            "no variation within segment(s) at position(s) 2; "
            "Welch's ANOVA needs a positive variance in every segment",
        )
        assert fisher_anova(groups).is_defined  # Fisher's pooled variance is still positive

    def test_group_of_one(self):
        groups = [Moments.from_values([1.0, 2.0, 3.0]), Moments.from_values([7.0])]
        expected = (
            "segment at position 2 has fewer than 2 observations; "
            "leave segments with n < 2 out before the test"
        )
        self.assert_undefined(fisher_anova(groups), expected)
        self.assert_undefined(welch_anova(groups), expected)

    def test_empty_segments(self):
        groups = [Moments.empty(), Moments.from_values([1.0, 2.0]), Moments.empty()]
        self.assert_undefined(fisher_anova(groups), "segments at positions 1, 3 have fewer than 2 observations")
        self.assert_undefined(kruskal_wallis([[], [1.0, 2.0]]), "no observations in segment(s) at position(s) 1")

    def test_kruskal_accepts_single_observations(self):
        res = kruskal_wallis([[1.0], [2.0], [3.0, 4.0]])
        # reference: scipy.stats.kruskal
        np.testing.assert_allclose(res.statistic, stats.kruskal([1.0], [2.0], [3.0, 4.0]).statistic, rtol=RTOL)

    def test_kruskal_all_tied(self):
        res = kruskal_wallis([[3.0, 3.0], [3.0, 3.0, 3.0]])
        self.assert_undefined(res, "all values are tied")
        assert res.tie_correction == 0.0

    def test_non_finite_values(self):
        self.assert_undefined(kruskal_wallis([[1.0, np.nan], [2.0, 3.0]]), "non-finite values in segment(s) at position(s) 1")
        groups = [Moments.from_values([1.0, np.inf]), Moments.from_values([2.0, 3.0])]
        self.assert_undefined(fisher_anova(groups), "non-finite values in segment(s) at position(s) 1")

    def test_no_numpy_warnings(self, recwarn):
        fisher_anova([Moments.from_values([1.0, 1.0]), Moments.from_values([1.0, 1.0])])
        welch_anova([Moments.from_values([1.0, 1.0]), Moments.from_values([2.0, 2.0])])
        kruskal_wallis([[1.0], [1.0]])
        assert len(recwarn) == 0

    def test_not_a_summary_is_a_type_error(self):
        with pytest.raises(TypeError, match="groups must be Moments summaries"):
            fisher_anova([[1.0, 2.0], [3.0, 4.0]])


def test_str_is_readable():
    res = fisher_anova([Moments.from_values([1.0, 2.0, 3.0]), Moments.from_values([2.0, 3.0, 5.0])])
    assert str(res).startswith("anova: F = ")
    assert str(fisher_anova([])) == "anova: F undefined (fewer than 2 segments to compare (got 0))"


# --------------------------------------------------------------------- properties
@st.composite
def datasets(draw):
    seed = draw(st.integers(0, 2**32 - 1))
    shape = draw(st.sampled_from(["unequal_n", "unequal_spread", "heavy_ties", "skew"]))
    groups = make_groups(seed, shape)
    return [g[: 60] for g in groups]  # keep the property tests fast


def _all_three(groups):
    return fisher_anova(summaries(groups)), welch_anova(summaries(groups)), kruskal_wallis(groups)


@settings(max_examples=40, deadline=None)
@given(
    groups=datasets(),
    shift=st.floats(-1e4, 1e4, allow_nan=False),
    scale=st.floats(1e-2, 1e2).flatmap(lambda s: st.sampled_from([s, -s])),
)
def test_shift_and_scale_change_nothing(groups, shift, scale):
    # property of the tests' definitions (location-scale invariance), not a library value
    before = _all_three(groups)
    after = _all_three([g * scale + shift for g in groups])
    for a, b in zip(before, after):
        if not a.is_defined:
            assert not b.is_defined
            continue
        # F and H have no unit, so a statistic at 0 (equal means) may come back as 1e-33 of rounding
        np.testing.assert_allclose(b.statistic, a.statistic, rtol=1e-7, atol=1e-12)
        np.testing.assert_allclose(b.p_value, a.p_value, rtol=1e-6, atol=1e-300)
        np.testing.assert_allclose(b.df, a.df, rtol=1e-7)


@settings(max_examples=40, deadline=None)
@given(groups=datasets(), data=st.data())
def test_segment_order_does_not_matter(groups, data):
    order = data.draw(st.permutations(range(len(groups))))
    before = _all_three(groups)
    after = _all_three([groups[i] for i in order])
    for a, b in zip(before, after):
        np.testing.assert_allclose(b.statistic, a.statistic, rtol=1e-9)
        np.testing.assert_allclose(b.p_value, a.p_value, rtol=1e-9)
        np.testing.assert_allclose(b.df, a.df, rtol=1e-12)
    np.testing.assert_allclose(after[2].mean_ranks, [before[2].mean_ranks[i] for i in order], rtol=1e-12)
