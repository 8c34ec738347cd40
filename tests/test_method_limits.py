"""A method is used only where it gives an answer and keeps its level.

* ``auto`` never chooses a method that cannot be computed when another can (Welch's
  ANOVA with one constant segment gives p = null; Fisher's ANOVA and Kruskal-Wallis
  give answers).
* Welch's ANOVA is not used below its size floor (many tiny segments: identical normal
  data were "significant" in most periods), named or chosen, and the reason says so.

Sources: scipy.stats (f_oneway, kruskal), statsmodels (anova_oneway with
use_var="unequal", which agrees with segwatch's Welch and is as liberal), and the
measurement of ``python -m tests.sim.welch_floor`` quoted in docs/error_rates.md. The
random values are only inputs.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.oneway import anova_oneway

from monitor import methods
from monitor.analysis import MetricInput, SegmentInput, analyse_period
from monitor.config import parse_config
from monitor.methods import Segments
from monitor.methods.welch import SIZE_FLOOR, size_floor
from monitor.stats import diagnostics
from monitor.stats.summary import Moments


def _job(test="auto", **extra):
    return parse_config({
        "job": "limits", "period": "week", "timezone": "UTC",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "site"},
        "metrics": [{"column": "v", "test": test}], **extra,
    }, Path("limits.yaml").absolute(), environ={})


def _analyse(job, samples, labels=None, with_values=True):
    labels = labels or [f"s{i:05d}" for i in range(len(samples))]
    segs = tuple(SegmentInput(s, Moments.from_values(v), v if with_values else None) for s, v in zip(labels, samples))
    (r,) = analyse_period([MetricInput(job.metrics[0], segs)], job)
    return r


class TestNeverUncomputableWhenAnotherComputes:
    def _data(self):
        rng = np.random.default_rng(3)
        return [rng.normal(20, 3, 40), rng.normal(21, 3, 100), np.full(30, 20.0)], ["a", "b", "c"]

    def test_with_values_kruskal_wallis_when_spreads_differ(self):
        samples, labels = self._data()
        r = _analyse(_job(), samples, labels)
        assert r.method == "kruskal"
        assert ("Welch's ANOVA cannot be computed here (no variation within segment(s) at position(s) 3; Welch's "
                "ANOVA needs a positive variance in every segment), so Kruskal-Wallis was used") in r.method_reason
        ref = sps.kruskal(*samples)  # reference: scipy.stats.kruskal
        assert r.p_value == pytest.approx(ref.pvalue, rel=1e-9)

    def test_from_sums_alone_fishers_anova(self):
        samples, labels = self._data()
        r = _analyse(_job(), samples, labels, with_values=False)
        assert r.method == "anova" and r.method_reason.endswith("so Fisher's ANOVA was used")
        assert r.p_value == pytest.approx(sps.f_oneway(*samples).pvalue, rel=1e-8)  # reference: scipy f_oneway
        # what auto chose before: Welch's ANOVA, with no answer
        welch = methods.get("welch").omnibus(Segments.of(labels, [Moments.from_values(s) for s in samples]))
        assert math.isnan(welch.p_value)

    def test_named_method_is_kept_with_its_note(self):
        samples, labels = self._data()
        r = _analyse(_job("welch"), samples, labels)
        assert r.method == "welch" and r.p_value != r.p_value
        assert "no variation within segment(s) at position(s) 3" in r.note

    def test_nothing_computable_stays_null_with_the_first_reason(self):
        samples = [np.full(10, 4.0), np.full(12, 4.0)]
        r = _analyse(_job(), samples, ["a", "b"])
        assert math.isnan(r.p_value) and "cannot be computed here" not in r.method_reason


class TestWelchSizeFloor:
    def test_floor_rows_are_increasing_and_grow_beyond_the_table(self):
        assert [b for b, _ in SIZE_FLOOR] == sorted(b for b, _ in SIZE_FLOOR)
        assert [n for _, n in SIZE_FLOOR] == sorted(n for _, n in SIZE_FLOOR)
        last_k, last_n = SIZE_FLOOR[-1]
        assert size_floor(2) == SIZE_FLOOR[0][1] and size_floor(last_k) == last_n
        assert size_floor(4 * last_k) == 2 * last_n

    def test_statsmodels_welch_is_as_liberal_as_ours_on_tiny_segments(self):
        # reference: statsmodels anova_oneway(use_var="unequal") gives the same p; the problem is
        # the method's approximation, not an error of this implementation
        rng = np.random.default_rng(9)
        samples = [rng.normal(50, 5, 3) for _ in range(50)]
        mine = methods.get("welch").omnibus(Segments.of([str(i) for i in range(50)],
                                                        [Moments.from_values(s) for s in samples]))
        assert mine.p_value == pytest.approx(anova_oneway(samples, use_var="unequal").pvalue, rel=1e-6)

    def test_fifty_segments_of_three_keep_the_level(self):
        """Identical N(50, 5) data, 50 segments x 3 rows, 200 periods: at most a nominal share of
        periods significant at 5% (today: Welch's ANOVA, about 60%)."""
        rng = np.random.default_rng(20261203)
        labels = [f"s{i:02d}" for i in range(50)]
        hits, used = 0, set()
        for _ in range(200):
            samples = [rng.normal(50.0, 5.0, 3) for _ in labels]
            groups = [Moments.from_values(s) for s in samples]
            segs = Segments.of(labels, groups, samples)
            choice = methods.choose("auto", segs, diagnostics.run_checks(labels, groups, samples))
            used.add(choice.method.name)
            hits += choice.result.p_value <= 0.05
        assert "welch" not in used
        # binomial(200, 0.05): mean 10, sd 3.1; 22 or more has probability below 0.1%
        assert hits <= 21

    def test_the_reason_says_why_welch_gave_way(self):
        rng = np.random.default_rng(4)
        r = _analyse(_job(), [rng.normal(50.0, 5.0, 3) for _ in range(50)])
        assert r.method in ("anova", "kruskal")
        assert (f"Welch's ANOVA keeps its level with 50 segments only when each has at least {size_floor(50)} "
                "records (the smallest has 3; measured, docs/error_rates.md), so") in r.method_reason

    def test_named_welch_gives_way_too(self):
        rng = np.random.default_rng(5)
        r = _analyse(_job("welch"), [rng.normal(50.0, 5.0, 3) for _ in range(30)])
        assert r.method == "anova"
        assert r.method_reason.startswith("set in the config (test: welch); Welch's ANOVA keeps its level with 30 "
                                          "segments only when each has at least")

    def test_large_segments_still_get_welch(self):
        rng = np.random.default_rng(6)
        samples = [rng.normal(50, sd, 60) for sd in (1.0, 3.0, 1.0, 3.0, 1.0)]
        r = _analyse(_job(), samples)
        assert r.method == "welch"

    def test_many_tiny_segments_flag_nothing_above_on_noise(self):
        """2,000 segments x 3 identical N(50, 5) rows: no segment claimed significantly above
        (today: Welch, q = 0, omega squared negative and a segment flagged)."""
        rng = np.random.default_rng(18)
        r = _analyse(_job(), [rng.normal(50.0, 5.0, 3) for _ in range(2000)])
        assert r.method == "anova"
        assert not r.significant or r.effect_size.value > 0
        assert [s.segment for s in r.segments if s.flag] == []
