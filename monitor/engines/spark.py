"""Spark SQL through its Thrift server (``hive://`` URLs, PyHive's dialect).

What differs on Spark
---------------------
* **Time zones.** Spark's ``TIMESTAMP`` is an instant, shown in the session's zone
  (``spark.sql.session.timeZone``); ``TIMESTAMP_NTZ`` is wall-clock time. segwatch
  sets the session zone to UTC on every new connection (so a timestamp read as text,
  e.g. in the sampling key, is the same whatever the server's default), and writes
  the window bounds with explicit types: an instant column is compared with
  ``CAST('2026-03-02 05:00:00+00:00' AS TIMESTAMP)`` (an instant whatever the
  session's zone), a ``TIMESTAMP_NTZ`` column with ``CAST('...' AS TIMESTAMP_NTZ)``
  from the naive rule (``source.naive_time``), a ``DATE`` column with
  ``CAST('...' AS DATE)`` of the local dates.
* **Reflection.** PyHive reflects ``TIMESTAMP``, ``DATE`` and ``DECIMAL`` as
  ``TypeDecorator`` types whose bind processing always raises, drops the decimal's
  precision and scale, and does not know ``TIMESTAMP_NTZ``. segwatch reads
  ``DESCRIBE TABLE`` itself and maps Spark's type names to plain SQLAlchemy types
  (:func:`spark_type`); Spark has no primary keys, so a sample is keyed by the time
  and segment values.
* **Exact decimals.** ``DECIMAL(p, s)`` with ``p <= 17`` is summed in Spark's decimal
  arithmetic: the shifted value has at most 18 digits, its square 37, within Spark's
  38, so ``S1`` and ``S2`` (means and variances, hence F and Welch) are exact; ``S3``
  and ``S4`` (skewness, kurtosis) are summed as doubles (fourth powers would need 76
  digits). Wider decimals are summed as doubles. Decimal shifts are written as
  ``CAST('...' AS DECIMAL(p, s))`` (PyHive cannot bind a ``Decimal``).
* **Row order.** Spark scans files in parallel tasks, so ``LIMIT`` without
  ``ORDER BY`` may pick other rows on every run; the shift probe's rows are ordered
  (:meth:`SparkEngine.first_rows`) so that a period gives the same numbers on every run.
* **Sampling.** ``md5(text)``, as on the other md5 engines (the same sample as
  SQLite, MySQL/MariaDB or Trino for the same key text).
* **Errors.** Spark answers with its error class (``[TABLE_OR_VIEW_NOT_FOUND]``) and
  the Java stack; a missing table is recognised by the class, and the message segwatch
  shows is the server's first line, capped (:func:`monitor.engines.base.one_line`).
* **Version.** ``SELECT version()``; Spark 3.4 or newer (``TIMESTAMP_NTZ``); tested
  with Spark 4.3.
"""

from __future__ import annotations

import logging
import re
from datetime import datetime, timezone
from decimal import Decimal
from typing import TYPE_CHECKING, Any, Sequence

import sqlalchemy as sa
from sqlalchemy.exc import NoSuchTableError, SQLAlchemyError

from .base import Engine, register

if TYPE_CHECKING:
    from ..periods import Period

log = logging.getLogger(__name__)

#: Spark's widest decimal.
SPARK_DECIMAL_DIGITS = 38
#: Decimals up to this precision are summed exactly (the shifted value's square fits 38 digits).
SPARK_EXACT_PRECISION = 17

#: Spark's error classes that mean "no such table" (or schema) on reflection.
_NOT_FOUND = ("[TABLE_OR_VIEW_NOT_FOUND]", "[SCHEMA_NOT_FOUND]", "Table or view not found",
              "Table not found")


class TimestampNTZ(sa.types.UserDefinedType):
    """Spark's ``TIMESTAMP_NTZ`` (wall-clock time, no zone)."""

    cache_ok = True

    def get_col_spec(self, **kw: Any) -> str:
        return "TIMESTAMP_NTZ"


class SparkTimestamp(sa.types.UserDefinedType):
    """Spark's ``TIMESTAMP``: an instant (the type of the window bounds of such a column)."""

    cache_ok = True

    def get_col_spec(self, **kw: Any) -> str:
        return "TIMESTAMP"


class SparkDate(sa.types.UserDefinedType):
    """Spark's ``DATE`` (PyHive compiles ``sa.Date`` as ``TIMESTAMP``)."""

    cache_ok = True

    def get_col_spec(self, **kw: Any) -> str:
        return "DATE"


class SparkDecimal(sa.types.UserDefinedType):
    """``DECIMAL(p, s)`` spelled out (PyHive compiles ``sa.Numeric(p, s)`` as a bare
    ``DECIMAL``, which Spark reads as ``DECIMAL(10, 0)``)."""

    cache_ok = True

    def __init__(self, precision: int, scale: int):
        self.precision, self.scale = int(precision), int(scale)

    def get_col_spec(self, **kw: Any) -> str:
        return f"DECIMAL({self.precision},{self.scale})"


class NaiveDateTime(sa.DateTime):
    """A reflected ``TIMESTAMP_NTZ`` column (naive, like ``sa.DateTime()``), told apart
    from an instant (``sa.DateTime(timezone=True)``) by segwatch's time window."""

    cache_ok = True


_SIMPLE_TYPES: dict[str, Any] = {
    "boolean": sa.Boolean, "tinyint": sa.SmallInteger, "byte": sa.SmallInteger, "smallint": sa.SmallInteger,
    "short": sa.SmallInteger, "int": sa.Integer, "integer": sa.Integer, "bigint": sa.BigInteger,
    "long": sa.BigInteger, "float": sa.Float, "real": sa.Float, "double": sa.Double, "string": sa.String,
    "varchar": sa.String, "char": sa.String, "date": sa.Date, "binary": sa.LargeBinary,
}


def spark_type(text: str) -> sa.types.TypeEngine:
    """The SQLAlchemy type segwatch judges a Spark column by, from ``DESCRIBE``'s type name.

    ``timestamp`` (an instant) becomes ``DateTime(timezone=True)``, ``timestamp_ntz``
    a naive ``DateTime``, ``decimal(p,s)`` ``Numeric(p, s)``; complex and unknown
    types are unknown (``NullType``).
    """
    name = (text or "").strip().lower()
    if name in ("timestamp", "timestamp_ltz"):
        return sa.DateTime(timezone=True)
    if name == "timestamp_ntz":
        return NaiveDateTime()
    match = re.fullmatch(r"(?:decimal|numeric|dec)(?:\((\d+)\s*,\s*(\d+)\))?", name)
    if match:
        p, s = match.groups()
        return sa.Numeric(int(p), int(s)) if p else sa.Numeric(10, 0)  # Spark's default DECIMAL
    base = re.match(r"[a-z_]+", name)
    kind = _SIMPLE_TYPES.get(base.group(0) if base else "")
    return kind() if kind is not None else sa.types.NullType()


def quote(identifier: str) -> str:
    """A Spark identifier in backticks."""
    return "`" + identifier.replace("`", "``") + "`"


class SparkEngine(Engine):
    """Spark SQL 3.4 or newer over its Thrift server (HiveServer2 protocol)."""

    name = "spark"
    dialects = ("hive",)
    label = "Spark"
    exact = True
    minimum = (3, 4)
    #: Powers of the shifted value summed in decimal arithmetic (S3, S4 as doubles).
    exact_powers = 2

    # -------------------------------------------------------------- traits

    def exact_decimal(self, ctype: sa.Numeric) -> bool:
        p = ctype.precision
        return p is not None and p <= SPARK_EXACT_PRECISION

    def decimal_literal(self, value: Decimal) -> sa.ColumnElement:
        """``CAST('<value>' AS DECIMAL(p, s))`` with just the digits the value has."""
        value = Decimal(value)
        sign, digits, exponent = value.as_tuple()
        scale = max(0, -int(exponent))
        precision = max(1, len(digits) + max(0, int(exponent)), scale + 1)
        return sa.cast(sa.literal(format(value, "f"), sa.String()),
                       SparkDecimal(min(precision, SPARK_DECIMAL_DIGITS), scale))

    def first_rows(self, stmt: sa.Select, order_by: Sequence[sa.ColumnElement], limit: int) -> sa.Select:
        """Spark scans in parallel tasks: the first rows are those of an explicit order
        (every selected column, so tied rows are equal rows and the picked values are
        the same on every run)."""
        return stmt.order_by(*order_by).limit(limit)

    # -------------------------------------------------------------- opening

    def connect_statements(self, url: sa.URL, role: str) -> Sequence[str]:
        # timestamps read as text (the sampling key, a query: source's naive bounds) in UTC
        return ("SET spark.sql.session.timeZone=UTC",)

    def prepare(self, engine: sa.Engine, role: str) -> None:
        statements = list(self.connect_statements(engine.url, role))

        def _on_connect(dbapi_conn: Any, _record: Any) -> None:
            cursor = dbapi_conn.cursor()
            try:
                for statement in statements:
                    cursor.execute(statement)
                    cursor.fetchall()
            finally:
                cursor.close()

        sa.event.listen(engine, "connect", _on_connect)

    # -------------------------------------------------------------- versions

    def flavour(self, dialect: sa.engine.Dialect) -> str:
        return "spark"

    def server_version(self, conn: sa.Connection) -> tuple[str, tuple[int, ...] | None]:
        """``SELECT version()`` (e.g. ``4.3.0 98bc0212...``)."""
        try:
            text = str(conn.exec_driver_sql("SELECT version()").scalar() or "")
        except SQLAlchemyError:
            return "spark", None
        match = re.match(r"(\d+)\.(\d+)(?:\.(\d+))?", text)
        if not match:
            return "spark", None
        return "spark", tuple(int(x) for x in match.groups() if x is not None)

    # -------------------------------------------------------------- reflection

    def reflect_table(self, conn: sa.Connection, name: str, schema: str | None) -> sa.Table:
        """The table's columns from ``DESCRIBE TABLE`` with plain types (:func:`spark_type`)."""
        target = f"{quote(schema)}.{quote(name)}" if schema else quote(name)
        try:
            rows = conn.exec_driver_sql(f"DESCRIBE TABLE {target}").all()
        except SQLAlchemyError as exc:
            if self.is_not_found(exc):
                raise NoSuchTableError(name) from exc
            raise
        columns = []
        seen = set()
        for row in rows:
            col, dtype = (row[0] or "").strip(), (row[1] or "").strip()
            if not col or col.startswith("#"):
                break  # partition and detail sections repeat columns
            if col in seen:
                continue
            seen.add(col)
            columns.append(sa.Column(col, spark_type(dtype)))
        if not columns:
            raise NoSuchTableError(name)
        return sa.Table(name, sa.MetaData(), *columns, schema=schema)

    def is_not_found(self, exc: BaseException) -> bool:
        text = str(getattr(exc, "orig", None) or exc)
        return any(marker in text for marker in _NOT_FOUND)

    def table_names(self, conn: sa.Connection, schema: str | None) -> list[str]:
        sql = f"SHOW TABLES IN {quote(schema)}" if schema else "SHOW TABLES"
        try:
            rows = conn.exec_driver_sql(sql).all()
        except SQLAlchemyError as exc:
            if self.is_not_found(exc):
                return []
            raise
        # (namespace, tableName, isTemporary)
        return [str(r[1]) for r in rows if len(r) > 1]

    def column_type(self, ctype: sa.types.TypeEngine) -> sa.types.TypeEngine:
        """A type PyHive reflected (a ``query:`` source or another path) without its
        ``TypeDecorator``, whose bind processing always raises."""
        while isinstance(ctype, sa.types.TypeDecorator):
            ctype = ctype.impl_instance
        return ctype

    # -------------------------------------------------------------- the time window

    def time_window(self, col: sa.ColumnElement, period: Period,
                    naive: tuple[datetime, datetime]) -> sa.ColumnElement[bool]:
        """Bounds written with explicit types: instants for ``TIMESTAMP``, wall-clock
        bounds (the naive rule) for ``TIMESTAMP_NTZ`` and untyped columns, local dates
        for ``DATE`` (see the module notes)."""
        ctype = self.column_type(col.type)
        if isinstance(ctype, sa.Date) and not isinstance(ctype, sa.DateTime):
            lo, hi = (f"{period.start.date():%Y-%m-%d}", f"{period.end.date():%Y-%m-%d}")
            kind: sa.types.TypeEngine = SparkDate()
        elif isinstance(ctype, sa.DateTime) and ctype.timezone:
            lo, hi = (_instant(period.start), _instant(period.end))
            kind = SparkTimestamp()
        elif isinstance(ctype, NaiveDateTime):
            lo, hi = (f"{naive[0]:%Y-%m-%d %H:%M:%S.%f}", f"{naive[1]:%Y-%m-%d %H:%M:%S.%f}")
            kind = TimestampNTZ()
        else:  # a query: source's column (no type known): the naive rule, read in the session's UTC
            lo, hi = (f"{naive[0]:%Y-%m-%d %H:%M:%S.%f}", f"{naive[1]:%Y-%m-%d %H:%M:%S.%f}")
            kind = SparkTimestamp()
        bound = lambda text: sa.cast(sa.literal(text, sa.String()), kind)  # noqa: E731
        return sa.and_(col >= bound(lo), col < bound(hi))

    def failure_hint(self, exc: BaseException) -> str | None:
        text = str(getattr(exc, "orig", None) or exc)
        if "[TABLE_OR_VIEW_NOT_FOUND]" in text:
            return "check the table name and the URL's database (hive://host:port/database)"
        return None


def _instant(moment: datetime) -> str:
    """An instant as Spark reads it whatever the session's zone: UTC with its offset."""
    return f"{moment.astimezone(timezone.utc):%Y-%m-%d %H:%M:%S.%f}+00:00"


ENGINE = register(SparkEngine())
