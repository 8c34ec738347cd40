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


# ------------------------------------------------------------------ items 6 and 7: a source that hangs or writes


def _pg_source(admin: sa.Engine, schema: str) -> None:
    """The parcels of :func:`_source_db` in a PostgreSQL schema, plus an ``audit`` table and a
    function ``wipe()`` that empties it (what a hostile or careless ``query:`` could call)."""
    rng = np.random.default_rng(5)
    with admin.connect() as c:
        c.execute(sa.text(f'SET search_path TO "{schema}"'))
        c.execute(sa.text("CREATE TABLE parcels (ts timestamptz, hub text, dwell double precision)"))
        c.execute(sa.text("CREATE TABLE audit (id int)"))
        c.execute(sa.text("INSERT INTO audit SELECT generate_series(1, 5)"))
        c.execute(sa.text("CREATE FUNCTION wipe() RETURNS int LANGUAGE plpgsql AS "
                          "$$ BEGIN DELETE FROM audit; RETURN 0; END $$"))
        rows = [{"ts": datetime(2026, 3, 9, 12, tzinfo=timezone.utc) + timedelta(hours=int(h)), "hub": hub,
                 "dwell": float(rng.normal(20, 2))} for hub in "ABC" for h in rng.integers(0, 120, 20)]
        c.execute(sa.text("INSERT INTO parcels VALUES (:ts, :hub, :dwell)"), rows)


def _pg_job(root: Path, schema: str, source: str, timeout: str = "") -> Path:
    url = f"postgresql+psycopg://postgres@127.0.0.1:5432/test?options=-csearch_path%3D{schema}"
    cfg = root / "job.yaml"
    cfg.write_text(
        f"job: hubs\nsource:\n  url: '{url}'\n{source}  time_column: ts\n  segment_column: hub\n{timeout}"
        "period: week\ntimezone: UTC\nmetrics:\n  - column: dwell\n    test: kruskal\n"
        "history: {url: 'sqlite:///state/h.sqlite'}\n")
    return cfg


def _ledger(root: Path) -> list[tuple]:
    con = sqlite3.connect(root / "state" / "h.sqlite")
    try:
        return con.execute("SELECT period, state, last_error FROM sw_ledger").fetchall()
    finally:
        con.close()


def test_a_query_blocked_by_another_sessions_lock_stops_at_source_timeout(tmp_path, pg_schema, capsys):
    from monitor.cli import main

    admin, schema = pg_schema
    _pg_source(admin, schema)
    cfg = _pg_job(tmp_path, schema, "  table: parcels\n", "  timeout: 1\n")
    locker_engine = sa.create_engine(PG)
    locker = locker_engine.connect()
    tx = locker.begin()
    locker.execute(sa.text(f'LOCK TABLE "{schema}".parcels IN ACCESS EXCLUSIVE MODE'))
    # a safety net, not the check: if no timeout stopped the query, the lock goes after 120 s and the run succeeds
    guard = threading.Timer(120, tx.rollback)
    guard.start()
    try:
        code = main(["run", str(cfg), "--period", "2026-W11"])
    finally:
        guard.cancel()
        if tx.is_active:
            tx.rollback()
        locker.close()
        locker_engine.dispose()
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    assert len(err) == 1 and err[0].startswith("Error: ") and "source.timeout" in err[0]
    assert "ran longer than 1 s" in err[0] and "statement_timeout" in err[0] and str(cfg) in err[0]
    ((period, state, error),) = _ledger(tmp_path)
    assert (period, state) == ("2026-W11", "failed") and "source.timeout" in error
    # once the lock is gone, the same period runs
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0


def test_a_query_source_calling_a_writing_function_fails_and_deletes_nothing(tmp_path, pg_schema, capsys):
    from monitor.cli import main

    admin, schema = pg_schema
    _pg_source(admin, schema)
    cfg = _pg_job(tmp_path, schema, "  query: SELECT o.*, wipe() AS w FROM parcels o\n")
    code = main(["run", str(cfg), "--period", "2026-W11"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1
    assert "tried to change the database" in err[0] and "read-only" in err[0]
    assert "cannot execute DELETE in a read-only transaction" in err[0]
    assert _rows(admin, schema, "SELECT count(*) FROM audit") == [(5,)]


def test_dollar_quotes_and_backslashes_cannot_hide_a_second_statement(tmp_path):
    from monitor.errors import ConfigError

    def load(query: str):
        cfg = tmp_path / "q.yaml"
        cfg.write_text("source:\n  url: sqlite:///x.sqlite\n  query: " + __import__("json").dumps(query) +
                       "\n  time_column: ts\n  segment_column: hub\nperiod: week\ntimezone: UTC\n"
                       "metrics:\n  - column: dwell\n")
        return load_config(cfg)

    for hidden in ("SELECT $$'$$ AS a; DELETE FROM audit; SELECT $$'$$ AS b",
                   "SELECT $t$'$t$ AS a; DELETE FROM audit; SELECT $t$'$t$ AS b",
                   "SELECT 'x\\'; DELETE FROM audit; SELECT ''' AS b"):
        with pytest.raises(ConfigError, match=r"source\.query: holds more than one statement"):
            load(hidden)
    # a ';' inside a dollar-quoted string, or a '$' inside a name, is one statement
    assert load("SELECT $$a;b$$ AS s, ts, hub, dwell FROM t").source.query.endswith("FROM t")
    assert load("SELECT a$b, ts FROM t;").source.query == "SELECT a$b, ts FROM t"


def test_source_timeout_is_read_as_seconds_or_an_iso_duration(tmp_path):
    from monitor.errors import ConfigError

    def timeout(text: str):
        cfg = tmp_path / "t.yaml"
        cfg.write_text("source:\n  url: sqlite:///x.sqlite\n  table: t\n  time_column: ts\n  segment_column: hub\n"
                       f"{text}period: week\ntimezone: UTC\nmetrics:\n  - column: dwell\n")
        return load_config(cfg).source.timeout

    assert timeout("") == 300.0
    assert timeout("  timeout: 2.5\n") == 2.5
    assert timeout("  timeout: PT15M\n") == 900.0
    assert timeout("  timeout: PT1H30S\n") == 3630.0
    with pytest.raises(ConfigError, match=r"t\.yaml: source\.timeout: is not a number of seconds or an ISO 8601 "
                                          r"duration \(given: '15 minutes'"):
        timeout("  timeout: 15 minutes\n")
    with pytest.raises(ConfigError, match=r"source\.timeout: is out of range \(given: 0;"):
        timeout("  timeout: 0\n")


def _sqlite_source(tmp_path: Path, timeout: float):
    from monitor.source import Source

    cfg = _config(tmp_path, f"sqlite:///{tmp_path / 'h.sqlite'}", "")
    text = cfg.read_text().replace("  segment_column: hub\n", f"  segment_column: hub\n  timeout: {timeout}\n")
    cfg.write_text(text)
    return Source(load_config(cfg))


def test_sqlite_source_sessions_are_read_only_and_bounded(tmp_path):
    from monitor.errors import SourceError

    source = _sqlite_source(tmp_path, 0.5)
    try:
        with source.engine.connect() as conn:
            with pytest.raises(SourceError, match="tried to change the database and SQLite refused it"):
                conn.execute(sa.text("DELETE FROM parcels"))
                conn.commit()
        with source.engine.connect() as conn:
            # a recursive query that would count to 10**10; stopped by the progress handler's deadline
            slow = ("WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c WHERE x < 10000000000) "
                    "SELECT count(*) FROM c")
            with pytest.raises(SourceError, match=r"source\.timeout: a source query ran longer than 0\.5 s and "
                                                  "SQLite stopped it"):
                conn.execute(sa.text(slow)).all()
            # the connection stays usable and a quick statement is not stopped by an old deadline
            assert conn.execute(sa.text("SELECT count(*) FROM parcels")).scalar() == 150
    finally:
        source.dispose()
    con = sqlite3.connect(tmp_path / "src.sqlite")
    assert con.execute("SELECT count(*) FROM parcels").fetchone() == (150,)
    con.close()


def test_duckdb_source_is_read_only_and_bounded(tmp_path):
    pytest.importorskip("duckdb_engine")
    import duckdb

    from monitor.engines import SourceSession, create_engine
    from monitor.errors import SourceError

    path = tmp_path / "src.duckdb"
    con = duckdb.connect(str(path))
    con.execute("CREATE TABLE parcels AS SELECT range AS id FROM range(10)")
    con.close()
    engine = create_engine(f"duckdb:///{path}", "source", read_only=True, session=SourceSession(0.5, "d.yaml"))
    try:
        with engine.connect() as conn:
            with pytest.raises(SourceError, match="tried to change the database and DuckDB refused it"):
                conn.execute(sa.text("DELETE FROM parcels"))
        with engine.connect() as conn:
            slow = "SELECT count(*) FROM range(100000000000) a WHERE md5(a.range::varchar) = 'x'"
            with pytest.raises(SourceError, match=r"source\.timeout: a source query ran longer than 0\.5 s and "
                                                  "DuckDB stopped it"):
                conn.execute(sa.text(slow)).all()
            conn.rollback()
            assert conn.execute(sa.text("SELECT count(*) FROM parcels")).scalar() == 10
    finally:
        engine.dispose()


def test_mariadb_source_sessions_are_read_only_and_bounded():
    pytest.importorskip("pymysql")
    from monitor.engines import SourceSession, create_engine
    from monitor.errors import SourceError

    admin = sa.create_engine("mysql+pymysql://root@127.0.0.1:3306/test")
    table = f"sw_fault_{uuid.uuid4().hex[:8]}"
    try:
        with admin.begin() as c:
            c.execute(sa.text(f"CREATE TABLE {table} (id int)"))
            c.execute(sa.text(f"INSERT INTO {table} VALUES (1), (2)"))
    except sa.exc.OperationalError as exc:
        pytest.skip(f"MariaDB not reachable at 127.0.0.1:3306: {' '.join(str(exc).split())[:120]}")
    engine = create_engine("mysql+pymysql://root@127.0.0.1:3306/test", "source",
                           session=SourceSession(0.5, "m.yaml"))
    try:
        with engine.connect() as conn:
            with pytest.raises(SourceError, match="tried to change the database and the MariaDB/MySQL server "
                                                  "refused it .*READ ONLY transaction"):
                conn.execute(sa.text(f"DELETE FROM {table}"))
        with engine.connect() as conn:
            flavour = conn.execute(sa.text("SELECT version()")).scalar()
            if "mariadb" in flavour.lower():
                slow = "SELECT sum(a.seq * b.seq) FROM seq_1_to_100000 a, seq_1_to_100000 b"
                with pytest.raises(SourceError, match=r"source\.timeout: .* MariaDB stopped it \(max_statement_time"):
                    conn.execute(sa.text(slow)).all()
    finally:
        engine.dispose()
        with admin.begin() as c:
            assert c.execute(sa.text(f"SELECT count(*) FROM {table}")).scalar() == 2
            c.execute(sa.text(f"DROP TABLE {table}"))
        admin.dispose()


# ------------------------------------------------------------------ low: config faults found at run time


def test_config_faults_found_at_run_time_leave_a_done_period_done(tmp_path, capsys):
    from monitor.cli import main

    cfg = _config(tmp_path, "sqlite:///state/h.sqlite")
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 0
    good = cfg.read_text()
    capsys.readouterr()
    cases = [
        (good.replace("column: dwell", "column: dwel"),
         f"Error: {cfg}: metrics[0].column: no column 'dwel' in the source (columns there: ts, hub, dwell)"),
        (good.replace("sqlite:///src.sqlite", "nosuchdb://u:pw@h/x"),
         f"Error: {cfg}: source.url: no SQLAlchemy dialect or driver for 'nosuchdb' (nosuchdb://u:***@h/x)"),
    ]
    for text, message in cases:
        cfg.write_text(text)
        for period in ("2026-W10", "2026-W11"):  # a done period and one never run
            assert main(["run", str(cfg), "--period", period]) == 2
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 1 and err[0].startswith(message), err
    con = sqlite3.connect(tmp_path / "state" / "h.sqlite")
    try:
        assert con.execute("SELECT period, state, attempts, last_error FROM sw_ledger").fetchall() == [
            ("2026-W10", "done", 1, None)]
        assert con.execute("SELECT count(*) FROM sw_leases").fetchone() == (0,)
        assert con.execute("SELECT count(*) FROM sw_events WHERE kind LIKE 'op%'").fetchone() == (0,)
    finally:
        con.close()


# ------------------------------------------------------------------ low: backfill far back and past the clock


def test_a_backfill_announces_a_stretch_without_rows_once_and_refuses_future_periods(tmp_path):
    import json

    from monitor.errors import PeriodError

    cfg = load_config(_config(tmp_path, "sqlite:///state/h.sqlite"))
    with Job(cfg, clock=FixedClock(datetime(2026, 3, 18, 12, tzinfo=timezone.utc))) as job:  # inside 2026-W12
        with pytest.raises(PeriodError, match=r"--to 2031-W01: that period of job hubs has not started yet"):
            job.backfill("2026-W10", "2031-W01")
        assert job.ledger.entries() == {}  # refused before anything ran
        reports = job.backfill("2024-W01", "2026-W11")
        assert [r.period.ident for r in reports if r.rows] == ["2026-W10", "2026-W11"]
        empty = [r.period.ident for r in reports if not r.rows]
        assert len(empty) == len(reports) - 2 and empty[0] == "2024-W01" and empty[-1] == "2026-W09"
        entries = job.ledger.entries()
        assert all(entries[p].state == "done" and entries[p].note for p in empty)
        ops = [e for e in job.history.events() if e["kind"].startswith("op_")]
    assert [(e["kind"], e["period"]) for e in ops] == [("op_period_empty", "2024-W01")]
    assert f"Periods 2024-W01 to 2026-W09 ({len(empty)} periods) were skipped" in ops[0]["message"]
    lines = [json.loads(x) for x in (tmp_path / "logs" / "alerts.jsonl").read_text().splitlines()]
    assert [x["kind"] for x in lines].count("op_period_empty") == 1


# ------------------------------------------------------------------ low: finite values near the top of double precision


def _huge_rows() -> list[dict]:
    rng = np.random.default_rng(1)
    return [{"ts": datetime(2026, 3, 9, tzinfo=timezone.utc) + timedelta(hours=i), "seg": s,
             "v": float(rng.uniform(1e300, 2e300))} for s in "ABC" for i in range(30)]


def _huge_job(root: Path, url: str, compute: str, test: str) -> Job:
    cfg = root / f"{compute}-{test}.yaml"
    cfg.write_text(f"job: big\nsource:\n  url: '{url}'\n  table: huge\n  time_column: ts\n  segment_column: seg\n"
                   f"period: week\ntimezone: UTC\ncompute: {compute}\nmetrics:\n  - column: v\n    test: {test}\n"
                   f"history: {{url: 'sqlite:///{root / 'h.sqlite'}'}}\n")
    return Job(load_config(cfg), clock=FixedClock(T0))


@pytest.mark.parametrize("engine", ["sqlite", "postgresql"])
def test_values_near_1e300_give_the_local_means_and_say_why_the_spread_is_missing(tmp_path, engine, request):
    import warnings

    rows = _huge_rows()
    if engine == "sqlite":
        con = sqlite3.connect(tmp_path / "src.sqlite")
        con.execute("CREATE TABLE huge (ts TEXT, seg TEXT, v REAL)")
        con.executemany("INSERT INTO huge VALUES (?, ?, ?)",
                        [(r["ts"].strftime("%Y-%m-%d %H:%M:%S"), r["seg"], r["v"]) for r in rows])
        con.commit()
        con.close()
        url = f"sqlite:///{tmp_path / 'src.sqlite'}"
    else:
        admin, schema = request.getfixturevalue("pg_schema")
        with admin.connect() as c:
            c.execute(sa.text(f'CREATE TABLE "{schema}".huge (ts timestamptz, seg text, v double precision)'))
            c.execute(sa.text(f'INSERT INTO "{schema}".huge VALUES (:ts, :seg, :v)'), rows)
        url = f"{PG}?options=-csearch_path%3D{schema}"
    # the means as numpy computes them from the same values (pairwise summation, to ~1e-16)
    expected = {s: float(np.mean([r["v"] for r in rows if r["seg"] == s])) for s in "ABC"}
    for compute in ("pushdown", "local"):
        for test in ("anova", "auto"):
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                with _huge_job(tmp_path, url, compute, test) as job:
                    doc = job.run("2026-W11", store=False).to_json()
            assert not [w for w in caught if "overflow" in str(w.message)], [str(w.message) for w in caught]
            (metric,) = doc["metrics"]
            means = {s["segment"]: s["mean"] for s in metric["segments"]}
            assert means == pytest.approx(expected, rel=1e-12), (compute, test)
            assert all(s["sd"] is None for s in metric["segments"])
            if metric["method"] == "kruskal":  # what auto may choose: ranks do not overflow
                assert metric["p_value"] is not None and 0 <= metric["p_value"] <= 1, (compute, test)
            else:
                assert "values too large for double precision" in (metric["note"] or ""), (compute, test, metric)


# ------------------------------------------------------------------ low: outbox rows under a channel's former name


def test_rows_stored_under_a_channels_former_name_are_delivered_and_the_name_loses_its_secret(tmp_path):
    import http.server
    import json
    import sys

    from monitor.delivery.relay import relay
    from monitor.delivery.sinks.command import CommandSink
    from monitor.delivery.sinks.webhook import WebhookSink
    from monitor.model import Event
    from monitor.periods import parse_period
    from monitor.store.history import History

    received: list[dict] = []

    class Hook(http.server.BaseHTTPRequestHandler):
        def do_POST(self):  # noqa: N802 - http.server's naming
            received.append(json.loads(self.rfile.read(int(self.headers["Content-Length"]))))
            self.send_response(200)
            self.end_headers()

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Hook)
    threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True).start()
    out = tmp_path / "cmd.jsonl"
    try:
        hook = WebhookSink(f"http://127.0.0.1:{server.server_address[1]}/hooks/s3cret?token=t0ps3cret")
        command = CommandSink([sys.executable, "-c",
                               f"import sys; open({str(out)!r}, 'a').write(sys.stdin.read() + '\\n')",
                               "--password=hunter2"])
        former = [hook.former_channels[0], command.former_channels[0]]
        assert all(name not in (hook.channel, command.channel) for name in former)
        history = History(f"sqlite:///{tmp_path / 'h.sqlite'}", "hubs")
        events = [Event("emerged", "dwell", None, "dwell now differs by hub", {}),
                  Event("segment_missing", None, "C", "hub C has no records", {})]
        # rows written by a version that named channels by their full URL and arguments
        history.store_period(parse_period("week", "2026-W11", "UTC"), [], events, former, computed_at=T0,
                             fingerprint="f", rows=9, null_segment_rows=0, segments=["A", "B", "C"])
        result = relay(history, [hook, command], FixedClock(T0))
        assert result.sent == 4 and result.retrying == 0 and result.dead == 0
        assert [len(r["events"]) for r in received] == [2]
        assert len(json.loads(out.read_text().splitlines()[0])["events"]) == 2
        with history.engine.connect() as c:
            channels = set(c.execute(sa.text("SELECT channel FROM sw_outbox")).scalars())
        assert channels == {hook.channel, command.channel}
        assert not any(s in ch for ch in channels for s in ("s3cret", "t0ps3cret", "hunter2"))
        assert relay(history, [hook, command], FixedClock(T0)).sent == 0  # nothing twice
        history.dispose()
    finally:
        server.shutdown()
        server.server_close()


def test_a_delivery_lease_left_by_an_outage_is_taken_back_by_the_next_delivery(tmp_path, monkeypatch):
    """SQLite history; the failure injected at the write call that releases the ``~relay`` lease."""
    import json

    from monitor.store.ledger import RELAY_RESOURCE

    cfg = load_config(_config(tmp_path, "sqlite:///state/h.sqlite"))
    clock = FixedClock(T0)
    with Job(cfg, clock=clock) as job:
        job.run("2026-W10")
        report = job.run("2026-W11", deliver=False)  # stored; its alerts wait in the outbox
        assert report.new_events > 0
        release, begin = job.ledger.release, job.history.begin

        def release_during_outage(claim):
            def unreachable():
                raise sa.exc.OperationalError("BEGIN IMMEDIATE", {}, Exception("disk I/O error"))

            monkeypatch.setattr(job.history, "begin", unreachable)
            try:
                release(claim)
            finally:
                monkeypatch.setattr(job.history, "begin", begin)

        monkeypatch.setattr(job.ledger, "release", release_during_outage)
        with pytest.raises(HistoryError, match=r"release the lease on ~relay"):
            job.deliver()
        monkeypatch.setattr(job.ledger, "release", release)
        assert job.ledger.holder(RELAY_RESOURCE) is not None  # left behind, not expired (same clock)
        with Job(cfg, clock=clock) as other:  # another process waits for it
            assert other.deliver().busy is not None
        again = job.deliver()  # this process takes its own lease back
        assert again.busy is None and job.ledger.holder(RELAY_RESOURCE) is None
    lines = [json.loads(x) for x in (tmp_path / "logs" / "alerts.jsonl").read_text().splitlines()]
    assert {x["period"] for x in lines} == {"2026-W11"} and len(lines) == report.new_events
    assert len(lines) == len({x["event_key"] for x in lines})  # nothing written twice
