"""Scheduling: what is owed at an instant, ticks with an injected clock, the APScheduler
wiring, and ``segwatch serve`` stopping cleanly on SIGTERM.

Calendar facts used as references (from the calendars themselves, checked with
Python's ``zoneinfo``/``datetime.date.isocalendar`` in the comments):
* Europe/Berlin springs forward on 2026-03-29 (02:00 → 03:00, a 23-hour day) and falls
  back on 2026-10-25 (03:00 → 02:00, a 25-hour day) — EU summer-time rule, Directive 2000/84/EC.
* ISO 2026 has 53 weeks: 2026-W53 runs from Monday 2026-12-28 to Monday 2027-01-04
  (ISO 8601: the week with the year's first Thursday is W01; 2026-01-01 is a Thursday).
"""

from __future__ import annotations

import json
import multiprocessing
import os
import signal
import sqlite3
import sys
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa
from apscheduler.events import EVENT_JOB_MAX_INSTANCES, JobSubmissionEvent
from apscheduler.triggers.cron import CronTrigger

from monitor.clock import FixedClock
from monitor.config import load_config, parse_config
from monitor.errors import UsageError
from monitor.store.ledger import Ledger, LedgerEntry
from monitor.periods import latest_complete, parse_period
from monitor.runner import Job
from monitor.scheduler import Service, due_periods, tick

UTC = timezone.utc


def _cfg(period="week", zone="UTC", settle=0, lookback=0, schedule="0 6 * * mon"):
    return parse_config({
        "job": "j", "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts",
                               "segment_column": "s"},
        "period": period, "timezone": zone, "metrics": [{"column": "v"}], "schedule": schedule,
        "scheduling": {"settle_minutes": settle, "lookback": lookback},
    }, Path("/tmp/j.yaml"), environ={})


def _done(cfg, ident, late=timedelta(days=1)):
    p = parse_period(cfg.period, ident, cfg.timezone)
    return LedgerEntry(ident, "done", 1, finished_at=p.end_utc + late)


def _due(cfg, ledger, now, **kw):
    return [(d.period.ident, d.reason) for d in due_periods(cfg, {e.period: e for e in ledger}, now, **kw)]


# ------------------------------------------------------------------ due_periods (pure)


def test_empty_ledger_owes_only_the_latest_closed_period():
    cfg = _cfg()
    now = datetime(2026, 3, 18, 12, tzinfo=UTC)  # a Wednesday in 2026-W12
    assert _due(cfg, [], now) == [("2026-W11", "catch-up")]


def test_catch_up_after_downtime_oldest_first():
    cfg = _cfg()
    now = datetime(2026, 3, 2, 6, tzinfo=UTC)  # Monday of 2026-W10; W05 was the last one done
    assert _due(cfg, [_done(cfg, "2026-W04"), _done(cfg, "2026-W05")], now) == [
        ("2026-W06", "catch-up"), ("2026-W07", "catch-up"), ("2026-W08", "catch-up"), ("2026-W09", "catch-up")]


def test_settle_delay_holds_a_period_back_until_it_has_passed():
    cfg = _cfg(settle=90)
    ledger = [_done(cfg, "2026-W10")]
    monday = datetime(2026, 3, 16, tzinfo=UTC)  # 2026-W11 ends here
    assert _due(cfg, ledger, monday + timedelta(minutes=89)) == []
    assert _due(cfg, ledger, monday + timedelta(minutes=90)) == [("2026-W11", "catch-up")]  # end + settle <= now


def test_look_back_recomputes_the_last_done_periods_only():
    cfg = _cfg(lookback=3)
    now = datetime(2026, 3, 18, tzinfo=UTC)  # in W12; W11 is the newest closed
    ledger = [_done(cfg, w) for w in ("2026-W08", "2026-W09", "2026-W10")]
    assert _due(cfg, ledger, now) == [("2026-W09", "look-back"), ("2026-W10", "look-back"),
                                      ("2026-W11", "catch-up")]
    assert _due(cfg, ledger, now, lookback=False) == [("2026-W11", "catch-up")]
    assert _due(_cfg(lookback=3), [], now) == [("2026-W11", "catch-up")]  # look-back never backfills


def test_failed_pending_and_interrupted_periods_are_retried():
    cfg = _cfg()
    now = datetime(2026, 3, 18, tzinfo=UTC)
    ledger = [LedgerEntry("2026-W07", "failed", 2, last_error="down",
                          next_attempt_at=datetime(2026, 3, 19, tzinfo=UTC)),
              _done(cfg, "2026-W08"), LedgerEntry("2026-W09", "running", 1), _done(cfg, "2026-W10"),
              LedgerEntry("2026-W12", "failed", 1)]  # not closed yet: not due
    assert _due(cfg, ledger, now) == [("2026-W07", "retry"), ("2026-W09", "retry"), ("2026-W11", "catch-up")]
    # a sweep honours the backoff of W07, and everything after it waits for it
    assert _due(cfg, ledger, now, new=False, lookback=False, respect_backoff=True) == []
    later = datetime(2026, 3, 19, tzinfo=UTC)
    assert _due(cfg, ledger, later, new=False, lookback=False, respect_backoff=True) == [
        ("2026-W07", "retry"), ("2026-W09", "retry")]


def test_a_period_computed_before_it_closed_is_computed_again():
    cfg = _cfg(settle=60)
    early = LedgerEntry("2026-W11", "done", 1, finished_at=datetime(2026, 3, 12, tzinfo=UTC))  # a Thursday
    assert _due(cfg, [_done(cfg, "2026-W10"), early], datetime(2026, 3, 16, 2, tzinfo=UTC)) == [
        ("2026-W11", "catch-up")]


def test_ledger_rows_of_another_period_kind_are_ignored():
    cfg = _cfg(period="month")
    ledger = [LedgerEntry("2026-W05", "failed", 1), _done(cfg, "2026-01")]
    assert _due(cfg, ledger, datetime(2026, 3, 18, tzinfo=UTC)) == [("2026-02", "catch-up")]


def test_dst_gap_day_in_berlin():
    cfg = _cfg(period="day", zone="Europe/Berlin", settle=60)
    gap_day = parse_period("day", "2026-03-29", "Europe/Berlin")
    assert gap_day.duration == timedelta(hours=23)  # 02:00 -> 03:00 skipped
    assert gap_day.end_utc == datetime(2026, 3, 29, 22, tzinfo=UTC)  # 2026-03-30 00:00 CEST
    ledger = [_done(cfg, "2026-03-27")]
    assert _due(cfg, ledger, datetime(2026, 3, 29, 22, 59, tzinfo=UTC)) == [("2026-03-28", "catch-up")]
    assert _due(cfg, ledger, datetime(2026, 3, 29, 23, 0, tzinfo=UTC)) == [
        ("2026-03-28", "catch-up"), ("2026-03-29", "catch-up")]


def test_dst_fold_day_in_berlin_is_owed_once():
    cfg = _cfg(period="day", zone="Europe/Berlin")
    fold_day = parse_period("day", "2026-10-25", "Europe/Berlin")
    assert fold_day.duration == timedelta(hours=25)  # 02:00-03:00 happens twice
    ledger = [_done(cfg, "2026-10-23")]
    # 23:30 UTC on the 25th is 00:30 CET on the 26th: the 25th has closed, once
    due = _due(cfg, ledger, datetime(2026, 10, 25, 23, 30, tzinfo=UTC))
    assert due == [("2026-10-24", "catch-up"), ("2026-10-25", "catch-up")]
    # 22:30 UTC is still 23:30 CET on the 25th
    assert _due(cfg, ledger, datetime(2026, 10, 25, 22, 30, tzinfo=UTC)) == [("2026-10-24", "catch-up")]


def test_iso_week_53_is_not_skipped():
    cfg = _cfg()
    w53 = parse_period("week", "2026-W53", "UTC")
    assert (w53.start.date().isoformat(), w53.end.date().isoformat()) == ("2026-12-28", "2027-01-04")
    now = datetime(2027, 1, 12, 6, tzinfo=UTC)
    assert _due(cfg, [_done(cfg, "2026-W52")], now) == [("2026-W53", "catch-up"), ("2027-W01", "catch-up")]


def test_the_schedule_is_read_in_utc_across_berlin_clock_changes():
    trigger = CronTrigger.from_crontab("0 6 * * mon", timezone=UTC)
    fires, t = [], datetime(2026, 3, 20, tzinfo=UTC)
    for _ in range(3):
        t = trigger.get_next_fire_time(None, t + timedelta(seconds=1))
        fires.append(t.isoformat())
    assert fires == ["2026-03-23T06:00:00+00:00", "2026-03-30T06:00:00+00:00", "2026-04-06T06:00:00+00:00"]


# ------------------------------------------------------------------ ticks on a real source


def _project(root: Path, *, zone="UTC", lookback=0, settle=0, extra="") -> Path:
    """Weekly data for 2026-W05..W12 of three hubs; C shifts up from W09 on; W07 has no rows."""
    rng = np.random.default_rng(5)
    (root / "src").mkdir(exist_ok=True)
    con = sqlite3.connect(root / "src" / "src.sqlite")
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    rows = []
    for week in range(5, 13):
        if week == 7:
            continue
        monday = datetime.fromisocalendar(2026, week, 1)
        for hub in "ABC":
            for _ in range(20):
                ts = monday + timedelta(minutes=int(rng.integers(0, 7 * 24 * 60)))
                mean = 26 if hub == "C" and week >= 9 else 20
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, float(rng.normal(mean, 2))))
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\nsource:\n  url: sqlite:///src/src.sqlite\n  table: parcels\n  time_column: ts\n"
        f"  segment_column: hub\nperiod: week\ntimezone: {zone}\n"
        "metrics:\n  - column: dwell\n    test: kruskal\n"
        "history: {url: 'sqlite:///state/h.sqlite'}\nalerts:\n  - type: log\n    path: alerts.jsonl\n"
        f"schedule: '0 6 * * mon'\nscheduling: {{settle_minutes: {settle}, lookback: {lookback}}}\n" + extra)
    return cfg


def _lines(root: Path) -> list[dict]:
    path = root / "alerts.jsonl"
    return [json.loads(x) for x in path.read_text().splitlines()] if path.exists() else []


def _table(root: Path, sql: str) -> list[tuple]:
    eng = sa.create_engine(f"sqlite:///{root / 'state' / 'h.sqlite'}")
    try:
        with eng.connect() as c:
            return [tuple(r) for r in c.execute(sa.text(sql))]
    finally:
        eng.dispose()


def test_tick_catches_up_after_downtime_and_then_owes_nothing(tmp_path):
    cfg = load_config(_project(tmp_path))
    clock = FixedClock(datetime(2026, 2, 9, 6, tzinfo=UTC))  # Monday of W07: W06 just closed
    with Job(cfg, clock=clock) as job:
        first = tick(job)
        assert first.computed == ("2026-W06",)
        clock.set(datetime(2026, 3, 16, 6, tzinfo=UTC))  # down for five weeks
        second = tick(job)
        assert second.due == ("2026-W07", "2026-W08", "2026-W09", "2026-W10", "2026-W11")
        assert second.computed == ("2026-W08", "2026-W09", "2026-W10", "2026-W11")
        assert second.skipped == ("2026-W07",)  # no rows: op_period_empty, not stored
        assert second.failed is None and second.busy is None
        lines = _lines(tmp_path)
        third = tick(job)
        assert third.due == () and _lines(tmp_path) == lines
    assert {(p, s) for p, s in _table(tmp_path, "SELECT period, state FROM sw_ledger")} == {
        (f"2026-W{w:02d}", "done") for w in range(6, 12)}
    assert [r[0] for r in _table(tmp_path, "SELECT period FROM sw_runs ORDER BY period")] == [
        "2026-W06", "2026-W08", "2026-W09", "2026-W10", "2026-W11"]
    kinds = [(x["period"], x["kind"], x["segment"]) for x in lines]
    assert ("2026-W07", "op_period_empty", None) in kinds
    assert ("2026-W09", "emerged", "C") in kinds
    assert len({x["event_key"] for x in lines}) == len(lines)


def test_look_back_recompute_that_changes_nothing_sends_nothing(tmp_path):
    # the per-period rule: a late correction that takes a difference back shows in its own week
    # (the two-period rule would wait for a second quiet week before clearing)
    root = _project(tmp_path, lookback=2, extra="decision: {rule: per_period}\n").parent
    cfg = load_config(root / "job.yaml")
    clock = FixedClock(datetime(2026, 3, 16, 6, tzinfo=UTC))
    with Job(cfg, clock=clock) as job:
        job.backfill("2026-W09", "2026-W10")
        assert tick(job).computed == ("2026-W10", "2026-W11")  # W10 look-back, W11 catch-up
        lines = _lines(root)
        events = _table(root, "SELECT event_key, message FROM sw_events ORDER BY event_key")
        clock.advance(timedelta(days=1))
        again = tick(job)
        assert again.computed == ("2026-W10", "2026-W11") and again.delivery.sent == 0
        assert _lines(root) == lines
        assert _table(root, "SELECT event_key, message FROM sw_events ORDER BY event_key") == events
        # late rows arrive for W11: hub C is back in line, so its shift clears; only that is new
        con = sqlite3.connect(root / "src" / "src.sqlite")
        con.executemany("INSERT INTO parcels VALUES (?, ?, ?)",
                        [("2026-03-12 10:00:00", "C", 20.0 + (i % 5) * 0.1) for i in range(300)])
        con.commit()
        con.close()
        clock.advance(timedelta(days=1))
        tick(job)
    new = _lines(root)[len(lines):]
    assert new and {x["period"] for x in new} == {"2026-W11"}
    assert len({x["event_key"] for x in _lines(root)}) == len(_lines(root))


def test_source_outage_fails_the_period_then_a_sweep_retries_it_after_backoff(tmp_path, monkeypatch):
    monkeypatch.setattr("monitor.source.reader.RETRY_BASE_SECONDS", 0.0)
    root = _project(tmp_path).parent
    (root / "src").rename(root / "src-away")
    cfg = load_config(root / "job.yaml")
    clock = FixedClock(datetime(2026, 3, 16, 6, tzinfo=UTC))
    with Job(cfg, clock=clock) as job:
        report = tick(job)
        assert report.computed == () and report.failed[0] == "2026-W11"
        assert "cannot connect to the source" in report.failed[1] and "after 3 attempts" in report.failed[1]
        entry = job.ledger.entry("2026-W11")
        assert entry.state == "failed" and entry.attempts == 1 and entry.last_error == report.failed[1]
        assert _table(root, "SELECT COUNT(*) FROM sw_runs") == [(0,)]  # nothing half-written
        assert [x["kind"] for x in _lines(root)] == ["op_run_failed"]
        (root / "src-away").rename(root / "src")
        clock.advance(timedelta(minutes=4))
        assert tick(job, sweep=True).due == ()  # backoff: first retry after 5 minutes
        clock.advance(timedelta(minutes=1))
        sweep = tick(job, sweep=True)
        assert sweep.computed == ("2026-W11",)
        assert job.ledger.entry("2026-W11").state == "done" and job.ledger.entry("2026-W11").attempts == 2


def test_sweep_starts_nothing_new(tmp_path):
    cfg = load_config(_project(tmp_path))
    with Job(cfg, clock=FixedClock(datetime(2026, 3, 16, 6, tzinfo=UTC))) as job:
        assert tick(job, sweep=True).due == ()


def test_busy_period_stops_the_tick_until_the_lease_expires(tmp_path):
    cfg = load_config(_project(tmp_path))
    clock = FixedClock(datetime(2026, 3, 9, 6, tzinfo=UTC))
    with Job(cfg, clock=clock) as job:
        other = Ledger(job.history, clock, lease_seconds=600).claim("2026-W10")
        report = tick(job)
        assert report.busy[0] == "2026-W10" and other.owner in report.busy[1] and report.computed == ()
        clock.advance(timedelta(minutes=10))
        report = tick(job)
        assert report.computed == ("2026-W10",)
    takeovers = [x for x in _lines(tmp_path) if x["kind"] == "op_lease_taken_over"]
    assert len(takeovers) == 1 and other.owner in takeovers[0]["message"]


def test_stop_request_is_honoured_between_periods(tmp_path):
    cfg = load_config(_project(tmp_path))
    import threading

    stop = threading.Event()
    stop.set()
    with Job(cfg, clock=FixedClock(datetime(2026, 3, 16, 6, tzinfo=UTC))) as job:
        report = tick(job, stop=stop)
    assert report.stopped and report.computed == () and report.due == ("2026-W11",)


def test_report_is_written_after_each_scheduled_period(tmp_path, monkeypatch):
    from monitor.present import report

    cfg = load_config(_project(tmp_path, extra="report: {path: 'reports/{period}.html'}\n"))
    calls = []
    monkeypatch.setattr(report, "write_report", lambda job, period, out: calls.append((period.ident, out)))
    with Job(cfg, clock=FixedClock(datetime(2026, 3, 2, 6, tzinfo=UTC))) as job:
        tick(job)
    assert calls == [("2026-W09", tmp_path / "reports" / "2026-W09.html")]


def test_a_report_that_fails_is_logged_and_the_period_still_counts(tmp_path, monkeypatch, caplog):
    from monitor.present import report

    def fail(job, period, out):
        raise OSError("disk full")

    cfg = load_config(_project(tmp_path, extra="report: {path: 'r.html'}\n"))
    monkeypatch.setattr(report, "write_report", fail)
    with Job(cfg, clock=FixedClock(datetime(2026, 3, 2, 6, tzinfo=UTC))) as job:
        assert tick(job).computed == ("2026-W09",)
    assert not (tmp_path / "r.html").exists()
    assert "report for 2026-W09 not written to" in caplog.text and "disk full" in caplog.text


def test_the_service_schedules_from_its_injected_clock(tmp_path):
    cfg = load_config(_project(tmp_path))
    service = Service([cfg], clock=FixedClock(datetime(2026, 3, 4, 12, 30, tzinfo=UTC)))
    try:
        # schedule "0 6 * * mon" (the test project's): the next Monday 06:00 after the clock's now
        assert service.next_ticks() == {"hubs": datetime(2026, 3, 9, 6, tzinfo=UTC)}
    finally:
        service.shutdown()


# ------------------------------------------------------------------ the service


def test_service_builds_utc_jobs_that_never_drop_or_pile_up_runs(tmp_path):
    cfg = load_config(_project(tmp_path))
    service = Service([cfg], retry_minutes=2)
    try:
        jobs = {j.id: j for j in service.scheduler.get_jobs()}
        assert set(jobs) == {"tick:hubs", "sweep:hubs"}
        for j in jobs.values():
            assert (j.misfire_grace_time, j.coalesce, j.max_instances) == (None, True, 1)
        assert str(jobs["tick:hubs"].trigger.timezone) == "UTC"
        assert jobs["sweep:hubs"].trigger.interval == timedelta(minutes=2)
    finally:
        service.shutdown()


def test_service_refuses_configs_it_cannot_schedule(tmp_path):
    path = _project(tmp_path)
    cfg = load_config(path)
    path.write_text(path.read_text().replace("schedule: '0 6 * * mon'\n", ""))
    unscheduled = load_config(path)
    with pytest.raises(UsageError) as exc:
        Service([unscheduled])
    assert str(exc.value) == (f"{path}: schedule: missing; `serve` needs one, e.g. schedule: \"0 6 * * mon\" "
                              "(cron fields, read in UTC)")
    with pytest.raises(UsageError, match=r"job 'hubs' is also defined by .*job.yaml; give each job its own name"):
        Service([cfg, cfg])


def test_skipped_overlapping_run_is_an_operational_event(tmp_path):
    cfg = load_config(_project(tmp_path))
    service = Service([cfg])
    try:
        when = datetime(2026, 3, 16, 6, tzinfo=UTC)
        service._on_event(JobSubmissionEvent(EVENT_JOB_MAX_INSTANCES, "tick:hubs", "default", [when]))
        job = service.jobs["hubs"]
        ops = [e for e in job.history.events() if e["kind"] == "op_run_skipped"]
        assert len(ops) == 1 and ops[0]["period"] == "2026-W11"
        assert ops[0]["message"].startswith("The run scheduled at 2026-03-16T06:00:00Z was skipped")
        job.deliver()
    finally:
        service.shutdown()
    assert [x["kind"] for x in _lines(tmp_path)] == ["op_run_skipped"]


def test_service_catches_up_at_start_through_apscheduler(tmp_path):
    cfg = load_config(_project(tmp_path))
    clock = FixedClock(datetime(2026, 3, 16, 6, tzinfo=UTC))
    service = Service([cfg], clock=clock)
    try:
        service.start()
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            entry = service.jobs["hubs"].ledger.entry("2026-W11")
            if entry is not None and entry.state == "done":
                break
            time.sleep(0.05)
    finally:
        service.shutdown()
    assert entry is not None and entry.state == "done"


def _serve_child(cfg: str, marker: str, out: str) -> None:
    """``segwatch serve`` in a forked child whose source is slow, so SIGTERM lands mid-period."""
    import io

    import monitor.source
    from monitor.cli import main

    original = monitor.source.Source.fetch

    def slow_fetch(self, period):
        Path(marker).write_text(period.ident)  # tell the test we are inside a period
        time.sleep(1.0)
        return original(self, period)

    monitor.source.Source.fetch = slow_fetch
    sys.stdout = open(out, "w")  # noqa: SIM115
    sys.stderr = io.StringIO()
    rc = main(["serve", cfg])
    sys.stdout.flush()
    os._exit(rc)


def test_serve_finishes_the_running_period_on_sigterm_and_exits_0(tmp_path):
    # data for the two latest complete weeks by the real clock
    now = datetime.now(UTC)
    latest = latest_complete("week", now, "UTC")
    con = sqlite3.connect(tmp_path / "src.sqlite")
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    rng = np.random.default_rng(9)
    for p in (latest.previous(), latest):
        start = p.start_utc.replace(tzinfo=None)
        con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", [
            ((start + timedelta(minutes=int(rng.integers(0, 10000)))).strftime("%Y-%m-%d %H:%M:%S"), hub,
             float(rng.normal(20, 2))) for hub in "AB" for _ in range(10)])
    con.commit()
    con.close()
    cfg = tmp_path / "job.yaml"
    cfg.write_text(
        "job: live\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
        "  segment_column: hub\nperiod: week\ntimezone: UTC\nmetrics:\n  - column: dwell\n    test: kruskal\n"
        "history: {url: 'sqlite:///h.sqlite'}\nschedule: '0 6 * * mon'\n")
    marker, out_path = tmp_path / "inside", tmp_path / "out.txt"
    child = multiprocessing.get_context("fork").Process(target=_serve_child,
                                                        args=(str(cfg), str(marker), str(out_path)))
    child.start()
    try:
        deadline = time.monotonic() + 30
        while not marker.exists() and child.is_alive() and time.monotonic() < deadline:
            time.sleep(0.02)
        assert marker.read_text() == latest.ident
        os.kill(child.pid, signal.SIGTERM)
        child.join(30)
    finally:
        if child.is_alive():
            child.kill()
            child.join()
    out = out_path.read_text()
    assert child.exitcode == 0
    assert out.startswith("serving live: schedule '0 6 * * mon' (UTC), next tick ")
    assert out.rstrip().endswith("stopping: finishing the period being computed\nstopped")
    eng = sa.create_engine(f"sqlite:///{tmp_path / 'h.sqlite'}")
    with eng.connect() as c:
        assert c.execute(sa.text("SELECT period, state FROM sw_ledger")).all() == [(latest.ident, "done")]
        assert c.execute(sa.text("SELECT COUNT(*) FROM sw_leases")).scalar_one() == 0
    eng.dispose()
