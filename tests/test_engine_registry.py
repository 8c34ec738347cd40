"""The engine registry, the one engine factory and the hooks of the Engine protocol.

The engines themselves are exercised over real connections in ``test_engines.py``; here
each hook is checked against what the database (SQLite, in memory or in a temporary
file) or SQLAlchemy's own compiler reports, and the hooks a later engine needs
(statements on connect, typed window bounds, unwrapped reflected types, a "not found"
rule, its own server-version query) are driven through a stand-in engine.
"""

from __future__ import annotations

import hashlib
from datetime import datetime, timezone

import pytest
import sqlalchemy as sa
from sqlalchemy.dialects import mysql, postgresql, sqlite
from sqlalchemy.exc import NoSuchTableError

from monitor import engines
from monitor.config import MetricConfig
from monitor.engines import base
from monitor.engines.duckdb import DuckDBEngine
from monitor.engines.generic import GenericEngine
from monitor.engines.mysql import MySQLEngine
from monitor.engines.postgresql import PostgreSQLEngine
from monitor.engines.sqlite import SQLiteEngine
from monitor.errors import HistoryError, SourceError
from monitor.periods import parse_period
from monitor.source import pushdown

PERIOD = parse_period("week", "2026-W10", "Europe/Paris")


# ---------------------------------------------------------------- registry


@pytest.mark.parametrize(("dialect", "cls"), [
    ("sqlite", SQLiteEngine), ("postgresql", PostgreSQLEngine), ("mysql", MySQLEngine),
    ("mariadb", MySQLEngine), ("duckdb", DuckDBEngine),
])
def test_each_dialect_finds_its_engine_module(dialect, cls):
    assert type(engines.get(dialect)) is cls


def test_unknown_dialects_get_the_generic_engine():
    assert type(engines.get("oracle")) is GenericEngine
    assert {"sqlite", "postgresql", "mysql", "duckdb", "generic", "trino"} <= set(engines.names())


def test_traits_come_from_the_engine_of_the_dialect():
    # the values of the push-down's documented table (monitor/source/pushdown.py notes)
    pg = engines.EngineTraits.of(postgresql.dialect())
    my = engines.EngineTraits.of(mysql.dialect())
    lite = engines.EngineTraits.of(sqlite.dialect())
    assert (pg.typeof, pg.non_finite, pg.exact) == (False, True, True)
    assert (my.typeof, my.non_finite, my.exact) == (False, False, True)
    assert (lite.typeof, lite.non_finite, lite.exact) == (True, True, False)
    assert type(pg.engine) is PostgreSQLEngine


def test_the_double_cast_is_the_engines_own():
    expr = engines.to_double(sa.column("x"))
    assert str(expr.compile(dialect=postgresql.dialect())) == "CAST(x AS DOUBLE PRECISION)"
    assert str(expr.compile(dialect=mysql.dialect())) == "(x + 0E0)"
    from sqlalchemy.dialects.mysql import mariadb

    assert str(expr.compile(dialect=mariadb.MariaDBDialect())) == "(x + 0E0)"


# ---------------------------------------------------------------- the factory


def test_factory_refuses_an_unknown_role():
    with pytest.raises(ValueError, match="role must be one of source, history"):
        engines.create_engine("sqlite://", "reports")


def test_factory_errors_name_the_url_per_role():
    with pytest.raises(SourceError, match=r"^cannot open database URL nosuchdriver://u:\*\*\*@h/db: "):
        engines.create_engine("nosuchdriver://u:secret@h/db", "source")
    with pytest.raises(HistoryError, match=r"^history.url: cannot open nosuchdriver://u:\*\*\*@h/db: "):
        engines.create_engine("nosuchdriver://u:secret@h/db", "history")
    with pytest.raises(HistoryError, match="^history.url: cannot parse"):
        engines.create_engine("not a url", "history")


def test_sqlite_source_gets_the_sampling_md5(tmp_path):
    eng = engines.create_engine(f"sqlite:///{tmp_path / 'src.sqlite'}", "source")
    with eng.connect() as conn:
        got = conn.exec_driver_sql("SELECT segwatch_md5('depot-7|2026-03-02:11')").scalar()
    eng.dispose()
    assert got == hashlib.md5(b"depot-7|2026-03-02:11").hexdigest()  # reference: Python's hashlib


def test_sqlite_history_runs_in_wal_and_begins_immediate(tmp_path):
    path = tmp_path / "deep" / "folder" / "history.sqlite"  # the folder is created
    eng = engines.create_engine(f"sqlite:///{path}", "history")
    seen: list[str] = []
    sa.event.listen(eng, "before_cursor_execute", lambda c, cur, stmt, *a: seen.append(stmt))
    with eng.begin() as conn:
        mode = conn.exec_driver_sql("PRAGMA journal_mode").scalar()
        timeout = conn.exec_driver_sql("PRAGMA busy_timeout").scalar()
    eng.dispose()
    assert mode == "wal" and timeout == 30000  # SQLite's own report of its settings
    assert seen[0] == "BEGIN IMMEDIATE"


def test_history_insert_if_absent_on_the_generic_engine(tmp_path):
    """The portable form (check, then insert) inserts once and keeps the first row."""
    eng = sa.create_engine(f"sqlite:///{tmp_path / 'h.sqlite'}")
    t = sa.Table("t", sa.MetaData(), sa.Column("k", sa.String, primary_key=True), sa.Column("v", sa.Integer))
    t.metadata.create_all(eng)
    generic = engines.get("oracle")
    with eng.begin() as conn:
        assert generic.insert_missing(conn, t, {"k": "a", "v": 1}) is True
        assert generic.insert_missing(conn, t, {"k": "a", "v": 2}) is False
        assert conn.execute(sa.select(t.c.k, t.c.v)).all() == [("a", 1)]
    eng.dispose()


# ---------------------------------------------------------------- hooks for a later engine


class _Unwrapped(sa.types.TypeDecorator):
    """A reflected type a dialect wraps around a plain double."""

    impl = sa.Float
    cache_ok = True


class StandIn(GenericEngine):
    """An engine with every hook a distributed engine would use set."""

    name = "standin"
    dialects = ("standin",)

    def connect_statements(self, url, role):
        return ["PRAGMA user_version = 17"]

    def bind_instant(self, value):
        return sa.literal(value, sa.DateTime(timezone=True))

    def bind_naive(self, value):
        return sa.literal(value, sa.DateTime(timezone=False))

    def column_type(self, ctype):
        return ctype.impl_instance if isinstance(ctype, sa.types.TypeDecorator) else ctype

    def is_not_found(self, exc):
        return "unknown database" in str(exc)

    def server_version(self, conn):
        return self.name, tuple(int(x) for x in conn.exec_driver_sql("SELECT '3.4.1'").scalar().split("."))


@pytest.fixture
def standin(monkeypatch):
    engine = StandIn()
    for name in (engine.name, *engine.dialects):
        monkeypatch.setitem(base._REGISTRY, name, engine)
    return engine


def test_statements_on_connect_run_on_every_new_connection(standin):
    eng = sa.create_engine("sqlite://", poolclass=sa.pool.NullPool)
    standin.prepare(eng, "source")
    for _ in range(2):
        with eng.connect() as conn:
            assert conn.exec_driver_sql("PRAGMA user_version").scalar() == 17  # SQLite's own report
    eng.dispose()


def _binds(clause):
    from sqlalchemy.sql import visitors
    from sqlalchemy.sql.elements import BindParameter

    return sorted((b for b in visitors.iterate(clause) if isinstance(b, BindParameter)), key=lambda b: b.value)


class _WrappedAware(sa.types.TypeDecorator):
    """A reflected zone-aware timestamp, wrapped by its dialect."""

    impl = sa.DateTime(timezone=True)
    cache_ok = True


def test_window_bounds_are_bound_as_the_engine_says(standin):
    """A zone-aware column gets UTC instants, a naive one the naive bounds; an engine
    that binds with explicit types (and unwraps the reflected type) gets them typed."""
    aware = sa.Table("a", sa.MetaData(), sa.Column("ts", _WrappedAware()))
    naive = sa.Table("n", sa.MetaData(), sa.Column("ts", sa.DateTime()))
    lo_naive, hi_naive = datetime(2026, 3, 2), datetime(2026, 3, 9)
    # Monday 2026-03-02 00:00 in Paris (UTC+1) is 2026-03-01 23:00 UTC
    instants = [datetime(2026, 3, 1, 23, tzinfo=timezone.utc), datetime(2026, 3, 8, 23, tzinfo=timezone.utc)]
    binds = _binds(standin.time_window(aware.c.ts, PERIOD, (lo_naive, hi_naive)))
    assert [b.value for b in binds] == instants
    assert all(isinstance(b.type, sa.DateTime) and b.type.timezone for b in binds)
    binds = _binds(standin.time_window(naive.c.ts, PERIOD, (lo_naive, hi_naive)))
    assert [b.value for b in binds] == [lo_naive, hi_naive]
    assert all(isinstance(b.type, sa.DateTime) and not b.type.timezone for b in binds)
    # the generic engine judges the wrapped column by its wrapper: not zone-aware, naive bounds
    binds = _binds(engines.get("oracle").time_window(aware.c.ts, PERIOD, (lo_naive, hi_naive)))
    assert [b.value for b in binds] == [lo_naive, hi_naive]


def test_reflected_type_decorators_are_unwrapped_for_the_pushdown(standin):
    t = sa.Table("t", sa.MetaData(), sa.Column("x", _Unwrapped()))
    metric = [MetricConfig(column="x", name="x")]
    plain = engines.EngineTraits("oracle", typeof=False, non_finite=True, exact=False)
    plans, reason = pushdown.plan_metrics(t, metric, plain)
    assert plans == () and "not a number" in reason  # without unwrapping it is refused
    plans, reason = pushdown.plan_metrics(t, metric, engines.EngineTraits("standin", False, True, False))
    assert reason is None and plans[0].kind == "float"


def test_a_not_found_rule_turns_an_error_into_no_such_table(standin):
    eng = sa.create_engine("sqlite://")
    with eng.connect() as conn:
        with pytest.raises(sa.exc.OperationalError):
            engines.get("oracle").reflect_table(conn, "t", "nosuch")
        with pytest.raises(NoSuchTableError):
            standin.reflect_table(conn, "t", "nosuch")
    eng.dispose()


def test_an_engine_may_ask_the_server_version_itself(standin):
    eng = sa.create_engine("sqlite://")
    with eng.connect() as conn:
        assert standin.server_version(conn) == ("standin", (3, 4, 1))
    eng.dispose()
    engines.check_server_version("standin", (0, 1), "src")  # no floor: accepted
