"""tests/support/batch.py against the per-metric routines and the reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.oneway import anova_oneway

from monitor.stats import effects, omnibus, posthoc
from tests.support.batch import anova_tukey, welch_games_howell
from monitor.stats.studentized import srange_sf
from monitor.stats.summary import Moments


def _batch(rng, metrics=4, segments=5):
    samples = []
    for m in range(metrics):
        row = []
        for s in range(segments):
            size = int(rng.integers(2, 80))
            row.append(rng.normal(rng.normal(0, 0.5), rng.uniform(0.5, 3.0), size) + 100.0)
        samples.append(row)
    mom = [[Moments.from_values(v) for v in row] for row in samples]
    n = np.array([[g.n for g in row] for row in mom], float)
    mean = np.array([[float(g.mean) for g in row] for row in mom])
    m2 = np.array([[float(g.m2) for g in row] for row in mom])
    return samples, mom, n, mean, m2


def test_anova_tukey_matches_reference_libraries_and_per_metric_routines():
    rng = np.random.default_rng(21)
    samples, mom, n, mean, m2 = _batch(rng)
    res = anova_tukey(n, mean, m2)
    labels = [f"s{i}" for i in range(n.shape[1])]
    for i, row in enumerate(samples):
        ref = stats.f_oneway(*row)  # reference: scipy.stats.f_oneway
        assert res.statistic[i] == pytest.approx(ref.statistic, rel=1e-9)
        assert res.p_value[i] == pytest.approx(ref.pvalue, rel=1e-9)
        tk = stats.tukey_hsd(*row)  # reference: scipy.stats.tukey_hsd
        for c, (a, b) in enumerate(res.pairs):
            assert res.p_adj[i, c] == pytest.approx(tk.pvalue[a, b], rel=1e-6, abs=1e-12)
        om = effects.omega_squared(omnibus.fisher_anova(mom[i]))
        assert res.omega_squared[i] == pytest.approx(om.value, rel=1e-9)
        ph = posthoc.tukey_kramer(labels, mom[i])
        assert res.diff[i] == pytest.approx([p.diff for p in ph.pairs], rel=1e-12)


def test_welch_games_howell_matches_reference_libraries():
    rng = np.random.default_rng(22)
    samples, mom, n, mean, m2 = _batch(rng)
    res = welch_games_howell(n, mean, m2)
    labels = [f"s{i}" for i in range(n.shape[1])]
    for i, row in enumerate(samples):
        ref = anova_oneway(row, use_var="unequal")  # reference: statsmodels Welch ANOVA
        assert res.statistic[i] == pytest.approx(ref.statistic, rel=1e-9)
        assert res.df2[i] == pytest.approx(ref.df_denom, rel=1e-9)
        assert res.p_value[i] == pytest.approx(ref.pvalue, rel=1e-8)
        gh = posthoc.games_howell(labels, mom[i])  # checked against pingouin in test_stats_posthoc
        # the batch reads its p-values from the interpolation tables (1e-9 absolute,
        # 1e-6 relative of the exact tail the per-metric routine integrates)
        assert res.p_adj[i] == pytest.approx([p.p_adj for p in gh.pairs], rel=1e-6, abs=1e-9)


def test_absent_segments_and_degenerate_metrics():
    n = np.array([[10, 12, 0, 9], [5, 1, 7, 8], [4, 4, 4, 4], [3, 0, 0, 0]], float)
    mean = np.array([[1.0, 2.0, 0.0, 1.5], [1.0, 9.0, 2.0, 1.0], [1.0, 2.0, 3.0, 4.0], [1.0, 0, 0, 0]])
    m2 = np.array([[5.0, 6.0, 0.0, 4.0], [3.0, 0.0, 2.0, 1.0], [0.0, 0.0, 0.0, 0.0], [1.0, 0, 0, 0]])
    res = anova_tukey(n, mean, m2)
    # metric 0: segment 2 absent -> same as the three present ones
    ref = omnibus.fisher_anova([Moments(10, 1.0, 5.0, 0, 0, 0, 0), Moments(12, 2.0, 6.0, 0, 0, 0, 0),
                                Moments(9, 1.5, 4.0, 0, 0, 0, 0)])
    assert res.statistic[0] == pytest.approx(ref.statistic, rel=1e-12)
    assert np.isnan(res.p_adj[0, 1]) and np.isfinite(res.p_adj[0, 0])  # pair (0, 2) involves the absent one
    # metric 1: the n=1 segment is treated as absent
    assert res.df1[1] == 2
    # metric 2: no within variation; metric 3: one segment -> NaN, no warnings
    assert np.isnan(res.statistic[2]) and np.isnan(res.statistic[3])
    w = welch_games_howell(n, mean, m2)
    assert np.isnan(w.statistic[2]) and np.isnan(w.statistic[3]) and np.isfinite(w.statistic[0])


def test_shape_mismatch_is_refused():
    with pytest.raises(ValueError, match="n, mean and m2 must have one shape"):
        anova_tukey(np.ones((2, 3)), np.ones((2, 3)), np.ones((3, 2)))


def _summaries(rng, metrics, segments, absent=0.0, small=0.0):
    """Random per-segment summaries; some segments absent (n = 0) or tiny (n = 2..4)."""
    n = rng.integers(20, 200, size=(metrics, segments)).astype(float)
    tiny = rng.random(n.shape) < small
    n[tiny] = rng.integers(2, 5, size=int(tiny.sum()))
    n[rng.random(n.shape) < absent] = 0
    mean = rng.normal(50, rng.uniform(0.05, 2.0, size=(metrics, 1)), size=(metrics, segments))
    m2 = np.maximum(n - 1, 0) * rng.uniform(4, 16, size=(metrics, segments))
    return n, mean, m2


@pytest.mark.parametrize("fn, per_metric", [(anova_tukey, posthoc.tukey_kramer),
                                            (welch_games_howell, posthoc.games_howell)])
def test_batch_pairs_match_per_metric_routines_on_a_mixed_batch(fn, per_metric):
    # absent segments give each metric its own k; tiny segments give Games-Howell pairs
    # df < 8 (the exact path); effects from none to large spread the p-values over the
    # bulk and the far tail
    rng = np.random.default_rng(31)
    n, mean, m2 = _summaries(rng, 40, 8, absent=0.15, small=0.15)
    res = fn(n, mean, m2)
    labels = [f"s{i}" for i in range(n.shape[1])]
    ks = set()
    for i in range(n.shape[0]):
        mom = [Moments(int(n[i, j]), mean[i, j], m2[i, j], 0.0, 0.0,
                       mean[i, j] - 1.0, mean[i, j] + 1.0) if n[i, j] > 0 else Moments.empty()
               for j in range(n.shape[1])]
        ref = per_metric(labels, mom)  # checked against scipy/pingouin in test_stats_posthoc
        ref_p = np.array([p.p_adj for p in ref.pairs])
        assert np.array_equal(np.isnan(res.p_adj[i]), np.isnan(ref_p))
        ok = ~np.isnan(ref_p)
        np.testing.assert_allclose(res.p_adj[i][ok], ref_p[ok], rtol=0, atol=1e-9)
        big = ok & (ref_p >= 1e-10)
        np.testing.assert_allclose(res.p_adj[i][big], ref_p[big], rtol=1e-6)
        ks.add(int(np.count_nonzero(n[i] > 0)))
    assert len(ks) >= 3 and np.nanmin(res.p_adj) < 1e-10 and np.nanmax(res.p_adj) > 0.5


def test_batch_p_values_against_the_exact_tail_many_metrics():
    # the benchmark's shape (20 segments, 190 pairs) on 60 metrics: every pair's p-value
    # against the exact studentized range tail computed from the batch's own q and df
    rng = np.random.default_rng(32)
    n, mean, m2 = _summaries(rng, 60, 20)
    for fn in (anova_tukey, welch_games_howell):
        res = fn(n, mean, m2)
        a, b = res.pairs[:, 0], res.pairs[:, 1]
        if fn is anova_tukey:
            msw = m2.sum(axis=1) / res.df2
            q = np.abs(res.diff) / np.sqrt(msw[:, None] / 2 * (1 / n[:, a] + 1 / n[:, b]))
            df = np.broadcast_to(res.df2[:, None], q.shape)
        else:
            v = m2 / (n - 1) / n
            q = np.abs(res.diff) / np.sqrt((v[:, a] + v[:, b]) / 2)
            df = (v[:, a] + v[:, b]) ** 2 / (v[:, a] ** 2 / (n[:, a] - 1) + v[:, b] ** 2 / (n[:, b] - 1))
        # reference: monitor.stats.studentized.srange_sf (held against scipy in its own tests)
        exact = srange_sf(q, 20, df)
        np.testing.assert_allclose(res.p_adj, exact, rtol=0, atol=1e-9)
        big = exact >= 1e-10
        np.testing.assert_allclose(res.p_adj[big], exact[big], rtol=1e-6)
        assert big.mean() > 0.3 and (~big).any()
