"""Dialects segwatch has no module for: the portable defaults of
:class:`~monitor.engines.base.Engine` (doubles by ``CAST``, ``md5(text)`` for sampling,
check-then-insert for the history, no version floor).

segwatch compiles its queries for Trino in the tests (no server is run) to keep the
push-down portable to a distributed engine; Trino hashes bytes, so its only difference
is the sampling hash.
"""

from __future__ import annotations

import sqlalchemy as sa

from .base import Engine, register


class GenericEngine(Engine):
    """Any other SQLAlchemy dialect: portable SQL only."""

    name = "generic"
    dialects = ()
    label = "SQL"


class TrinoEngine(GenericEngine):
    """Trino (compiled for in the tests only)."""

    name = "trino"
    dialects = ("trino",)
    label = "Trino"

    def md5_hex(self, text: sa.ColumnElement) -> sa.ColumnElement:
        return sa.func.lower(sa.func.to_hex(sa.func.md5(sa.func.to_utf8(text))), type_=sa.String())


ENGINE = register(GenericEngine())
register(TrinoEngine())
