"""Faults an operator meets: the history going away mid-run, a source that hangs or tries
to write, configs that break only at run time, and inputs at the edge of doubles.

Every scenario runs against real servers where the fault lives in a server
(PostgreSQL on 127.0.0.1:5432, MariaDB on 127.0.0.1:3306), or injects the failure at
the call that meets it. Time comes from an injected clock; nothing waits on the wall
clock to decide a test (a process or query is waited for with generous bounds and the
outcome is asserted, not the duration).
"""

from __future__ import annotations

import socket
import sqlite3
import threading
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

from monitor import scheduler
from monitor.clock import FixedClock
from monitor.config import load_config
from monitor.errors import HistoryError
from monitor.runner import Job
from monitor.store.ledger import Ledger

PG = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
#: Monday 2026-03-23 06:00 UTC: weeks 10 to 12 of 2026 are over.
T0 = datetime(2026, 3, 23, 6, 0, tzinfo=timezone.utc)


# ------------------------------------------------------------------ helpers


def _pg_admin() -> sa.Engine:
    eng = sa.create_engine(PG, isolation_level="AUTOCOMMIT")
    try:
        with eng.connect() as c:
            c.execute(sa.text("SELECT 1"))
    except sa.exc.OperationalError as exc:
        pytest.skip(f"PostgreSQL not reachable at 127.0.0.1:5432: {' '.join(str(exc).split())[:120]}")
    return eng


@pytest.fixture()
def pg_schema():
    """A throw-away PostgreSQL schema; yields (admin engine, schema name)."""
    admin = _pg_admin()
    schema = f"sw_fault_{uuid.uuid4().hex[:10]}"
    with admin.connect() as c:
        c.execute(sa.text(f'CREATE SCHEMA "{schema}"'))
    try:
        yield admin, schema
    finally:
        with admin.connect() as c:
            c.execute(sa.text(f'DROP SCHEMA "{schema}" CASCADE'))
        admin.dispose()


class Proxy:
    """A TCP relay from a local port to a server that can be cut (every connection closed,
    new ones closed at once) and restored: an outage of the server as its clients see it."""

    def __init__(self, port: int):
        self.target = ("127.0.0.1", port)
        self.sock = socket.create_server(("127.0.0.1", 0))
        self.port = self.sock.getsockname()[1]
        self.up = True
        self._conns: list[socket.socket] = []
        self._lock = threading.Lock()
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self.sock.accept()
            except OSError:
                return
            if not self.up:
                client.close()
                continue
            server = socket.create_connection(self.target)
            with self._lock:
                self._conns += [client, server]
            for a, b in ((client, server), (server, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(a: socket.socket, b: socket.socket) -> None:
        try:
            while data := a.recv(65536):
                b.sendall(data)
        except OSError:
            pass
        finally:
            for s in (a, b):
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass

    def cut(self) -> None:
        self.up = False
        with self._lock:
            for s in self._conns:
                try:
                    s.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass
                s.close()
            self._conns.clear()

    def restore(self) -> None:
        self.up = True

    def close(self) -> None:
        self.cut()
        self.sock.close()


def _source_db(path: Path) -> None:
    """Parcels of three hubs in ISO weeks 10 and 11 of 2026; hub C dwells longer in week 11."""
    rng = np.random.default_rng(21)
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE parcels (ts TEXT, hub TEXT, dwell REAL)")
    rows = []
    for monday, shift in ((datetime(2026, 3, 2), 0.0), (datetime(2026, 3, 9), 6.0)):
        for hub in "ABC":
            for _ in range(25):
                ts = monday + timedelta(minutes=int(rng.integers(0, 7 * 24 * 60)))
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, float(rng.normal(20 + (shift if hub == "C" else 0), 2))))
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()


def _config(root: Path, history_url: str, extra: str = "") -> Path:
    _source_db(root / "src.sqlite")
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
        "  segment_column: hub\nperiod: week\ntimezone: Europe/Berlin\n"
        "metrics:\n  - column: dwell\n    test: kruskal\n"
        f"history: {{url: '{history_url}'}}\nalerts:\n  - type: log\n    path: logs/alerts.jsonl\n{extra}")
    return cfg


def _rows(admin: sa.Engine, schema: str, sql: str) -> list[tuple]:
    with admin.connect() as c:
        c.execute(sa.text(f'SET search_path TO "{schema}"'))
        return [tuple(r) for r in c.execute(sa.text(sql))]


# ------------------------------------------------------------------ item 5: an outage of the history


def test_a_history_outage_mid_run_is_recorded_afterwards_and_the_lease_is_not_waited_for(tmp_path, pg_schema):
    admin, schema = pg_schema
    proxy = Proxy(5432)
    try:
        url = f"postgresql+psycopg://postgres@127.0.0.1:{proxy.port}/test?options=-csearch_path%3D{schema}"
        clock = FixedClock(T0)
        job = Job(load_config(_config(tmp_path, url)), clock=clock)
        assert job.run("2026-W10").new_events == 0
        fetch = job.source.fetch

        def fetch_then_cut(period):
            data = fetch(period)
            proxy.cut()  # the history goes away while the period is computed
            return data

        job.source.fetch = fetch_then_cut
        with pytest.raises((HistoryError, sa.exc.OperationalError)):
            job.run("2026-W11")
        # nothing could be written: the lease is still there, the period still running
        assert _rows(admin, schema, "SELECT resource FROM sw_leases") == [("2026-W11",)]
        assert _rows(admin, schema, "SELECT period, state FROM sw_ledger ORDER BY period") == [
            ("2026-W10", "done"), ("2026-W11", "running")]
        assert job.ledger.owed == 1

        # a scheduled tick while the history is still away: no exception, nothing started
        report = scheduler.tick(job, T0 + timedelta(minutes=1))
        assert report.failed is not None and report.computed == ()

        proxy.restore()
        job.source.fetch = fetch
        clock.set(T0 + timedelta(minutes=2))  # well inside the 600-s lease
        report = job.run("2026-W11")  # not PeriodBusy: the lease was ours, the failure is recorded first
        assert report.new_events > 0
        assert job.ledger.owed == 0
        assert _rows(admin, schema, "SELECT resource FROM sw_leases") == []
        assert _rows(admin, schema, "SELECT period, state, attempts FROM sw_ledger ORDER BY period") == [
            ("2026-W10", "done", 1), ("2026-W11", "done", 2)]
        ops = _rows(admin, schema, "SELECT kind, period, message, detected_at FROM sw_events "
                                   "WHERE kind LIKE 'op%' ORDER BY detected_at")
        kinds = [(k, p) for k, p, _, _ in ops]
        assert kinds == [("op_run_failed", "2026-W11"), ("op_run_failed", "")]
        # the failure keeps the time it happened; the outage record spans the ticks that could not start
        assert ops[0][3] == T0.replace(tzinfo=None) and "server closed the connection" in ops[0][2]
        assert "\n" not in ops[0][2]
        assert "could not be reached" in ops[1][2] and "1 scheduled run could not start" in ops[1][2]
        assert not any(k == "op_lease_taken_over" for k, _ in kinds)
    finally:
        proxy.close()


def test_a_lease_whose_release_failed_is_taken_back_by_its_own_process(tmp_path, monkeypatch):
    """SQLite history; the failure injected at the write call of the release."""
    from monitor.store.history import History

    clock = FixedClock(T0)
    history = History(f"sqlite:///{tmp_path / 'h.sqlite'}", "hubs")
    ledger = Ledger(history, clock)
    first = ledger.claim("2026-W11")
    assert first.won
    begin = history.begin

    def unreachable():
        raise sa.exc.OperationalError("COMMIT", {}, Exception("disk I/O error"))

    monkeypatch.setattr(history, "begin", unreachable)
    with pytest.raises(HistoryError, match="release the lease on 2026-W11"):
        ledger.release(first)
    monkeypatch.setattr(history, "begin", begin)
    again = ledger.claim("2026-W11")  # same clock: the lease has not expired
    assert again.won and again.owner != first.owner and again.takeover_reason is None
    # another process (another ledger) still sees it held
    other = Ledger(history, clock).claim("2026-W11")
    assert not other.won and other.owner == again.owner
    assert [e["kind"] for e in history.events()] == []
