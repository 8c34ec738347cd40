"""The shared vocabulary (monitor/model.py): typed results read back from stored JSON.

``tests/fixtures/history_format0.sqlite`` was written by the release before stored
entries carried a format number (built by ``tests/fixtures/build_history_format0.py``
with that release). Every entry in it must read back typed and print the same JSON
it was stored as; entries written now carry ``format`` and read back the same way;
a format newer than this release is refused with a message that says to upgrade.
"""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess
import sys
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest

from monitor.config import parse_config
from monitor.errors import HistoryError
from monitor.model import (
    FORMAT, Check, EffectSize, Event, MetricInput, MetricResult, MetricSettings, PairRow, QualityCounts,
    RunSettings, SegmentInput, SegmentRow, Sensitivity,
)
from monitor.stats.summary import Moments

ROOT = Path(__file__).resolve().parents[1]
FIXTURE = ROOT / "tests" / "fixtures" / "history_format0.sqlite"


def _format0_rows(sql: str) -> list[tuple]:
    con = sqlite3.connect(f"file:{FIXTURE}?mode=ro", uri=True)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_the_fixture_is_in_format_0():
    payloads = [json.loads(p) for (p,) in _format0_rows("SELECT payload FROM sw_metric_results")]
    assert len(payloads) == 12  # 3 weeks x 4 metrics
    assert all("format" not in p for p in payloads)


def test_every_stored_entry_of_format_0_reads_back_typed_and_prints_the_same_json():
    seen_methods, seen_ratio, seen_watched = set(), False, False
    for period, metric, payload in _format0_rows("SELECT period, metric, payload FROM sw_metric_results"):
        stored = json.loads(payload)
        r = MetricResult.from_json(stored)
        assert isinstance(r, MetricResult) and r.metric == metric
        assert all(isinstance(s, SegmentRow) for s in r.segments)
        assert all(isinstance(p, PairRow) for p in r.pairs)
        assert all(isinstance(c, Check) and c.name == k for k, c in r.assumptions.items())
        assert r.effect_size is None or isinstance(r.effect_size, EffectSize)
        assert r.sensitivity is None or isinstance(r.sensitivity, Sensitivity)
        printed = r.to_json()
        assert printed.pop("pairs_left_out") == 0  # a field added later: format 0 kept every pair
        assert printed == stored, (period, metric)
        seen_methods.add(r.method)
        seen_ratio |= any(p.log_scale for p in r.pairs)
        seen_watched |= bool(r.relevant_checks)
    # the fixture covers the shapes that matter: three methods, ratios (log scale), watched checks
    assert seen_methods == {"anova", "welch", "kruskal"} and seen_ratio and seen_watched


def test_format_0_values_come_back_as_numbers_with_nan_for_null():
    (payload,) = _format0_rows("SELECT payload FROM sw_metric_results WHERE period = '2026-W12' "
                               "AND metric = 'dwell'")[0]
    r = MetricResult.from_json(json.loads(payload))
    d = next(s for s in r.segments if s.segment == "D")
    assert d.excluded and d.n == 1 and math.isnan(d.sd)  # one value: no sd (stored as null)
    assert 0 <= r.q_value <= 1 and r.significant
    assert r.requested == r.method  # format 0 does not say which test was asked for


def test_stored_events_of_format_0_read_back():
    rows = _format0_rows("SELECT kind, metric, segment, message, detail FROM sw_events")
    assert rows
    for kind, metric, segment, message, detail in rows:
        stored = {"kind": kind, "metric": metric, "segment": segment, "message": message,
                  "detail": json.loads(detail)}
        e = Event.from_json(stored)
        assert e.to_json() == stored


def test_entries_written_now_carry_the_format_and_read_back():
    for (payload,) in _format0_rows("SELECT payload FROM sw_metric_results"):
        r = MetricResult.from_json(json.loads(payload), requested="auto")
        again = r.to_json(stored=True)
        assert again["format"] == FORMAT and again["requested"] == "auto"
        back = MetricResult.from_json(json.loads(json.dumps(again)))
        assert back.to_json(stored=True) == again
        assert back.to_json() == r.to_json()


def test_a_newer_format_is_refused_with_a_way_out():
    (payload,) = _format0_rows("SELECT payload FROM sw_metric_results LIMIT 1")[0]
    entry = {**json.loads(payload), "format": FORMAT + 1}
    with pytest.raises(HistoryError, match=rf"stored in format {FORMAT + 1}, newer than this segwatch reads "
                                           rf"\(up to {FORMAT}\); upgrade segwatch"):
        MetricResult.from_json(entry)
    with pytest.raises(HistoryError, match="is not a format number"):
        MetricResult.from_json({**entry, "format": "one"})


JOB = {
    "job": "hubs", "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts",
                              "segment_column": "hub"},
    "period": "week", "timezone": "UTC",
    "metrics": [{"column": "dwell", "test": "auto", "min_effect": 0.06},
                {"column": "cost", "test": "anova", "reference": "A", "transform": "log"}],
    "fdr": {"method": "by", "level": 0.01, "pairs": "selective"}, "alpha": 0.1, "confirm": 2, "decision": {"rule": "per_period"},
    "history": {"url": "sqlite:///h.sqlite"},
}


def test_run_settings_record_what_a_verdict_was_judged_by(tmp_path):
    cfg = parse_config(JOB, tmp_path / "job.yaml")
    result = MetricResult.from_json(json.loads(_format0_rows(
        "SELECT payload FROM sw_metric_results WHERE metric = 'dwell' LIMIT 1")[0][0]))
    s = RunSettings.of(cfg, [result], version="9.9")
    assert (s.fdr_method, s.fdr_level, s.alpha, s.pairs, s.confirm, s.version) == ("by", 0.01, 0.1, "selective",
                                                                                   2, "9.9")
    assert s.metric("dwell") == MetricSettings("dwell", "auto", "anova", 0.06, None, "none")
    assert s.metric("cost") == MetricSettings("cost", "anova", None, None, "A", "log")
    back = RunSettings.from_json(json.loads(json.dumps(s.to_json())))
    assert back == s and back.to_json()["format"] == FORMAT
    with pytest.raises(HistoryError, match="stored run settings: stored in format"):
        RunSettings.from_json({**s.to_json(), "format": FORMAT + 1})


def test_inputs_round_trip(tmp_path):
    cfg = parse_config(JOB, tmp_path / "job.yaml")
    values = np.array([1.5, 2.0, 4.25])
    exact = Moments(3, Decimal("2.5833333333333333333"), Decimal("3.79"), Decimal("0"), Decimal("7"),
                    Decimal("1.5"), Decimal("4.25"))
    data = MetricInput(cfg.metrics[0], (SegmentInput("A", Moments.from_values(values), values), SegmentInput("B", exact)),
                       QualityCounts(rows=5, null=2), sample_size=None)
    back = MetricInput.from_json(json.loads(json.dumps(data.to_json())), cfg.metrics[0])
    assert back.metric is cfg.metrics[0] and back.quality == data.quality
    a, b = back.segments
    assert a.moments == data.segments[0].moments and np.array_equal(a.values, values)
    assert b.moments == exact and b.values is None
    with pytest.raises(ValueError, match="read with the config of 'cost'"):
        MetricInput.from_json(data.to_json(), cfg.metrics[1])


def test_the_vocabulary_loads_without_scipy_or_sql():
    code = "import sys, monitor.model; print(sorted(m for m in ('scipy', 'sqlalchemy', 'yaml') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=ROOT,
                         env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert out.stdout.strip() == "[]"


# ------------------------------------------------------------------ bounded pairs


def _many_pairs(k: int, significant: bool, reference: str | None = None) -> MetricResult:
    """k segments, all k(k-1)/2 pairs; p_adj falls with the pair's index, every tenth pair significant."""
    import itertools

    from monitor.model import QualityCounts

    names = [f"s{i:03d}" for i in range(k)]
    combos = list(itertools.combinations(names, 2))
    pairs = tuple(PairRow(a, b, 0.1 * i, 1.0 - i / len(combos), significant=significant and i % 10 == 0)
                  for i, (a, b) in enumerate(combos))
    return MetricResult(metric="dwell", column="dwell", requested="anova", method="anova", method_reason="set",
                        statistic=2.0, df=(k - 1.0, 100.0), p_value=0.01 if significant else 0.5,
                        effect_size=None, segments=tuple(SegmentRow(n, 10, 1.0, 1.0) for n in names),
                        pairs=pairs, posthoc="tukey-kramer", assumptions={}, quality=QualityCounts(10 * k),
                        significant=significant, reference=reference)


def test_bounded_pairs_keep_the_smallest_adjusted_p_values_and_count_the_rest():
    from monitor.model import FULL_PAIRS, TOP_PAIRS

    r = _many_pairs(30, significant=False)  # 435 pairs > FULL_PAIRS
    assert len(r.pairs) == 435 > FULL_PAIRS
    top = r.to_json(pairs="top")
    assert len(top["pairs"]) == TOP_PAIRS and top["pairs_left_out"] == 435 - TOP_PAIRS
    assert [p["p_adj"] for p in top["pairs"]] == [p.p_adj for p in r.pairs[-TOP_PAIRS:]]  # the smallest, in order
    assert r.to_json(pairs="significant")["pairs"] == top["pairs"]  # nothing significant: the same
    full = r.to_json(pairs="all")
    assert len(full["pairs"]) == 435 and full["pairs_left_out"] == 0
    back = MetricResult.from_json(top)  # read back: the count survives another write
    assert len(back.pairs) == TOP_PAIRS and back.to_json(pairs="all")["pairs_left_out"] == 435 - TOP_PAIRS


def test_a_significant_metric_keeps_its_significant_pairs_in_the_stored_form():
    from monitor.model import TOP_PAIRS

    r = _many_pairs(30, significant=True)
    sig = {(p.a, p.b) for p in r.pairs if p.significant}
    kept = r.kept_pairs("significant")
    assert sig <= {(p.a, p.b) for p in kept}
    assert len(kept) == len(sig | {(p.a, p.b) for p in r.pairs[-TOP_PAIRS:]})
    assert len(r.kept_pairs("top")) == TOP_PAIRS


def test_small_families_and_reference_metrics_keep_every_pair():
    small = _many_pairs(24, significant=False)  # 276 pairs: the report's full matrix
    assert small.kept_pairs("top") == small.pairs
    ref = _many_pairs(30, significant=False, reference="s000")
    assert ref.kept_pairs("top") == ref.pairs
    with pytest.raises(ValueError, match="pair form 'some'"):
        small.kept_pairs("some")
