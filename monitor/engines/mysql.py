"""MariaDB and MySQL: no inf/NaN, exact decimals within the server's digits, doubles by
``x + 0E0``, ``INSERT IGNORE`` for the history."""

from __future__ import annotations

from typing import Any, Mapping, Sequence

import sqlalchemy as sa
from sqlalchemy.ext.compiler import compiles

from ..errors import SourceError
from ..redact import one_line
from .base import Engine, SourceSession, register, to_double

#: Server error codes: MariaDB's max_statement_time, MySQL's max_execution_time, and a
#: write in a read-only transaction (both).
_MARIADB_TIMEOUT, _MYSQL_TIMEOUT, _READ_ONLY, _OUT_OF_RANGE = 1969, 3024, 1792, 1690

#: Decimals are summed exactly up to these digits after / before the point, so that
#: fourth powers of the shifted values stay inside the server's 65-81 digit decimals.
MYSQL_EXACT_SCALE = 15
MYSQL_EXACT_INTEGER_DIGITS = 17

_FLOORS = {"mariadb": ("MariaDB", (10, 2)), "mysql": ("MySQL", (8, 0))}


class MySQLEngine(Engine):
    """MariaDB 10.2+ and MySQL 8.0+ (one SQLAlchemy dialect; the server tells them apart)."""

    name = "mysql"
    dialects = ("mysql", "mariadb")
    label = "MySQL"
    snapshot_isolation = "REPEATABLE READ"
    non_finite = False  # cannot store inf or NaN
    exact = True

    def exact_decimal(self, ctype: sa.Numeric) -> bool:
        p, s = ctype.precision, ctype.scale
        if p is None or s is None:
            return False
        return s <= MYSQL_EXACT_SCALE and p - s <= MYSQL_EXACT_INTEGER_DIGITS

    def flavour(self, dialect: sa.engine.Dialect) -> str:
        return "mariadb" if getattr(dialect, "is_mariadb", False) or dialect.name == "mariadb" else "mysql"

    def version_floor(self, flavour: str) -> tuple[str, tuple[int, ...]] | None:
        return _FLOORS.get(flavour)

    def insert_missing(self, conn: sa.Connection, table: sa.Table, row: Mapping[str, Any]) -> bool:
        return conn.execute(sa.insert(table).values(**row).prefix_with("IGNORE")).rowcount == 1

    # -------------------------------------------------------------- source sessions

    def source_session_statements(self, dbapi_conn: Any, session: SourceSession) -> Sequence[str]:
        """Every transaction of the session read-only (``SET SESSION TRANSACTION READ ONLY``:
        a stored function called by the query cannot write either), and the statement
        timeout: MariaDB's ``max_statement_time`` (seconds), MySQL's ``max_execution_time``
        (milliseconds, SELECT statements)."""
        out = ["SET SESSION TRANSACTION READ ONLY"]
        if session.timeout:
            info = getattr(dbapi_conn, "get_server_info", None)
            if "mariadb" in str(info() if callable(info) else "").lower():
                out.append(f"SET SESSION max_statement_time = {session.timeout:g}")
            else:
                out.append(f"SET SESSION max_execution_time = {max(1, round(session.timeout * 1000))}")
        return out

    def is_overflow(self, exc: BaseException) -> bool:
        args = getattr(getattr(exc, "orig", exc), "args", ())
        return bool(args) and args[0] == _OUT_OF_RANGE  # "DOUBLE value is out of range"

    def translate_error(self, exc: BaseException, session: SourceSession) -> SourceError | None:
        args = getattr(exc, "args", ())
        code = args[0] if args and isinstance(args[0], int) else None
        if code == _MARIADB_TIMEOUT:
            return session.timed_out("MariaDB", "max_statement_time")
        if code == _MYSQL_TIMEOUT:
            return session.timed_out("MySQL", "max_execution_time")
        if code == _READ_ONLY:
            return session.refused_write("the MariaDB/MySQL server", one_line(exc))
        return None


@compiles(to_double, "mysql")
@compiles(to_double, "mariadb")
def _to_double_mysql(element: to_double, compiler: Any, **kw: Any) -> str:
    """SQLAlchemy skips ``CAST ... AS DOUBLE`` here, and an arithmetic mix with a decimal
    literal would stay decimal, so the server gets ``(x + 0E0)``, which it evaluates in
    double precision."""
    (arg,) = list(element.clauses)
    return f"({compiler.process(arg, **kw)} + 0E0)"


ENGINE = register(MySQLEngine())
