"""DuckDB: files opened read-only and without a pool, no progress bar, a memory limit
of segwatch's own, an integer sampling hash, its own reflection, and the values read
as numpy columns through a temporary table."""

from __future__ import annotations

import math
import re
import threading
from typing import TYPE_CHECKING, Any, Iterable, Sequence

import sqlalchemy as sa
from sqlalchemy.exc import NoSuchTableError
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.sql.base import Executable
from sqlalchemy.sql.elements import ClauseElement

from ..errors import SourceError
from ..redact import one_line
from .base import Engine, SourceSession, hash_array, key_text, register

if TYPE_CHECKING:
    import numpy as np

#: DuckDB's memory limit per worker thread (``threads``, the number of cores unless the
#: URL sets it), and at least :data:`DUCKDB_MEMORY_MIN_MB`, unless the URL sets a limit
#: (``duckdb:///file.duckdb?memory_limit=2GB``). DuckDB's buffer pool keeps the blocks
#: it has read up to the limit, so the limit is what DuckDB adds to segwatch's memory;
#: but each thread scanning a table pins its current blocks of every column read (about
#: 14 MB per thread for 23 columns of doubles here), and a query that needs more than
#: the limit fails with DuckDB's "Out of Memory Error".
DUCKDB_MEMORY_PER_THREAD_MB = 32
DUCKDB_MEMORY_MIN_MB = 64
#: Per thread and per column read, what a scan may pin (measured ~0.6 MB; with margin).
DUCKDB_MEMORY_PER_COLUMN_MB = 1.5
#: The temporary table that holds the values while they are read column by column.
DUCKDB_VALUES_TABLE = "segwatch_values"
_URL_LIMITS = {"memory_limit", "max_memory"}
_TIMER = "segwatch_timer"


class DuckDBEngine(Engine):
    """DuckDB (through duckdb-engine), in segwatch's own process."""

    name = "duckdb"
    dialects = ("duckdb",)
    label = "DuckDB"
    in_process = True
    file_urls = True

    def hash_kind(self, version: tuple[int, ...]) -> str:
        return "md5_60"

    def sample_hash(self, key_columns: Sequence[sa.ColumnElement], seed: int, kind: str) -> sa.ColumnElement:
        """``md5_60``: the first 15 hex digits of the MD5 as a ``BIGINT`` (an integer
        column, no strings to carry), which orders rows as the hex digest does."""
        text = key_text(key_columns).concat(sa.literal(f":{int(seed)}", sa.String()))
        prefix = sa.literal("0x", sa.String()).concat(sa.func.substr(sa.func.md5(text, type_=sa.String()), 1, 15))
        return sa.cast(prefix, sa.BigInteger())

    # -------------------------------------------------------------- opening

    def engine_options(self, url: sa.URL, role: str, read_only: bool) -> dict[str, Any]:
        kwargs = super().engine_options(url, role, read_only)
        if role != "source":
            return kwargs
        if read_only and _is_file(url):
            # DuckDB allows one writing process per file; an in-memory database (a query:
            # over files, source.file) cannot be opened read-only and holds nothing to protect
            kwargs["connect_args"] = {"read_only": True}
        if _is_file(url):
            # DuckDB runs inside segwatch's process: a connection returned to a pool would
            # keep the database open and its buffers (up to the memory limit) in memory
            # through the statistics; without a pool they are freed when segwatch's
            # connection closes (opening a file again costs milliseconds)
            kwargs["poolclass"] = sa.pool.NullPool
        return kwargs

    def prepare(self, engine: sa.Engine, role: str) -> None:
        if role != "source":
            return
        own_limit = not _URL_LIMITS & set(engine.url.query)
        sa.event.listen(engine, "connect", lambda conn, rec: _on_connect(conn, own_limit))

    def files_relative_to(self, engine: sa.Engine, folder: str) -> None:
        """Relative file names in the SQL (``read_csv('parcels.csv')``) are searched in
        ``folder``, the config file's (DuckDB's ``file_search_path``)."""
        text = str(folder).replace("'", "''")
        sa.event.listen(engine, "connect",
                        lambda conn, rec: conn.execute(f"SET file_search_path = '{text}'"))

    # -------------------------------------------------------------- versions

    def server_version(self, conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
        """``SELECT version()`` (``v2.0.1``): duckdb-engine's ``server_version_info`` is
        not DuckDB's version."""
        text = str(conn.exec_driver_sql("SELECT version()").scalar() or "")
        match = re.match(r"v?(\d+)\.(\d+)(?:\.(\d+))?", text)
        return self.name, tuple(int(x) for x in match.groups() if x is not None) if match else None

    # -------------------------------------------------------------- source sessions

    def guard_source(self, engine: sa.Engine, session: SourceSession) -> None:
        """A source file is opened read-only already (:meth:`engine_options`; an in-memory
        database keeps nothing). DuckDB has no statement timeout of its own: a timer per
        statement calls the connection's ``interrupt()`` once ``source.timeout`` has passed."""
        timeout = session.timeout
        if timeout:
            def _start(conn: sa.Connection, *_args: Any) -> None:
                _stop(conn)
                timer = threading.Timer(timeout, _interrupt, args=(conn.connection.driver_connection,))
                timer.daemon = True
                conn.info[_TIMER] = timer
                timer.start()

            def _stop(conn: sa.Connection, *_args: Any) -> None:
                timer = conn.info.pop(_TIMER, None)
                if timer is not None:
                    timer.cancel()

            def _stop_on_error(context: Any) -> None:
                if context.connection is not None:
                    _stop(context.connection)

            sa.event.listen(engine, "before_cursor_execute", _start)
            sa.event.listen(engine, "after_cursor_execute", _stop)
            sa.event.listen(engine, "handle_error", _stop_on_error)
        self.listen_errors(engine, session)

    def translate_error(self, exc: BaseException, session: SourceSession) -> SourceError | None:
        text = str(exc)
        if type(exc).__name__ == "InterruptException" or text.startswith("INTERRUPT Error"):
            return session.timed_out("DuckDB", "interrupted by segwatch's timer")
        if "read-only mode" in text:
            return session.refused_write("DuckDB", one_line(exc))
        return None

    # -------------------------------------------------------------- reflection

    def reflect_table(self, conn: sa.Connection, name: str, schema: str | None) -> sa.Table:
        table = reflect_duckdb_table(conn, name, schema)
        if table is None:
            raise NoSuchTableError(name)
        return table

    def table_names(self, conn: sa.Connection, schema: str | None) -> list[str]:
        return duckdb_table_names(conn, schema)

    # -------------------------------------------------------------- one period's reads

    def tune_transaction(self, conn: sa.Connection, columns: int) -> None:
        fit_duckdb_memory(conn, columns)

    def numbered_read_possible(self, conn: sa.Connection) -> bool:
        return hasattr(conn.connection.driver_connection, "execute")

    def read_numbered(self, conn: sa.Connection, stmt: sa.Select, width: int, *,
                      hashed: bool) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
        """The values as plain numpy arrays (no masked arrays, no segment strings; about
        60 MB less at 300,000 rows x 20 metrics).

        The rows go first into a temporary table, inside DuckDB's buffer pool and under
        segwatch's memory limit, and are then read one column at a time. Read all at once,
        DuckDB converts a result of unknown length through arrays that double as they
        fill: just past 262,144 rows (50 segments of 5,291 sampled rows) that held about
        50 MB more than the values themselves (measured: 356 against 314 MB at the peak of
        a run, 2,000,000 rows x 20 metrics), for about 0.1 to 0.2 s more work.
        """
        import numpy as np

        keys = [c.key for c in stmt.selected_columns]
        conn.execute(CreateTempTableAs(DUCKDB_VALUES_TABLE, stmt))
        quote = conn.dialect.identifier_preparer.quote
        table = quote(DUCKDB_VALUES_TABLE)
        data = {}
        for key in keys:
            data[key] = conn.exec_driver_sql(f"SELECT {quote(key)} FROM {table}").cursor.fetchnumpy()[key]
        conn.exec_driver_sql(f"DROP TABLE {table}")
        g = np.asarray(data.pop(keys[0]), dtype=np.int64)
        hashes = hash_array(data.pop(keys[1])) if hashed else hash_array(())
        return g, hashes, [np.asarray(data.pop(k), dtype=float) for k in keys[1 + hashed:]]

    def fetch_values(self, conn: sa.Connection, stmt: sa.Select, chunk: int
                     ) -> tuple[list[np.ndarray] | None, Iterable[Sequence[Any]] | None]:
        # DuckDB's row-by-row fetch is slow: take the result as numpy arrays directly
        result = conn.execute(stmt)
        if hasattr(result.cursor, "fetchnumpy"):
            data = result.cursor.fetchnumpy()
            return [data[k] for k in result.keys()], None
        return None, [result.all()]

    def failure_hint(self, exc: BaseException) -> str | None:
        if "out of memory" in str(exc).lower():
            return ("DuckDB ran out of the memory segwatch allows it; set a larger limit in the URL, "
                    "e.g. duckdb:///file.duckdb?memory_limit=1GB")
        return None


def _interrupt(driver: Any) -> None:
    try:
        driver.interrupt()
    except Exception:  # noqa: BLE001 - the connection closed meanwhile: nothing to stop
        pass


def _is_file(url: sa.URL) -> bool:
    """True for a DuckDB database file (not ``:memory:``, not a MotherDuck ``md:`` database)."""
    database = url.database or ""
    return database not in ("", ":memory:") and not database.startswith(("md:", "motherduck:", ":memory:"))


def duckdb_memory_limit(threads: int, columns: int = 0) -> str:
    """segwatch's default DuckDB ``memory_limit`` for ``threads`` worker threads reading
    ``columns`` columns: per thread the larger of :data:`DUCKDB_MEMORY_PER_THREAD_MB` and
    :data:`DUCKDB_MEMORY_PER_COLUMN_MB` per column, and at least :data:`DUCKDB_MEMORY_MIN_MB`."""
    per_thread = max(DUCKDB_MEMORY_PER_THREAD_MB, math.ceil(DUCKDB_MEMORY_PER_COLUMN_MB * max(0, int(columns))))
    return f"{max(DUCKDB_MEMORY_MIN_MB, per_thread * max(1, int(threads)))}MB"


def fit_duckdb_memory(conn: sa.Connection, columns: int) -> None:
    """Raise segwatch's own DuckDB memory limit for a query reading ``columns`` columns
    (wide jobs pin more per scanning thread); a limit set in the URL is left alone."""
    if conn.dialect.name != "duckdb" or _URL_LIMITS & set(conn.engine.url.query):
        return
    threads = conn.exec_driver_sql("SELECT current_setting('threads')").scalar()
    conn.exec_driver_sql(f"SET memory_limit = '{duckdb_memory_limit(threads, columns)}'")


def _on_connect(dbapi_conn: Any, own_limit: bool) -> None:
    # DuckDB draws a progress bar on stdout for long queries, which would mix into `run --json`
    dbapi_conn.execute("SET enable_progress_bar = false")
    if own_limit:
        # its buffer pool would otherwise grow with the rows scanned (to 80% of RAM);
        # one aggregate row per segment needs little of it
        threads = dbapi_conn.execute("SELECT current_setting('threads')").fetchone()[0]
        dbapi_conn.execute(f"SET memory_limit = '{duckdb_memory_limit(threads)}'")


class CreateTempTableAs(Executable, ClauseElement):
    """``CREATE OR REPLACE TEMPORARY TABLE name AS <select>``, with the select's bound
    parameters passed as usual (the "CREATE TABLE AS" pattern of SQLAlchemy's compiler
    extension)."""

    inherit_cache = False

    def __init__(self, name: str, select: sa.Select):
        self.name = name
        self.select = select


@compiles(CreateTempTableAs)
def _create_temp_table_as(element: CreateTempTableAs, compiler: Any, **kw: Any) -> str:
    name = compiler.preparer.quote(element.name)
    return f"CREATE OR REPLACE TEMPORARY TABLE {name} AS {compiler.process(element.select, **kw)}"


# ------------------------------------------------------------------ reflection


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


ENGINE = register(DuckDBEngine())
