"""MariaDB and MySQL: no inf/NaN, exact decimals within the server's digits, doubles by
``x + 0E0``, ``INSERT IGNORE`` for the history."""

from __future__ import annotations

from typing import Any, Mapping

import sqlalchemy as sa
from sqlalchemy.ext.compiler import compiles

from .base import Engine, register, to_double

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


@compiles(to_double, "mysql")
@compiles(to_double, "mariadb")
def _to_double_mysql(element: to_double, compiler: Any, **kw: Any) -> str:
    """SQLAlchemy skips ``CAST ... AS DOUBLE`` here, and an arithmetic mix with a decimal
    literal would stay decimal, so the server gets ``(x + 0E0)``, which it evaluates in
    double precision."""
    (arg,) = list(element.clauses)
    return f"({compiler.process(arg, **kw)} + 0E0)"


ENGINE = register(MySQLEngine())
