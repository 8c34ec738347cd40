"""SQL engines: one module per engine behind :class:`~monitor.engines.base.Engine`,
found by SQLAlchemy dialect name (:func:`get`), and the one factory
(:func:`create_engine`) that opens source and history databases. See
:mod:`monitor.engines.base`.
"""

from __future__ import annotations

from . import duckdb, generic, mysql, postgresql, spark, sqlite  # noqa: F401 - each registers its engine
from .base import (
    Engine,
    EngineTraits,
    SourceSession,
    check_server_version,
    create_engine,
    for_dialect,
    format_version,
    get,
    hash_array,
    names,
    one_line,
    redact,
    register,
    server_version,
    to_double,
)

__all__ = [
    "Engine", "EngineTraits", "SourceSession", "check_server_version", "create_engine", "for_dialect", "format_version", "get",
    "hash_array", "names", "one_line", "redact", "register", "server_version", "to_double",
]
