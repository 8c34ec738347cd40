"""Reading one period's records from the source database.

The source is a table (reflected, so every configured column is checked against the
real ones) or a SELECT query (wrapped as a subquery). Column names from the config
are never pasted into SQL text: they are looked up on the reflected table or the
subquery and referenced as column objects, which SQLAlchemy quotes per dialect.

Time windows
------------
A period is the half-open window ``[start, end)`` in the job's time zone. How a
timestamp column is compared depends on what it stores:

* ``DATE`` columns are compared with the window's local calendar dates;
* zone-aware timestamp columns (``TIMESTAMP WITH TIME ZONE``) with UTC instants;
* timestamps without a zone are read as wall-clock time in the job's zone
  (``source.naive_time: local``, the default) or as UTC (``naive_time: utc``);
* SQLite stores timestamps as text, so the column is normalised with SQLite's
  ``datetime()`` and compared with text bounds of the same shape.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any, Sequence

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Engine
from sqlalchemy.exc import NoSuchTableError, SQLAlchemyError

from .analysis import MetricInput, QualityCounts, SegmentInput
from .config import JobConfig, MetricConfig, SourceConfig
from .db import one_line, redact
from .errors import ConfigError, SourceError
from .periods import Period
from .stats.summary import Moments

log = logging.getLogger(__name__)

CONNECT_ATTEMPTS = 3
RETRY_BASE_SECONDS = 0.5


@dataclass(frozen=True)
class PeriodData:
    """One period's data, ready for the analysis."""

    metrics: tuple[MetricInput, ...]
    rows: int  # rows in the window
    null_segment_rows: int  # rows whose segment is NULL (counted, not grouped)
    segments: tuple[str, ...]  # segments with at least one row in the window


@dataclass(frozen=True)
class SourceInfo:
    """What :meth:`Source.describe` found: for ``segwatch check``."""

    dialect: str
    server_version: str
    columns: tuple[str, ...]


def make_engine(url: str, *, read_only: bool = False) -> Engine:
    """An engine with pre-ping and connection recycling (see RELIABILITY.md)."""
    kwargs: dict[str, Any] = {"pool_pre_ping": True, "pool_recycle": 1800}
    if url.startswith("duckdb") and read_only:
        kwargs["connect_args"] = {"read_only": True}
    try:
        return sa.create_engine(url, **kwargs)
    except (SQLAlchemyError, ImportError, ValueError) as exc:
        raise SourceError(f"cannot open database URL {redact(url)}: {one_line(exc)}") from exc


class Source:
    """The job's source table or query, reflected once per instance."""

    def __init__(self, job: JobConfig, engine: Engine | None = None):
        self.job = job
        self.cfg: SourceConfig = job.source
        self.engine = engine or make_engine(self.cfg.url, read_only=True)
        self._from: sa.FromClause | None = None

    # -------------------------------------------------------------- structure

    def _relation(self) -> sa.FromClause:
        if self._from is None:
            self._from = self._reflect()
        return self._from

    def _reflect(self) -> sa.FromClause:
        cfg = self.cfg
        where = f"{self.job.path}: source"
        try:
            with self._connect() as conn:
                if cfg.table is not None:
                    schema, _, name = cfg.table.rpartition(".")
                    try:
                        rel: sa.FromClause = sa.Table(
                            name, sa.MetaData(), schema=schema or None, autoload_with=conn
                        )
                    except NoSuchTableError:
                        tables = sa.inspect(conn).get_table_names(schema=schema or None)
                        raise ConfigError(
                            f"{where}.table: no table {cfg.table!r} in {redact(cfg.url)} "
                            f"(tables there: {', '.join(sorted(tables)) or 'none'})"
                        ) from None
                else:
                    probe = sa.select(sa.text("*")).select_from(
                        sa.text(f"({cfg.query}) AS segwatch_probe")
                    ).limit(0)
                    keys = list(conn.execute(probe).keys())
                    rel = (
                        sa.text(cfg.query)
                        .columns(*[sa.column(k) for k in keys])
                        .subquery("segwatch_src")
                    )
        except SQLAlchemyError as exc:
            raise SourceError(f"{where}: cannot read the source at {redact(cfg.url)}: {one_line(exc)}") from exc
        available = [c.name for c in rel.columns]
        wanted = [("time_column", cfg.time_column), ("segment_column", cfg.segment_column)]
        wanted += [(f"metrics[{i}].column", m.column) for i, m in enumerate(self.job.metrics)]
        for key, col in wanted:
            if col not in rel.c:
                key_path = key if key.startswith("metrics") else f"source.{key}"
                raise ConfigError(
                    f"{self.job.path}: {key_path}: no column {col!r} in the source "
                    f"(columns there: {', '.join(available)})"
                )
        return rel

    def describe(self) -> SourceInfo:
        """Reach the source, check the columns and report the server version."""
        rel = self._relation()
        with self._connect() as conn:
            version = _server_version(conn)
        return SourceInfo(self.engine.dialect.name, version, tuple(c.name for c in rel.columns))

    # -------------------------------------------------------------- data

    def window_clause(self, period: Period) -> sa.ColumnElement[bool]:
        """The WHERE condition placing a record in ``period`` (see module notes)."""
        rel = self._relation()
        col = rel.c[self.cfg.time_column]
        ctype = col.type
        if self.engine.dialect.name == "sqlite":
            lo, hi = self._naive_bounds(period)
            norm = sa.func.datetime(col)
            fmt = "%Y-%m-%d %H:%M:%S"
            return sa.and_(norm >= lo.strftime(fmt), norm < hi.strftime(fmt))
        if isinstance(ctype, sa.Date) and not isinstance(ctype, sa.DateTime):
            return sa.and_(col >= period.start.date(), col < period.end.date())
        if isinstance(ctype, sa.DateTime) and ctype.timezone:
            return sa.and_(
                col >= period.start.astimezone(timezone.utc),
                col < period.end.astimezone(timezone.utc),
            )
        lo, hi = self._naive_bounds(period)
        return sa.and_(col >= lo, col < hi)

    def _naive_bounds(self, period: Period) -> tuple[datetime, datetime]:
        if self.cfg.naive_time == "utc":
            return (
                period.start.astimezone(timezone.utc).replace(tzinfo=None),
                period.end.astimezone(timezone.utc).replace(tzinfo=None),
            )
        return period.start.replace(tzinfo=None), period.end.replace(tzinfo=None)

    def fetch(self, period: Period) -> PeriodData:
        """Read the period's rows (segment and metric columns only) and summarise
        them per segment and metric."""
        rel = self._relation()
        seg = rel.c[self.cfg.segment_column]
        cols = [seg.label("__segment")]
        names = []
        for i, m in enumerate(self.job.metrics):
            cols.append(rel.c[m.column].label(f"__m{i}"))
            names.append(f"__m{i}")
        stmt = sa.select(*cols).where(self.window_clause(period))
        try:
            with self._connect() as conn:
                result = conn.execute(stmt)
                frame = pd.DataFrame(result.fetchall(), columns=["__segment", *names])
        except SQLAlchemyError as exc:
            raise SourceError(
                f"{self.job.path}: reading period {period.ident} from {redact(self.cfg.url)} failed: {one_line(exc)}"
            ) from exc
        return summarise_frame(frame, self.job.metrics, names)

    def _connect(self):
        """A connection, with bounded retries and backoff when the server is unreachable."""
        last: Exception | None = None
        for attempt in range(1, CONNECT_ATTEMPTS + 1):
            try:
                return self.engine.connect()
            except sa.exc.OperationalError as exc:
                last = exc
                if attempt < CONNECT_ATTEMPTS:
                    wait = RETRY_BASE_SECONDS * 2 ** (attempt - 1)
                    log.warning("source %s unreachable (attempt %d): %s; retrying in %.1fs",
                                redact(self.cfg.url), attempt, one_line(exc), wait)
                    time.sleep(wait)
        raise SourceError(
            f"cannot connect to the source {redact(self.cfg.url)} after {CONNECT_ATTEMPTS} attempts: {one_line(last)}"
        )

    def dispose(self) -> None:
        self.engine.dispose()


def summarise_frame(frame: pd.DataFrame, metrics: Sequence[MetricConfig], names: Sequence[str]) -> PeriodData:
    """Per-segment summaries and values for each metric, counting what is unusable.

    Values are converted to float here, in one place. Text that does not parse as a
    number, non-finite values and (under ``log``/``log1p``) values outside the
    transform's domain are counted and dropped; rows with a NULL segment are
    counted and not grouped.
    """
    null_seg = int(frame["__segment"].isna().sum())
    frame = frame[frame["__segment"].notna()]
    segments_all = frame["__segment"].astype(str)
    segment_names = tuple(sorted(segments_all.unique()))
    inputs = []
    for m, name in zip(metrics, names):
        raw = frame[name]
        is_null = raw.isna()
        num = pd.to_numeric(raw, errors="coerce").astype(float)
        non_numeric = num.isna() & ~is_null
        arr = num.to_numpy(dtype=float)
        non_finite = ~np.isfinite(arr) & ~num.isna().to_numpy()
        ok = np.isfinite(arr)
        out_of_domain = np.zeros(len(arr), dtype=bool)
        if m.transform == "log":
            out_of_domain = ok & (arr <= 0)
        elif m.transform == "log1p":
            out_of_domain = ok & (arr <= -1)
        ok = ok & ~out_of_domain
        with np.errstate(all="ignore"):
            if m.transform == "log":
                arr = np.where(ok, np.log(np.where(ok, arr, 1.0)), np.nan)
            elif m.transform == "log1p":
                arr = np.where(ok, np.log1p(np.where(ok, arr, 0.0)), np.nan)
        quality = QualityCounts(
            rows=len(frame),
            null=int(is_null.sum()),
            non_numeric=int(non_numeric.sum()),
            non_finite=int(non_finite.sum()),
            out_of_domain=int(out_of_domain.sum()),
        )
        segs = []
        seg_codes = segments_all.to_numpy()
        for s in segment_names:
            vals = arr[(seg_codes == s) & ok]
            segs.append(SegmentInput(s, Moments.from_values(vals), vals))
        inputs.append(MetricInput(m, tuple(segs), quality))
    return PeriodData(tuple(inputs), rows=len(frame) + null_seg, null_segment_rows=null_seg,
                      segments=segment_names)


def _server_version(conn: sa.Connection) -> str:
    info = conn.dialect.server_version_info
    if info:
        return ".".join(str(x) for x in info)
    if conn.dialect.name == "sqlite":
        import sqlite3

        return sqlite3.sqlite_version
    return "unknown"


