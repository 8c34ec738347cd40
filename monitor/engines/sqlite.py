"""SQLite: text in numeric columns, a Python md5 for sampling, text timestamps, and
the history's locking (WAL, a busy timeout, ``BEGIN IMMEDIATE``)."""

from __future__ import annotations

import hashlib
import logging
import math
import sqlite3
import time
from datetime import datetime
from pathlib import Path
from typing import Any, Mapping
from urllib.parse import quote

import sqlalchemy as sa

from ..errors import HistoryError, SourceError
from ..redact import one_line
from .base import Engine, SourceSession, register

#: SQLite VM instructions between two looks at the statement's deadline.
PROGRESS_STEPS = 20_000
_DEADLINE = "segwatch_deadline"

log = logging.getLogger(__name__)

#: Name of the md5 function segwatch registers on its own SQLite connections.
SQLITE_MD5 = "segwatch_md5"
#: Seconds a history writer waits for the file's lock.
HISTORY_LOCK_TIMEOUT = 30


class SQLiteEngine(Engine):
    """SQLite (through Python's ``sqlite3``)."""

    name = "sqlite"
    dialects = ("sqlite",)
    label = "SQLite"
    in_process = True
    file_urls = True
    typeof = True  # a numeric column may hold text
    minimum = (3, 25)
    version_note = " (for SQLite: the library Python's sqlite3 module is built with)"

    def fence(self, stmt: sa.Select) -> sa.Select:
        # SQLite substitutes a subquery's select list into the outer query: LIMIT -1 OFFSET 0
        return stmt.offset(0)

    def md5_hex(self, text: sa.ColumnElement) -> sa.ColumnElement:
        return getattr(sa.func, SQLITE_MD5)(text, type_=sa.String())

    # -------------------------------------------------------------- opening

    def engine_options(self, url: sa.URL, role: str, read_only: bool) -> dict[str, Any]:
        if role == "history":
            return {"connect_args": {"timeout": HISTORY_LOCK_TIMEOUT}}
        options = super().engine_options(url, role, read_only)
        path = _file(url)
        if read_only and path is not None:
            # mode=ro: a mistyped path fails instead of being created as an empty file, and
            # nothing segwatch sends can change the user's file; a file that is missing (or a
            # folder away for a while) fails to connect, retried as any connection is
            file = Path(path).resolve()
            uri = f"file:{quote(str(file))}?mode=ro"

            def _open() -> sqlite3.Connection:
                if not file.is_file():
                    what = "is a folder, not a SQLite file" if file.is_dir() else "no such file"
                    raise sqlite3.OperationalError(
                        f"{what}: {file} (a SQLite source is opened read-only, never created; check the "
                        "path in source.url: a relative one is taken from the config file's folder)")
                return sqlite3.connect(uri, uri=True, check_same_thread=False)

            options["creator"] = _open
        return options

    def before_create(self, url: sa.URL, role: str) -> None:
        db = url.database
        if db and db.startswith("file:") and url.query.get("uri") == "true":  # an SQLite URI: file:PATH?mode=ro
            db = db[len("file:"):]
            if url.query.get("mode") == "ro":  # opened read-only: nothing to create
                return
        if role == "history" and db and db != ":memory:":
            try:
                Path(db).parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise HistoryError(f"cannot create the folder for the history file {db}: {exc.strerror}") from exc

    def prepare(self, engine: sa.Engine, role: str) -> None:
        if role == "source":
            sa.event.listen(engine, "connect", _on_source_connect)
            return
        db = engine.url.database
        on_file = bool(db and db != ":memory:")

        def _on_connect(dbapi_conn: Any, _record: Any) -> None:  # pragma: no cover - every history test
            dbapi_conn.isolation_level = None  # let us issue BEGIN ourselves
            cur = dbapi_conn.cursor()
            cur.execute(f"PRAGMA busy_timeout={HISTORY_LOCK_TIMEOUT * 1000}")  # before anything that may wait
            if on_file and cur.execute("PRAGMA journal_mode").fetchone()[0].lower() != "wal":
                try:
                    cur.execute("PRAGMA journal_mode=WAL")  # once per file; WAL persists in the file
                except sqlite3.OperationalError:  # a read-only history is read in the mode it has
                    pass
            cur.close()

        def _on_begin(conn: sa.Connection) -> None:  # pragma: no cover
            conn.exec_driver_sql("BEGIN IMMEDIATE")  # two writers queue instead of failing on upgrade

        sa.event.listen(engine, "connect", _on_connect)
        sa.event.listen(engine, "begin", _on_begin)

    # -------------------------------------------------------------- source sessions

    def guard_source(self, engine: sa.Engine, session: SourceSession) -> None:
        """``PRAGMA query_only`` on every source connection (no statement may change the
        file, whatever a query calls), and the timeout as a progress handler: each statement
        gets a deadline when it starts, and SQLite's VM stops it (``interrupted``) once the
        deadline has passed."""
        timeout = session.timeout

        def _on_connect(dbapi_conn: Any, record: Any) -> None:
            dbapi_conn.execute("PRAGMA query_only = ON")
            if timeout:
                info = record.info

                def _past_deadline() -> int:
                    deadline = info.get(_DEADLINE)
                    return int(deadline is not None and time.monotonic() > deadline)

                dbapi_conn.set_progress_handler(_past_deadline, PROGRESS_STEPS)

        def _on_execute(conn: sa.Connection, *_args: Any) -> None:
            conn.connection.info[_DEADLINE] = time.monotonic() + timeout

        def _on_checkout(_dbapi_conn: Any, record: Any, _proxy: Any) -> None:
            record.info.pop(_DEADLINE, None)

        sa.event.listen(engine, "connect", _on_connect)
        if timeout:
            sa.event.listen(engine, "before_cursor_execute", _on_execute)
            sa.event.listen(engine.pool, "checkout", _on_checkout)
        self.listen_errors(engine, session)

    def translate_error(self, exc: BaseException, session: SourceSession) -> SourceError | None:
        text = str(exc).lower()
        if isinstance(exc, sqlite3.OperationalError) and text.startswith("interrupted"):
            return session.timed_out("SQLite", "interrupted by segwatch's progress handler")
        if isinstance(exc, sqlite3.OperationalError) and "readonly database" in text:
            return session.refused_write("SQLite", one_line(exc))
        return None

    # -------------------------------------------------------------- versions

    def server_version(self, conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
        return self.name, tuple(sqlite3.sqlite_version_info)

    # -------------------------------------------------------------- the time window

    def placed_time(self, col: sa.ColumnElement) -> sa.ColumnElement:
        return sa.func.datetime(col, type_=sa.String())

    def time_window(self, col: sa.ColumnElement, period: Any,
                    naive: tuple[datetime, datetime]) -> sa.ColumnElement[bool]:
        """SQLite stores timestamps as text: the column is normalised with
        ``datetime()`` and compared with text bounds of the same shape."""
        lo, hi = naive
        norm = sa.func.datetime(col)
        fmt = "%Y-%m-%d %H:%M:%S"
        return sa.and_(norm >= lo.strftime(fmt), norm < hi.strftime(fmt))

    # -------------------------------------------------------------- history

    def insert_missing(self, conn: sa.Connection, table: sa.Table, row: Mapping[str, Any]) -> bool:
        from sqlalchemy.dialects.sqlite import insert

        return conn.execute(insert(table).values(**row).on_conflict_do_nothing()).rowcount == 1


def _file(url: sa.URL) -> str | None:
    """The database file a ``sqlite:///`` URL names (None: in memory, or a ``file:`` URI)."""
    db = url.database
    if not db or db == ":memory:" or db.startswith("file:") or url.query.get("uri"):
        return None
    return db


def _on_source_connect(dbapi_conn: Any, _record: Any) -> None:
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
      rows on every engine (see :mod:`monitor.source.sampling`).
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


ENGINE = register(SQLiteEngine())
