"""The SQL engine protocol, the registry of engines and the one engine factory.

segwatch reads its source and writes its history through SQLAlchemy. What differs
from one database engine to the next lives in one module per engine
(:mod:`~monitor.engines.sqlite`, :mod:`~monitor.engines.postgresql`,
:mod:`~monitor.engines.mysql` for MariaDB and MySQL, :mod:`~monitor.engines.duckdb`,
and :mod:`~monitor.engines.generic` for dialects segwatch only compiles for), each an
:class:`Engine` subclass registered under its SQLAlchemy dialect names. Everything
else asks the engine object (``get(conn.dialect.name)``) instead of testing the name.

An engine says
--------------
* **traits** the push-down SQL allows for (:class:`EngineTraits`: text in numeric
  columns, inf/NaN storable, exact decimal sums, the subquery fence);
* the **sampling hash** (:meth:`Engine.hash_kind`, :meth:`Engine.sample_hash`) and the
  **casts** (:class:`to_double`, compiled per dialect);
* **session settings**: statements on every new connection
  (:meth:`Engine.connect_statements`, e.g. a ``SET``), engine options and listeners
  (:meth:`Engine.engine_options`, :meth:`Engine.prepare`), per-period transaction
  settings (:meth:`Engine.tune_transaction`) and the snapshot isolation level;
* the **fast value read** (:meth:`Engine.read_numbered`, :meth:`Engine.fetch_values`);
* the **source's time window**: how bounds are bound (:meth:`Engine.bind_instant`,
  :meth:`Engine.bind_naive`) or the whole window written (:meth:`Engine.time_window`);
* **reflection**: the table, its column types unwrapped (:meth:`Engine.column_type`),
  the tables of a schema, and which errors mean "no such table"
  (:meth:`Engine.is_not_found`);
* the **version floor** and how the server's version is asked (:meth:`Engine.server_version`);
* **failure hints**, the one-line fix a user sees (:meth:`Engine.failure_hint`);
* the **history specifics**: insert-if-absent (:meth:`Engine.insert_missing`) and the
  locking set up by :meth:`Engine.prepare` for the ``history`` role.

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

Adding an engine
----------------
One module here with an :class:`Engine` subclass (its ``dialects``, traits and the
hooks it needs) ending in ``register(MyEngine())``, one import line in
``monitor/engines/__init__.py``, its tests, and its row in ``docs/engines.md``.
"""

from __future__ import annotations

import logging
import weakref
from dataclasses import dataclass
from datetime import datetime, timezone
from decimal import Decimal
from typing import TYPE_CHECKING, Any, ClassVar, Iterable, Mapping, Sequence

import sqlalchemy as sa
from sqlalchemy.exc import NoSuchTableError, SQLAlchemyError
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.sql.functions import FunctionElement

from ..errors import ConfigError, HistoryError, SourceError
from ..redact import one_line, redact  # noqa: F401 - the one rule (monitor.redact), re-exported

if TYPE_CHECKING:
    import numpy as np

    from ..periods import Period

log = logging.getLogger(__name__)

#: What an engine is opened for: reading the job's source, or writing segwatch's history.
ROLES = ("source", "history")


@dataclass(frozen=True)
class SourceSession:
    """How a source's sessions are guarded: read-only, and each statement stopped after
    ``timeout`` seconds. ``where`` names the config file for messages (``<file>: source.timeout``)."""

    timeout: float | None = None
    where: str = "source"

    def timeout_text(self) -> str:
        t = self.timeout or 0.0
        return f"{t:g} s" if t < 120 else f"{t / 60:g} min"

    def timed_out(self, engine: str, how: str) -> SourceError:
        return SourceError(
            f"{self.where}: source.timeout: a source query ran longer than {self.timeout_text()} and {engine} "
            f"stopped it ({how}); another session may hold a lock on the table, or the query needs more time: "
            "find what blocks it, or raise source.timeout (seconds or an ISO 8601 duration such as PT15M)")

    def refused_write(self, engine: str, detail: str) -> SourceError:
        return SourceError(
            f"{self.where}: source: the source query tried to change the database and {engine} refused it "
            f"({detail}); segwatch reads the source in a read-only session: give a query (or call functions) "
            "that only read")


def format_version(version: tuple[int, ...] | None) -> str:
    return ".".join(str(x) for x in version) if version else "unknown"


# ------------------------------------------------------------------ traits


@dataclass(frozen=True)
class EngineTraits:
    """What the push-down SQL has to allow for on one engine.

    Attributes
    ----------
    name : str
        SQLAlchemy dialect name (``sqlite``, ``postgresql``, ``mysql``, ``duckdb``, ...);
        :attr:`engine` is the registered engine of that name.
    typeof : bool
        Values may be text in a numeric column (SQLite): test ``typeof``.
    non_finite : bool
        The engine can store inf/NaN (all but MySQL/MariaDB).
    exact : bool
        ``NUMERIC``/``DECIMAL`` sums can be kept exact (PostgreSQL, MySQL/MariaDB).
    version : tuple of int
        The server's version once a connection has been made (empty before).
    """

    name: str
    typeof: bool
    non_finite: bool
    exact: bool
    version: tuple[int, ...] = ()

    @classmethod
    def of(cls, dialect: sa.engine.Dialect) -> EngineTraits:
        return get(dialect.name).traits(dialect)

    @property
    def engine(self) -> Engine:
        return get(self.name)


# ------------------------------------------------------------------ casts


class to_double(FunctionElement):  # noqa: N801 - reads like the SQL function it stands for
    """``CAST(x AS DOUBLE)`` per dialect (an engine module may compile it its own way,
    as :mod:`monitor.engines.mysql` does)."""

    type = sa.Double()
    name = "to_double"
    inherit_cache = True


@compiles(to_double)
def _to_double_default(element: to_double, compiler: Any, **kw: Any) -> str:
    (arg,) = list(element.clauses)
    return compiler.process(sa.cast(arg, sa.Double()), **kw)


def key_text(key_columns: Sequence[sa.ColumnElement]) -> sa.ColumnElement:
    """``key1 || '|' || key2 ...`` with NULL parts as empty strings (the sampling key)."""
    parts: list[sa.ColumnElement] = []
    for j, c in enumerate(key_columns):
        if j:
            parts.append(sa.literal("|", sa.String()))
        parts.append(sa.func.coalesce(sa.cast(c, sa.String()), sa.literal("", sa.String())))
    text = parts[0]
    for part in parts[1:]:
        text = text.concat(part)
    return text


def hash_array(values: Any) -> np.ndarray:
    """Sampling hashes as an array that sorts like them: 64-bit integers, or the hex digests
    as 32-byte strings (an empty input gives an empty string array)."""
    import numpy as np

    a = np.asarray(values)
    return a.astype(np.int64) if a.size and a.dtype.kind in "iu" else a.astype("S32")


# ------------------------------------------------------------------ the protocol


class Engine:
    """One SQL engine: what segwatch does differently there. Every hook has the
    portable default; an engine module overrides what its engine needs.

    Attributes
    ----------
    name : str
        Registry name (the main SQLAlchemy dialect name).
    dialects : tuple of str
        Every SQLAlchemy dialect name this engine serves.
    label : str
        The engine's name in messages.
    in_process : bool
        The engine runs inside segwatch's process (no server): SQLite, DuckDB.
    file_urls : bool
        A URL's database is a file path (a relative one is made absolute by the config).
    snapshot_isolation : str or None
        Isolation level under which one period's queries share one snapshot.
    typeof, non_finite, exact : bool
        The push-down traits (see :class:`EngineTraits`).
    minimum : tuple of int or None
        The oldest server version segwatch supports (None: not checked).
    """

    name: ClassVar[str] = "generic"
    dialects: ClassVar[tuple[str, ...]] = ()
    label: ClassVar[str] = "SQL"
    in_process: ClassVar[bool] = False
    file_urls: ClassVar[bool] = False
    snapshot_isolation: ClassVar[str | None] = None
    typeof: ClassVar[bool] = False
    non_finite: ClassVar[bool] = True
    exact: ClassVar[bool] = False
    minimum: ClassVar[tuple[int, ...] | None] = None
    #: Added to the "too old" message.
    version_note: ClassVar[str] = ""
    #: Powers of the shifted value an exact metric sums in decimal arithmetic (higher
    #: ones as doubles: Spark, whose decimals end at 38 digits).
    exact_powers: ClassVar[int] = 4

    def __repr__(self) -> str:
        return f"<engine {self.name}>"

    # -------------------------------------------------------------- push-down traits

    def traits(self, dialect: sa.engine.Dialect) -> EngineTraits:
        """The push-down traits on ``dialect`` (with the server version once connected)."""
        version = getattr(dialect, "server_version_info", None) or ()
        return EngineTraits(
            name=dialect.name,
            typeof=self.typeof,
            non_finite=self.non_finite,
            exact=self.exact,
            version=tuple(v for v in version if isinstance(v, int)),
        )

    def exact_decimal(self, ctype: sa.Numeric) -> bool:
        """Whether sums of this ``NUMERIC`` column stay exact (given :attr:`exact`)."""
        return True

    def decimal_literal(self, value: Decimal) -> sa.ColumnElement:
        """An exact shift in SQL (a bound ``Decimal`` by default)."""
        return sa.literal(value, sa.Numeric())

    def first_rows(self, stmt: sa.Select, order_by: Sequence[sa.ColumnElement], limit: int) -> sa.Select:
        """At most ``limit`` rows of ``stmt``, for the shift probe. By default ``LIMIT``
        alone: the engine stops early and hands out rows in its scan order. An engine
        whose scans run in parallel tasks orders by ``order_by`` first (Spark), so
        that the same rows come every time."""
        return stmt.limit(limit)

    def fence(self, stmt: sa.Select) -> sa.Select:
        """Keep the planner from inlining a subquery's expressions into every use
        (see :func:`monitor.source.pushdown.aggregate_query`); by default left as it is."""
        return stmt

    # -------------------------------------------------------------- sampling hash

    def hash_kind(self, version: tuple[int, ...]) -> str:
        """``md5`` (hex digests), or an engine's own kind (``int64``, ``md5_60``)."""
        return "md5"

    def md5_hex(self, text: sa.ColumnElement) -> sa.ColumnElement:
        """The lowercase hex MD5 of ``text``."""
        return sa.func.md5(text, type_=sa.String())

    def sample_hash(self, key_columns: Sequence[sa.ColumnElement], seed: int, kind: str) -> sa.ColumnElement:
        """The sampling hash of a row's key and the seed (see :mod:`monitor.source.sampling`)."""
        text = key_text(key_columns).concat(sa.literal(f":{int(seed)}", sa.String()))
        return self.md5_hex(text)

    # -------------------------------------------------------------- opening

    def engine_options(self, url: sa.URL, role: str, read_only: bool) -> dict[str, Any]:
        """Keyword arguments for ``sqlalchemy.create_engine`` (pre-ping and connection
        recycling as RELIABILITY.md asks)."""
        return {"pool_pre_ping": True, "pool_recycle": 1800}

    def before_create(self, url: sa.URL, role: str) -> None:
        """Anything to do before the engine is created (e.g. make a file's folder)."""

    def files_relative_to(self, engine: sa.Engine, folder: str) -> None:
        """Make relative file names in a source's SQL resolve against ``folder`` (the
        config file's), for engines that read files named in SQL (DuckDB)."""

    def connect_statements(self, url: sa.URL, role: str) -> Sequence[str]:
        """Statements run on every new connection (session settings such as ``SET``)."""
        return ()

    def prepare(self, engine: sa.Engine, role: str) -> None:
        """Listeners on a new engine: by default, :meth:`connect_statements` on connect."""
        statements = list(self.connect_statements(engine.url, role))
        if statements:
            def _on_connect(dbapi_conn: Any, _record: Any) -> None:
                _execute_all(dbapi_conn, statements)

            sa.event.listen(engine, "connect", _on_connect)

    # -------------------------------------------------------------- source sessions

    def guard_source(self, engine: sa.Engine, session: SourceSession) -> None:
        """Make every source session read-only and bound each statement by ``session.timeout``.

        By default: :meth:`source_session_statements` on every new connection (then a
        commit, so the settings are the session's own), and :meth:`translate_error` turning
        the engine's timeout and read-only refusals into one-line :class:`SourceError` messages.
        Engines that cannot do either leave the hooks alone (and say so in docs/engines.md).
        """
        def _on_connect(dbapi_conn: Any, _record: Any) -> None:
            statements = list(self.source_session_statements(dbapi_conn, session))
            if not statements:
                return
            _execute_all(dbapi_conn, statements)
            dbapi_conn.commit()

        sa.event.listen(engine, "connect", _on_connect)
        self.listen_errors(engine, session)

    def listen_errors(self, engine: sa.Engine, session: SourceSession) -> None:
        """Raise :meth:`translate_error`'s answer instead of the driver's error, where it has one."""
        def _on_error(context: Any) -> None:
            better = self.translate_error(context.original_exception, session)
            if better is not None:
                raise better from context.original_exception

        sa.event.listen(engine, "handle_error", _on_error)

    def source_session_statements(self, dbapi_conn: Any, session: SourceSession) -> Sequence[str]:
        """Statements that make a new source session read-only and set its statement timeout."""
        return ()

    def translate_error(self, exc: BaseException, session: SourceSession) -> SourceError | None:
        """A one-line error for a statement the engine stopped (timeout) or refused (a write in a
        read-only session); None for anything else."""
        return None

    # -------------------------------------------------------------- versions

    def flavour(self, dialect: sa.engine.Dialect) -> str:
        """The engine's name for version checks (MariaDB apart from MySQL)."""
        return dialect.name

    def server_version(self, conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
        """The flavour and the server version (None when unknown)."""
        info = conn.dialect.server_version_info
        name = self.flavour(conn.dialect)
        if not info:
            return name, None
        return name, tuple(int(x) for x in info if isinstance(x, int))

    def version_floor(self, flavour: str) -> tuple[str, tuple[int, ...]] | None:
        """The label and the oldest supported version of ``flavour`` (None: not checked)."""
        return (self.label, self.minimum) if self.minimum else None

    # -------------------------------------------------------------- reflection

    def reflect_table(self, conn: sa.Connection, name: str, schema: str | None) -> sa.Table:
        """The source table; raises ``NoSuchTableError`` when there is none."""
        try:
            return sa.Table(name, sa.MetaData(), schema=schema, autoload_with=conn)
        except NoSuchTableError:
            raise
        except SQLAlchemyError as exc:
            if self.is_not_found(exc):
                raise NoSuchTableError(name) from exc
            raise

    def is_not_found(self, exc: BaseException) -> bool:
        """Whether a reflection error means "no such table" (beyond ``NoSuchTableError``)."""
        return False

    def table_names(self, conn: sa.Connection, schema: str | None) -> list[str]:
        """The tables of ``schema`` (for the "no such table" message)."""
        return list(sa.inspect(conn).get_table_names(schema=schema))

    def column_type(self, ctype: sa.types.TypeEngine) -> sa.types.TypeEngine:
        """The type segwatch judges a reflected column by (an engine may unwrap a
        ``TypeDecorator`` its dialect reflects)."""
        return ctype

    # -------------------------------------------------------------- the time window

    def bind_instant(self, value: datetime) -> Any:
        """A window bound for a zone-aware column: a UTC instant (as given, by default)."""
        return value

    def bind_naive(self, value: datetime) -> Any:
        """A window bound for a timestamp without a zone (as given, by default)."""
        return value

    def placed_time(self, col: sa.ColumnElement) -> sa.ColumnElement:
        """The time column as the window compares it (SQLite: ``datetime(col)``), read by
        ``segwatch check`` to find values no window can place."""
        return col

    def time_window(self, col: sa.ColumnElement, period: Period,
                    naive: tuple[datetime, datetime]) -> sa.ColumnElement[bool]:
        """The condition placing a record in ``period``: ``DATE`` columns by local
        dates, zone-aware columns by UTC instants, other timestamps by the naive
        bounds ``naive`` (see :mod:`monitor.source.reader`)."""
        ctype = self.column_type(col.type)
        if isinstance(ctype, sa.Date) and not isinstance(ctype, sa.DateTime):
            return sa.and_(col >= period.start.date(), col < period.end.date())
        if isinstance(ctype, sa.DateTime) and ctype.timezone:
            return sa.and_(
                col >= self.bind_instant(period.start.astimezone(timezone.utc)),
                col < self.bind_instant(period.end.astimezone(timezone.utc)),
            )
        lo, hi = naive
        return sa.and_(col >= self.bind_naive(lo), col < self.bind_naive(hi))

    # -------------------------------------------------------------- one period's reads

    def tune_transaction(self, conn: sa.Connection, columns: int) -> None:
        """Settings for one period's transaction reading ``columns`` columns."""

    def numbered_read_possible(self, conn: sa.Connection) -> bool:
        """Whether :meth:`read_numbered` can run on this connection."""
        return False

    def read_numbered(self, conn: sa.Connection, stmt: sa.Select, width: int, *,
                      hashed: bool) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
        """The fast read of the values query reshaped to plain numbers (columns ``g``,
        ``h`` when hashed, ``v<i>``; see :func:`monitor.source.reader._numbered`):
        the segment numbers, the hashes (:func:`hash_array` form) and one float array
        per metric."""
        raise NotImplementedError(f"{self.label} has no fast value read")

    def fetch_values(self, conn: sa.Connection, stmt: sa.Select, chunk: int
                     ) -> tuple[list[np.ndarray] | None, Iterable[Sequence[Any]] | None]:
        """Run the values query: either whole columns (arrays), or chunks of rows."""
        result = conn.execute(stmt.execution_options(yield_per=chunk))
        return None, result.partitions()

    def is_overflow(self, exc: BaseException) -> bool:
        """Whether a failed push-down query overflowed double precision (an engine that raises
        instead of giving infinity, such as PostgreSQL's sums of squares past ~1e154): the
        period is then read row by row (``compute: local``)."""
        return False

    def failure_hint(self, exc: BaseException) -> str | None:
        """A few words on what to do about a failed push-down query (None: the general hint)."""
        return None

    # -------------------------------------------------------------- history

    def insert_missing(self, conn: sa.Connection, table: sa.Table, row: Mapping[str, Any]) -> bool:
        """Insert ``row`` unless a row with the same primary key exists; True when
        inserted. Portable form: check, then insert (safe inside the caller's
        serialising transaction)."""
        where = [c == row[c.name] for c in table.primary_key.columns]
        if conn.execute(sa.select(sa.literal(1)).select_from(table).where(*where)).first() is not None:
            return False
        return conn.execute(sa.insert(table).values(**row)).rowcount == 1


# ------------------------------------------------------------------ registry

_REGISTRY: dict[str, Engine] = {}
_FALLBACK = "generic"


def register(engine: Engine) -> Engine:
    """Register ``engine`` under its name and every dialect name it serves."""
    for name in (engine.name, *engine.dialects):
        _REGISTRY[name] = engine
    return engine


def get(name: str) -> Engine:
    """The engine for a dialect (or backend) name; the generic engine for others."""
    engine = _REGISTRY.get(name)
    if engine is None:
        engine = _REGISTRY[_FALLBACK]
    return engine


def for_dialect(dialect: sa.engine.Dialect) -> Engine:
    return get(dialect.name)


def names() -> tuple[str, ...]:
    """The registered engines' names."""
    return tuple(sorted({e.name for e in _REGISTRY.values()}))


# ------------------------------------------------------------------ the factory


def create_engine(url: str, role: str = "source", *, read_only: bool = False,
                  session: SourceSession | None = None) -> sa.Engine:
    """A SQLAlchemy engine for ``url``, opened for ``role`` (``source`` or ``history``).

    A ``session`` (source role only) makes every connection read-only and bounds each
    statement by its timeout, as the engine module can (:meth:`Engine.guard_source`).

    The engine module of the URL's backend gives the options (pre-ping and recycling;
    DuckDB files read-only and without a pool for a source), does what must come
    before (a history file's folder) and adds its listeners (SQLite: the functions
    the push-down needs, or for the history WAL, a busy timeout and ``BEGIN
    IMMEDIATE``; DuckDB: no progress bar, a memory limit).

    Raises
    ------
    SourceError or HistoryError
        One line naming the (redacted) URL, by role.
    """
    if role not in ROLES:
        raise ValueError(f"role must be one of {', '.join(ROLES)}, not {role!r}")
    try:
        parsed = sa.engine.make_url(url)
    except Exception as exc:  # noqa: BLE001 - any parse failure is the user's URL
        if role == "history":
            raise HistoryError(f"history.url: cannot parse {url!r}: {exc}") from exc
        raise SourceError(f"cannot open database URL {redact(url)}: {one_line(exc)}") from exc
    kind = get(parsed.get_backend_name())
    kind.before_create(parsed, role)
    try:
        engine = sa.create_engine(url, **kind.engine_options(parsed, role, read_only))
    except (SQLAlchemyError, ImportError, ValueError) as exc:
        if session is not None and isinstance(exc, sa.exc.NoSuchModuleError):
            raise ConfigError(
                f"{session.where}: source.url: no SQLAlchemy dialect or driver for {parsed.drivername!r} "
                f"({redact(url)}): {one_line(exc)}; check the URL's scheme, or install the driver "
                "(pip install 'segwatch[engines]' brings PostgreSQL, MariaDB/MySQL and DuckDB)") from exc
        if role == "history":
            raise HistoryError(f"history.url: cannot open {redact(url)}: {one_line(exc)}") from exc
        raise SourceError(f"cannot open database URL {redact(url)}: {one_line(exc)}") from exc
    kind.prepare(engine, role)
    if session is not None and role == "source":
        kind.guard_source(engine, session)
        _SESSIONS[engine] = session
    return engine


_SESSIONS: "weakref.WeakKeyDictionary[sa.Engine, SourceSession]" = weakref.WeakKeyDictionary()


def session_of(conn: sa.Connection) -> SourceSession | None:
    """The :class:`SourceSession` a source connection was opened with (None: unguarded)."""
    return _SESSIONS.get(conn.engine)


# ------------------------------------------------------------------ versions


def server_version(conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
    """The engine flavour (``mariadb`` apart from ``mysql``) and the server version."""
    return for_dialect(conn.dialect).server_version(conn)


def check_server_version(engine: str, version: tuple[int, ...] | None, where: str) -> None:
    """Refuse a server older than segwatch supports.

    Parameters
    ----------
    engine : str
        The flavour from :func:`server_version` (``sqlite``, ``postgresql``,
        ``mariadb``, ``mysql``; engines without a floor are not checked).
    version : tuple of int or None
        The server's version; None (unknown) passes.
    where : str
        The place to name in the message (e.g. the redacted source URL).

    Raises
    ------
    SourceError
        With a one-line message naming the engine, the version found and the minimum.
    """
    kind = get(engine)
    floor = kind.version_floor(engine)
    if floor is None or not version:
        return
    label, minimum = floor
    if tuple(version[: len(minimum)]) < minimum:
        raise SourceError(
            f"{where}: {label} {format_version(version)} is too old; segwatch needs {label} "
            f"{format_version(minimum)} or newer (window functions); upgrade the server"
            + kind.version_note
        )


def _execute_all(dbapi_conn: Any, statements: Sequence[str]) -> None:
    """Run ``statements`` in order on a new driver connection (one cursor, always closed)."""
    cursor = dbapi_conn.cursor()
    try:
        for statement in statements:
            cursor.execute(statement)
    finally:
        cursor.close()
