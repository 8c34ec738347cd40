"""Small helpers shared by the source and the history: URL redaction, one-line
database error texts, source engines and the server version check.

Server versions
---------------
segwatch's SQL (conditional aggregates written with ``CASE``, no ``FILTER``; window
functions are the newest feature any of its queries may use) runs on these versions or
newer; older servers are refused when the source is first reached, with a message that
says what was found and what is needed (see :func:`check_server_version`):

==============  ========  ==================================================
engine          minimum   why
==============  ========  ==================================================
SQLite          3.25      window functions
PostgreSQL      10        oldest release segwatch is supported on
MariaDB         10.2      window functions
MySQL           8.0       window functions
DuckDB          any       (only the read-only open is required)
==============  ========  ==================================================
"""

from __future__ import annotations

import hashlib
import logging
import math
import sqlite3
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Engine
from sqlalchemy.exc import SQLAlchemyError

from .errors import SourceError

log = logging.getLogger(__name__)

#: Oldest supported server per engine (see the module notes).
MIN_VERSIONS: dict[str, tuple[int, ...]] = {
    "sqlite": (3, 25),
    "postgresql": (10,),
    "mariadb": (10, 2),
    "mysql": (8, 0),
}

_ENGINE_NAMES = {"sqlite": "SQLite", "postgresql": "PostgreSQL", "mariadb": "MariaDB", "mysql": "MySQL"}

#: Name of the md5 function segwatch registers on its own SQLite connections.
SQLITE_MD5 = "segwatch_md5"


def redact(url: str) -> str:
    """The URL with any password hidden, for messages and logs."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - a malformed URL is shown as given
        return url


def one_line(exc: BaseException | None) -> str:
    """The first line of a database error (the driver's own text when there is one)."""
    if exc is None:
        return "unknown error"
    text = str(getattr(exc, "orig", None) or exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


# ------------------------------------------------------------------ engines


def make_engine(url: str, *, read_only: bool = False) -> Engine:
    """An engine for a source database.

    Pre-ping and connection recycling as RELIABILITY.md asks; DuckDB files opened
    read-only when ``read_only`` (DuckDB allows one writing process per file); on
    SQLite, every connection gets the functions the push-down SQL needs
    (:func:`install_sqlite_functions`).
    """
    kwargs: dict[str, Any] = {"pool_pre_ping": True, "pool_recycle": 1800}
    if url.startswith("duckdb") and read_only:
        kwargs["connect_args"] = {"read_only": True}
    try:
        if _duckdb_file(url):
            # DuckDB runs inside segwatch's process: a connection returned to a pool would
            # keep the database open and its buffers (up to the memory limit) in memory
            # through the statistics; without a pool they are freed when segwatch's
            # connection closes (opening a file again costs milliseconds)
            kwargs["poolclass"] = sa.pool.NullPool
        engine = sa.create_engine(url, **kwargs)
    except (SQLAlchemyError, ImportError, ValueError) as exc:
        raise SourceError(f"cannot open database URL {redact(url)}: {one_line(exc)}") from exc
    if engine.dialect.name == "sqlite":
        sa.event.listen(engine, "connect", _on_sqlite_connect)
    elif engine.dialect.name == "duckdb":
        own_limit = not {"memory_limit", "max_memory"} & set(engine.url.query)
        sa.event.listen(engine, "connect", lambda conn, rec: _on_duckdb_connect(conn, own_limit))
    return engine


def _duckdb_file(url: str) -> bool:
    """True for a DuckDB database file (not ``:memory:``, not a MotherDuck ``md:`` database)."""
    if not url.startswith("duckdb"):
        return False
    database = sa.engine.make_url(url).database or ""
    return database not in ("", ":memory:") and not database.startswith(("md:", "motherduck:", ":memory:"))


#: DuckDB's memory limit per worker thread (``threads``, the number of cores unless the
#: URL sets it), and at least :data:`DUCKDB_MEMORY_MIN`, unless the URL sets a limit
#: (``duckdb:///file.duckdb?memory_limit=2GB``). DuckDB's buffer pool keeps the blocks
#: it has read up to the limit, so the limit is what DuckDB adds to segwatch's memory;
#: but each thread scanning a table pins its current blocks of every column read (about
#: 14 MB per thread for 23 columns of doubles here), and a query that needs more than
#: the limit fails with DuckDB's "Out of Memory Error".
DUCKDB_MEMORY_PER_THREAD_MB = 32
DUCKDB_MEMORY_MIN_MB = 64


#: Per thread and per column read, what a scan may pin (measured ~0.6 MB; with margin).
DUCKDB_MEMORY_PER_COLUMN_MB = 1.5


def duckdb_memory_limit(threads: int, columns: int = 0) -> str:
    """segwatch's default DuckDB ``memory_limit`` for ``threads`` worker threads reading
    ``columns`` columns: per thread the larger of :data:`DUCKDB_MEMORY_PER_THREAD_MB` and
    :data:`DUCKDB_MEMORY_PER_COLUMN_MB` per column, and at least :data:`DUCKDB_MEMORY_MIN_MB`."""
    per_thread = max(DUCKDB_MEMORY_PER_THREAD_MB, math.ceil(DUCKDB_MEMORY_PER_COLUMN_MB * max(0, int(columns))))
    return f"{max(DUCKDB_MEMORY_MIN_MB, per_thread * max(1, int(threads)))}MB"


def fit_duckdb_memory(conn: sa.Connection, columns: int) -> None:
    """Raise segwatch's own DuckDB memory limit for a query reading ``columns`` columns
    (wide jobs pin more per scanning thread); a limit set in the URL is left alone."""
    if conn.dialect.name != "duckdb" or {"memory_limit", "max_memory"} & set(conn.engine.url.query):
        return
    threads = conn.exec_driver_sql("SELECT current_setting('threads')").scalar()
    conn.exec_driver_sql(f"SET memory_limit = '{duckdb_memory_limit(threads, columns)}'")


def _on_duckdb_connect(dbapi_conn: Any, own_limit: bool) -> None:
    # DuckDB draws a progress bar on stdout for long queries, which would mix into `run --json`
    dbapi_conn.execute("SET enable_progress_bar = false")
    if own_limit:
        # its buffer pool would otherwise grow with the rows scanned (to 80% of RAM);
        # one aggregate row per segment needs little of it
        threads = dbapi_conn.execute("SELECT current_setting('threads')").fetchone()[0]
        dbapi_conn.execute(f"SET memory_limit = '{duckdb_memory_limit(threads)}'")


def _on_sqlite_connect(dbapi_conn: Any, _record: Any) -> None:
    install_sqlite_functions(dbapi_conn)


def sqlite_has_ln(dbapi_conn: sqlite3.Connection) -> bool:
    """True if this SQLite build has the math functions (``ln``)."""
    try:
        dbapi_conn.execute("SELECT ln(1.0)").fetchone()
    except sqlite3.OperationalError:
        return False
    return True


def install_sqlite_functions(dbapi_conn: sqlite3.Connection, *, has_ln: bool | None = None) -> bool:
    """Register the SQL functions segwatch needs on one SQLite connection.

    * ``segwatch_md5(text)``: the lowercase hex MD5 of the UTF-8 text, as
      ``md5()`` in PostgreSQL, MySQL and DuckDB, so a seeded sample is the same
      rows on every engine (see :mod:`monitor.sampling`).
    * ``ln(x)``: only when the build lacks SQLite's math functions (before 3.35, or
      compiled without ``SQLITE_ENABLE_MATH_FUNCTIONS``). The Python version is
      slower per row but gives the same doubles, so the push-down keeps working.

    Returns True if a Python ``ln`` had to be registered.
    """
    dbapi_conn.create_function(SQLITE_MD5, 1, _md5_hex, deterministic=True)
    if has_ln is None:
        has_ln = sqlite_has_ln(dbapi_conn)
    if not has_ln:
        log.info("this SQLite build has no ln(); segwatch registered a Python ln() on its connection")
        dbapi_conn.create_function("ln", 1, _ln, deterministic=True)
        return True
    return False


def _md5_hex(text: Any) -> str | None:
    if text is None:
        return None
    return hashlib.md5(str(text).encode("utf-8")).hexdigest()  # noqa: S324 - sampling, not security


def _ln(x: Any) -> float | None:
    try:
        return math.log(float(x))
    except (TypeError, ValueError):
        return None


# ------------------------------------------------------------------ versions


def server_version(conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
    """The engine name (``mariadb`` apart from ``mysql``) and the server version."""
    dialect = conn.dialect
    name = dialect.name
    if name == "sqlite":
        return name, tuple(sqlite3.sqlite_version_info)
    if name == "mysql" and getattr(dialect, "is_mariadb", False):
        name = "mariadb"
    info = dialect.server_version_info
    if not info:
        return name, None
    return name, tuple(int(x) for x in info if isinstance(x, int))


def format_version(version: tuple[int, ...] | None) -> str:
    return ".".join(str(x) for x in version) if version else "unknown"


def check_server_version(engine: str, version: tuple[int, ...] | None, where: str) -> None:
    """Refuse a server older than segwatch supports.

    Parameters
    ----------
    engine : str
        ``sqlite``, ``postgresql``, ``mariadb``, ``mysql`` (others are not checked).
    version : tuple of int or None
        The server's version; None (unknown) passes.
    where : str
        The place to name in the message (e.g. the redacted source URL).

    Raises
    ------
    SourceError
        With a one-line message naming the engine, the version found and the minimum.
    """
    minimum = MIN_VERSIONS.get(engine)
    if minimum is None or not version:
        return
    if tuple(version[: len(minimum)]) < minimum:
        label = _ENGINE_NAMES[engine]
        raise SourceError(
            f"{where}: {label} {format_version(version)} is too old; segwatch needs {label} "
            f"{format_version(minimum)} or newer (window functions); upgrade the server"
            + (" (for SQLite: the library Python's sqlite3 module is built with)" if engine == "sqlite" else "")
        )


# ------------------------------------------------------------------ DuckDB reflection


def reflect_duckdb_table(conn: sa.Connection, name: str, schema: str | None) -> sa.Table | None:
    """Reflect a DuckDB table or view from ``information_schema`` (None if absent).

    duckdb-engine's own reflection goes through PostgreSQL catalog tables that
    DuckDB does not have under SQLAlchemy 2.1 (``pg_catalog.pg_collation``), so
    segwatch reads the column names and types itself and maps the types it needs
    (numbers, decimals with precision and scale, booleans, dates, timestamps, text);
    any other type is kept as unknown. The primary key comes from
    ``duckdb_constraints()``.
    """
    rows = conn.execute(
        sa.text(
            "SELECT column_name, data_type, numeric_precision, numeric_scale "
            "FROM information_schema.columns "
            "WHERE table_name = :name AND table_schema = COALESCE(:schema, current_schema()) "
            "ORDER BY ordinal_position"
        ),
        {"name": name, "schema": schema},
    ).all()
    if not rows:
        return None
    pk_rows = conn.execute(
        sa.text(
            "SELECT constraint_column_names FROM duckdb_constraints() "
            "WHERE table_name = :name AND schema_name = COALESCE(:schema, current_schema()) "
            "AND constraint_type = 'PRIMARY KEY'"
        ),
        {"name": name, "schema": schema},
    ).all()
    pk = {c for (cols,) in pk_rows for c in (cols or [])}
    columns = [
        sa.Column(col, _duckdb_type(dtype, prec, scale), primary_key=col in pk)
        for col, dtype, prec, scale in rows
    ]
    return sa.Table(name, sa.MetaData(), *columns, schema=schema)


def duckdb_table_names(conn: sa.Connection, schema: str | None) -> list[str]:
    """Tables and views of a DuckDB schema (for the 'no such table' message)."""
    return [
        r[0]
        for r in conn.execute(
            sa.text(
                "SELECT table_name FROM information_schema.tables "
                "WHERE table_schema = COALESCE(:schema, current_schema()) ORDER BY table_name"
            ),
            {"schema": schema},
        )
    ]


_DUCKDB_TYPES: dict[str, Any] = {
    "DOUBLE": sa.Double, "FLOAT": sa.Float, "REAL": sa.Float,
    "TINYINT": sa.SmallInteger, "SMALLINT": sa.SmallInteger, "INTEGER": sa.Integer, "BIGINT": sa.BigInteger,
    "HUGEINT": sa.BigInteger, "UTINYINT": sa.SmallInteger, "USMALLINT": sa.Integer, "UINTEGER": sa.BigInteger,
    "UBIGINT": sa.BigInteger, "BOOLEAN": sa.Boolean, "DATE": sa.Date, "VARCHAR": sa.String, "TEXT": sa.String,
    "TIMESTAMP": sa.DateTime, "TIMESTAMP_NS": sa.DateTime, "TIMESTAMP_MS": sa.DateTime, "TIMESTAMP_S": sa.DateTime,
}


def _duckdb_type(dtype: str, precision: Any, scale: Any) -> sa.types.TypeEngine:
    text = (dtype or "").upper()
    if text.startswith("DECIMAL") or text.startswith("NUMERIC"):
        return sa.Numeric(precision, scale)
    if text in ("TIMESTAMP WITH TIME ZONE", "TIMESTAMPTZ"):
        return sa.DateTime(timezone=True)
    kind = _DUCKDB_TYPES.get(text)
    return kind() if kind is not None else sa.types.NullType()
