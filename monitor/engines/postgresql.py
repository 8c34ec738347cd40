"""PostgreSQL: exact decimal sums, a seeded 64-bit hash for sampling (11+), JIT off for
segwatch's wide queries, and the values read through binary ``COPY``."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Mapping, Sequence

import sqlalchemy as sa

from ..errors import SourceError
from ..redact import one_line
from .base import Engine, SourceSession, key_text, register, session_of

if TYPE_CHECKING:
    import numpy as np

#: Bytes of the COPY stream gathered before numpy parses them.
COPY_BLOCK_BYTES = 4 << 20
_COPY_FIX = " (a proxy or driver that alters COPY data?); compute: local reads the rows instead"
_COPY_SIGNATURE = b"PGCOPY\n\xff\r\n\x00"


class PostgreSQLEngine(Engine):
    """PostgreSQL 10 or newer."""

    name = "postgresql"
    dialects = ("postgresql",)
    label = "PostgreSQL"
    snapshot_isolation = "REPEATABLE READ"
    exact = True
    minimum = (10,)

    def fence(self, stmt: sa.Select) -> sa.Select:
        # PostgreSQL inlines a subquery's select list into every use; OFFSET 0 is the customary fence
        return stmt.offset(0)

    def hash_kind(self, version: tuple[int, ...]) -> str:
        """``int64`` from PostgreSQL 11 (``hashint8extended``/``hashtextextended``), else ``md5``."""
        return "int64" if version >= (11,) else "md5"

    def sample_hash(self, key_columns: Sequence[sa.ColumnElement], seed: int, kind: str) -> sa.ColumnElement:
        """``int64``: ``hashint8extended(key, seed)`` for one integer key column, else
        ``hashtextextended(key1|key2|..., seed)`` (a NULL key counts as 0 / an empty string)."""
        if kind != "int64":
            return super().sample_hash(key_columns, seed, kind)
        seed_lit = sa.literal(int(seed), sa.BigInteger())
        if len(key_columns) == 1 and isinstance(key_columns[0].type, sa.Integer):
            key = sa.func.coalesce(sa.cast(key_columns[0], sa.BigInteger()), sa.literal(0, sa.BigInteger()))
            return sa.func.hashint8extended(key, seed_lit, type_=sa.BigInteger())
        return sa.func.hashtextextended(key_text(key_columns), seed_lit, type_=sa.BigInteger())

    def tune_transaction(self, conn: sa.Connection, columns: int) -> None:
        """PostgreSQL 11+ compiles a query whose estimated cost passes ``jit_above_cost``
        with LLVM; for a query with hundreds of aggregate expressions that compilation
        alone took longer than the scan it was meant to speed up (about 4 s of 6 s at
        2,000,000 rows x 20 metrics here), so JIT is switched off for segwatch's own
        transaction (``SET LOCAL``; the server's setting is untouched)."""
        version = getattr(conn.dialect, "server_version_info", None) or (0,)
        if version >= (11,):
            conn.exec_driver_sql("SET LOCAL jit = off")

    # -------------------------------------------------------------- source sessions

    def source_session_statements(self, dbapi_conn: Any, session: SourceSession) -> Sequence[str]:
        """Every transaction of the session read-only (a function called by a query cannot
        write either: PostgreSQL refuses the write), and ``statement_timeout`` in milliseconds
        (a wait for another session's lock counts)."""
        out = ["SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY"]
        if session.timeout:
            out.append(f"SET statement_timeout = {max(1, round(session.timeout * 1000))}")
        return out

    def is_overflow(self, exc: BaseException) -> bool:
        # numeric_value_out_of_range: float8 aggregates (even avg keeps a sum of squares) raise on overflow
        return getattr(getattr(exc, "orig", exc), "sqlstate", None) == "22003"

    def translate_error(self, exc: BaseException, session: SourceSession) -> SourceError | None:
        state = getattr(exc, "sqlstate", None)
        if state == "57014" and "statement timeout" in str(exc):  # query_canceled by statement_timeout
            return session.timed_out("PostgreSQL", "statement_timeout")
        if state == "25006":  # read_only_sql_transaction
            return session.refused_write("PostgreSQL", one_line(exc))
        return None

    # -------------------------------------------------------------- binary COPY

    def numbered_read_possible(self, conn: sa.Connection) -> bool:
        driver = getattr(conn.connection, "driver_connection", None)
        return hasattr(getattr(driver, "cursor", None), "__call__") and type(driver).__module__.startswith("psycopg")

    def read_numbered(self, conn: sa.Connection, stmt: sa.Select, width: int, *,
                      hashed: bool) -> tuple[np.ndarray, np.ndarray, list[np.ndarray]]:
        """The values through PostgreSQL's binary ``COPY ... TO STDOUT``, parsed by numpy.

        Every field of the reshaped query has a fixed width (the segment's number, the
        hash as a 64-bit integer or, before PostgreSQL 11, 32 hex characters, and NaN
        instead of NULL), so each row has the same layout (PostgreSQL's documented
        binary copy format: a 16-bit field count, then per field a 32-bit length and
        the big-endian value), and chunks of the stream are read with one structured
        numpy dtype instead of creating a Python object per value. Runs on the
        transaction's own connection, inside its snapshot.
        """
        import numpy as np

        sub = stmt.selected_columns
        compiled = stmt.compile(dialect=conn.dialect, compile_kwargs={"render_postcompile": True})
        text_hash = hashed and not isinstance(sub.h.type, sa.BigInteger)
        fields = [("nf", ">i2"), ("l_g", ">i4"), ("g", ">i4")]
        if hashed:
            fields += [("l_h", ">i4"), ("h", "S32" if text_hash else ">i8")]
        for j in range(width):
            fields += [(f"l{j}", ">i4"), (f"v{j}", ">f8")]
        dtype = np.dtype(fields)
        expect = {"nf": len(sub), "l_g": 4, "l_h": 32 if text_hash else 8, **{f"l{j}": 8 for j in range(width)}}
        names_out = ["g", *(["h"] if hashed else []), *[f"v{j}" for j in range(width)]]
        native: dict[str, Any] = {"g": np.int32, "h": "S32" if text_hash else np.int64,
                                  **{f"v{j}": np.float64 for j in range(width)}}
        parts: dict[str, list[np.ndarray]] = {name: [] for name in names_out}
        buf = bytearray()
        pending: list[bytes] = []  # libpq hands out one row per chunk: parse in blocks
        size = 0
        start = True

        def parse() -> None:
            # each block becomes native column arrays at once, so only one block's raw bytes live
            nonlocal start, size
            buf.extend(b"".join(pending))
            pending.clear()
            size = 0
            if start:
                if len(buf) < 19:
                    return
                if bytes(buf[:11]) != _COPY_SIGNATURE:
                    raise SourceError(f"PostgreSQL COPY returned an unexpected header{_COPY_FIX}")
                ext = int.from_bytes(buf[15:19], "big")
                del buf[:19 + ext]
                start = False
            whole = len(buf) // dtype.itemsize * dtype.itemsize
            if not whole:
                return
            block = np.frombuffer(memoryview(buf)[:whole], dtype=dtype)
            for name, size_ in expect.items():
                if name in dtype.names and not np.all(block[name] == size_):
                    raise SourceError(f"PostgreSQL COPY returned rows of an unexpected layout{_COPY_FIX}")
            for name in names_out:
                parts[name].append(block[name].astype(native[name]))
            del block
            del buf[:whole]

        cursor = conn.connection.driver_connection.cursor()
        try:
            with cursor.copy(f"COPY ({compiled}) TO STDOUT (FORMAT BINARY)", compiled.params) as copy:
                for chunk in copy:
                    pending.append(bytes(chunk))
                    size += len(chunk)
                    if size >= COPY_BLOCK_BYTES:
                        parse()
            parse()
        except Exception as exc:
            session = session_of(conn)
            better = self.translate_error(exc, session) if session is not None else None
            if better is not None:  # the COPY runs on the driver's cursor, outside SQLAlchemy's error events
                raise better from exc
            raise
        finally:
            cursor.close()
        if bytes(buf) not in (b"\xff\xff", b""):
            raise SourceError(f"PostgreSQL COPY returned rows of an unexpected layout{_COPY_FIX}")
        columns = {}
        for name in names_out:
            pieces = parts.pop(name)
            columns[name] = np.concatenate(pieces) if pieces else np.empty(0, dtype=native[name])
            del pieces
        hashes = columns["h"] if hashed else np.empty(0, dtype="S32")
        return columns["g"], hashes, [columns[f"v{j}"] for j in range(width)]

    # -------------------------------------------------------------- history

    def insert_missing(self, conn: sa.Connection, table: sa.Table, row: Mapping[str, Any]) -> bool:
        # the rowcount of an INSERT is not reported here (-1): ask for the row back
        from sqlalchemy.dialects.postgresql import insert

        pk = list(table.primary_key.columns)[0]
        return conn.execute(insert(table).values(**row).on_conflict_do_nothing().returning(pk)).first() is not None


ENGINE = register(PostgreSQLEngine())
