"""Segments against the rest, step by step: no flag invented by another segment's shift.

Checks: the first step is the contrast of :func:`monitor.stats.flags.segment_vs_rest`
(itself checked against statsmodels/scipy in test_stats_flags.py) with Bonferroni over
the segments (Holm 1979); later steps leave flagged segments out of the reference; the
proportions contrast is the pooled two-proportion z (R: prop.test(correct = FALSE)).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.stats import flags
from monitor.stats.stepdown import proportion_vs_rest, stepdown_vs_rest
from monitor.stats.summary import Moments


def far_high_segment(seed=3, k=5, n=200, shift=3.0):
    rng = np.random.default_rng(seed)
    samples = [rng.standard_normal(n) + (shift if j == 0 else 0.0) for j in range(k)]
    labels = [f"S{j}" for j in range(k)]
    return labels, [Moments.from_values(s) for s in samples], samples


@pytest.mark.parametrize("method", ["anova", "welch", "kruskal"])
def test_one_far_segment_does_not_invent_low_ones(method):
    labels, groups, samples = far_high_segment()
    # today's contrast against all the others flags every unmoved segment low ...
    today = flags.segment_vs_rest(labels, groups, samples if method == "kruskal" else None, method=method)
    assert [c.direction for c in today] == ["high", "low", "low", "low", "low"]
    # ... the step-down flags only the segment that moved
    res = stepdown_vs_rest(labels, groups, samples, method)
    assert [c.direction for c in res] == ["high", None, None, None, None]


def test_first_step_is_bonferroni_of_the_plain_contrast():
    labels, groups, samples = far_high_segment(shift=0.35)
    plain = flags.segment_vs_rest(labels, groups, None, method="anova", alpha=0.5, adjust="none")
    res = stepdown_vs_rest(labels, groups, None, "anova")
    j = int(np.argmin([c.p_adj for c in plain]))
    assert res[j].p_adj == pytest.approx(min(1, 5 * plain[j].p_adj), rel=1e-12)
    assert res[j].diff == pytest.approx(plain[j].diff, rel=1e-12)


def test_second_step_leaves_the_flagged_segment_out():
    rng = np.random.default_rng(11)
    samples = [rng.standard_normal(300) + s for s in (3.0, -1.0, 0, 0, 0, 0)]
    labels = [f"S{j}" for j in range(6)]
    groups = [Moments.from_values(s) for s in samples]
    res = stepdown_vs_rest(labels, groups, None, "anova")
    assert [c.direction for c in res] == ["high", "low", None, None, None, None]
    # S1's contrast is against S2..S5 only (S0 already flagged)
    rest = np.concatenate(samples[2:])
    assert res[1].diff == pytest.approx(samples[1].mean() - rest.mean(), rel=1e-10)


def test_no_difference_rarely_flags():
    rng = np.random.default_rng(5)
    hits = 0
    for _ in range(300):
        samples = [rng.standard_normal(40) for _ in range(6)]
        res = stepdown_vs_rest([f"S{j}" for j in range(6)], [Moments.from_values(s) for s in samples], None, "welch")
        hits += any(c.direction for c in res)
    assert hits / 300 <= 0.05 + 4 * math.sqrt(0.05 * 0.95 / 300)


def test_proportions_do_not_invent_low_segments():
    x, n = [400, 70, 72, 68, 71], [1000] * 5
    res = proportion_vs_rest(list("ABCDE"), x, n)
    assert [c.direction for c in res] == ["high", None, None, None, None]
    # A against the rest: pooled z, as R's prop.test(c(400, 281), c(1000, 4000), correct = FALSE)
    pooled = (400 + 281) / 5000
    z = (0.4 - 281 / 4000) / math.sqrt(pooled * (1 - pooled) * (1 / 1000 + 1 / 4000))
    assert res[0].statistic == pytest.approx(z, rel=1e-10)
    assert res[0].p_adj == pytest.approx(min(1, 5 * 2 * stats.norm.sf(abs(z))), rel=1e-6, abs=1e-300)


def test_empty_segment():
    labels, groups, samples = far_high_segment(k=3)
    groups = groups[:2] + [Moments.empty()]
    res = stepdown_vs_rest(labels, groups, None, "anova")
    assert res[2].direction is None and "no records" in res[2].note
