"""segwatch on Spark SQL, live: a Thrift server (HiveThriftServer2) reached with ``hive://``.

The same generated parcel-depot table is loaded into Spark (TIMESTAMP, TIMESTAMP_NTZ,
DATE, DECIMAL(15,6), BIGINT, DOUBLE columns with NULLs, infinities and a NaN) and into
SQLite; segwatch's SQLite path, itself checked against scipy and NIST StRD in
``test_source_pushdown.py`` / ``test_engines.py``, is the reference here. For each time
column type and for ``compute: pushdown`` (full values and a seeded sample) and
``compute: local``, the comparison must agree with SQLite's: statistic and p to 1e-9
relative, per-segment n and the data-quality counts exactly, the sample row for row.
The job's zone is America/New_York (a DST change inside the week), and the Spark session
segwatch connects to starts in another zone (Asia/Kolkata here; the cluster server's
default zone is America/New_York): Spark's TIMESTAMP is an instant, TIMESTAMP_NTZ wall
clock time, and neither may move with the session's zone. One test runs on a
standalone master and worker (the aggregate runs in an executor), twice, with the same
results.

The server: ``SEGWATCH_TEST_SPARK`` (a ``hive://host:port`` URL) and
``SEGWATCH_TEST_SPARK_CLUSTER`` name running ones; else ``SEGWATCH_TEST_SPARK_DIR``
names the folder where ``.ci/spark.sh`` started them (what ``.ci/run`` does); else the
fixtures start them with ``.ci/spark.sh`` in a temporary folder and stop them at the end
of the session (also when a test fails). They skip with the reason when Spark cannot
start (no Java, no pyspark/pyhive), except under ``SEGWATCH_REQUIRE_SPARK=1`` (CI), where
that is a failure.
"""

from __future__ import annotations

import json
import logging
import math
import os
import shutil
import sqlite3
import subprocess
import sys
import urllib.request
import uuid
from dataclasses import replace
from datetime import date, datetime, timedelta, timezone
from decimal import Decimal
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

from monitor.analysis import analyse_period
from monitor.cli import main
from monitor.config import parse_config
from monitor.periods import parse_period
from monitor.source import Source

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / ".ci" / "spark.sh"
REQUIRED = os.environ.get("SEGWATCH_REQUIRE_SPARK") == "1"

START = datetime(2026, 3, 1)  # rows from Sunday 1 March to Tuesday 10 March 2026, UTC
SEGMENTS = ("north", "south", "east", "west")
ZONE = "America/New_York"  # the job's zone: the week ends after the DST change of 8 March
PERIOD = parse_period("week", "2026-W10", ZONE)
REL = 1e-9  # the tolerance on F and p
SESSION_ZONE = "Asia/Kolkata"  # a session zone that is not UTC (+05:30, no DST)


# ---------------------------------------------------------------- servers


def _unavailable(reason: str):
    if REQUIRED:
        pytest.fail(f"Spark is required here (SEGWATCH_REQUIRE_SPARK=1) but {reason}")
    pytest.skip(reason)


def _answers(url: str) -> str | None:
    """None when the server at ``url`` answers a query, else why not (one line)."""
    try:
        engine = sa.create_engine(url, poolclass=sa.pool.NullPool)
        with engine.connect() as conn:
            conn.exec_driver_sql("SELECT 1").all()
        engine.dispose()
        return None
    except Exception as exc:  # noqa: BLE001 - any failure: report it
        return str(exc).splitlines()[0][:300] if str(exc) else type(exc).__name__


def _script(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHON": sys.executable}
    if args[0] == "start-cluster":
        env.setdefault("SPARK_CLUSTER_ZONE", "America/New_York")
    return subprocess.run(["bash", str(SCRIPT), *args], capture_output=True, text=True, env=env)


def _server(kind: str, env_url: str, tmp_path_factory):
    """Yield the ``hive://`` base URL of a running Thrift server of ``kind`` (local or cluster)."""
    url = os.environ.get(env_url)
    if url:
        why = _answers(url)
        if why:
            _unavailable(f"{env_url}={url} does not answer: {why}")
        yield url.rstrip("/"), None
        return
    for module in ("pyhive", "thrift", "thrift_sasl", "puresasl", "pyspark"):
        try:
            __import__(module)
        except ImportError:
            _unavailable(f"{module} is not installed (pip install pyspark pyhive thrift thrift-sasl pure-sasl)")
    state = os.environ.get("SEGWATCH_TEST_SPARK_DIR")
    started = None
    if state and (Path(state) / f"{kind}.pid").exists():
        proc = _script("wait", state, kind)  # started by .ci/run before pytest
        if proc.returncode:
            _unavailable(f"the {kind} Spark server in {state} did not start: {proc.stderr.strip()[:500]}")
        folder = Path(state)
    else:
        if not (shutil.which("java") or os.environ.get("JAVA_HOME")):
            _unavailable("no Java runtime for Spark (install Java 17 or 21)")
        folder = tmp_path_factory.mktemp(f"spark_{kind}")
        proc = _script("start" if kind == "local" else "start-cluster", str(folder))
        if proc.returncode:
            _unavailable(f"the {kind} Spark server did not start: {proc.stderr.strip()[-500:]}")
        started = folder
    try:
        port = int((folder / f"{kind}.port").read_text())
        yield f"hive://segwatch@127.0.0.1:{port}", folder
    finally:
        if started is not None:
            _script("stop", str(started))


@pytest.fixture(scope="session")
def spark_local(tmp_path_factory):
    yield from _server("local", "SEGWATCH_TEST_SPARK", tmp_path_factory)


@pytest.fixture(scope="session")
def spark_cluster(tmp_path_factory):
    yield from _server("cluster", "SEGWATCH_TEST_SPARK_CLUSTER", tmp_path_factory)


class SparkDB:
    """A throw-away Spark database (schema) on one server, dropped afterwards."""

    def __init__(self, base: str):
        self.base = base
        self.name = f"sw_{uuid.uuid4().hex[:10]}"
        self.admin = sa.create_engine(f"{base}/default", poolclass=sa.pool.NullPool)
        self.run("SET spark.sql.session.timeZone=UTC", f"CREATE DATABASE {self.name}")

    @property
    def url(self) -> str:
        return f"{self.base}/{self.name}"

    def run(self, *statements: str) -> list:
        out = []
        with self.admin.connect() as conn:
            conn.exec_driver_sql("SET spark.sql.session.timeZone=UTC")  # the literals below are UTC
            for sql in statements:
                result = conn.exec_driver_sql(sql)
                out.append(result.all() if result.returns_rows else None)
        return out

    def drop(self) -> None:
        self.run(f"DROP DATABASE IF EXISTS {self.name} CASCADE")
        self.admin.dispose()


@pytest.fixture(scope="module")
def spark_db(spark_local):
    db = SparkDB(spark_local[0])
    yield db
    db.drop()


# ---------------------------------------------------------------- data

COLUMNS = {  # name: Spark type
    "id": "BIGINT", "ts": "TIMESTAMP", "tn": "TIMESTAMP_NTZ", "d": "DATE", "seg": "STRING",
    "x": "DOUBLE", "big": "DOUBLE", "pos": "DOUBLE", "amount": "DECIMAL(15,6)", "cnt": "BIGINT",
}


def depot_rows(seed: int = 20261202) -> list[dict]:
    """4 depots, 30-66 parcels each over ten days around the week, with every kind of bad value."""
    rng = np.random.default_rng(seed)
    rows = []
    for s_idx, seg in enumerate(SEGMENTS):
        for _ in range(30 + 12 * s_idx):
            t = START + timedelta(seconds=int(rng.integers(0, 9 * 86400)))
            rows.append({
                "id": len(rows) + 1, "ts": t, "tn": t, "d": t.date(), "seg": seg,
                "x": float(rng.normal(10 + s_idx, 2 + s_idx / 2)),
                "big": 1e9 + float(rng.normal(0, 1e-3 * (1 + s_idx))),
                "pos": float(rng.gamma(2.0, 3.0)) - 0.5,
                "amount": Decimal(f"{rng.normal(500 + 5 * s_idx, 50):.6f}"),
                "cnt": int(rng.poisson(4 + s_idx)),
            })
    # bad values on rows inside the week (rows sorted by time, the week's middle)
    inside = sorted((r for r in rows if datetime(2026, 3, 3) <= r["ts"] < datetime(2026, 3, 7)),
                    key=lambda r: r["id"])
    inside[0]["x"] = None
    inside[1]["x"] = -3.0  # out of domain under log
    inside[2]["x"] = 0.0  # out of domain under log
    inside[3]["x"] = float("inf")
    inside[4]["big"] = float("-inf")
    inside[5]["pos"] = -1.0  # out of domain under log1p
    inside[6]["pos"] = float("nan")  # SQLite stores NaN as NULL (see _sqlite_counts)
    inside[7]["amount"] = None
    inside[8]["cnt"] = None
    inside[9]["seg"] = None
    rows.append({**inside[10], "id": len(rows) + 1, "ts": None, "tn": None, "d": None})
    return rows


def _literal(column: str, v) -> str:
    if v is None:
        return "NULL"
    kind = COLUMNS[column]
    if kind == "DOUBLE":
        text = {math.inf: "Infinity", -math.inf: "-Infinity"}.get(v, "NaN" if v != v else repr(v))
        return f"CAST('{text}' AS DOUBLE)"
    if kind.startswith("DECIMAL"):
        return f"CAST('{v}' AS {kind})"
    if kind in ("TIMESTAMP", "TIMESTAMP_NTZ"):
        return f"{kind} '{v:%Y-%m-%d %H:%M:%S}'"
    if kind == "DATE":
        return f"DATE '{v:%Y-%m-%d}'"
    if kind == "STRING":
        return "'" + v.replace("'", "''") + "'"
    return str(int(v))


def load_spark(db: SparkDB, rows: list[dict], *, files: int = 1) -> str:
    """A parquet table of ``rows`` in ``files`` INSERTs (one file each at least)."""
    name = f"parcels_{uuid.uuid4().hex[:8]}"
    cols = ", ".join(f"{c} {t}" for c, t in COLUMNS.items())
    statements = [f"CREATE TABLE {db.name}.{name} ({cols}) USING parquet"]
    for part in np.array_split(np.arange(len(rows)), files):
        values = ", ".join("(" + ", ".join(_literal(c, rows[i][c]) for c in COLUMNS) + ")" for i in part)
        statements.append(f"INSERT INTO {db.name}.{name} VALUES {values}")
    db.run(*statements)
    return name


def load_sqlite(path: Path, rows: list[dict]) -> None:
    """The same rows in SQLite, time values as ISO text, with no primary key (like the
    Spark table, so both sample by the time and segment text)."""
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE parcels (id INTEGER, ts TEXT, tn TEXT, d TEXT, seg TEXT, x REAL, big REAL, "
                "pos REAL, amount NUMERIC, cnt INTEGER)")

    def cell(c, v):
        if isinstance(v, Decimal):
            return float(v)
        if isinstance(v, datetime):
            return f"{v:%Y-%m-%d %H:%M:%S}"
        if isinstance(v, date):
            return f"{v:%Y-%m-%d}"
        return v

    con.executemany(f"INSERT INTO parcels VALUES ({', '.join('?' for _ in COLUMNS)})",
                    [tuple(cell(c, r[c]) for c in COLUMNS) for r in rows])
    con.commit()
    con.close()


METRICS = [
    {"column": "x", "test": "anova"},
    {"name": "x_log", "column": "x", "transform": "log", "test": "welch"},
    {"column": "big", "test": "anova"},
    {"column": "pos", "transform": "log1p", "test": "welch"},
    {"column": "amount", "test": "anova"},
    {"column": "cnt", "test": "kruskal"},
]
#: No transform: the direct aggregate form is tried first (and falls back on the infinities).
PLAIN_METRICS = [m for m in METRICS if "transform" not in m]
#: time column -> how naive times are read (TIMESTAMP is an instant in Spark; SQLite holds UTC text)
TIME_COLUMNS = {"ts": "utc", "tn": "local", "d": "local"}


def job(url: str, table: str, folder: Path, time_column: str, *, metrics=None, **extra):
    data = {
        "job": "depots",
        "source": {"url": url, "table": table, "time_column": time_column, "segment_column": "seg",
                   "naive_time": TIME_COLUMNS[time_column]},
        "period": "week",
        "timezone": ZONE,
        "metrics": metrics or METRICS,
        "history": {"url": f"sqlite:///{folder / 'history.sqlite'}"},
        **extra,
    }
    return parse_config(data, folder / "depots.yaml", environ={})


def fetch(cfg, *, session_zone: str | None = SESSION_ZONE, engine_events=None):
    """One period through segwatch. ``session_zone``: what the Spark session is set to
    before segwatch's own connect hook runs (as a server whose default zone it is)."""
    src = Source(cfg)
    if session_zone and src.engine.dialect.name == "hive":
        sa.event.listen(src.engine, "connect",
                        lambda dbapi, rec: _set_zone(dbapi, session_zone), insert=True)
    for name, fn in (engine_events or {}).items():
        sa.event.listen(src.engine, name, fn)
    try:
        return src.fetch(PERIOD)
    finally:
        src.dispose()


def _set_zone(dbapi_conn, zone: str) -> None:
    cur = dbapi_conn.cursor()
    cur.execute(f"SET spark.sql.session.timeZone={zone}")
    cur.fetchall()
    cur.close()


def _sqlite_counts(q, column: str, reference: str):
    """SQLite's counts as Spark sees the same rows: SQLite cannot store NaN (it becomes
    NULL), Spark counts it as non-finite."""
    if column == "pos" and reference == "sqlite":
        return replace(q, null=q.null - 1, non_finite=q.non_finite + 1)
    return q


def assert_same(spark, ref, cfg, ref_engine: str = "sqlite") -> None:
    """Same rows, segments, counts and n; statistic and p to 1e-9; same values when sampled."""
    assert (spark.rows, spark.null_segment_rows, spark.segments) == (ref.rows, ref.null_segment_rows,
                                                                    ref.segments)
    assert spark.sampled == ref.sampled
    for ms, mr in zip(spark.metrics, ref.metrics, strict=True):
        name = ms.metric.name
        assert ms.quality == _sqlite_counts(mr.quality, ms.metric.column, ref_engine), name
        assert [s.moments.n for s in ms.segments] == [s.moments.n for s in mr.segments], name
        assert ms.sample_size == mr.sample_size, name
        for ss, sr in zip(ms.segments, mr.segments):
            a, b = ss.moments, sr.moments  # F is blind to a shift common to all segments: check the means
            scale = max(abs(float(b.mean)), float(b.sd) if b.n > 1 else 0.0)
            assert abs(float(a.mean) - float(b.mean)) <= REL * scale, (name, ss.segment, a.mean, b.mean)
            assert float(a.m2) == pytest.approx(float(b.m2), rel=REL), (name, ss.segment)
            # the same rows: identical values (sampled or all), up to order
            assert np.allclose(np.sort(ss.values), np.sort(sr.values), rtol=1e-12, atol=0), (name, ss.segment)
    for a, b in zip(analyse_period(spark.metrics, cfg), analyse_period(ref.metrics, cfg), strict=True):
        assert a.method == b.method, a.metric
        assert math.isfinite(a.statistic) and math.isfinite(a.p_value), a.metric
        assert a.statistic == pytest.approx(b.statistic, rel=REL), a.metric
        assert a.p_value == pytest.approx(b.p_value, rel=REL), a.metric


@pytest.fixture(scope="module")
def tables(spark_db, tmp_path_factory):
    """The depot table in Spark and in SQLite: (spark table, sqlite URL, the rows)."""
    rows = depot_rows()
    name = load_spark(spark_db, rows)
    path = tmp_path_factory.mktemp("sqlite_ref") / "depots.sqlite"
    load_sqlite(path, rows)
    return name, f"sqlite:///{path}", rows


# ---------------------------------------------------------------- parity with SQLite


@pytest.mark.parametrize("time_column", list(TIME_COLUMNS))
@pytest.mark.parametrize("mode", ["pushdown-full", "pushdown-sample", "local"])
def test_every_mode_matches_sqlite(spark_db, tables, tmp_path, time_column, mode):
    """TIMESTAMP (an instant), TIMESTAMP_NTZ (wall clock) and DATE windows, in a session
    whose zone is not UTC: the same period as SQLite's, the same numbers."""
    table, sqlite_url, _ = tables
    compute, _, sampling = mode.partition("-")
    extra = {"compute": compute, "sampling": {"mode": sampling or "full", "cap": 12, "seed": 7}}
    cfg = job(spark_db.url, table, tmp_path, time_column, **extra)
    ref_cfg = job(sqlite_url, "parcels", tmp_path, time_column, **extra)
    spark, ref = fetch(cfg), fetch(ref_cfg)
    assert spark.compute == ref.compute == compute
    assert spark.sampled is (sampling == "sample")
    assert 100 < spark.rows < len(tables[2])  # the window cut some rows off
    assert_same(spark, ref, cfg)


def test_decimal_is_summed_exactly_and_the_direct_form_serves(spark_db, tables, tmp_path, caplog):
    """DECIMAL is pushed down in Spark's decimal arithmetic (no fallback to reading the rows);
    without transforms the direct form is sent first and, finding the infinities, the
    row-by-row form; the results are SQLite's."""
    table, sqlite_url, _ = tables
    cfg = job(spark_db.url, table, tmp_path, "ts", metrics=PLAIN_METRICS, sampling={"mode": "full"})
    sent: list[str] = []

    def seen(conn, cursor, statement, *args):
        if "GROUP BY" in statement.upper() and "SUM(" in statement.upper():
            sent.append("row-by-row" if "segwatch_rows" in statement else "direct")

    with caplog.at_level(logging.WARNING):
        spark = fetch(cfg, engine_events={"before_cursor_execute": seen})
    assert not [r for r in caplog.records if "computing locally" in r.getMessage()]
    assert spark.compute == "pushdown"
    amount = next(m for m in spark.metrics if m.metric.name == "amount")
    assert all(s.moments.is_exact for s in amount.segments)
    assert sent[:2] == ["direct", "row-by-row"]
    ref = fetch(job(sqlite_url, "parcels", tmp_path, "ts", metrics=PLAIN_METRICS, sampling={"mode": "full"}))
    assert_same(spark, ref, cfg)
    # reference for the exact sums: Python's Decimal over the same rows (per segment, all usable)
    rows = [r for r in tables[2] if r["ts"] is not None and r["seg"] is not None and r["amount"] is not None
            and PERIOD.start <= r["ts"].replace(tzinfo=timezone.utc) < PERIOD.end]
    for s in amount.segments:
        values = [r["amount"] for r in rows if r["seg"] == s.segment]
        exact_mean = sum(values) / len(values)
        assert s.moments.n == len(values)
        assert isinstance(s.moments.mean, Decimal) and abs(s.moments.mean - exact_mean) <= abs(exact_mean) * Decimal("1e-25")


def test_the_session_zone_moves_nothing(spark_db, tables, tmp_path):
    """Sessions starting in UTC, Asia/Kolkata and America/New_York give the same period,
    sample and numbers (segwatch sets UTC on connect and binds instants)."""
    table, _, _ = tables
    cfg = job(spark_db.url, table, tmp_path, "ts", sampling={"mode": "sample", "cap": 12, "seed": 3})
    results = [fetch(cfg, session_zone=z) for z in ("UTC", SESSION_ZONE, "America/New_York")]
    for other in results[1:]:
        assert_same(other, results[0], cfg, ref_engine="spark")


# ---------------------------------------------------------------- errors and check


def _write(folder: Path, cfg: dict) -> Path:
    path = folder / "depots.yaml"
    path.write_text(json.dumps(cfg), encoding="utf-8")  # JSON is YAML
    return path


def _config_dict(url: str, table: str, folder: Path, **source) -> dict:
    return {
        "job": "depots",
        "source": {"url": url, "table": table, "time_column": "ts", "segment_column": "seg", **source},
        "period": "week", "timezone": ZONE,
        "metrics": [{"column": "x"}, {"column": "amount"}],
        "history": {"url": f"sqlite:///{folder / 'history.sqlite'}"},
    }


@pytest.mark.parametrize("command", ["check", "run"])
def test_a_missing_table_is_exit_2_with_the_tables_there(spark_db, tables, tmp_path, capsys, command):
    path = _write(tmp_path, _config_dict(spark_db.url, "no_such_parcels", tmp_path))
    argv = [command, str(path)] + (["--period", "2026-W10"] if command == "run" else [])
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and len(err) < 400, err[:600]
    assert "no_such_parcels" in err and tables[0] in err  # the table asked for, and what is there


def test_a_missing_column_is_exit_2_with_the_columns_there(spark_db, tables, tmp_path, capsys):
    cfg = _config_dict(spark_db.url, tables[0], tmp_path)
    cfg["metrics"].append({"column": "weight_kg"})
    assert main(["check", str(_write(tmp_path, cfg))]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "weight_kg" in err and "amount" in err and "tn" in err, err


def test_a_failing_query_is_one_short_line(spark_db, tables, tmp_path, capsys):
    """A driver message (Spark sends its Java stack) is cut to one readable line."""
    cfg = _config_dict(spark_db.url, "x", tmp_path)
    cfg["source"] = {k: v for k, v in cfg["source"].items() if k != "table"}
    cfg["source"]["query"] = f"SELECT * FROM {spark_db.name}.{tables[0]} WHERE no_function_like_this(x) > 0"
    assert main(["run", str(_write(tmp_path, cfg)), "--period", "2026-W10"]) in (1, 2)
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and len(err) < 700, err[:900]
    assert "no_function_like_this" in err or "UNRESOLVED_ROUTINE" in err, err


def test_check_runs_a_window_query_and_shows_the_server_version(spark_db, tables, tmp_path, capsys):
    path = _write(tmp_path, _config_dict(spark_db.url, tables[0], tmp_path))
    seen: list[str] = []
    real = Source.describe

    def spy(self):  # record the SQL sent while check describes the source
        sa.event.listen(self.engine, "before_cursor_execute",
                        lambda conn, cursor, statement, *a: seen.append(statement))
        return real(self)

    Source.describe = spy
    try:
        assert main(["check", str(path), "--period", "2026-W10"]) == 0
    finally:
        Source.describe = real
    out = capsys.readouterr().out
    version = spark_db.run("SELECT version()")[0][0][0].split()[0]  # the server's own answer
    assert f"spark {version}" in out.lower(), out
    assert any("WHERE" in s and tables[0] in s for s in seen), seen  # a real window query was sent


# ---------------------------------------------------------------- a standalone cluster


def test_standalone_cluster_runs_the_period_in_executors_reproducibly(spark_cluster, tmp_path):
    """Master + one worker on 127.0.0.1, a server whose default zone is America/New_York;
    the table in six files. Two runs give identical samples and results, equal to SQLite's."""
    base, folder = spark_cluster
    db = SparkDB(base)
    try:
        assert db.run("SET spark.master")[0][0][1].startswith("spark://")
        rows = depot_rows(seed=77)
        table = load_spark(db, rows, files=6)
        sqlite_path = tmp_path / "ref.sqlite"
        load_sqlite(sqlite_path, rows)
        extra = {"sampling": {"mode": "sample", "cap": 10, "seed": 11}}
        cfg = job(db.url, table, tmp_path, "ts", **extra)
        first = fetch(cfg, session_zone=None)  # the server's own default zone
        second = fetch(cfg, session_zone=None)
        ref = fetch(job(f"sqlite:///{sqlite_path}", "parcels", tmp_path, "ts", **extra))
        assert first.sampled
        assert_same(first, ref, cfg)
        for a, b in zip(analyse_period(first.metrics, cfg), analyse_period(second.metrics, cfg)):
            assert (a.statistic, a.p_value) == pytest.approx((b.statistic, b.p_value), rel=1e-12), a.metric
        for ma, mb in zip(first.metrics, second.metrics):
            for sa_, sb in zip(ma.segments, mb.segments):
                assert np.array_equal(np.sort(sa_.values), np.sort(sb.values)), (ma.metric.name, sa_.segment)
        if folder is not None:  # the master's own account: the server's application holds executor cores
            apps = _master_state(folder)["activeapps"]
            assert any(a["name"] == "segwatch-test-cluster" and a["cores"] > 0 for a in apps), apps
    finally:
        db.drop()


def _master_state(folder: Path) -> dict:
    port = (folder / "master.webui").read_text().strip()
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/", timeout=30) as resp:
        return json.load(resp)


def test_check_finds_a_window_query_that_cannot_run(spark_db, tables, tmp_path, capsys, monkeypatch):
    """With PyHive's own reflection (TIMESTAMP as a TypeDecorator whose binds raise), the
    first run would fail; check must say so, in one line, instead of 'ok'."""
    from monitor.engines import base, spark

    monkeypatch.setattr(spark.SparkEngine, "reflect_table", base.Engine.reflect_table)
    monkeypatch.setattr(spark.SparkEngine, "time_window", base.Engine.time_window)
    monkeypatch.setattr(spark.SparkEngine, "column_type", base.Engine.column_type)
    path = _write(tmp_path, _config_dict(spark_db.url, tables[0], tmp_path))
    assert main(["check", str(path)]) == 1
    captured = capsys.readouterr()
    assert "ok" not in captured.out.split()
    err = captured.err.strip()
    assert len(err.splitlines()) == 1 and "window query" in err and "2026-W" in err, err


# ---------------------------------------------------------------- the SQL itself (no server)


def _hive_dialect():
    pytest.importorskip("pyhive", reason="pyhive is not installed")
    from pyhive.sqlalchemy_hive import HiveDialect

    return HiveDialect()


def test_only_spark_orders_the_probe_and_every_selected_column_is_in_the_order():
    """The probe's LIMIT picks the same rows on every run on Spark (ORDER BY the time column,
    then every selected column, so tied rows are equal rows); the single-node engines keep
    their early-stopping LIMIT alone (results there unchanged)."""
    from sqlalchemy.dialects import postgresql, sqlite

    from monitor.config import MetricConfig
    from monitor.engines import EngineTraits
    from monitor.source import pushdown

    t = sa.Table("parcels", sa.MetaData(), sa.Column("ts", sa.DateTime(timezone=True)), sa.Column("seg", sa.String),
                 sa.Column("x", sa.Double), sa.Column("amount", sa.Numeric(15, 6)))
    metrics = [MetricConfig(column="x", name="x"), MetricConfig(column="amount", name="amount")]
    for dialect, ordered in ((_hive_dialect(), True), (postgresql.dialect(), False), (sqlite.dialect(), False)):
        traits = EngineTraits.of(dialect)
        plans, reason = pushdown.plan_metrics(t, metrics, traits)
        assert reason is None
        where = t.c.ts >= sa.literal("2026-03-02")
        probe = pushdown.probe_query(t, plans, where, traits, order_by=[t.c.ts])
        first = pushdown.first_value_query(t, plans[0], where, traits, [t.c.ts])
        sql = [" ".join(str(q.compile(dialect=dialect, compile_kwargs={"literal_binds": True})).split())
               for q in (probe, first)]
        if ordered:
            assert "ORDER BY `parcels`.`ts`, `parcels`.`x`, `parcels`.`amount` LIMIT 1000" in sql[0], sql[0]
            assert "ORDER BY `parcels`.`ts`, `parcels`.`x` LIMIT 1" in sql[1], sql[1]
        else:
            assert "ORDER BY" not in sql[0] and "ORDER BY" not in sql[1]
        if dialect.name == "hive":  # exact amount: a typed decimal shift, S3/S4 as doubles
            assert traits.exact and plans[1].exact
            shifts = {p.position: pushdown.Shift.from_probe(p, Decimal("368.735685") if p.exact else 10.5, 4.0)
                      for p in plans}
            agg = " ".join(str(pushdown.aggregate_query(t, "seg", plans, where, shifts, traits).compile(
                dialect=dialect, compile_kwargs={"literal_binds": True})).split())
            assert "CAST('368.735685' AS DECIMAL(9,6))" in agg, agg
            assert "sum(CAST(`segwatch_shifted`.`d1` AS DOUBLE) * CAST(" in agg, agg


def test_spark_types_and_decimal_limits():
    from monitor.engines import get
    from monitor.engines.spark import NaiveDateTime, spark_type

    assert isinstance(spark_type("timestamp"), sa.DateTime) and spark_type("timestamp").timezone
    assert isinstance(spark_type("timestamp_ntz"), NaiveDateTime) and not spark_type("timestamp_ntz").timezone
    dec = spark_type("decimal(15,6)")
    assert (dec.precision, dec.scale) == (15, 6)
    assert isinstance(spark_type("date"), sa.Date) and not isinstance(spark_type("date"), sa.DateTime)
    assert isinstance(spark_type("array<int>"), sa.types.NullType)
    engine = get("hive")
    assert engine.name == "spark"
    # 17 digits: the shifted value (18) squared is 37 digits, inside Spark's 38
    assert engine.exact_decimal(sa.Numeric(17, 6)) and not engine.exact_decimal(sa.Numeric(18, 6))


# ---------------------------------------------------------------- NIST StRD

NIST_DIR = ROOT / "tests" / "reference" / "nist_strd_anova"


def _lre(computed: float, certified: float) -> float:
    """Log relative error, capped at 15 (NIST StRD scoring)."""
    if computed == certified:
        return 15.0
    return min(15.0, max(0.0, -math.log10(abs(computed - certified) / abs(certified))))


@pytest.mark.parametrize("name", ["AtmWtAg", "SmLs03", "SmLs09"])
def test_nist_strd_certified_f_through_spark_decimals(spark_db, tmp_path, name):
    """NIST StRD one-way ANOVA data stored as DECIMAL: the pushed-down exact sums give the
    certified F statistic (certified.json) to at least 12 digits."""
    import csv

    from monitor.stats.omnibus import fisher_anova

    certified = json.loads((NIST_DIR / "certified.json").read_text(encoding="utf-8"))["datasets"][name]
    with open(NIST_DIR / f"{name}.csv", newline="", encoding="utf-8") as fh:
        data = [(int(r["treatment"]), r["response"]) for r in csv.DictReader(fh)]
    scale = max(len(v.partition(".")[2]) for _, v in data)
    digits = max(len(v.partition(".")[0].lstrip("-")) for _, v in data) + scale
    table = f"nist_{name.lower()}_{uuid.uuid4().hex[:6]}"
    statements = [f"CREATE TABLE {spark_db.name}.{table} (ts TIMESTAMP, treatment INT, response "
                  f"DECIMAL({digits},{scale})) USING parquet"]
    for start in range(0, len(data), 6000):
        values = ", ".join(f"(TIMESTAMP '2026-03-03 12:00:00', {t}, {v})" for t, v in data[start:start + 6000])
        statements.append(f"INSERT INTO {spark_db.name}.{table} VALUES {values}")
    spark_db.run(*statements)
    cfg = parse_config({
        "job": "nist", "period": "week", "timezone": "UTC",
        "source": {"url": spark_db.url, "table": table, "time_column": "ts", "segment_column": "treatment"},
        "metrics": [{"column": "response", "test": "anova"}],
        "sampling": {"mode": "sample", "cap": 50},
        "history": {"url": f"sqlite:///{tmp_path / 'h.sqlite'}"},
    }, tmp_path / "nist.yaml", environ={})
    src = Source(cfg)
    try:
        data_ = src.fetch(parse_period("week", "2026-W10", "UTC"))
    finally:
        src.dispose()
    (metric,) = data_.metrics
    assert sum(s.moments.n for s in metric.segments) == len(data)
    assert all(s.moments.is_exact for s in metric.segments)
    f = fisher_anova([s.moments for s in metric.segments]).statistic
    assert _lre(f, certified["f_statistic"]) >= 12.0, (name, f, certified["f_statistic"])


# ---------------------------------------------------------------- adjust_for: per-(segment, stratum) cells

ADJUSTED_METRICS = [
    {"column": "x", "reference": "north", "adjust_for": ["cnt"]},
    {"name": "x_log", "column": "x", "transform": "log", "test": "welch", "reference": "north",
     "adjust_for": ["cnt"]},
    {"column": "amount", "reference": "north", "adjust_for": ["cnt"]},  # exact decimal cells
    {"name": "pos_by_day", "column": "pos", "reference": "north", "adjust_for": ["cnt", "d"]},  # a DATE stratum
]


def _cells_by_key(metric) -> dict:
    return {(c.segment, c.levels): c for c in metric.cells.cells}


def test_cells_pushed_down_equal_local_and_sqlite(spark_db, tables, tmp_path):
    """The per-(segment, stratum) query of adjust_for (monitor/source/cells.py) on Spark,
    in a session whose zone is not UTC: the same cells (n exactly, means and sums of
    squares to 1e-9) as Spark's rows summarised locally and as SQLite's push-down (whose
    cells equal pandas/numpy on the rows, tests/test_adjust_for.py); the adjusted test
    (the metric's statistic) equals SQLite's to 1e-9."""
    table, sqlite_url, _ = tables
    extra = {"sampling": {"mode": "full"}}
    cfg = job(spark_db.url, table, tmp_path, "ts", metrics=ADJUSTED_METRICS, **extra)
    push = fetch(cfg)
    local = fetch(replace(cfg, compute="local"))
    ref = fetch(job(sqlite_url, "parcels", tmp_path, "ts", metrics=ADJUSTED_METRICS, **extra))
    assert push.compute == "pushdown" and local.compute == "local"
    for p, q, r in zip(push.metrics, local.metrics, ref.metrics, strict=True):
        name = p.metric.name
        pc, qc, rc = _cells_by_key(p), _cells_by_key(q), _cells_by_key(r)
        assert pc.keys() == qc.keys() == rc.keys() and len(pc) > 10, name
        for key, c in pc.items():
            for d in (qc[key], rc[key]):
                assert c.n == d.n, (name, key)
                scale = max(abs(d.mean), math.sqrt(d.m2 / d.n) if d.n > 1 else 0.0, 1e-300)
                assert abs((c.mean + c.mean_residual) - (d.mean + d.mean_residual)) <= REL * scale, (name, key)
                assert c.m2 == pytest.approx(d.m2, rel=REL, abs=1e-12), (name, key)
        assert p.cells.missing == q.cells.missing == r.cells.missing >= 1, name  # the row whose cnt is NULL
        # the cells and the values left out add up to the per-segment counts
        assert sum(c.n for c in p.cells.cells) + p.cells.missing == sum(s.moments.n for s in p.segments), name
    assert_same(push, ref, cfg)
