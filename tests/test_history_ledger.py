"""History, ledger and leases on SQLite and on PostgreSQL.

Every test runs on both backends: a SQLite file in a temporary folder, and a schema of
its own in the PostgreSQL database ``test`` on 127.0.0.1:5432 (user ``postgres``,
trust auth), dropped afterwards. Without a reachable server (or without psycopg) the
PostgreSQL half is skipped with the reason.
"""

from __future__ import annotations

import json
import math
import socket
import sqlite3
import subprocess
import sys
import threading
import time
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

from monitor.clock import FixedClock
from monitor.config import load_config
from monitor.model import Event
from monitor.errors import LeaseLost, PeriodBusy
from monitor.store.history import History, insert_missing, leases_t
from monitor.store.ledger import RELAY_RESOURCE, Ledger, new_owner, owner_gone, retry_delay
from monitor.periods import parse_period
from monitor.runner import Job

T0 = datetime(2026, 3, 16, 6, 0, tzinfo=timezone.utc)  # Monday after 2026-W11
PG_DSN = "host=127.0.0.1 port=5432 user=postgres dbname=test"


# ------------------------------------------------------------------ backends


@pytest.fixture(scope="session")
def pg_admin():
    try:
        import psycopg
    except ImportError:
        pytest.skip("PostgreSQL tests need psycopg: pip install 'psycopg[binary]'")
    try:
        conn = psycopg.connect(PG_DSN, connect_timeout=3, autocommit=True)
    except psycopg.OperationalError as exc:
        pytest.skip(f"PostgreSQL not reachable at 127.0.0.1:5432 (user postgres, database test): "
                    f"{' '.join(str(exc).split())}")
    yield conn
    conn.close()


@pytest.fixture(params=["sqlite", "postgresql"])
def history_url(request, tmp_path):
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'history.sqlite'}"
        return
    admin = request.getfixturevalue("pg_admin")
    schema = f"sw_test_{uuid.uuid4().hex[:12]}"
    admin.execute(f'CREATE SCHEMA "{schema}"')
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:5432/test?options=-csearch_path%3D{schema}"
    finally:
        admin.execute(f'DROP SCHEMA "{schema}" CASCADE')


@pytest.fixture()
def history(history_url):
    h = History(history_url, "hubs")
    h.ensure()
    yield h
    h.dispose()


def _ledger(history: History, clock: FixedClock, **kw) -> Ledger:
    return Ledger(history, clock, op_channels=["log:/tmp/ops.jsonl"], **kw)


def _events(history: History, kind_prefix: str = "") -> list[dict]:
    return [e for e in history.events() if e["kind"].startswith(kind_prefix)]


# ------------------------------------------------------------------ the dialect helper


def test_insert_missing_inserts_once_and_keeps_the_first_row(history):
    row = {"job": "hubs", "resource": "2026-W11", "owner": "a", "acquired_at": datetime(2026, 1, 1),
           "expires_at": datetime(2026, 1, 2)}
    with history.begin() as conn:
        assert insert_missing(conn, leases_t, row) is True
        assert insert_missing(conn, leases_t, {**row, "owner": "b"}) is False
    with history.engine.connect() as conn:
        assert conn.execute(sa.select(leases_t.c.owner)).scalars().all() == ["a"]


# ------------------------------------------------------------------ leases


def test_second_claim_loses_and_learns_the_holder(history):
    clock = FixedClock(T0)
    a, b = _ledger(history, clock), _ledger(history, clock)
    first = a.claim("2026-W11")
    second = b.claim("2026-W11")
    assert first.won and not second.won
    assert second.owner == first.owner and second.expires_at == T0 + timedelta(seconds=600)
    host, pid, token = first.owner.rsplit(":", 2)
    assert host == socket.gethostname() and int(pid) > 0 and len(token) == 12
    a.release(first)
    assert b.claim("2026-W11").won


def test_expired_lease_is_taken_over_and_reported(history):
    clock = FixedClock(T0)
    a, b = _ledger(history, clock, lease_seconds=60), _ledger(history, clock, lease_seconds=60)
    first = a.claim("2026-W11")
    clock.advance(timedelta(seconds=59))
    assert not b.claim("2026-W11").won  # still valid one second before expiry
    clock.advance(timedelta(seconds=1))
    taken = b.claim("2026-W11")
    assert taken.won and taken.previous_owner == first.owner and taken.takeover_reason == "expired"
    ops = _events(history, "op_lease_taken_over")
    assert len(ops) == 1 and ops[0]["period"] == "2026-W11"
    assert first.owner in ops[0]["message"] and ops[0]["detail"]["reason"] == "expired"
    # the old owner can no longer renew, and its store is refused
    assert a.renew(first) is False
    assert b.renew(taken) is True


def test_lease_of_a_dead_process_on_this_host_is_taken_over_at_once(history):
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()  # reaped: the pid names no process now
    dead = f"{socket.gethostname()}:{proc.pid}:0123456789ab"
    elsewhere = f"another-host.invalid:{proc.pid}:0123456789ab"
    assert owner_gone(dead) and not owner_gone(elsewhere) and not owner_gone(new_owner())
    clock = FixedClock(T0)
    with history.begin() as conn:
        for resource, owner in (("2026-W10", dead), ("2026-W11", elsewhere)):
            conn.execute(sa.insert(leases_t).values(job="hubs", resource=resource, owner=owner,
                                                    acquired_at=datetime(2026, 3, 16, 6),
                                                    expires_at=datetime(2026, 3, 16, 7)))
    led = _ledger(history, clock)
    taken = led.claim("2026-W10")
    assert taken.won and taken.takeover_reason == "owner process gone"
    assert not led.claim("2026-W11").won  # another host: only expiry frees it


def test_store_checks_the_lease_in_its_own_transaction(history):
    clock = FixedClock(T0)
    period = parse_period("week", "2026-W11", "UTC")
    a, b = _ledger(history, clock, lease_seconds=60), _ledger(history, clock, lease_seconds=60)
    slow = a.claim(period.ident)
    a.start(slow)
    clock.advance(timedelta(minutes=5))
    fast = b.claim(period.ident)
    b.start(fast)
    ev = [Event("emerged", "dwell", None, "dwell differs.")]
    kw = dict(computed_at=clock.now(), fingerprint="f", rows=3, null_segment_rows=0, segments=["A"])
    with pytest.raises(LeaseLost, match=r"period 2026-W11 of job hubs: the lease was taken over by .*; "
                                        r"its results were not stored"):
        history.store_period(period, [], ev, ["log:x"], lease_owner=slow.owner, **kw)
    assert history.periods() == [] and _events(history, "emerged") == []
    fresh = history.store_period(period, [], ev, ["log:x"], lease_owner=fast.owner, **kw)
    assert [e.kind for e in fresh] == ["emerged"]
    entry = b.entry(period.ident)
    assert entry.state == "done" and entry.attempts == 2 and entry.finished_at == clock.now()
    assert b.holder(period.ident) is None  # released in the same transaction


def test_concurrent_claims_have_exactly_one_winner(history_url):
    clock = FixedClock(T0)
    History(history_url, "hubs").ensure()
    barrier = threading.Barrier(6)
    results = []

    def claim():
        h = History(history_url, "hubs")
        try:
            barrier.wait()
            results.append(_ledger(h, clock).claim("2026-W11").won)
        finally:
            h.dispose()

    threads = [threading.Thread(target=claim) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(results) == [False] * 5 + [True]


def test_heartbeat_renews_the_lease_and_notices_a_takeover(history):
    clock = FixedClock(T0)
    led = _ledger(history, clock, lease_seconds=60)
    claim = led.claim("2026-W11")
    clock.advance(timedelta(seconds=50))
    with led.heartbeat(claim, interval=0.01) as lost:
        deadline = time.monotonic() + 10
        while led.holder("2026-W11")[1] != T0 + timedelta(seconds=110) and time.monotonic() < deadline:
            time.sleep(0.01)
    assert led.holder("2026-W11") == (claim.owner, T0 + timedelta(seconds=110)) and not lost.is_set()
    clock.advance(timedelta(seconds=61))
    thief = _ledger(history, clock).claim("2026-W11")
    assert thief.won
    with led.heartbeat(claim, interval=0.01) as lost:
        assert lost.wait(10)
    assert led.holder("2026-W11")[0] == thief.owner


# ------------------------------------------------------------------ the ledger


def test_failed_attempt_records_reason_backoff_and_op_event(history):
    clock = FixedClock(T0)
    led = _ledger(history, clock)
    claim = led.claim("2026-W11")
    assert claim.entry is None
    assert led.start(claim).state == "running"
    entry = led.fail(claim, "cannot connect to the source sqlite:///x after 3 attempts: unable to open")
    assert entry.state == "failed" and entry.attempts == 1
    assert entry.last_error.startswith("cannot connect to the source")
    assert entry.next_attempt_at == T0 + timedelta(minutes=5)  # RETRY_BASE_SECONDS
    assert led.holder("2026-W11") is None
    op = _events(history, "op_run_failed")
    assert len(op) == 1 and "attempt 1" in op[0]["message"] and op[0]["period"] == "2026-W11"
    again = led.claim("2026-W11")
    assert again.entry.state == "failed"
    led.start(again)
    assert led.fail(again, "still down").attempts == 2
    assert len(_events(history, "op_run_failed")) == 2  # one per attempt
    assert [retry_delay(n).total_seconds() for n in (1, 2, 3, 20)] == [300, 600, 1200, 6 * 3600]


def test_register_adds_pending_rows_once(history):
    led = _ledger(history, FixedClock(T0))
    assert led.register(["2026-W10", "2026-W11"]) == 2
    assert led.register(["2026-W11", "2026-W12"]) == 1
    assert {p: e.state for p, e in led.entries().items()} == {
        "2026-W10": "pending", "2026-W11": "pending", "2026-W12": "pending"}


def test_empty_period_is_done_with_a_note(history):
    clock = FixedClock(T0)
    led = _ledger(history, clock)
    period = parse_period("week", "2026-W11", "UTC")
    claim = led.claim(period.ident)
    led.start(claim)
    led.finish_empty(claim, period.start, period.end)
    entry = led.entry(period.ident)
    assert entry.state == "done" and entry.note == "skipped: the source had no rows in the window"
    op = _events(history, "op_period_empty")
    assert len(op) == 1 and op[0]["message"] == (
        "Period 2026-W11 was skipped: the source had no rows from 2026-03-09T00:00:00+00:00 "
        "to 2026-03-16T00:00:00+00:00.")


# ------------------------------------------------------------------ events and outbox


def test_rerun_reconciles_events_and_keeps_operational_ones(history):
    period = parse_period("week", "2026-W11", "UTC")
    kw = dict(computed_at=T0, fingerprint="f", rows=3, null_segment_rows=0, segments=["A", "B"])
    a = Event("emerged", "dwell", None, "dwell differs.")
    b = Event("emerged", "dwell", "C", "C stands above.")
    assert len(history.store_period(period, [], [a, b], ["log:x", "email:o@example.com"], **kw)) == 2
    history.record_op(period.ident, Event("op_run_failed", None, None, "it failed once.", subject="attempt 1"),
                      ["log:x"], T0)
    history.mark("log:x", [a.key("hubs", period.ident), b.key("hubs", period.ident)], "sent", T0)
    # a re-run without b withdraws b (its unsent email is dropped); the op event stays
    assert history.store_period(period, [], [a], ["log:x", "email:o@example.com"], **kw) == []
    kinds = sorted((e["kind"], e["segment"]) for e in history.events())
    assert kinds == [("emerged", None), ("op_run_failed", None)]
    assert [r.kind for r in history.alerts()] == ["emerged", "op_run_failed"]
    # b comes back: new for the period again, but the log line it already had is not written twice
    assert [e.segment for e in history.store_period(period, [], [a, b], ["log:x", "email:o@example.com"], **kw)] \
        == ["C"]
    assert [(i.event["segment"]) for i in history.pending("log:x")] == [None]  # only the op event
    assert [(i.event["segment"]) for i in history.pending("email:o@example.com")] == [None, "C"]
    assert history.events(include_ops=False) == [e for e in history.events() if not e["kind"].startswith("op_")]


def test_backoff_hides_alerts_until_due_and_requeue_revives_dead_ones(history):
    period = parse_period("week", "2026-W11", "UTC")
    ev = Event("emerged", "dwell", None, "dwell differs.")
    history.store_period(period, [], [ev], ["webhook:http://h/x", "email:o@example.com"], computed_at=T0,
                         fingerprint="f", rows=1, null_segment_rows=0, segments=["A"])
    key = ev.key("hubs", period.ident)
    later = T0 + timedelta(minutes=2)
    history.mark("webhook:http://h/x", [key], "pending", T0, "HTTP 503", next_attempt_at=later)
    history.mark("email:o@example.com", [key], "dead", T0, "SMTP answered 550")
    assert history.pending("webhook:http://h/x", T0 + timedelta(minutes=1)) == []
    assert len(history.pending("webhook:http://h/x", later)) == 1
    assert len(history.pending("webhook:http://h/x")) == 1  # no clock: every pending row
    rows = {r.channel: r for r in history.alerts()}
    assert rows["webhook:http://h/x"].status == "pending" and rows["webhook:http://h/x"].next_attempt_at == later
    assert rows["email:o@example.com"].status == "dead" and rows["email:o@example.com"].attempts == 1
    assert rows["email:o@example.com"].to_json()["updated_at"] == "2026-03-16T06:00:00Z"
    assert history.requeue(T0) == 2
    rows = {r.channel: r for r in history.alerts()}
    assert {r.status for r in rows.values()} == {"pending"} and rows["email:o@example.com"].attempts == 0
    assert all(r.next_attempt_at is None for r in rows.values())


def test_an_old_outbox_table_gains_the_backoff_column(history_url):
    engine = sa.create_engine(history_url)
    with engine.begin() as conn:
        conn.exec_driver_sql(
            "CREATE TABLE sw_outbox (event_key VARCHAR(40) NOT NULL, channel VARCHAR(400) NOT NULL, "
            "job VARCHAR(200) NOT NULL, status VARCHAR(8) NOT NULL, attempts INTEGER NOT NULL, "
            "last_error TEXT, updated_at TIMESTAMP NOT NULL, PRIMARY KEY (event_key, channel))")
    engine.dispose()
    h = History(history_url, "hubs")
    try:
        h.ensure()
        cols = {c["name"] for c in sa.inspect(h.engine).get_columns("sw_outbox")}
        assert "next_attempt_at" in cols
        assert h.pending("log:x", T0) == []
    finally:
        h.dispose()


# ------------------------------------------------------------------ segment and pair rows


def test_segments_and_pairs_are_stored_once_in_the_entry_and_replaced_on_rerun(history):
    # every segment number and pair lands in the metric's entry, NaN as null, and reads
    # back typed; sw_segment_results and sw_pair_results are left for older histories
    from monitor.model import MetricResult, PairRow, QualityCounts, SegmentRow
    from monitor.store.history import pair_results, segment_results

    period = parse_period("week", "2026-W11", "UTC")
    segs = (SegmentRow("A", 30, 20.5, 3.25, flag="high"), SegmentRow("B", 2, float("nan"), float("nan")),
            SegmentRow("C", 31, 19.0, 2.5, flag=None))
    pairs = (PairRow("A", "B", float("nan"), float("nan")),
             PairRow("A", "C", 1.5, 0.0125, significant=True),
             PairRow("B", "C", -0.75, 0.5, significant=False))

    def result(metric: str, pair_rows: tuple) -> MetricResult:
        return MetricResult(metric=metric, column=metric, requested="anova", method="anova", method_reason="set",
                            statistic=4.0, df=(2.0, 60.0), p_value=0.02, effect_size=None, segments=segs,
                            pairs=pair_rows, posthoc="tukey-kramer", assumptions={}, quality=QualityCounts(63))

    kw = dict(computed_at=T0, fingerprint="f", rows=63, null_segment_rows=0, segments=["A", "B", "C"])
    # rows an older release wrote for this period: dropped when the period is stored again
    history.ensure()
    with history.begin() as conn:
        conn.execute(sa.insert(segment_results).values(job="hubs", period="2026-W11", metric="dwell", segment="A",
                                                       n=1, mean=1.0, sd=None, flag=None))
        conn.execute(sa.insert(pair_results).values(job="hubs", period="2026-W11", metric="dwell", a="A", b="C",
                                                    diff=1.0, p_adj=0.5, significant=False))
    history.store_period(period, [result("dwell", pairs), result("cost", pairs[1:])], [], ["log:x"], **kw)
    with history.engine.connect() as conn:
        for table in (segment_results, pair_results):
            assert conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one() == 0
    stored = {e["metric"]: e for e in history.metric_history()}
    assert [(s["segment"], s["n"], s["mean"], s["sd"], s["flag"]) for s in stored["dwell"]["segments"]] == [
        ("A", 30, 20.5, 3.25, "high"), ("B", 2, None, None, None), ("C", 31, 19.0, 2.5, None)]
    typed = {r.metric: r.result for r in history.results()}
    assert typed["cost"].segments[0] == segs[0] and math.isnan(typed["cost"].segments[1].mean)
    assert [(p["a"], p["b"], p["diff"], p["p_adj"], p["significant"]) for p in stored["dwell"]["pairs"]] == [
        ("A", "B", None, None, False), ("A", "C", 1.5, 0.0125, True), ("B", "C", -0.75, 0.5, False)]
    assert [(p["a"], p["b"]) for p in stored["cost"]["pairs"]] == [("A", "C"), ("B", "C")]
    assert stored["dwell"]["pairs_left_out"] == 0
    # a re-run replaces the period's entries whole
    history.store_period(period, [result("dwell", pairs[2:])], [], ["log:x"], **kw)
    assert [(e["metric"], [(p["a"], p["b"]) for p in e["pairs"]]) for e in history.metric_history()] == [
        ("dwell", [("B", "C")])]


# ------------------------------------------------------------------ a whole run on each backend


def _project(root: Path, history_url: str) -> Path:
    rng = np.random.default_rng(11)
    con = sqlite3.connect(root / "src.sqlite")
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    rows = []
    for monday, shift in ((datetime(2026, 3, 2), 0.0), (datetime(2026, 3, 9), 6.0)):
        for hub in "ABC":
            for _ in range(30):
                ts = monday + timedelta(minutes=int(rng.integers(0, 7 * 24 * 60)))
                mean = 20 + (shift if hub == "C" else 0)
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, float(rng.normal(mean, 3))))
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
        "  segment_column: hub\nperiod: week\ntimezone: UTC\nmetrics:\n  - column: dwell\n    test: kruskal\n"
        f"history: {{url: '{history_url}'}}\nalerts:\n  - type: log\n    path: alerts.jsonl\n")
    return cfg


def test_job_runs_rerun_and_refuse_a_held_period_on_each_backend(history_url, tmp_path):
    cfg = load_config(_project(tmp_path, history_url))
    clock = FixedClock(T0)
    with Job(cfg, clock=clock) as job:
        job.run("2026-W10")
        second = job.run("2026-W11")
        assert ("emerged", "dwell", "C") in {(e.kind, e.metric, e.segment) for e in second.events}
        lines = (tmp_path / "alerts.jsonl").read_text().splitlines()
        assert len(lines) == len(job.history.events()) and second.delivery.sent == second.new_events
        again = job.run("2026-W11")
        assert again.new_events == 0 and again.delivery.sent == 0
        assert (tmp_path / "alerts.jsonl").read_text().splitlines() == lines
        entries = job.ledger.entries()
        assert {p: (e.state, e.attempts) for p, e in entries.items()} == {
            "2026-W10": ("done", 1), "2026-W11": ("done", 2)}
        other = Ledger(job.history, clock).claim("2026-W10")
        with pytest.raises(PeriodBusy) as busy:
            job.run("2026-W10")
        assert str(busy.value) == (f"period 2026-W10 of job hubs is being computed by {other.owner} "
                                   "until 2026-03-16T06:10:00Z; not started (if that process has stopped, "
                                   "run again after that time)")
        assert busy.value.exit_code == 3
        assert json.loads(lines[0])["job"] == "hubs"
        assert Ledger(job.history, clock).holder(RELAY_RESOURCE) is None  # delivery gave its lease back
