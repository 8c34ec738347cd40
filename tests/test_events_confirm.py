"""The persistence rule ``confirm: K`` (monitor/events.py, issue 7).

The rule is ours, not a statistic, so the checks are of the rule itself: a reference
implementation written here from the definition in the issue ("``emerged`` only after
K consecutive significant periods, ``cleared`` after K non-significant ones"), hand
worked sequences, the exact words a user reads, and ``confirm: 1`` staying what it
was.
"""

from __future__ import annotations

import logging
import math
from dataclasses import replace
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.model import EffectSize, MetricResult, QualityCounts, SegmentRow
from monitor.config import parse_config
from monitor.events import Baseline, derive_events, lookback
from monitor.store.history import StoredPeriod

SEGS = ("A", "B", "C")


def make_job(tmp_path: Path, confirm: int = 1):
    data = {
        "job": "t",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
        "period": "week",
        "timezone": "UTC",
        "metrics": [{"column": "dwell"}, {"column": "cost", "min_effect": 0.05}],
        "confirm": confirm,
        "decision": {"rule": "per_period"},  # the rule confirm: K belongs to
    }
    return parse_config(data, tmp_path / "t.yaml", environ={})


def result(metric="dwell", significant=True, effect=0.1, flags=None, computed=True, segments=SEGS):
    flags = flags or {}
    segs = tuple(
        SegmentRow(s, 50, 10.0 + (2 if flags.get(s) == "high" else -2 if flags.get(s) == "low" else 0), 1.0,
                   flag=flags.get(s), diff_vs_rest=2.0 if flags.get(s) == "high" else -2.0 if flags.get(s) else 0.0,
                   above=2 if flags.get(s) == "high" else 0, below=2 if flags.get(s) == "low" else 0)
        for s in segments
    )
    q = 0.001 if significant else 0.4
    r = MetricResult(
        metric=metric, column=metric, requested="auto", method="anova", method_reason="r",
        statistic=5.0, df=(2.0, 147.0), p_value=q / 2, effect_size=EffectSize("omega_squared", effect),
        segments=segs, pairs=(), posthoc="tukey-kramer", assumptions={},
        quality=QualityCounts(rows=150), q_value=q, significant=significant,
    )
    if not computed:
        r = replace(r, p_value=math.nan, q_value=math.nan, statistic=math.nan, significant=False,
                    effect_size=None, segments=tuple(replace(s, flag=None) for s in segs))
    return r


def week(t: int) -> str:
    return f"2026-W{t + 1:02d}"


def stream(job, periods, segments=SEGS):
    """Run ``periods`` (each a list of results) through derive_events with a baseline from
    the stored history (newest first, as History.recent returns it); yield events per period."""
    history: list[StoredPeriod] = []
    out = []
    for t, results in enumerate(periods):
        segs = segments[t] if isinstance(segments, list) else segments
        base = Baseline.from_history(history[:lookback(job.confirm)], job)
        out.append(derive_events(job, results, segs, 0, 150, base))
        history.insert(0, StoredPeriod(week(t), tuple(segs), {r.metric: r.to_json() for r in results}))
    return out


def metric_kinds(events_per_period, metric="dwell"):
    return [[e.kind for e in ev if e.metric == metric and e.segment is None and e.kind in ("emerged", "cleared")]
            for ev in events_per_period]


def reference_transitions(verdicts, k):
    """The rule from its definition: the announced state turns on after K consecutive
    significant periods and off after K consecutive non-significant ones; a period
    without a verdict (None) neither counts nor breaks a run. Returns the event per period."""
    announced, run_value, run_len, out = False, None, 0, []
    for v in verdicts:
        if v is None:
            out.append(None)
            continue
        run_len = run_len + 1 if v == run_value else 1
        run_value = v
        event = None
        if run_len >= k and v != announced:
            event = "emerged" if v else "cleared"
            announced = v
        out.append(event)
    return out


# ---------------------------------------------------------------- confirm: 1 is unchanged


def test_confirm_one_from_history_is_from_stored(tmp_path):
    job = make_job(tmp_path)
    prev = [result(flags={"A": "high"}), result("cost", effect=0.2)]
    stored = [StoredPeriod("2026-W02", SEGS, {r.metric: r.to_json() for r in prev}),
              StoredPeriod("2026-W01", SEGS, {})]
    assert Baseline.from_history(stored, job) == Baseline.from_stored("2026-W02", SEGS, stored[0].metrics, job)
    assert Baseline.from_history([], job) == Baseline.empty()
    assert lookback(1) == 1


def test_confirm_one_keeps_the_previous_period_rule(tmp_path):
    job = make_job(tmp_path)
    seq = [[result(significant=s)] for s in (True, False, True, True, False)]
    assert metric_kinds(stream(job, seq)) == [["emerged"], ["cleared"], ["emerged"], [], ["cleared"]]
    # a period that could not be computed neither clears nor is remembered (as before issue 7)
    seq = [[result()], [result(computed=False)], [result()]]
    assert metric_kinds(stream(job, seq)) == [["emerged"], [], ["emerged"]]


def test_flags_of_a_metric_below_min_effect_never_clear(tmp_path):
    # before the fix the stored flag of a too-small effect was read back as announced,
    # so "cleared" came every period for a flag that was never announced
    job = make_job(tmp_path)
    small = [result("cost", effect=0.01, flags={"A": "high"})]
    assert stream(job, [small, small, small]) == [[], [], []]


# ---------------------------------------------------------------- confirm: K >= 2, by hand


def test_two_in_a_row_emerge_and_clear_with_their_words(tmp_path):
    job = make_job(tmp_path, confirm=2)
    seq = [[result(significant=s)] for s in (True, True, False, False)]
    ev = stream(job, seq)
    assert metric_kinds(ev) == [[], ["emerged"], [], ["cleared"]]
    emerged = ev[1][0]
    assert emerged.message == ("dwell now differs by depot (anova, q = 0.001, omega squared 0.1); "
                               "confirmed over the last 2 periods, since 2026-W01.")
    assert emerged.detail["confirmed_periods"] == 2 and emerged.detail["since"] == "2026-W01"
    cleared = ev[3][0]
    assert cleared.message == ("dwell no longer differs by depot (q = 0.400); "
                               "confirmed over the last 2 periods, since 2026-W03.")


def test_alternating_verdicts_change_nothing(tmp_path):
    job = make_job(tmp_path, confirm=2)
    seq = [[result(significant=s)] for s in (True, False) * 5]
    assert metric_kinds(stream(job, seq)) == [[]] * 10


def test_state_is_remembered_past_the_last_k_periods(tmp_path):
    # on from week 2; single non-significant weeks do not clear; two in a row do, in week 8
    job = make_job(tmp_path, confirm=2)
    seq = [[result(significant=s)] for s in (True, True, False, True, False, True, False, False)]
    assert metric_kinds(stream(job, seq)) == [[], ["emerged"], [], [], [], [], [], ["cleared"]]


def test_first_periods_need_k_periods_of_history(tmp_path):
    job = make_job(tmp_path, confirm=3)
    seq = [[result()] for _ in range(4)]
    assert metric_kinds(stream(job, seq)) == [[], [], ["emerged"], []]


def test_uncomputed_periods_neither_count_nor_break_a_run(tmp_path):
    job = make_job(tmp_path, confirm=2)
    seq = [[result()], [result(computed=False)], [result()], [result(computed=False)], [result(significant=False)],
           [result(significant=False)]]
    assert metric_kinds(stream(job, seq)) == [[], [], ["emerged"], [], [], ["cleared"]]


def test_min_effect_counts_as_no_difference(tmp_path):
    job = make_job(tmp_path, confirm=2)
    seq = [[result("cost", effect=0.2)], [result("cost", effect=0.2)], [result("cost", effect=0.01)],
           [result("cost", effect=0.01)]]
    ev = stream(job, seq)
    assert metric_kinds(ev, "cost") == [[], ["emerged"], [], ["cleared"]]
    assert ev[3][0].message == ("cost no longer differs by depot at the practical threshold "
                                "(omega squared 0.01 < 0.05); confirmed over the last 2 periods, since 2026-W03.")


def test_segment_flags_need_k_periods_and_a_flip_gives_both_events(tmp_path):
    job = make_job(tmp_path, confirm=3)
    high, low = result(flags={"A": "high"}), result(flags={"A": "low"})
    ev = stream(job, [[high], [high], [high], [low], [low], [low]])
    seg = [[(e.kind, e.detail.get("flag") or e.detail.get("previous_flag")) for e in p if e.segment == "A"]
           for p in ev]
    assert seg == [[], [], [("emerged", "high")], [], [], [("emerged", "low"), ("cleared", "high")]]
    assert ev[2][1].message == ("depot A now stands above the rest on dwell (mean 12, +2 against the "
                                "rest, significantly above 2 of 2 others); confirmed over the last 3 periods, "
                                "since 2026-W01.")
    assert ev[5][1].message == ("depot A no longer stands above the rest on dwell; confirmed over the "
                                "last 3 periods, since 2026-W04.")


def test_a_segment_without_records_gives_no_verdict(tmp_path):
    job = make_job(tmp_path, confirm=2)
    flagged = result(flags={"A": "high"})
    without_a = result(segments=("B", "C"))
    ev = stream(job, [[flagged], [without_a], [flagged]], segments=[SEGS, ("B", "C"), SEGS])
    assert [[(e.kind, e.segment) for e in p if e.segment == "A" and e.kind in ("emerged", "cleared")]
            for p in ev] == [[], [], [("emerged", "A")]]


def test_a_baseline_for_another_confirm_is_logged(tmp_path, caplog):
    job = make_job(tmp_path, confirm=2)
    base = Baseline.from_stored("2026-W01", SEGS, {"dwell": result().to_json()}, job)
    with caplog.at_level(logging.WARNING, logger="monitor.events"):
        events = derive_events(job, [result()], SEGS, 0, 150, base)
    assert [e.kind for e in events if e.kind in ("emerged", "cleared")] == []
    assert ("job t has confirm: 2 but the baseline was built for confirm: 1; build it with "
            "Baseline.from_history(history.recent(period, lookback(2)), job)") in caplog.text


def test_lookback_grows_with_confirm():
    assert [lookback(k) for k in (1, 2, 3, 52)] == [1, 52, 78, 1352]


# ---------------------------------------------------------------- against the definition


verdict = st.sampled_from([True, False, None])


@settings(max_examples=150, deadline=None)
@given(st.lists(verdict, min_size=1, max_size=24), st.integers(1, 4))
def test_events_follow_the_definition(tmp_path_factory, verdicts, k):
    job = make_job(tmp_path_factory.mktemp("c"), confirm=k)
    periods = [[result(significant=bool(v), computed=v is not None)] for v in verdicts]
    got = [kinds[0] if kinds else None for kinds in metric_kinds(stream(job, periods))]
    want = reference_transitions(verdicts, k)
    if k == 1:  # confirm: 1 keeps the old reading of an uncomputed period (it counts as not significant)
        want = reference_transitions([bool(v) if v is not None else False for v in verdicts], 1)
        want = [w if v is not None else None for w, v in zip(want, verdicts)]
        # ... except that a period without a verdict never raises "cleared" itself
        got = [g if v is not None else None for g, v in zip(got, verdicts)]
    assert got == want


@settings(max_examples=150, deadline=None)
@given(st.lists(st.booleans(), min_size=2, max_size=30), st.integers(2, 4), st.integers(1, 30))
def test_a_short_window_is_exact_once_it_holds_a_run_of_k(tmp_path_factory, verdicts, k, window):
    job = make_job(tmp_path_factory.mktemp("w"), confirm=k)
    history = [StoredPeriod(week(t), SEGS, {"dwell": result(significant=v).to_json()})
               for t, v in enumerate(verdicts)][::-1]  # newest first
    full = Baseline.from_history(history, job)
    part = Baseline.from_history(history[:window], job)
    seen = verdicts[-window:]
    has_run = any(len(set(seen[i:i + k])) == 1 for i in range(len(seen) - k + 1))
    if has_run or window >= len(verdicts):
        assert part.significant.get("dwell", False) == full.significant.get("dwell", False)
    assert part.metric_runs["dwell"].verdict == full.metric_runs["dwell"].verdict
    assert part.metric_runs["dwell"].length == min(full.metric_runs["dwell"].length, window)


def reference_flag_events(flags, k):
    """The rule for one segment's flag ('high', 'low', None; 'absent' = no records): the
    announced flag becomes v after K consecutive periods with flag v."""
    announced, run_value, run_len, out = None, object(), 0, []
    for v in flags:
        if v == "absent":
            out.append([])
            continue
        run_len = run_len + 1 if v == run_value else 1
        run_value = v
        events = []
        if run_len >= k and v != announced:
            if v:
                events.append(("emerged", v))
            if announced:
                events.append(("cleared", announced))
            announced = v
        out.append(events)
    return out


@settings(max_examples=150, deadline=None)
@given(st.lists(st.sampled_from(["high", "low", None, "absent"]), min_size=1, max_size=20), st.integers(2, 4))
def test_segment_events_follow_the_definition(tmp_path_factory, flags, k):
    job = make_job(tmp_path_factory.mktemp("f"), confirm=k)
    periods, segments = [], []
    for f in flags:
        if f == "absent":
            periods.append([result(segments=("B", "C"))])
            segments.append(("B", "C"))
        else:
            periods.append([result(flags={"A": f} if f else {})])
            segments.append(SEGS)
    got = [[(e.kind, e.detail.get("flag") or e.detail.get("previous_flag")) for e in ev
            if e.segment == "A" and e.kind in ("emerged", "cleared")]
           for ev in stream(job, periods, segments=segments)]
    assert got == reference_flag_events(flags, k)
