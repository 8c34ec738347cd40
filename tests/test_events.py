"""Event rules (monitor/events.py): pure functions over results and a baseline.

These are decision rules of our own, not statistics, so the checks are of the rules
themselves: what raises which kind, with which words.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import pytest

from monitor.model import Check, EffectSize, MetricResult, QualityCounts, SegmentRow
from monitor.config import parse_config
from monitor.events import Baseline, derive_events


@pytest.fixture()
def job(tmp_path: Path):
    data = {
        "job": "t",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
        "period": "week",
        "timezone": "UTC",
        "metrics": [{"column": "dwell"}, {"column": "cost", "min_effect": 0.05}],
    }
    return parse_config(data, tmp_path / "t.yaml", environ={})


def result(metric="dwell", significant=True, q=0.001, effect=0.1, flags=None, checks=None, relevant=None,
           quality=None):
    flags = flags or {}
    segs = tuple(
        SegmentRow(s, 50, 10.0 + (2 if flags.get(s) == "high" else 0), 1.0, flag=flags.get(s),
                   diff_vs_rest=2.0 if flags.get(s) else 0.0, above=2 if flags.get(s) == "high" else 0)
        for s in ("A", "B", "C")
    )
    checks = checks or {}
    return MetricResult(
        metric=metric, column=metric, requested="auto", method="anova", method_reason="r",
        statistic=5.0, df=(2.0, 147.0), p_value=q / 2, effect_size=EffectSize("omega_squared", effect),
        segments=segs, pairs=(), posthoc="tukey-kramer", assumptions=checks,
        quality=quality or QualityCounts(rows=150), q_value=q, significant=significant,
        relevant_checks=tuple(relevant if relevant is not None else checks.keys()),
    )


def baseline_from(job, results, period="2026-W01", segments=("A", "B", "C")):
    return Baseline.from_stored(period, segments, {r.metric: r.to_json() for r in results}, job)


def kinds(events):
    return sorted(((e.kind, e.metric, e.segment) for e in events), key=lambda t: tuple(x or "" for x in t))


def test_first_period_significant_metric_and_flag_emerge(job):
    ev = derive_events(job, [result(flags={"A": "high"})], ["A", "B", "C"], 0, 150, Baseline.empty())
    assert kinds(ev) == [("emerged", "dwell", None), ("emerged", "dwell", "A")]
    msg = next(e.message for e in ev if e.segment == "A")
    assert msg.startswith("depot A now stands above the rest on dwell")
    assert "significantly above 2 of 2 others" in msg


def test_unchanged_state_raises_nothing_and_clearing_is_reported(job):
    prev = [result(flags={"A": "high"})]
    base = baseline_from(job, prev)
    assert derive_events(job, prev, ["A", "B", "C"], 0, 150, base) == []
    now = [result(significant=False, q=0.4)]
    ev = derive_events(job, now, ["A", "B", "C"], 0, 150, base)
    assert kinds(ev) == [("cleared", "dwell", None), ("cleared", "dwell", "A")]
    assert ev[0].message == "dwell no longer differs by depot (q = 0.400)."


def test_min_effect_keeps_small_significant_effects_quiet(job):
    small = result(metric="cost", effect=0.01)
    ev = derive_events(job, [small], ["A", "B", "C"], 0, 150, Baseline.empty())
    assert ev == []
    big = result(metric="cost", effect=0.2)
    assert kinds(derive_events(job, [big], ["A", "B", "C"], 0, 150, Baseline.empty())) == [
        ("emerged", "cost", None)]


def test_only_watched_checks_raise_assumption_events(job):
    bad = Check("brown_forsythe", 0.001, 0.05, False, "Brown-Forsythe p 0.001 is below 0.05.")
    ratio = Check("sd_ratio", 3.0, 2.0, False, "ratio 3.0 exceeds 2.0.")
    ok = Check("brown_forsythe", 0.4, 0.05, True, "Brown-Forsythe p 0.4 is at or above 0.05.")
    prev = [result(significant=False, checks={"brown_forsythe": ok}, relevant=["brown_forsythe"])]
    now = [result(significant=False, checks={"brown_forsythe": bad, "sd_ratio": ratio},
                  relevant=["brown_forsythe"])]
    ev = derive_events(job, now, ["A", "B", "C"], 0, 150, baseline_from(job, prev))
    assert kinds(ev) == [("assumption_broken", "dwell", None)]
    assert ev[0].detail["check"] == "brown_forsythe" and ev[0].detail["threshold"] == 0.05
    assert "equal-spread check (Brown-Forsythe) fails" in ev[0].message
    back = derive_events(job, prev, ["A", "B", "C"], 0, 150, baseline_from(job, now))
    assert kinds(back) == [("assumption_restored", "dwell", None)]


def test_segments_new_and_missing(job):
    base = baseline_from(job, [result(significant=False)], segments=("A", "B", "C"))
    ev = derive_events(job, [result(significant=False)], ["A", "B", "D"], 0, 150, base)
    assert kinds(ev) == [("segment_missing", None, "C"), ("segment_new", None, "D")]
    assert ev[0].message == "depot D has records this period and had none in 2026-W01." or \
        ev[1].message == "depot D has records this period and had none in 2026-W01."


def test_data_quality_threshold_and_null_segments(job):
    q = QualityCounts(rows=100, null=4, non_numeric=2)
    ev = derive_events(job, [result(significant=False, quality=q)], ["A", "B", "C"], 3, 103, Baseline.empty())
    assert kinds(ev) == [("data_quality", None, None), ("data_quality", "dwell", None)]
    texts = {e.metric: e.message for e in ev}
    assert texts[None] == "3 of 103 rows have no depot value and were left out."
    assert texts["dwell"] == ("dwell: 6.0% of 100 values are unusable (4 null, 2 non-numeric), "
                              "above the 5% threshold.")
    # at the threshold exactly: no event
    q5 = QualityCounts(rows=100, null=5)
    assert derive_events(job, [result(significant=False, quality=q5)], ["A", "B", "C"], 0, 100,
                         Baseline.empty()) == []


def test_event_keys_are_stable_and_distinct(job):
    ev = derive_events(job, [result(flags={"A": "high"})], ["A", "B", "C"], 0, 150, Baseline.empty())
    keys = [e.key("t", "2026-W02") for e in ev]
    assert len(set(keys)) == len(keys)
    again = derive_events(job, [result(flags={"A": "high"})], ["A", "B", "C"], 0, 150, Baseline.empty())
    assert keys == [e.key("t", "2026-W02") for e in again]
    assert ev[0].key("t", "2026-W03") != keys[0]


def test_uncomputable_metric_does_not_clear(job):
    base = baseline_from(job, [result()])
    nan = replace(result(significant=False), p_value=math.nan, q_value=math.nan, statistic=math.nan)
    assert [e for e in derive_events(job, [nan], ["A", "B", "C"], 0, 150, base) if e.kind == "cleared"] == []
