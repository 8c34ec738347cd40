"""Multiple-testing adjustment against statsmodels and the Benjamini-Hochberg paper."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from monitor.stats.multiplicity import METHODS, TwoLevelResult, adjust, two_level

# our method name -> statsmodels.stats.multitest.multipletests method name
STATSMODELS_NAME = {"bh": "fdr_bh", "by": "fdr_by", "holm": "holm", "bonferroni": "bonferroni"}


def generated_p_values(seed: int) -> np.ndarray:
    """A mix of nulls (uniform) and signals (small), with exact ties and 0/1 (fixed seeds)."""
    rng = np.random.default_rng(seed)
    m = int(rng.integers(1, 200))
    p = np.where(rng.random(m) < 0.3, rng.beta(0.1, 5.0, m), rng.random(m))
    if m > 5:
        p[:3] = p[3]  # ties
        p[4] = 1.0
    return p


@pytest.mark.parametrize("method", list(STATSMODELS_NAME))
@pytest.mark.parametrize("seed", range(10))
def test_matches_statsmodels(method, seed):
    p = generated_p_values(seed)
    # reference: statsmodels.stats.multitest.multipletests (pvals_corrected)
    _, expected, _, _ = multipletests(p, alpha=0.05, method=STATSMODELS_NAME[method])
    np.testing.assert_allclose(adjust(p, method), expected, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("method", list(STATSMODELS_NAME))
def test_nan_passes_through_and_is_not_counted(method):
    p = generated_p_values(3)
    with_nan = np.insert(p, [0, 5, len(p)], np.nan)
    got = adjust(with_nan, method)
    assert np.isnan(got[[0, 6, len(with_nan) - 1]]).all()
    # reference: statsmodels.stats.multitest.multipletests on the family without the NaNs
    _, expected, _, _ = multipletests(p, alpha=0.05, method=STATSMODELS_NAME[method])
    np.testing.assert_allclose(got[~np.isnan(with_nan)], expected, rtol=1e-12, atol=1e-15)


def test_bh_paper_example(published_examples):
    # Benjamini & Hochberg (1995) Section 4: 15 p-values; at 0.05 BH rejects 4 and
    # Bonferroni 3 (published_examples.json bh_1995_example, marked from_memory)
    ex = published_examples["bh_1995_example"]
    level = ex["expected"]["level"]
    assert int(np.sum(adjust(ex["p_values"], "bh") <= level)) == ex["expected"]["bh_rejections"]
    assert int(np.sum(adjust(ex["p_values"], "bonferroni") <= level)) == ex["expected"]["bonferroni_rejections"]


def test_none_and_edge_cases():
    p = [0.01, 0.5, np.nan]
    np.testing.assert_array_equal(adjust(p, "none"), p)
    assert adjust([], "bh").size == 0
    assert np.isnan(adjust([np.nan, np.nan], "holm")).all()
    assert set(METHODS) == {"bh", "by", "holm", "bonferroni", "none"}


def test_bad_inputs_name_the_problem():
    with pytest.raises(ValueError) as err:
        adjust([0.1], "fdr")
    assert str(err.value) == "unknown adjustment method 'fdr'; valid methods are bh, by, holm, bonferroni and none"
    with pytest.raises(ValueError) as err:
        adjust([0.1, 1.5], "bh")
    assert str(err.value) == "p_values must lie between 0 and 1 (or be NaN); got 1.5"


class TestTwoLevel:
    """Benjamini & Bogomolov (2014): BH across metrics, then pairs at level R q / m."""

    def test_matches_manual_procedure_with_statsmodels(self):
        rng = np.random.default_rng(11)
        m = 12
        metric_p = np.concatenate([rng.beta(0.2, 20.0, 4), rng.random(m - 4)])
        pairs = [rng.beta(0.5, 3.0, int(rng.integers(0, 10))) for _ in range(m)]
        q = 0.1
        res = two_level(metric_p, pairs, q, pair_method="holm")
        assert isinstance(res, TwoLevelResult)
        # reference: statsmodels multipletests for each step of the published procedure
        selected, metric_q, _, _ = multipletests(metric_p, alpha=q, method="fdr_bh")
        np.testing.assert_array_equal(res.metric_selected, selected)
        np.testing.assert_allclose(res.metric_q, metric_q, rtol=1e-12)
        r = int(selected.sum())
        assert res.n_selected == r and res.n_tested == m
        assert res.pair_level == pytest.approx(r * q / m)
        for i, family in enumerate(pairs):
            if family.size == 0:
                assert res.pair_rejected[i].size == 0
                continue
            reject, p_adj, _, _ = multipletests(family, alpha=r * q / m, method="holm")
            np.testing.assert_allclose(res.pair_p_adj[i], p_adj, rtol=1e-12)
            np.testing.assert_array_equal(res.pair_rejected[i], reject & selected[i])

    def test_nothing_selected(self):
        res = two_level([0.5, 0.9], [[0.001], [0.0001]], 0.05, pair_method="bh")
        assert res.n_selected == 0 and res.pair_level == 0.0
        assert not any(r.any() for r in res.pair_rejected)

    def test_nan_metric_is_never_selected_and_not_counted(self):
        res = two_level([0.001, np.nan], [[0.01], [0.0]], 0.05)
        assert res.n_tested == 1 and list(res.metric_selected) == [True, False]
        assert res.pair_level == pytest.approx(0.05)  # R q / m = 1 * 0.05 / 1
        assert list(res.pair_rejected[1]) == [False]

    def test_bad_inputs(self):
        with pytest.raises(ValueError) as err:
            two_level([0.1, 0.2], [[0.1]], 0.05)
        assert str(err.value) == (
            "pair_p_by_metric has 1 entries but metric_p has 2; give one (possibly empty) "
            "list of pair p-values per metric"
        )
        with pytest.raises(ValueError, match=r"level must be a number strictly between 0 and 1; got 5.0"):
            two_level([0.1], [[0.1]], 5)
        with pytest.raises(ValueError, match=r"pair_p_by_metric\[0\] must lie between 0 and 1 \(or be NaN\); got -0.1"):
            two_level([0.1], [[-0.1]], 0.05)
