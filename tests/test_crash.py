"""Crashes and races between real processes.

* A child process computing a period is killed with SIGKILL at several points (while
  reading the source, inside the store transaction, after the commit but before any
  delivery, after writing the alert log but before marking it sent); running the
  period again leaves the history and the alert log exactly as one clean run does
  (plus the operational event that reports the takeover of the dead run's lease).
* Two processes started on one period at once: one computes, the other says so in one
  line and exits 0; no event or alert line is doubled.

Children are forked from the test process (``multiprocessing`` fork context), so they
are separate processes with their own pids, connections and file locks, without
paying the interpreter start-up again.
"""

from __future__ import annotations

import io
import json
import multiprocessing
import os
import signal
import sqlite3
import sys
import time
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

from monitor import runner, source
from monitor.delivery.sinks import log as alerts
from monitor.store import history
from monitor.cli import main

ctx = multiprocessing.get_context("fork")


def _project(root: Path) -> Path:
    rng = np.random.default_rng(21)
    con = sqlite3.connect(root / "src.sqlite")
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    rows = []
    for monday, shift in ((datetime(2026, 3, 2), 0.0), (datetime(2026, 3, 9), 6.0)):
        for hub in "ABC":
            for _ in range(25):
                ts = monday + timedelta(minutes=int(rng.integers(0, 7 * 24 * 60)))
                mean = 20 + (shift if hub == "C" else 0)
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, float(rng.normal(mean, 2))))
    rows.append(("2026-03-10 08:00:00", None, 20.0))  # a row without a hub: a data_quality event
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
        "  segment_column: hub\nperiod: week\ntimezone: Europe/Berlin\n"
        "metrics:\n  - column: dwell\n    test: kruskal\n"
        "history: {url: 'sqlite:///state/h.sqlite'}\nalerts:\n  - type: log\n    path: logs/alerts.jsonl\n")
    return cfg


def _quiet_main(argv: list[str], err_path: Path | None = None) -> int:
    """``main`` in a forked child, with its output kept out of the parent's capture."""
    sys.stdout = io.StringIO()
    sys.stderr = open(err_path, "w") if err_path else io.StringIO()  # noqa: SIM115
    try:
        return main(argv)
    finally:
        sys.stderr.flush()


def _snapshot(root: Path) -> dict:
    """Everything a clean run leaves, minus clocks and attempt counters of the ledger."""
    eng = sa.create_engine(f"sqlite:///{root / 'state' / 'h.sqlite'}")
    with eng.connect() as c:
        def rows(sql):
            return sorted(tuple(r) for r in c.execute(sa.text(sql)))
        snap = {
            "runs": rows("SELECT job, period, period_start, period_end, fingerprint, rows, null_segment_rows, "
                         "segments FROM sw_runs"),
            "metrics": rows("SELECT * FROM sw_metric_results"),
            "segments": rows("SELECT * FROM sw_segment_results"),
            "pairs": rows("SELECT * FROM sw_pair_results"),
            "events": rows("SELECT event_key, job, period, kind, metric, segment, message, detail FROM sw_events "
                           "WHERE kind NOT LIKE 'op%'"),
            "outbox": [(k, ch.replace(str(root), "<root>"), *rest) for k, ch, *rest in rows(
                "SELECT o.event_key, o.channel, o.status, o.attempts, o.last_error FROM sw_outbox o "
                "JOIN sw_events e ON e.event_key = o.event_key WHERE e.kind NOT LIKE 'op%'")],
            "ledger": rows("SELECT job, period, state, last_error FROM sw_ledger"),
            "leases": rows("SELECT * FROM sw_leases"),
        }
        ops = rows("SELECT kind, period FROM sw_events WHERE kind LIKE 'op%'")
    eng.dispose()
    lines = [json.loads(x) for x in (root / "logs" / "alerts.jsonl").read_text().splitlines()]
    snap["log"] = [{k: v for k, v in x.items() if k != "detected_at"} for x in lines if not x["kind"].startswith("op_")]
    return snap, ops, lines


@pytest.fixture(scope="module")
def clean(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("clean")
    cfg = _project(root)
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 0
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    snap, ops, lines = _snapshot(root)
    assert ops == [] and len(lines) == len(snap["events"]) and snap["outbox"]
    assert any(e[3] == "emerged" for e in snap["events"] if e[2] == "2026-W11")
    return snap


def _die():
    os.kill(os.getpid(), signal.SIGKILL)


def _crash_child(cfg: str, point: str) -> None:
    if point == "fetch":  # lease held, period running, nothing stored
        source.Source.fetch = lambda self, period: _die()
    elif point == "store":  # inside the store transaction: results written but not committed
        history.History._reconcile_events = lambda self, *a, **k: _die()
    elif point == "before-relay":  # committed; nothing delivered; the delivery lease not taken
        runner.Job.deliver = lambda self, **k: _die()
    elif point == "mid-relay":  # the alert lines are on disk, the outbox does not know yet
        original = alerts.LogSink.send

        def send_then_die(self, job, period, events):
            original(self, job, period, events)
            _die()

        alerts.LogSink.send = send_then_die
    os._exit(_quiet_main(["run", cfg, "--period", "2026-W11"]))


@pytest.mark.parametrize("point, takeover", [
    ("fetch", "2026-W11"), ("store", "2026-W11"), ("before-relay", None), ("mid-relay", None)])
def test_sigkill_then_rerun_equals_one_clean_run(tmp_path, clean, point, takeover, capsys):
    cfg = _project(tmp_path)
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 0
    child = ctx.Process(target=_crash_child, args=(str(cfg), point))
    child.start()
    child.join(60)
    assert child.exitcode == -signal.SIGKILL
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    capsys.readouterr()
    snap, ops, lines = _snapshot(tmp_path)
    assert snap == clean
    if point == "before-relay":
        assert ops == []  # the period's lease was released with the commit: nothing to take over
    else:
        # the dead run's lease (the period's, or the delivery's) was taken over, and that is reported
        assert ops == [("op_lease_taken_over", takeover or "")]
        op_line = [x for x in lines if x["kind"] == "op_lease_taken_over"]
        assert len(op_line) == 1 and "its process is gone" in op_line[0]["message"]
        assert op_line[0]["period"] == takeover


def _racer(cfg: str, go, err_path: str) -> None:
    original = source.Source.fetch

    def slow_fetch(self, period):
        time.sleep(1.0)  # long enough that the other process claims while this one computes
        return original(self, period)

    source.Source.fetch = slow_fetch
    go.wait(30)
    os._exit(_quiet_main(["run", cfg, "--period", "2026-W11"], Path(err_path)))


def test_two_processes_on_one_period_compute_it_once(tmp_path, clean):
    cfg = _project(tmp_path)
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 0
    go = ctx.Event()
    errs = [tmp_path / f"err{i}.txt" for i in range(2)]
    procs = [ctx.Process(target=_racer, args=(str(cfg), go, str(e))) for e in errs]
    for p in procs:
        p.start()
    time.sleep(0.2)
    go.set()
    for p in procs:
        p.join(60)
    # the loser is skipped with its own exit code (3), so that a cron wrapper can tell it from success
    assert sorted(p.exitcode for p in procs) == [0, 3]
    texts = [e.read_text().strip() for e in errs]
    losers = [t for t in texts if "is being computed by" in t]
    assert len(losers) == 1 and len(losers[0].splitlines()) == 1
    assert losers[0].startswith("Skipped: period 2026-W11 of job hubs")
    assert "; not started (if that process has stopped, run again after that time)" in losers[0]
    snap, ops, lines = _snapshot(tmp_path)
    assert snap == clean and ops == []
    assert len({x["event_key"] for x in lines}) == len(lines)
