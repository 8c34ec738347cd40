"""monitor/stats/batch.py against the per-metric routines and the reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.oneway import anova_oneway

from monitor.stats import effects, omnibus, posthoc
from monitor.stats.batch import anova_tukey, welch_games_howell
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
        assert res.p_adj[i] == pytest.approx([p.p_adj for p in gh.pairs], rel=1e-9, abs=1e-12)  # the studentized range tail is integrated to ~1e-13 absolute


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
