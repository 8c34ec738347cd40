"""The history database: every stored period's results, its events and the alert outbox.

Tables (prefix ``sw_``) are created on the first write with SQLAlchemy Core, so any
SQLAlchemy URL works; the default is a SQLite file. Reading never creates or changes
a table: ``history``, ``report`` and ``alerts`` work on a read-only history.

* ``sw_schema`` — the layout's version (:data:`SCHEMA_VERSION`); a history without it is
  version 0. Opening an older history for writing upgrades it in place (columns added,
  label columns widened); a newer one is refused with a line that says to upgrade segwatch.
* ``sw_runs`` — one row per (job, period): when it was computed, and in ``settings`` the
  :class:`~monitor.model.RunSettings` its verdicts were judged by (JSON; NULL for periods
  stored before schema 1).
* ``sw_metric_results`` — one row per metric: method, statistic, p, q, effect size,
  plus the full JSON entry as printed by ``run --json`` (segments, bounded pairs:
  :data:`monitor.model.PAIR_FORMS` ``significant``, assumptions, data quality). An entry
  longer than :data:`PACK_ABOVE` characters is kept LZMA-packed in ``packed`` (a
  :data:`PACK_MARK` header, then the raw LZMA2 stream of the JSON) and ``payload`` holds a
  stand-in naming the metric; reads unpack it.
* ``sw_segment_results`` — per segment, and ``sw_pair_results`` — per pair: written by
  releases before segments and pairs were stored once, in the metric's entry; kept so that
  those histories stay readable by SQL (a period stored again drops its rows).
* ``sw_events`` — events, keyed by a stable hash of (job, period, kind, metric, segment).
* ``sw_outbox`` — one row per (event, alert channel): pending, sent or dead, with the
  number of attempts, the last error and when the next attempt is due (backoff).
* ``sw_ledger`` — one row per (job, period): pending → running → done / failed, with
  attempts, last error and timestamps (see :mod:`monitor.store.ledger`).
* ``sw_leases`` — who may compute a period (or deliver a job's alerts) right now:
  owner ``host:pid:uuid`` and an expiry; claimed with a conditional insert/update.

Storing a period is one transaction. Results of the period are replaced whole;
events are reconciled by key, so running a period again neither duplicates an event
nor sends an alert that was already sent (the outbox keeps its state). When the run
holds a lease, the same transaction checks the lease is still ours, releases it and
marks the period ``done`` in the ledger: results, events, outbox rows and the ledger
change together or not at all.

Operational events (kinds starting with ``op_``: a run that failed, a period skipped
for want of rows, a lease taken over, an alert dead-lettered, a scheduled run skipped)
are stored in ``sw_events`` too, each occurrence under its own key, with outbox rows
for the job's ``log`` channels only. Re-running a period never reconciles them away.

On SQLite the file runs in WAL mode and write transactions start with
``BEGIN IMMEDIATE``, so two writers queue instead of failing on a lock upgrade.
"""

from __future__ import annotations

import json
import logging
import lzma
import math
import threading
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Iterable, Mapping, Sequence

import sqlalchemy as sa
from sqlalchemy.engine import Engine
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.ext.compiler import compiles

from ..engines import create_engine
from ..redact import one_line, redact
from ..engines import get as engine_for
from ..errors import HistoryError, LeaseLost
from .. import __version__
from ..model import FORMAT, Event, MetricResult, RunSettings, StoredResult, StoredRun
from ..periods import Period

log = logging.getLogger(__name__)

#: Prefix of operational event kinds (never one of the contract's event kinds).
OP_PREFIX = "op_"


#: The layout of the history tables this release writes; a history without ``sw_schema``
#: is version 0. Version 1: ``sw_runs.settings``, ``sw_metric_results.packed``, labels
#: (job, metric, segment, channel and owner names) as TEXT on PostgreSQL and MySQL/MariaDB.
SCHEMA_VERSION = 1

#: Entries longer than this (characters of JSON) are stored packed; shorter ones stay plain JSON.
PACK_ABOVE = 4096
#: The header of a packed entry: segwatch, LZMA2 raw stream, version 1 of the packing.
PACK_MARK = b"swL1"
_PACK_FILTERS = [{"id": lzma.FILTER_LZMA2, "preset": 6, "dict_size": 1 << 20}]

#: Bytes an InnoDB index key may hold (DYNAMIC rows); four bytes per utf8mb4 character.
_MYSQL_KEY_BYTES = 3072

metadata = sa.MetaData()
_SCHEMA_LOCK = threading.RLock()


def Label(length: int = 200) -> sa.types.TypeEngine:  # reads as a column type
    """A name a user or a source chooses (job, metric, segment, channel, owner).

    TEXT on PostgreSQL and MySQL/MariaDB, so that no length a source can hold is refused
    (a VARCHAR(200) stopped a job for good on one long segment value); VARCHAR elsewhere
    (SQLite does not enforce the length). On MySQL/MariaDB a key over a TEXT column
    indexes its first characters (see :func:`_mysql_prefixes`).
    """
    return sa.String(length).with_variant(sa.Text(), "postgresql", "mysql", "mariadb")


def _payload_type() -> sa.types.TypeEngine:
    from sqlalchemy.dialects import mysql

    return sa.Text().with_variant(mysql.LONGTEXT(), "mysql", "mariadb")


def _packed_type() -> sa.types.TypeEngine:
    from sqlalchemy.dialects import mysql

    return sa.LargeBinary().with_variant(mysql.LONGBLOB(), "mysql", "mariadb")

runs = sa.Table(
    "sw_runs", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("period", sa.String(16), primary_key=True),
    sa.Column("period_start", sa.String(40), nullable=False),  # ISO 8601 with offset
    sa.Column("period_end", sa.String(40), nullable=False),
    sa.Column("start_utc", sa.DateTime(), nullable=False, index=True),
    sa.Column("computed_at", sa.DateTime(), nullable=False),
    sa.Column("fingerprint", sa.String(64), nullable=False),
    sa.Column("rows", sa.Integer, nullable=False),
    sa.Column("null_segment_rows", sa.Integer, nullable=False),
    sa.Column("segments", sa.Text, nullable=False),  # JSON list of segments seen
    sa.Column("settings", sa.Text),  # RunSettings.to_json(); NULL before schema 1
)

metric_results = sa.Table(
    "sw_metric_results", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("period", sa.String(16), primary_key=True),
    sa.Column("metric", Label(), primary_key=True),
    sa.Column("method", sa.String(16), nullable=False),
    sa.Column("statistic", sa.Float),
    sa.Column("p_value", sa.Float),
    sa.Column("q_value", sa.Float),
    sa.Column("significant", sa.Boolean, nullable=False),
    sa.Column("effect_name", sa.String(40)),
    sa.Column("effect_value", sa.Float),
    sa.Column("payload", _payload_type(), nullable=False),  # the metric's JSON entry (or a stand-in)
    sa.Column("packed", _packed_type()),  # the entry LZMA-packed when long (PACK_MARK ...); else NULL
)

segment_results = sa.Table(
    "sw_segment_results", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("period", sa.String(16), primary_key=True),
    sa.Column("metric", Label(), primary_key=True),
    sa.Column("segment", Label(), primary_key=True),
    sa.Column("n", sa.Integer, nullable=False),
    sa.Column("mean", sa.Float),
    sa.Column("sd", sa.Float),
    sa.Column("flag", sa.String(8)),
)

pair_results = sa.Table(
    "sw_pair_results", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("period", sa.String(16), primary_key=True),
    sa.Column("metric", Label(), primary_key=True),
    sa.Column("a", Label(), primary_key=True),
    sa.Column("b", Label(), primary_key=True),
    sa.Column("diff", sa.Float),
    sa.Column("p_adj", sa.Float),
    sa.Column("significant", sa.Boolean, nullable=False),
)

events_t = sa.Table(
    "sw_events", metadata,
    sa.Column("event_key", sa.String(40), primary_key=True),
    sa.Column("job", Label(), nullable=False),
    sa.Column("period", sa.String(16), nullable=False),
    sa.Column("kind", sa.String(32), nullable=False),
    sa.Column("metric", Label()),
    sa.Column("segment", Label()),
    sa.Column("message", sa.Text, nullable=False),
    sa.Column("detail", sa.Text, nullable=False),
    sa.Column("detected_at", sa.DateTime(), nullable=False),
    sa.Index("ix_sw_events_job_period", "job", "period", mysql_length={"job": 700}),
)

outbox = sa.Table(
    "sw_outbox", metadata,
    sa.Column("event_key", sa.String(40), primary_key=True),
    sa.Column("channel", Label(400), primary_key=True),
    sa.Column("job", Label(), nullable=False),
    sa.Column("status", sa.String(8), nullable=False),  # pending | sent | dead
    sa.Column("attempts", sa.Integer, nullable=False, default=0),
    sa.Column("last_error", sa.Text),
    sa.Column("updated_at", sa.DateTime(), nullable=False),
    sa.Column("next_attempt_at", sa.DateTime()),  # NULL: due now
    sa.Index("ix_sw_outbox_status", "job", "channel", "status", mysql_length={"job": 380, "channel": 380}),
)

ledger_t = sa.Table(
    "sw_ledger", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("period", sa.String(16), primary_key=True),
    sa.Column("state", sa.String(8), nullable=False),  # pending | running | done | failed
    sa.Column("attempts", sa.Integer, nullable=False),
    sa.Column("last_error", sa.Text),
    sa.Column("note", sa.Text),
    sa.Column("owner", Label()),  # the lease owner of the latest attempt
    sa.Column("created_at", sa.DateTime(), nullable=False),
    sa.Column("started_at", sa.DateTime()),
    sa.Column("finished_at", sa.DateTime()),
    sa.Column("next_attempt_at", sa.DateTime()),
)

leases_t = sa.Table(
    "sw_leases", metadata,
    sa.Column("job", Label(), primary_key=True),
    sa.Column("resource", sa.String(40), primary_key=True),  # a period identifier, or ~relay
    sa.Column("owner", Label(), nullable=False),
    sa.Column("acquired_at", sa.DateTime(), nullable=False),
    sa.Column("expires_at", sa.DateTime(), nullable=False),
)

schema_t = sa.Table(
    "sw_schema", metadata,
    sa.Column("name", sa.String(40), primary_key=True),  # always "history"
    sa.Column("version", sa.Integer, nullable=False),
    sa.Column("written_by", sa.String(40), nullable=False),  # the segwatch version that set it
)

#: Columns added after the first release: created on an existing table by :meth:`History.ensure`.
_ADDED_COLUMNS = {"sw_outbox": ("next_attempt_at",), "sw_runs": ("settings",), "sw_metric_results": ("packed",)}

#: The label columns, by table: widened to TEXT on an older PostgreSQL or MySQL/MariaDB history.
_LABEL_COLUMNS = {
    t.name: tuple(c.name for c in t.columns if isinstance(c.type, sa.String) and c.type.length in (200, 400)
                  and c.name not in ("period", "resource"))
    for t in metadata.sorted_tables
}


def _mysql_prefixes(table: sa.Table) -> dict[str, int]:
    """Characters of each TEXT column a MySQL/MariaDB primary key indexes: the key's
    3,072 bytes shared among its label columns (four bytes a character), after the fixed-width ones."""
    cols = list(table.primary_key.columns)
    labels = [c.name for c in cols
              if isinstance(getattr(c.type, "_variant_mapping", {}).get("mysql", c.type), sa.Text)]
    if not labels:
        return {}
    fixed = sum(4 * (getattr(c.type, "length", None) or 8) for c in cols if c.name not in labels)
    share = min(768, (_MYSQL_KEY_BYTES - fixed) // (4 * len(labels)))
    return {name: share for name in labels}


@compiles(sa.PrimaryKeyConstraint, "mysql")
@compiles(sa.PrimaryKeyConstraint, "mariadb")
def _mysql_primary_key(constraint: sa.PrimaryKeyConstraint, compiler: Any, **kw: Any) -> str:
    """``PRIMARY KEY (job(250), period, ...)``: MySQL/MariaDB index a TEXT column by a prefix.

    Only the history's own tables; any other table's key is written as SQLAlchemy writes it.
    """
    table = constraint.table
    if not len(constraint) or metadata.tables.get(table.name) is not table:
        return compiler.visit_primary_key_constraint(constraint, **kw)
    return _mysql_key_text(table, compiler.preparer.quote)


def _mysql_key_text(table: sa.Table, quote: Any) -> str:
    prefixes = _mysql_prefixes(table)
    cols = ", ".join(quote(c.name) + (f"({prefixes[c.name]})" if c.name in prefixes else "")
                     for c in table.primary_key.columns)
    return f"PRIMARY KEY ({cols})"


@dataclass(frozen=True)
class StoredPeriod:
    """What the history holds for one earlier period: enough to derive events."""

    period: str
    segments: tuple[str, ...]
    metrics: Mapping[str, dict[str, Any]]  # metric name -> its stored JSON entry
    settings: RunSettings | None = None  # what its verdicts were judged by (None: not recorded)


def _stored_run(r: Mapping[str, Any]) -> StoredRun:
    raw = r.get("settings")
    try:
        settings = RunSettings.from_json(json.loads(raw)) if raw else None
    except (ValueError, KeyError, TypeError) as exc:
        raise HistoryError(f"the stored settings of period {r['period']} cannot be read ({exc}); "
                           "the history may be damaged") from exc
    return StoredRun(r["period"], r["period_start"], r["period_end"], iso_utc(utc_aware(r["computed_at"])),
                     r["fingerprint"], int(r["rows"]), int(r["null_segment_rows"]), tuple(json.loads(r["segments"])),
                     settings)


@dataclass(frozen=True)
class OutboxItem:
    event_key: str
    channel: str
    attempts: int
    event: dict[str, Any]


@dataclass(frozen=True)
class AlertRow:
    """One undelivered (pending) or dead-lettered alert, for ``segwatch alerts``."""

    channel: str
    status: str
    period: str | None
    kind: str
    metric: str | None
    segment: str | None
    message: str
    attempts: int
    last_error: str | None
    next_attempt_at: datetime | None  # aware UTC; None means due now
    updated_at: datetime
    event_key: str

    def to_json(self) -> dict[str, Any]:
        return {
            "channel": self.channel, "status": self.status, "period": self.period, "kind": self.kind,
            "metric": self.metric, "segment": self.segment, "message": self.message,
            "attempts": self.attempts, "last_error": self.last_error,
            "next_attempt_at": iso_utc(self.next_attempt_at), "updated_at": iso_utc(self.updated_at),
            "event_key": self.event_key,
        }

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "AlertRow":
        """A row from its JSON (``alerts --json``); times back as aware UTC."""
        def when(x: Any) -> datetime | None:
            return utc_aware(str(x).replace("Z", "+00:00")) if x else None

        return cls(data["channel"], data["status"], data.get("period"), data["kind"], data.get("metric"),
                   data.get("segment"), data.get("message") or "", int(data.get("attempts") or 0),
                   data.get("last_error"), when(data.get("next_attempt_at")), when(data.get("updated_at")),
                   data.get("event_key") or "")


def _utc_naive(dt: datetime) -> datetime:
    return dt.astimezone(timezone.utc).replace(tzinfo=None)


def utc_aware(dt: datetime | str | None) -> datetime | None:
    """A naive-UTC value read back from the database, as an aware UTC datetime."""
    if dt is None:
        return None
    if isinstance(dt, str):
        dt = datetime.fromisoformat(dt)
    return dt.replace(tzinfo=timezone.utc) if dt.tzinfo is None else dt.astimezone(timezone.utc)


def iso_utc(dt: datetime | None) -> str | None:
    """ISO 8601 in UTC with a ``Z``, or None."""
    if dt is None:
        return None
    return utc_aware(dt).isoformat().replace("+00:00", "Z")


def insert_missing(conn: sa.Connection, table: sa.Table, row: Mapping[str, Any]) -> bool:
    """Insert ``row`` unless a row with the same primary key exists; True when inserted.

    One form per engine (SQLAlchemy has no portable upsert, issue #8321), written by the
    engine module (:meth:`monitor.engines.base.Engine.insert_missing`):
    ``INSERT .. ON CONFLICT DO NOTHING`` on SQLite and PostgreSQL, ``INSERT IGNORE`` on
    MySQL/MariaDB, and check-then-insert elsewhere (safe inside the caller's
    serialising transaction).
    """
    return engine_for(conn.dialect.name).insert_missing(conn, table, row)


def is_op(kind: str) -> bool:
    """Whether an event kind is operational (``op_...``) rather than one of the contract's."""
    return kind.startswith(OP_PREFIX)


def insert_op(conn: sa.Connection, job: str, period: str | None, event: Event,
              channels: Sequence[str], now: datetime) -> bool:
    """Store one operational event and its outbox rows (``channels``) unless already stored.

    ``period`` is None for an event that belongs to the job rather than to a period
    (stored as an empty string). Returns True when the event is new.
    """
    ident = period or ""
    key = event.key(job, ident)
    naive = _utc_naive(now)
    fresh = insert_missing(conn, events_t, {
        "event_key": key, "job": job, "period": ident, "kind": event.kind, "metric": event.metric,
        "segment": event.segment, "message": event.message,
        "detail": json.dumps(dict(event.detail), default=str), "detected_at": naive,
    })
    if fresh:
        for ch in channels:
            insert_missing(conn, outbox, {"event_key": key, "channel": ch, "job": job, "status": "pending",
                                          "attempts": 0, "updated_at": naive, "next_attempt_at": None})
    return fresh


def finish_period(conn: sa.Connection, job: str, period: str, owner: str | None, now: datetime,
                  note: str | None = None) -> None:
    """Mark ``period`` done in the ledger and release the run's lease, inside the caller's transaction.

    With an ``owner``, the lease row must still be ours; otherwise :class:`LeaseLost`
    is raised and the caller's transaction rolls back (nothing of the run is kept).
    """
    naive = _utc_naive(now)
    if owner is not None:
        gone = conn.execute(sa.delete(leases_t).where(
            leases_t.c.job == job, leases_t.c.resource == period, leases_t.c.owner == owner))
        if gone.rowcount != 1:
            holder = conn.execute(sa.select(leases_t.c.owner).where(
                leases_t.c.job == job, leases_t.c.resource == period)).scalar_one_or_none()
            raise LeaseLost(
                f"period {period} of job {job}: the lease was taken over by {holder or 'another process'} "
                f"while this run ({owner}) computed it; its results were not stored")
    insert_missing(conn, ledger_t, {"job": job, "period": period, "state": "pending", "attempts": 1,
                                    "created_at": naive})
    conn.execute(sa.update(ledger_t).where(ledger_t.c.job == job, ledger_t.c.period == period).values(
        state="done", finished_at=naive, last_error=None, next_attempt_at=None, note=note))


class History:
    """Access to the history database for one job."""

    def __init__(self, url: str, job: str, engine: Engine | None = None):
        self.url = url
        self.job = job
        self.engine = engine or create_engine(url, "history")
        self._ready = False
        self._layout: dict[str, set[str]] | None = None

    # -------------------------------------------------------------- set-up

    def ensure(self) -> None:
        """Make the history ready for writing: create the tables, or upgrade an older layout.

        Raises :class:`HistoryError` for a history written by a newer segwatch (nothing
        is changed) and when the tables cannot be created.
        """
        if self._ready:
            return
        try:
            with _SCHEMA_LOCK:  # threads of one process (serve's tick and sweep) create tables one at a time
                if self._ready:
                    return
                version = self._version(sa.inspect(self.engine))
                try:
                    metadata.create_all(self.engine)
                    if version is not None and version < SCHEMA_VERSION:
                        self._upgrade(version)
                    if version != SCHEMA_VERSION:
                        self._set_version()
                except SQLAlchemyError:
                    # another process may have created or upgraded the same history meanwhile
                    if self._version(sa.inspect(self.engine)) != SCHEMA_VERSION:
                        raise
                    log.info("history %s: made ready by another process meanwhile", redact(self.url))
        except SQLAlchemyError as exc:
            raise HistoryError(f"cannot create the history tables at {redact(self.url)}: {one_line(exc)}") from exc
        self._ready = True
        self._layout = None

    def _version(self, inspector: Any) -> int | None:
        """The stored layout version: None for an empty database, 0 for tables without ``sw_schema``.

        A version above :data:`SCHEMA_VERSION` raises :class:`HistoryError`.
        """
        names = set(inspector.get_table_names())
        if "sw_schema" not in names:
            return 0 if names & set(metadata.tables) else None
        with self.engine.connect() as conn:
            row = conn.execute(sa.select(schema_t.c.version, schema_t.c.written_by).where(
                schema_t.c.name == "history")).one_or_none()
        if row is None:
            return 0
        if row.version > SCHEMA_VERSION:
            raise HistoryError(
                f"the history at {redact(self.url)} has layout version {row.version}, written by segwatch "
                f"{row.written_by}; this segwatch ({__version__}) reads up to version {SCHEMA_VERSION}: "
                f"upgrade segwatch (pip install --upgrade segwatch) to use this history")
        return int(row.version)

    def _set_version(self) -> None:
        row = {"name": "history", "version": SCHEMA_VERSION, "written_by": str(__version__)[:40]}
        with self.engine.begin() as conn:  # two processes setting it at once: the second updates
            if not insert_missing(conn, schema_t, row):
                conn.execute(sa.update(schema_t).where(schema_t.c.name == "history").values(
                    version=SCHEMA_VERSION, written_by=row["written_by"]))

    def _upgrade(self, version: int) -> None:
        """Bring a history of layout ``version`` to :data:`SCHEMA_VERSION` (nothing stored moves)."""
        self._add_missing_columns()
        self._widen_labels()
        log.info("history %s: upgraded from layout version %s to %s", redact(self.url), version, SCHEMA_VERSION)

    def _add_missing_columns(self) -> None:
        """Add columns introduced after a history database was created (nullable, so no data moves)."""
        inspector = sa.inspect(self.engine)
        for table_name, names in _ADDED_COLUMNS.items():
            have = {c["name"] for c in inspector.get_columns(table_name)}
            for name in names:
                if name in have:
                    continue
                col = metadata.tables[table_name].c[name]
                ddl = f"ALTER TABLE {table_name} ADD COLUMN {name} {col.type.compile(dialect=self.engine.dialect)}"
                with self.engine.begin() as conn:
                    conn.exec_driver_sql(ddl)
                log.info("history %s: added column %s.%s", redact(self.url), table_name, name)

    def _widen_labels(self) -> None:
        """Label columns of an older PostgreSQL or MySQL/MariaDB history become TEXT (issue: a
        300-character segment value stopped the job). SQLite does not enforce lengths."""
        dialect = self.engine.dialect
        if dialect.name not in ("postgresql", "mysql", "mariadb"):
            return
        inspector = sa.inspect(self.engine)
        for table in metadata.sorted_tables:
            names = [n for n in _LABEL_COLUMNS.get(table.name, ())
                     if any(c["name"] == n and isinstance(c["type"], sa.String) and not isinstance(c["type"], sa.Text)
                            for c in inspector.get_columns(table.name))]
            if not names:
                continue
            q = dialect.identifier_preparer.quote
            with self.engine.begin() as conn:
                if dialect.name == "postgresql":
                    conn.exec_driver_sql(f"ALTER TABLE {q(table.name)} "
                                         + ", ".join(f"ALTER COLUMN {q(n)} TYPE TEXT" for n in names))
                else:  # a key over a TEXT column needs prefixes: drop the keys, widen, key again
                    present = {i["name"] for i in inspector.get_indexes(table.name)}
                    indexes = [i for i in table.indexes if any(c.name in names for c in i.columns)]
                    for ix in indexes:
                        if ix.name in present:
                            conn.exec_driver_sql(f"DROP INDEX {q(ix.name)} ON {q(table.name)}")
                    keyed = any(c.name in names for c in table.primary_key.columns)
                    parts = ["DROP PRIMARY KEY"] if keyed else []
                    parts += [f"MODIFY {q(n)} TEXT{'' if table.c[n].nullable else ' NOT NULL'}" for n in names]
                    if keyed:  # written here: sa.schema.AddConstraint would drop the key from later CREATE TABLEs
                        parts.append("ADD " + _mysql_key_text(table, q))
                    conn.exec_driver_sql(f"ALTER TABLE {q(table.name)} " + ", ".join(parts))
                    for ix in indexes:
                        conn.execute(sa.schema.CreateIndex(ix))
            log.info("history %s: %s.%s now TEXT", redact(self.url), table.name, ", ".join(names))

    def layout(self) -> dict[str, set[str]]:
        """The history's tables and their columns, read without creating or changing anything.

        Empty for a database without the history's tables. Raises :class:`HistoryError`
        for a history written by a newer segwatch, or one that cannot be reached.
        """
        if self._layout is not None:
            return self._layout
        try:
            inspector = sa.inspect(self.engine)
            version = self._version(inspector)
            layout = {} if version is None else {
                name: {c["name"] for c in inspector.get_columns(name)}
                for name in inspector.get_table_names() if name in metadata.tables}
        except SQLAlchemyError as exc:
            raise HistoryError(f"cannot read the history at {redact(self.url)}: {one_line(exc)}") from exc
        if version == SCHEMA_VERSION and len(layout) == len(metadata.tables):
            self._layout = layout  # complete and current: it can only be changed by a newer release
        return layout

    def readable(self, *tables: str) -> bool:
        """Whether the history holds ``tables`` (default: the runs): reads return nothing otherwise."""
        have = self.layout()
        return all(t in have for t in (tables or ("sw_runs",)))

    def _cols(self, table: sa.Table) -> list[sa.Column]:
        """The columns of ``table`` this history has (an older layout lacks the later ones)."""
        have = self.layout().get(table.name, set())
        return [c for c in table.columns if c.name in have]

    def _begin(self):
        self.ensure()
        return self.engine.begin()

    def begin(self):
        """A write transaction (``BEGIN IMMEDIATE`` on SQLite); tables are created first if needed."""
        return self._begin()

    # -------------------------------------------------------------- writes

    def store_period(
        self,
        period: Period,
        results: Sequence[MetricResult],
        events: Sequence[Event],
        channels: Sequence[str],
        *,
        computed_at: datetime,
        fingerprint: str,
        rows: int,
        null_segment_rows: int,
        segments: Sequence[str],
        lease_owner: str | None = None,
        settings: RunSettings | None = None,
    ) -> list[Event]:
        """Replace the period's results, reconcile its events and mark it done, in one transaction.

        ``settings`` are what the verdicts were judged by (stored whole, as JSON, with the run).

        Returns the events that are new to this period (those not stored by an
        earlier run of the same period); only these get outbox rows. With
        ``lease_owner`` the transaction first checks that the run still holds the
        period's lease and releases it (:class:`LeaseLost` if not: nothing is stored).
        """
        key = {"job": self.job, "period": period.ident}
        now = _utc_naive(computed_at)
        try:
            with self._begin() as conn:
                finish_period(conn, self.job, period.ident, lease_owner, computed_at)
                for table in (pair_results, segment_results, metric_results, runs):
                    conn.execute(sa.delete(table).where(table.c.job == self.job, table.c.period == period.ident))
                conn.execute(sa.insert(runs).values(
                    **key, period_start=period.start.isoformat(), period_end=period.end.isoformat(),
                    start_utc=_utc_naive(period.start), computed_at=now, fingerprint=fingerprint,
                    rows=rows, null_segment_rows=null_segment_rows, segments=json.dumps(list(segments)),
                    settings=None if settings is None else json.dumps(settings.to_json(), separators=(",", ":")),
                ))
                if results:  # segments and pairs are stored once, in the metric's entry
                    conn.execute(sa.insert(metric_results), [_metric_row(key, r) for r in results])
                return self._reconcile_events(conn, period, events, channels, now)
        except LeaseLost:
            raise
        except SQLAlchemyError as exc:
            raise HistoryError(
                f"cannot store period {period.ident} in the history at {redact(self.url)}: {one_line(exc)}"
            ) from exc

    def _reconcile_events(self, conn, period: Period, events: Sequence[Event],
                          channels: Sequence[str] | Mapping[str, frozenset[str] | None],
                          now: datetime) -> list[Event]:
        existing = {
            row.event_key
            for row in conn.execute(
                sa.select(events_t.c.event_key).where(
                    events_t.c.job == self.job, events_t.c.period == period.ident,
                    sa.not_(events_t.c.kind.startswith(OP_PREFIX, autoescape=True)))
            )
        }
        wanted = {e.key(self.job, period.ident): e for e in events}
        gone = existing - wanted.keys()
        if gone:
            # An event that no longer holds is withdrawn; alerts not yet sent for it are dropped.
            conn.execute(sa.delete(outbox).where(outbox.c.event_key.in_(gone), outbox.c.status != "sent"))
            conn.execute(sa.delete(events_t).where(events_t.c.event_key.in_(gone)))
        fresh = [e for k, e in wanted.items() if k not in existing]
        for k, e in wanted.items():
            if k in existing:  # same event again: keep its first detection time and delivery state
                conn.execute(sa.update(events_t).where(events_t.c.event_key == k).values(
                    message=e.message, detail=json.dumps(e.detail, default=str)))
        if fresh:
            conn.execute(sa.insert(events_t), [
                {"event_key": e.key(self.job, period.ident), "job": self.job, "period": period.ident,
                 "kind": e.kind, "metric": e.metric, "segment": e.segment, "message": e.message,
                 "detail": json.dumps(e.detail, default=str), "detected_at": now}
                for e in fresh
            ])
            fresh_keys = [e.key(self.job, period.ident) for e in fresh]
            # An event withdrawn by an earlier re-run and now back keeps the outbox rows
            # already sent for it: it is not announced twice.
            sent_before = {
                (r.event_key, r.channel)
                for r in conn.execute(sa.select(outbox.c.event_key, outbox.c.channel).where(
                    outbox.c.event_key.in_(fresh_keys)))
            }
            rows = [
                {"event_key": k, "channel": ch, "job": self.job,
                 "status": "pending", "attempts": 0, "updated_at": now, "next_attempt_at": None}
                for k, e in zip(fresh_keys, fresh) for ch in channels
                if (k, ch) not in sent_before and _receives(channels, ch, e.kind)
            ]
            if rows:
                conn.execute(sa.insert(outbox), rows)
        return fresh

    # -------------------------------------------------------------- outbox

    def pending(self, channel: str, now: datetime | None = None) -> list[OutboxItem]:
        """Undelivered alerts for one channel, oldest period first.

        With ``now``, only those due (no backoff, or backoff over by ``now``).
        """
        self.ensure()
        stmt = (
            sa.select(outbox.c.event_key, outbox.c.attempts, events_t)
            .join(events_t, events_t.c.event_key == outbox.c.event_key)
            .where(outbox.c.job == self.job, outbox.c.channel == channel, outbox.c.status == "pending")
            .order_by(events_t.c.period, events_t.c.detected_at, events_t.c.kind, *_nulls_first_text())
        )
        if now is not None:
            stmt = stmt.where(sa.or_(outbox.c.next_attempt_at.is_(None),
                                     outbox.c.next_attempt_at <= _utc_naive(now)))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt).mappings().all()
        return [OutboxItem(r["event_key"], channel, r["attempts"], _event_dict(r)) for r in rows]

    def mark(self, channel: str, keys: Iterable[str], status: str, now: datetime, error: str | None = None,
             next_attempt_at: datetime | None = None) -> None:
        """Record one delivery attempt of ``keys`` on ``channel``: sent, pending (retry later) or dead."""
        keys = list(keys)
        if not keys:
            return
        try:
            with self._begin() as conn:
                conn.execute(
                    sa.update(outbox)
                    .where(outbox.c.channel == channel, outbox.c.event_key.in_(keys))
                    .values(status=status, attempts=outbox.c.attempts + 1, last_error=error,
                            updated_at=_utc_naive(now),
                            next_attempt_at=_utc_naive(next_attempt_at) if next_attempt_at else None)
                )
        except SQLAlchemyError as exc:
            raise HistoryError(f"cannot record alert delivery in the history at {redact(self.url)}: "
                               f"{one_line(exc)}") from exc

    def alerts(self, statuses: Sequence[str] = ("pending", "dead")) -> list[AlertRow]:
        """Alerts in the given states, by channel and period (for ``segwatch alerts``)."""
        if not self.readable("sw_outbox", "sw_events"):
            return []
        stmt = (
            sa.select(outbox.c.channel, outbox.c.status, outbox.c.attempts, outbox.c.last_error,
                      outbox.c.next_attempt_at, outbox.c.updated_at, outbox.c.event_key,
                      events_t.c.period, events_t.c.kind, events_t.c.metric, events_t.c.segment,
                      events_t.c.message)
            .join(events_t, events_t.c.event_key == outbox.c.event_key)
            .where(outbox.c.job == self.job, outbox.c.status.in_(list(statuses)))
            .order_by(outbox.c.status, outbox.c.channel, events_t.c.period, events_t.c.kind, *_nulls_first_text())
        )
        with self.engine.connect() as conn:
            return [AlertRow(r.channel, r.status, r.period or None, r.kind, r.metric, r.segment, r.message,
                             r.attempts, r.last_error, utc_aware(r.next_attempt_at), utc_aware(r.updated_at),
                             r.event_key)
                    for r in conn.execute(stmt)]

    def requeue(self, now: datetime) -> int:
        """Make every dead or backed-off alert of the job due now (``segwatch alerts --retry``).

        Dead alerts go back to ``pending`` with their attempt count reset (the give-up
        limit counts from here); their last error is kept until the next attempt.
        Returns the number of alerts made due.
        """
        with self._begin() as conn:
            n = conn.execute(sa.update(outbox).where(outbox.c.job == self.job, outbox.c.status == "dead").values(
                status="pending", attempts=0, next_attempt_at=None, updated_at=_utc_naive(now))).rowcount
            n += conn.execute(sa.update(outbox).where(
                outbox.c.job == self.job, outbox.c.status == "pending", outbox.c.next_attempt_at.is_not(None)
            ).values(next_attempt_at=None)).rowcount
        return n

    def record_op(self, period: str | None, event: Event, channels: Sequence[str], now: datetime) -> bool:
        """Store an operational event (kind ``op_...``) with outbox rows for ``channels``; True if new."""
        try:
            with self._begin() as conn:
                return insert_op(conn, self.job, period, event, channels, now)
        except SQLAlchemyError as exc:
            raise HistoryError(f"cannot record an operational event in the history at {redact(self.url)}: "
                               f"{one_line(exc)}") from exc

    # -------------------------------------------------------------- reads

    def previous(self, period: Period) -> StoredPeriod | None:
        """The latest stored period that starts before ``period``, if any."""
        found = self.recent(period, 1)
        return found[0] if found else None

    def recent(self, period: Period, count: int) -> list[StoredPeriod]:
        """Up to ``count`` stored periods that start before ``period``, newest first."""
        if not self.readable("sw_runs", "sw_metric_results"):
            return []
        found = self._runs(runs.c.start_utc < _utc_naive(period.start), newest_first=True, limit=count)
        if not found:
            return []
        payloads: dict[str, dict[str, Any]] = {r.period: {} for r in found}
        for p, entry in self._entries(metric_results.c.period.in_(list(payloads))):
            payloads[p][entry["metric"]] = entry
        return [StoredPeriod(r.period, r.segments, payloads[r.period], r.settings) for r in found]

    def runs(self) -> list[StoredRun]:
        """Every stored period of the job, oldest first, with the settings it was judged by."""
        if not self.readable("sw_runs"):
            return []
        return self._runs()

    def results(self, metric: str | None = None) -> list[StoredResult]:
        """Stored metric verdicts, typed, oldest period first, each with the level it was judged at.

        The level is the stored run's (``settings.fdr_level``); None for a period stored
        before runs recorded their settings, whose verdicts are read as stored.
        """
        if not self.readable("sw_runs", "sw_metric_results"):
            return []
        levels = {r.period: r for r in self._runs()}
        cond = metric_results.c.metric == metric if metric is not None else None
        out = []
        for p, entry in self._entries(cond):
            run = levels.get(p)
            settings = run.settings if run else None
            ms = settings.metric(entry.get("metric")) if settings else None
            out.append(StoredResult(p, MetricResult.from_json(entry, ms.requested if ms else None),
                                    run.level if run else None))
        return out

    def periods(self) -> list[dict[str, Any]]:
        """Every stored period of the job as its stored row, oldest first (see :meth:`runs` for the typed form)."""
        if not self.readable("sw_runs"):
            return []
        with self.engine.connect() as conn:
            return [dict(r) for r in conn.execute(
                sa.select(*self._cols(runs)).where(runs.c.job == self.job).order_by(runs.c.start_utc)).mappings()]

    def metric_history(self, metric: str | None = None) -> list[dict[str, Any]]:
        """Stored metric entries (the ``run --json`` shape) with their period, oldest first
        (see :meth:`results` for the typed form)."""
        if not self.readable("sw_runs", "sw_metric_results"):
            return []
        cond = metric_results.c.metric == metric if metric is not None else None
        return [{"period": p, **entry} for p, entry in self._entries(cond)]

    def _runs(self, cond: Any = None, newest_first: bool = False, limit: int | None = None) -> list[StoredRun]:
        cols = self._cols(runs)
        stmt = sa.select(*cols).where(runs.c.job == self.job)
        if cond is not None:
            stmt = stmt.where(cond)
        stmt = stmt.order_by(runs.c.start_utc.desc() if newest_first else runs.c.start_utc)
        if limit is not None:
            stmt = stmt.limit(limit)
        with self.engine.connect() as conn:
            rows = conn.execute(stmt).mappings().all()
        return [_stored_run(r) for r in rows]

    def _entries(self, cond: Any = None) -> list[tuple[str, dict[str, Any]]]:
        """(period, stored entry) of the job's metric rows, oldest period first, packed ones unpacked."""
        have = self.layout().get("sw_metric_results", set())
        cols = [metric_results.c.period, metric_results.c.payload]
        if "packed" in have:
            cols.append(metric_results.c.packed)
        stmt = (
            sa.select(*cols)
            .join(runs, sa.and_(runs.c.job == metric_results.c.job, runs.c.period == metric_results.c.period))
            .where(metric_results.c.job == self.job)
            .order_by(runs.c.start_utc, metric_results.c.metric)
        )
        if cond is not None:
            stmt = stmt.where(cond)
        with self.engine.connect() as conn:
            return [(r.period, unpack_entry(r.payload, r.packed if "packed" in have else None))
                    for r in conn.execute(stmt)]

    def events(self, period: str | None = None, include_ops: bool = True) -> list[dict[str, Any]]:
        """Stored events of the job (or of one period), operational ones (``op_...``) included unless asked."""
        if not self.readable("sw_events"):
            return []
        stmt = sa.select(events_t).where(events_t.c.job == self.job)
        if period is not None:
            stmt = stmt.where(events_t.c.period == period)
        if not include_ops:
            stmt = stmt.where(sa.not_(events_t.c.kind.startswith(OP_PREFIX, autoescape=True)))
        stmt = stmt.order_by(events_t.c.period, events_t.c.kind, *_nulls_first_text())
        with self.engine.connect() as conn:
            return [_event_dict(r) for r in conn.execute(stmt).mappings()]

    def outbox_counts(self) -> dict[str, int]:
        if not self.readable("sw_outbox"):
            return {}
        with self.engine.connect() as conn:
            rows = conn.execute(
                sa.select(outbox.c.status, sa.func.count()).where(outbox.c.job == self.job).group_by(outbox.c.status)
            ).all()
        return {status: int(n) for status, n in rows}

    def describe(self) -> str:
        """Reach the database and create the tables; return the dialect and version."""
        self.ensure()
        with self.engine.connect() as conn:
            info = conn.dialect.server_version_info
        return f"{self.engine.dialect.name} {'.'.join(map(str, info)) if info else ''}".strip()

    def dispose(self) -> None:
        self.engine.dispose()


def _nulls_first_text() -> tuple:
    """Order by metric and segment with NULL first on every dialect (PostgreSQL sorts NULL last)."""
    return sa.func.coalesce(events_t.c.metric, ""), sa.func.coalesce(events_t.c.segment, "")


def _metric_row(key: Mapping[str, str], r: MetricResult) -> dict[str, Any]:
    payload = json.dumps(r.to_json(stored=True, pairs="significant"),  # bounded: see monitor.model.PAIR_FORMS
                         separators=(",", ":"))
    packed = None
    if len(payload) > PACK_ABOVE:
        packed = PACK_MARK + lzma.compress(payload.encode("utf-8"), format=lzma.FORMAT_RAW, filters=_PACK_FILTERS)
        payload = json.dumps({"format": FORMAT, "metric": r.metric, "packed": "lzma"})
    eff = r.effect_size
    return {
        **key, "metric": r.metric, "method": r.method, "statistic": _fl(r.statistic),
        "p_value": _fl(r.p_value), "q_value": _fl(r.q_value), "significant": r.significant,
        "effect_name": eff.name if eff else None, "effect_value": _fl(eff.value) if eff else None,
        "payload": payload, "packed": packed,
    }


def unpack_entry(payload: str, packed: bytes | None) -> dict[str, Any]:
    """A stored metric entry as JSON: the payload, or the packed entry it stands in for."""
    if packed is None:
        return json.loads(payload)
    packed = bytes(packed)
    if not packed.startswith(PACK_MARK):
        raise HistoryError(f"a stored entry is packed as {packed[:4]!r}, which this segwatch does not read; "
                           "upgrade segwatch to read this history")
    try:
        return json.loads(lzma.decompress(packed[len(PACK_MARK):], format=lzma.FORMAT_RAW, filters=_PACK_FILTERS))
    except (lzma.LZMAError, ValueError) as exc:
        stand_in = json.loads(payload) if payload else {}
        raise HistoryError(f"the stored entry of metric {stand_in.get('metric')!r} cannot be unpacked ({exc}); "
                           "the history may be damaged") from exc


def _event_dict(r: Mapping[str, Any]) -> dict[str, Any]:
    detected = r["detected_at"]
    if isinstance(detected, str):
        detected = datetime.fromisoformat(detected)
    return {
        "event_key": r["event_key"], "job": r["job"], "period": r["period"] or None, "kind": r["kind"],
        "metric": r["metric"], "segment": r["segment"], "message": r["message"],
        "detail": json.loads(r["detail"]) if r["detail"] else {},
        "detected_at": detected.replace(tzinfo=timezone.utc).isoformat().replace("+00:00", "Z"),
    }


def _fl(x: Any) -> float | None:
    if type(x) is float:  # the usual case, first
        return x if math.isfinite(x) else None
    if x is None:
        return None
    v = float(x)
    return v if math.isfinite(v) else None


def _receives(channels: Sequence[str] | Mapping[str, frozenset[str] | None], channel: str, kind: str) -> bool:
    """Whether ``channel`` takes events of ``kind``: ``channels`` may map each channel to its
    kinds (None: all), as the runner passes them from the alerts' ``kinds:``."""
    kinds = channels.get(channel) if isinstance(channels, Mapping) else None
    return kinds is None or kind in kinds
