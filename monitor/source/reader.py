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

Two ways to compute a period
----------------------------
``compute: pushdown`` (the default) sends one aggregate query per period and reads
back per-segment sums (:mod:`monitor.source.pushdown`), plus the values the rank test and
the value checks need: all of them while the period is small, a seeded sample of at
most ``sampling.cap`` rows per segment otherwise (:mod:`monitor.source.sampling`). Before
that, a probe reads at most a thousand rows to choose each metric's shift. On
PostgreSQL and MySQL/MariaDB the queries of a period share one snapshot
(``REPEATABLE READ``).

``compute: local`` reads the period's rows (segment and metric columns only) and
summarises them here (:func:`summarise_frame`). The push-down falls back to it, with
a warning in the log, when a metric column is not numeric (e.g. text).

Both give the same summaries (to rounding) and, while the values are not sampled,
the same results.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass, replace
from datetime import date, datetime, timezone
from decimal import Decimal
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np
import sqlalchemy as sa
from sqlalchemy.engine import Engine
from sqlalchemy.exc import NoSuchTableError, SQLAlchemyError

from .. import engines
from ..config import JobConfig, MetricConfig, SourceConfig
from ..engines import (
    EngineTraits,
    check_server_version,
    format_version,
    hash_array,
)
from ..errors import ConfigError, SegwatchError, SourceError
from ..redact import one_line, redact
from ..model import MetricInput, QualityCounts, SegmentInput
from ..periods import Period
from ..stats.summary import Moments
from ..stats.cells import CellData
from . import cells as cells_sql
from . import pushdown
from .pushdown import Aggregate, MetricPlan, Shift
from .sampling import SamplePlan, plan_sample, smallest, thresholds

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["PeriodData", "Source", "SourceInfo", "summarise_frame"]

log = logging.getLogger(__name__)

CONNECT_ATTEMPTS = 3
RETRY_BASE_SECONDS = 0.5
#: Re-reads of a sampled segment that came up short before all its rows are read.
SAMPLE_RETRIES = 4
#: Rows per chunk when reading the values query.
FETCH_CHUNK = 20_000


@dataclass(frozen=True)
class PeriodData:
    """One period's data, ready for the analysis."""

    metrics: tuple[MetricInput, ...]
    rows: int  # rows in the window
    null_segment_rows: int  # rows whose segment is NULL (counted, not grouped)
    segments: tuple[str, ...]  # segments with at least one row in the window
    compute: str = "local"  # how it was computed: "pushdown" or "local"
    sampled: bool = False  # True when the values are a sample (see monitor.source.sampling)


@dataclass(frozen=True)
class SourceInfo:
    """What :meth:`Source.describe` found: for ``segwatch check``."""

    dialect: str
    server_version: str
    columns: tuple[str, ...]


class Source:
    """The job's source table or query, reflected once per instance."""

    def __init__(self, job: JobConfig, engine: Engine | None = None):
        self.job = job
        self.cfg: SourceConfig = job.source
        try:
            self.engine = engine or engines.create_engine(
                self.cfg.url, "source", read_only=True,
                session=engines.SourceSession(self.cfg.timeout, str(job.path)))
        except SegwatchError as exc:  # name the job file too
            if str(exc).startswith(f"{job.path}:"):
                raise
            raise type(exc)(f"{job.path}: {exc}") from exc
        #: What differs on this database engine (monitor.engines).
        self.backend = engines.for_dialect(self.engine.dialect)
        if engine is None and job.path:
            self.backend.files_relative_to(self.engine, str(Path(job.path).resolve().parent))
        self._from: sa.FromClause | None = None
        self._version: tuple[str, tuple[int, ...] | None] | None = None
        self._fallback_logged = False
        #: Try the direct aggregate form first (see pushdown.direct_query); tests switch it off.
        self.direct = True

    # -------------------------------------------------------------- structure

    @property
    def remote(self) -> bool:
        """Whether the source is a database server (the work happens in another
        process), not an engine inside this one (SQLite, DuckDB)."""
        return not self.backend.in_process

    def _relation(self) -> sa.FromClause:
        if self._from is None:
            self._from = self._reflect()
        return self._from

    def _reflect(self) -> sa.FromClause:
        cfg = self.cfg
        where = f"{self.job.path}: source"
        try:
            with self._connect() as conn:
                self._version = self.backend.server_version(conn)
                check_server_version(*self._version, where=f"source {redact(cfg.url)}")
                if cfg.table is not None:
                    schema, _, name = cfg.table.rpartition(".")
                    try:
                        rel: sa.FromClause = self.backend.reflect_table(conn, name, schema or None)
                    except NoSuchTableError:
                        tables = self.backend.table_names(conn, schema or None)
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
        wanted += [(f"metrics[{i}].adjust_for[{j}]", a) for i, m in enumerate(self.job.metrics)
                   for j, a in enumerate(m.adjust_for)]
        for key, col in wanted:
            if col not in rel.c:
                key_path = key if key.startswith("metrics") else f"source.{key}"
                raise ConfigError(
                    f"{self.job.path}: {key_path}: no column {col!r} in the source "
                    f"(columns there: {', '.join(available)})"
                )
        return rel

    def check_references(self, limit: int = 10_000) -> None:
        """Check every metric's ``reference`` against the segment values in the source.

        Reads ``SELECT DISTINCT segment`` (at most ``limit`` values). A reference that is not
        among them raises :class:`ConfigError` naming the key, the values there and, when one
        differs only in case or spacing, that value.
        """
        refs = [(i, m.reference) for i, m in enumerate(self.job.metrics) if m.reference is not None]
        if not refs:
            return
        rel = self._relation()
        seg = rel.c[self.cfg.segment_column]
        stmt = sa.select(seg).where(seg.is_not(None)).distinct().limit(limit + 1)
        try:
            with self._connect() as conn:
                values = sorted({str(v) for (v,) in conn.execute(stmt)})
        except SQLAlchemyError as exc:
            raise SourceError(f"{self.job.path}: source: reading the values of {self.cfg.segment_column!r} "
                              f"failed: {one_line(exc)}") from exc
        if len(values) > limit:
            log.info("job %s: more than %d segment values; references not checked", self.job.job, limit)
            return
        noun = self.cfg.segment_column
        for i, ref in refs:
            if ref in values:
                continue
            shown = ", ".join(values[:20]) + (f", ... ({len(values)} in all)" if len(values) > 20 else "")
            close = [v for v in values if "".join(v.split()).casefold() == "".join(ref.split()).casefold()]
            hint = f"; did you mean {close[0]!r}?" if close else ""
            raise ConfigError(
                f"{self.job.path}: metrics[{i}].reference: no {noun} named {ref!r}; "
                f"{noun}s there: {shown or 'none'}{hint}"
            )

    def describe(self) -> SourceInfo:
        """Reach the source, check the server version and the columns, and report them."""
        rel = self._relation()
        name, version = self._version or ("unknown", None)
        # the engine's own name (Spark speaks PyHive's "hive" dialect; MariaDB MySQL's)
        return SourceInfo(name, format_version(version), tuple(c.name for c in rel.columns))

    def check_columns(self, limit: int = 100) -> None:
        """Check what the time and metric columns hold, before any period is read (for
        ``segwatch check``): a time column of numbers (epoch seconds) or of text the
        engine cannot place in time (``02/03/2026 14:30``) would give every period 0
        rows, and a text metric column nothing but data-quality events.

        Reads at most ``limit`` non-NULL values of the time column (as the engine
        normalises them for the window, :meth:`Engine.placed_time`) and of each metric
        column whose type is unknown (a ``query:`` source).

        Raises
        ------
        ConfigError
            One line naming the key, the column, an example value and the fix.
        """
        rel = self._relation()
        name = self.cfg.time_column
        col = rel.c[name]
        key = f"{self.job.path}: source.time_column"
        fix = _TIME_FIXES.get(self.backend.name, _TIME_FIXES["generic"])
        ctype = self.backend.column_type(col.type)
        if isinstance(ctype, (sa.Integer, sa.Float, sa.Numeric)) and not isinstance(ctype, sa.Boolean):
            raise ConfigError(
                f"{key}: {name!r} has type {_type_text(ctype)}, numbers, not timestamps or dates; if they are "
                f"Unix epoch seconds, convert them in a source.query: {fix[0].format(c=name)} "
                f"(README, 'Time columns')")
        raw_col = sa.type_coerce(col, sa.types.NullType())  # the driver's value (SQLite: no date parsing)
        stmt = sa.select(raw_col, self.backend.placed_time(col)).where(col.is_not(None)).limit(limit)
        metric_cols = [(i, m.column) for i, m in enumerate(self.job.metrics)]
        try:
            with self._connect() as conn:
                rows = conn.execute(stmt).all()
                typed = {}
                for i, c in metric_cols:
                    mtype = self.backend.column_type(rel.c[c].type)
                    if isinstance(mtype, sa.types.NullType) and c not in typed:
                        mc = rel.c[c]
                        typed[c] = [v for (v,) in conn.execute(sa.select(mc).where(mc.is_not(None)).limit(limit))]
        except SQLAlchemyError as exc:
            raise SourceError(f"{self.job.path}: source: reading values of {name!r} failed: {one_line(exc)}") from exc
        bad = [(raw, placed) for raw, placed in rows if not _placed(placed)]
        if bad:
            raw = bad[0][0]
            count = f"{len(bad)} of the {len(rows)} values read"
            if isinstance(raw, (int, float, Decimal)) and not isinstance(raw, bool):
                raise ConfigError(
                    f"{key}: {name!r} holds numbers (e.g. {raw!r}; {count}), not timestamps or dates; if they are "
                    f"Unix epoch seconds, convert them in a source.query: {fix[0].format(c=name)} "
                    f"(README, 'Time columns')")
            raise ConfigError(
                f"{key}: {name!r} holds text segwatch cannot place in time (e.g. {str(raw)[:40]!r}; {count}); "
                f"it reads ISO 8601 text (2026-03-02 14:30:00, 2026-03-02T14:30:00+01:00, 2026-03-02) and "
                f"timestamp or date columns; convert other text in a source.query, e.g. for "
                f"'02/03/2026 14:30': {fix[1].format(c=name)} (README, 'Time columns')")
        for i, c in metric_cols:
            mtype = self.backend.column_type(rel.c[c].type)
            where = f"{self.job.path}: metrics[{i}].column"
            if isinstance(mtype, (sa.String, sa.Date, sa.DateTime, sa.Time, sa.LargeBinary, sa.Interval)):
                raise ConfigError(
                    f"{where}: {c!r} has type {_type_text(mtype)}, not a number; point the metric at a numeric "
                    f"column, or convert it in a source.query (CAST({c} AS DOUBLE PRECISION) AS {c})")
            text = [v for v in typed.get(c, ()) if isinstance(v, (str, bytes))]
            if text:
                raise ConfigError(
                    f"{where}: {c!r} holds text (e.g. {str(text[0])[:40]!r}; {len(text)} of the "
                    f"{len(typed[c])} values read), not numbers; point the metric at a numeric column, or "
                    f"convert it in the source.query (CAST({c} AS DOUBLE) AS {c})")

    def count_rows(self, period: Period) -> int:
        """The number of records in ``period``'s window (a real query: for ``segwatch check``)."""
        rel = self._relation()
        stmt = sa.select(sa.func.count()).select_from(rel).where(self.window_clause(period))
        try:
            with self._connect() as conn:
                return int(conn.execute(stmt).scalar() or 0)
        except SQLAlchemyError as exc:
            raise SourceError(
                f"{self.job.path}: counting the rows of period {period.ident} on {redact(self.cfg.url)} "
                f"failed: {one_line(exc)}") from exc

    def newest_record(self) -> Any:
        """The time column's largest value as the window reads it (None: no records)."""
        rel = self._relation()
        col = rel.c[self.cfg.time_column]
        try:
            with self._connect() as conn:
                return conn.execute(sa.select(sa.func.max(self.backend.placed_time(col)))).scalar()
        except SQLAlchemyError as exc:
            raise SourceError(f"{self.job.path}: reading the newest {self.cfg.time_column!r} failed: "
                              f"{one_line(exc)}") from exc

    def check_window(self, period: Period) -> int:
        """Send the period's queries as a run would build them, for no rows (``LIMIT 0``):
        the window's bounds bound and compared with the time column, the metrics' casts,
        transforms and tests, the sampling hash and (``compute: pushdown``) the aggregate
        sums are all compiled and analysed by the engine, so a broken bind or type shows
        here, not in the first scheduled run (for ``segwatch check``). Returns the number
        of queries sent.

        Raises
        ------
        SourceError
            One line naming the period, the URL and the engine's answer.
        """
        rel = self._relation()
        where = self.window_clause(period)
        seg_key = self.cfg.segment_column
        traits = EngineTraits.of(self.engine.dialect)
        plans, reason = ((), "local")
        if self.job.compute == "pushdown":
            plans, reason = pushdown.plan_metrics(rel, self.job.metrics, traits)
        if reason is None:
            shifts = {p.position: Shift.from_probe(p, None, None) for p in plans}
            hashed = pushdown.hash_expr(self._sample_key(rel), self.job.sampling.seed, traits)
            statements = [
                pushdown.aggregate_query(rel, seg_key, plans, where, shifts, traits).limit(0),
                pushdown.values_query(rel, seg_key, plans, where, traits, hashed=hashed).limit(0),
            ]
            statements += [cells_sql.cell_query(rel, seg_key, p, p.metric.adjust_for, where, shifts[p.position],
                                                traits).limit(0) for p in plans if p.metric.adjust_for]
        else:
            cols = [rel.c[seg_key], *[rel.c[m.column] for m in self.job.metrics]]
            cols += [rel.c[a] for a in dict.fromkeys(a for m in self.job.metrics for a in m.adjust_for)]
            statements = [sa.select(*cols).where(where).limit(0)]
        try:
            with self._connect() as conn:
                for stmt in statements:
                    conn.execute(stmt).all()
        except SQLAlchemyError as exc:
            raise SourceError(
                f"{self.job.path}: a window query for period {period.ident} on {redact(self.cfg.url)} "
                f"failed: {one_line(exc)}"
            ) from exc
        return len(statements)

    # -------------------------------------------------------------- data

    def window_clause(self, period: Period) -> sa.ColumnElement[bool]:
        """The WHERE condition placing a record in ``period`` (see module notes)."""
        rel = self._relation()
        col = rel.c[self.cfg.time_column]
        return self.backend.time_window(col, period, self._naive_bounds(period))

    def _naive_bounds(self, period: Period) -> tuple[datetime, datetime]:
        if self.cfg.naive_time == "utc":
            return (
                period.start.astimezone(timezone.utc).replace(tzinfo=None),
                period.end.astimezone(timezone.utc).replace(tzinfo=None),
            )
        return period.start.replace(tzinfo=None), period.end.replace(tzinfo=None)

    def fetch(self, period: Period) -> PeriodData:
        """Summarise the period per segment and metric, in the database
        (``compute: pushdown``) or here (``compute: local``); see the module notes."""
        rel = self._relation()
        if self.job.compute == "pushdown":
            traits = EngineTraits.of(self.engine.dialect)
            plans, reason = pushdown.plan_metrics(rel, self.job.metrics, traits)
            if reason is None:
                try:
                    return self._fetch_pushdown(period, plans, traits)
                except SourceError as exc:
                    if not traits.engine.is_overflow(exc.__cause__):
                        raise
                    log.warning("job %s: %s: the database's sums overflowed double precision (values beyond "
                                "~1e154); computing this period locally (reading the rows)", self.job.job,
                                period.ident)
            if not self._fallback_logged:
                log.warning("job %s: %s; computing locally (reading the rows) instead", self.job.job, reason)
                self._fallback_logged = True
        return self._fetch_local(period)

    def _fetch_local(self, period: Period) -> PeriodData:
        """Read the period's rows (segment and metric columns only) and summarise them."""
        rel = self._relation()
        seg = rel.c[self.cfg.segment_column]
        cols = [seg.label("__segment")]
        names = []
        for i, m in enumerate(self.job.metrics):
            # the driver's own value: SQLAlchemy's MySQL DOUBLE type would round to 10 decimals
            cols.append(sa.type_coerce(rel.c[m.column], sa.types.NullType()).label(f"__m{i}"))
            names.append(f"__m{i}")
        strata = list(dict.fromkeys(a for m in self.job.metrics for a in m.adjust_for))
        cols += [rel.c[a].label(f"__a{j}") for j, a in enumerate(strata)]
        stmt = sa.select(*cols).where(self.window_clause(period))
        import pandas as pd  # only for compute: local (a push-down run does without it)

        try:
            with self._connect() as conn:
                result = conn.execute(stmt)
                frame = pd.DataFrame(result.fetchall(),
                                     columns=["__segment", *names, *[f"__a{j}" for j in range(len(strata))]],
                                     dtype=object)
        except SQLAlchemyError as exc:
            raise SourceError(
                f"{self.job.path}: reading period {period.ident} from {redact(self.cfg.url)} failed: {one_line(exc)}"
            ) from exc
        data = summarise_frame(frame, self.job.metrics, names)
        if not strata:
            return data
        inputs = tuple(
            replace(inp, cells=_local_cells(frame, m, name, [f"__a{strata.index(a)}" for a in m.adjust_for]))
            if m.adjust_for else inp
            for inp, m, name in zip(data.metrics, self.job.metrics, names)
        )
        return replace(data, metrics=inputs)

    def _fetch_pushdown(self, period: Period, plans: tuple[MetricPlan, ...], traits: EngineTraits) -> PeriodData:
        rel = self._relation()
        where = self.window_clause(period)
        sampling = self.job.sampling
        step = "the shift probe"
        try:
            with self._connect() as conn:
                if self.backend.snapshot_isolation:
                    conn = conn.execution_options(isolation_level=self.backend.snapshot_isolation)
                with conn.begin():
                    _tune_session(conn, traits, len(plans) + 3)
                    shifts = self._shifts(conn, rel, plans, where, traits)
                    step = "the aggregate query"
                    agg = self._aggregate(conn, rel, plans, where, shifts, traits, period)
                    step = "the per-stratum query"
                    cells = self._cells(conn, rel, plans, where, traits, agg, shifts)
                    step = "the values query"
                    plan = plan_sample(sampling.mode, sampling.cap, sampling.seed, agg.rows)
                    values = self._values(conn, rel, plans, where, traits, agg, plan)
        except SQLAlchemyError as exc:
            raise SourceError(
                f"{self.job.path}: {step} for period {period.ident} on {redact(self.cfg.url)} failed: "
                f"{one_line(exc)} ({_failure_hint(traits, exc)})"
            ) from exc
        inputs = []
        for p in plans:
            per = agg.metrics[p.position]
            segs = []
            quality = QualityCounts()
            for label in agg.labels:
                summary = per[label]
                quality = pushdown.add_quality(quality, summary.quality)
                vals = _transform(values[label][p.position], p.metric.transform)
                segs.append(SegmentInput(label, summary.moments, vals))
            size = sum(len(s.values) for s in segs) if plan.any else None
            inputs.append(MetricInput(p.metric, tuple(segs), quality, sample_size=size, cells=cells.get(p.position)))
        log.debug("job %s: %s pushed down (%d rows, %d segments, %s)", self.job.job, period.ident,
                  agg.total_rows, len(agg.labels), "sampled values" if plan.any else "all values")
        return PeriodData(tuple(inputs), rows=agg.total_rows, null_segment_rows=agg.null_segment_rows,
                          segments=agg.labels, compute="pushdown", sampled=plan.any)

    def _cells(self, conn: sa.Connection, rel: sa.FromClause, plans: Sequence[MetricPlan],
               where: sa.ColumnElement[bool], traits: EngineTraits, agg: Aggregate,
               shifts: Mapping[int, Shift]) -> dict[int, CellData]:
        """Per-(segment, stratum) sums of the metrics with ``adjust_for`` (:mod:`monitor.source.cells`),
        each segment's values shifted by its own mean from the first pass."""
        out: dict[int, CellData] = {}
        for p in plans:
            if not p.metric.adjust_for:
                continue
            per = agg.metrics[p.position]
            means = {raw: float(per[label].moments.mean) for label in agg.labels if per[label].moments.n
                     for raw in agg.raw[label]}
            shift = shifts[p.position].per_segment(means)
            stmt = cells_sql.cell_query(rel, self.cfg.segment_column, p, p.metric.adjust_for, where, shift, traits)
            out[p.position] = cells_sql.read_cells(conn.execute(stmt).mappings(), p, p.metric.adjust_for, shift)
        return out

    def _aggregate(self, conn: sa.Connection, rel: sa.FromClause, plans: Sequence[MetricPlan],
                   where: sa.ColumnElement[bool], shifts: Mapping[int, Shift], traits: EngineTraits,
                   period: Period) -> Aggregate:
        """The period's per-segment sums: the direct query first where it may serve,
        the row-by-row query when it may not or when the direct result shows a
        non-finite value (see :func:`pushdown.direct_query`)."""
        agg, direct = self._sums(conn, rel, plans, where, shifts, traits, period)
        far = pushdown.ill_shifted(agg, plans, shifts)
        if far:
            again = tuple(p for p in plans if p.position in far)
            fixed = {i: shifts[i].per_segment(means) for i, means in far.items()}
            log.debug("job %s: %s: metrics %s summed again with a shift per segment", self.job.job,
                      period.ident, ", ".join(p.metric.name for p in again))
            second, _ = self._sums(conn, rel, again, where, fixed, traits, period, direct)
            agg.metrics.update(second.metrics)
        return agg

    def _sums(self, conn: sa.Connection, rel: sa.FromClause, plans: Sequence[MetricPlan],
              where: sa.ColumnElement[bool], shifts: Mapping[int, Shift], traits: EngineTraits,
              period: Period, direct: bool | None = None) -> tuple[Aggregate, bool]:
        """One aggregate pass; ``direct`` None tries the direct form when it may serve."""
        seg_key = self.cfg.segment_column
        if direct is None:
            direct = self.direct and pushdown.direct_possible(plans, traits)
        if direct:
            stmt = pushdown.direct_query(rel, seg_key, plans, where, shifts, traits)
            rows = conn.execute(stmt).mappings().all()
            if pushdown.direct_clean(rows, plans):
                return pushdown.read_aggregate(rows, plans, shifts, traits, direct=True), True
            log.debug("job %s: %s holds non-finite values; summing row by row", self.job.job, period.ident)
        stmt = pushdown.aggregate_query(rel, seg_key, plans, where, shifts, traits)
        return pushdown.read_aggregate(conn.execute(stmt).mappings(), plans, shifts, traits), False

    def _shifts(self, conn: sa.Connection, rel: sa.FromClause, plans: Sequence[MetricPlan],
                where: sa.ColumnElement[bool], traits: EngineTraits) -> dict[int, Shift]:
        """One shift per metric: the probe, then the first usable value where the probe found none."""
        order = [rel.c[self.cfg.time_column]]
        row = conn.execute(pushdown.probe_query(rel, plans, where, traits, order_by=order)).mappings().one()
        shifts: dict[int, Shift] = {}
        for p in plans:
            k = row[f"k{p.position}"]
            spread = None if p.exact else row[f"r{p.position}"]
            if k is None:
                k = conn.execute(pushdown.first_value_query(rel, p, where, traits, order)).scalar()
            shifts[p.position] = Shift.from_probe(p, k, spread)
        return shifts

    def _values(self, conn: sa.Connection, rel: sa.FromClause, plans: Sequence[MetricPlan],
                where: sa.ColumnElement[bool], traits: EngineTraits, agg: Aggregate,
                plan: SamplePlan) -> dict[str, dict[int, np.ndarray]]:
        """The values per segment label and metric position (before the transform)."""
        seg_key = self.cfg.segment_column
        if not plan.any:
            stmt = pushdown.values_query(rel, seg_key, plans, where, traits)
            labels, _, cols = _fetch_columns(conn, stmt, traits, len(plans), hashed=False, raw=agg.raw)
            return _split(_positions(labels, agg.labels), cols, plans)
        hashed = pushdown.hash_expr(self._sample_key(rel), plan.seed, traits)
        kind = pushdown.hash_kind(traits)
        stmt = pushdown.values_query(rel, seg_key, plans, where, traits, hashed=hashed,
                                     thresholds=thresholds(plan, agg.rows, agg.raw, kind=kind))
        labels, hashes, cols = _fetch_columns(conn, stmt, traits, len(plans), hashed=True, raw=agg.raw)
        pos = _positions(labels, agg.labels)
        del labels
        if all(len(pos[lab]) >= min(plan.cap, agg.rows[lab]) for lab in plan.sampled):
            # the usual case: pick the rows, then copy out one column at a time
            keep = {lab: m[smallest(hashes[m], [c[m] for c in cols], plan.cap)] if lab in plan.sampled else m
                    for lab, m in pos.items()}
            del hashes, pos
            return _split(keep, cols, plans)
        groups = {lab: (hashes[m], [c[m] for c in cols]) for lab, m in pos.items()}
        del hashes, cols, pos  # the per-segment copies above are all that is kept
        boost: dict[str, int] = {}
        for _ in range(SAMPLE_RETRIES + 1):
            short = [lab for lab in sorted(plan.sampled)
                     if len(groups[lab][0]) < min(plan.cap, agg.rows[lab])]
            if not short:
                break
            for lab in short:
                boost[lab] = boost.get(lab, 0) + 1
            log.debug("sample came up short for %s; reading again", ", ".join(short))
            found = thresholds(plan, agg.rows, agg.raw, boost, only=short, kind=kind)
            stmt = pushdown.values_query(rel, seg_key, plans, where, traits, hashed=hashed,
                                         thresholds=found, only_listed=True)
            labels2, hashes2, cols2 = _fetch_columns(conn, stmt, traits, len(plans), hashed=True, raw=agg.raw)
            again = _positions(labels2, short)
            for lab in short:
                m = again[lab]
                groups[lab] = (hashes2[m], [c[m] for c in cols2])
        out: dict[str, dict[int, np.ndarray]] = {}
        for lab in agg.labels:
            h, group_cols = groups.pop(lab)
            keep = smallest(h, group_cols, plan.cap) if lab in plan.sampled else np.arange(len(h))
            out[lab] = {p.position: _usable(c[keep]) for p, c in zip(plans, group_cols)}
        return out

    def _sample_key(self, rel: sa.FromClause) -> list[sa.ColumnElement]:
        """The columns whose text is hashed to sample rows: the primary key, else time and segment."""
        pk = list(getattr(rel, "primary_key", []) or [])
        if pk:
            return pk
        return [rel.c[self.cfg.time_column], rel.c[self.cfg.segment_column]]

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
                    log.info("source %s unreachable (attempt %d): %s; retrying in %.1fs",
                                redact(self.cfg.url), attempt, one_line(exc), wait)
                    time.sleep(wait)
        raise SourceError(
            f"cannot connect to the source {redact(self.cfg.url)} after {CONNECT_ATTEMPTS} attempts: {one_line(last)}"
        )

    def dispose(self) -> None:
        self.engine.dispose()


def _failure_hint(traits: EngineTraits, exc: BaseException) -> str:
    """What to do about a failed push-down query, in a few words (the engine's own
    hint, e.g. DuckDB's memory limit, else reading the rows)."""
    return traits.engine.failure_hint(exc) or "compute: local reads the rows instead"


def _tune_session(conn: sa.Connection, traits: EngineTraits, columns: int = 0) -> None:
    """Per-transaction settings for segwatch's wide aggregate queries
    (:meth:`monitor.engines.base.Engine.tune_transaction`: PostgreSQL 11+ without JIT,
    DuckDB's memory limit fitted to ``columns`` columns)."""
    traits.engine.tune_transaction(conn, columns)


def _fetch_columns(conn: sa.Connection, stmt: sa.Select, traits: EngineTraits, width: int, *,
                   hashed: bool, raw: Mapping[str, Sequence[Any]] | None = None
                   ) -> tuple[SegmentCodes, np.ndarray, list[np.ndarray]]:
    """Run the values query and return its columns: the segment of each row
    (:class:`SegmentCodes`), hashes (or an empty array) and one float array per metric
    (NaN where the value is not usable).

    Rows are streamed in chunks of :data:`FETCH_CHUNK` and turned into arrays chunk by
    chunk, so memory holds arrays, not millions of Python objects. Where the engine
    has a fast read of plain numbers (PostgreSQL's binary ``COPY``, DuckDB's numpy
    columns: :meth:`monitor.engines.base.Engine.read_numbered`) and ``raw`` (label ->
    raw segment values) names the segments, the query is reshaped for it
    (:func:`_numbered`); an engine may also hand back whole columns
    (:meth:`~monitor.engines.base.Engine.fetch_values`, DuckDB).
    """
    backend = traits.engine
    if raw is not None and _numbered_possible(raw) and backend.numbered_read_possible(conn):
        numbered, names = _numbered(stmt, width, hashed=hashed, raw=raw)
        g, hashes, values = backend.read_numbered(conn, numbered, width, hashed=hashed)
        if g.size and (g < 0).any():
            raise SourceError("the values query returned a segment the aggregate query did not")
        return SegmentCodes(g, np.array(names, dtype=object)), hashes, values
    columns, chunks = backend.fetch_values(conn, stmt, FETCH_CHUNK)
    if columns is not None:
        names, codes = np.unique(np.array([str(v) for v in np.asarray(columns[0], dtype=object)],
                                          dtype=object), return_inverse=True)
        labels = SegmentCodes(codes.ravel(), names)
        hashes = hash_array(columns[1]) if hashed else hash_array(())
        return labels, hashes, [_floats(c) for c in columns[1 + hashed:]]
    assert chunks is not None
    codes: dict[str, int] = {}
    parts: list[list[np.ndarray]] = []
    for rows in chunks:
        if not rows:
            continue
        cols = list(zip(*rows))
        del rows
        part = [np.fromiter((codes.setdefault(str(v), len(codes)) for v in cols[0]), dtype=np.int32,
                            count=len(cols[0]))]
        if hashed:
            part.append(hash_array(cols[1]))
        part += [np.array(c, dtype=float) for c in cols[1 + hashed:]]
        parts.append(part)
        del cols
    if not parts:
        return SegmentCodes.empty(), np.empty(0, dtype="S32"), [np.empty(0) for _ in range(width)]
    merged = []
    for j in range(len(parts[0])):  # column by column, letting each chunk's piece go
        merged.append(np.concatenate([part[j] for part in parts]))
        for part in parts:
            part[j] = None
    names = np.empty(len(codes), dtype=object)
    for name, code in codes.items():
        names[code] = name
    labels = SegmentCodes(merged[0], names)
    hashes = merged[1] if hashed else np.empty(0, dtype="S32")
    return labels, hashes, merged[1 + hashed:]


#: Most segments for which the values travel as plain numbers (binary COPY on
#: PostgreSQL, numpy on DuckDB): each returned row maps its segment to a number with
#: one CASE branch per segment.
COPY_MAX_SEGMENTS = 200


def _numbered_possible(raw: Mapping[str, Sequence[Any]]) -> bool:
    return 0 < sum(len(v) for v in raw.values()) <= COPY_MAX_SEGMENTS


def _numbered(stmt: sa.Select, width: int, *, hashed: bool, raw: Mapping[str, Sequence[Any]]
              ) -> tuple[sa.Select, list[str]]:
    """The values query reshaped to plain numbers: ``g`` (the segment's number in the
    returned list of labels), ``h`` (when hashed) and ``v<i>`` with NaN for "not usable"."""
    sub = stmt.subquery("segwatch_values")
    names: list[str] = []
    whens: dict[Any, int] = {}
    for label in sorted(raw):
        for value in raw[label]:
            whens[value] = len(names)
            names.append(label)
    cols: list[sa.ColumnElement] = [sa.case(whens, value=sub.c.seg, else_=-1).label("g")]
    if hashed:
        cols.append(sub.c.h)
    nan = sa.cast(sa.literal("NaN"), sa.Double())
    cols += [sa.func.coalesce(sub.c[f"v{j}"], nan).label(f"v{j}") for j in _value_positions(sub)]
    if len(cols) - 1 - hashed != width:
        raise AssertionError("values query columns do not match the metrics")
    return sa.select(*cols), names


def _value_positions(sub: sa.Subquery) -> list[int]:
    return [int(c.key[1:]) for c in sub.c if c.key.startswith("v") and c.key[1:].isdigit()]


@dataclass(frozen=True)
class SegmentCodes:
    """The segment of each fetched row as a number into ``names`` (one label per number;
    several numbers may share a label), so that no string is held per row."""

    codes: np.ndarray
    names: np.ndarray

    @classmethod
    def empty(cls) -> "SegmentCodes":
        return cls(np.empty(0, dtype=np.intp), np.empty(0, dtype=object))

    def __len__(self) -> int:
        return len(self.codes)


def _positions(labels: SegmentCodes, wanted: Sequence[str]) -> dict[str, np.ndarray]:
    """Row indices per segment label, ascending (every wanted label present, possibly empty)."""
    out = {lab: np.empty(0, dtype=np.intp) for lab in wanted}
    if len(labels) == 0:
        return out
    names, merge = np.unique(labels.names.astype(str), return_inverse=True)  # a few names, not rows
    inverse = merge.ravel()[labels.codes]
    order = np.argsort(inverse, kind="stable")
    bounds = np.cumsum(np.bincount(inverse, minlength=len(names)))[:-1]
    for name, idx in zip(names, np.split(order, bounds)):
        if name in out:
            out[name] = idx
    return out


def _floats(col: np.ndarray) -> np.ndarray:
    """Floats with NaN for NULL (drivers give None, Decimal, float or a masked array)."""
    if isinstance(col, np.ma.MaskedArray):
        return col.astype(float).filled(np.nan)
    if col.dtype != object:
        return col.astype(float)
    return np.array([np.nan if v is None else float(v) for v in col], dtype=float)


def _usable(col: np.ndarray) -> np.ndarray:
    return col[~np.isnan(col)]


def _split(picks: dict[str, np.ndarray], cols: list[np.ndarray | None], plans: Sequence[MetricPlan]
           ) -> dict[str, dict[int, np.ndarray]]:
    """Each segment's usable values per metric; ``cols`` is emptied column by column as it
    is copied out, so the fetched and the split values are never all held twice."""
    out: dict[str, dict[int, np.ndarray]] = {lab: {} for lab in picks}
    for j, p in enumerate(plans):
        col, cols[j] = cols[j], None
        for lab, idx in picks.items():
            out[lab][p.position] = _usable(col[idx])
        del col
    return out


def _is_nan(v: Any) -> bool:
    return isinstance(v, (float, np.floating, Decimal)) and v != v


def _transform(values: np.ndarray, transform: str) -> np.ndarray:
    """The analysis scale, as :func:`summarise_frame` computes it (numpy's log/log1p)."""
    if transform == "log":
        return np.log(values)
    if transform == "log1p":
        return np.log1p(values)
    return values


#: Per engine: how to convert Unix epoch seconds, and text like '02/03/2026 14:30', in a
#: source.query (the hints of Source.check_columns; README, "Time columns").
_TIME_FIXES = {
    "sqlite": ("datetime({c}, 'unixepoch') AS {c}",
               "substr({c}, 7, 4) || '-' || substr({c}, 4, 2) || '-' || substr({c}, 1, 2) || substr({c}, 11) AS {c}"),
    "duckdb": ("to_timestamp({c}) AS {c}", "strptime({c}, '%d/%m/%Y %H:%M') AS {c}"),
    "postgresql": ("to_timestamp({c}) AS {c}", "to_timestamp({c}, 'DD/MM/YYYY HH24:MI') AS {c}"),
    "mysql": ("FROM_UNIXTIME({c}) AS {c}", "STR_TO_DATE({c}, '%d/%m/%Y %H:%i') AS {c}"),
    "spark": ("timestamp_seconds({c}) AS {c}", "to_timestamp({c}, 'dd/MM/yyyy HH:mm') AS {c}"),
    "generic": ("CAST({c} AS TIMESTAMP) from your engine's epoch conversion",
                "your engine's text-to-timestamp function AS {c}"),
}


def _placed(value: Any) -> bool:
    """Whether a time value, as the engine normalised it, can be placed in a window."""
    if isinstance(value, (datetime, date)):
        return True
    if isinstance(value, str):
        text = value.strip()
        try:
            datetime.fromisoformat(text[:-1] + "+00:00" if text.endswith(("Z", "z")) else text)
        except ValueError:
            return False
        return True
    return False


def _type_text(ctype: Any) -> str:
    try:
        return str(ctype)
    except Exception:  # noqa: BLE001 - some types cannot render without a dialect
        return type(ctype).__name__


def _local_cells(frame: pd.DataFrame, m: MetricConfig, name: str, strata: Sequence[str]) -> CellData:
    """The per-(segment, stratum) cells of ``compute: local``, by the usable-value rule of
    :func:`summarise_frame`."""
    import pandas as pd

    frame = frame[frame["__segment"].notna()]
    arr = pd.to_numeric(frame[name], errors="coerce").astype(float).to_numpy(dtype=float)
    ok = np.isfinite(arr)
    if m.transform == "log":
        ok &= arr > 0
    elif m.transform == "log1p":
        ok &= arr > -1
    with np.errstate(all="ignore"):
        values = _transform(np.where(ok, arr, 1.0), m.transform)
    return cells_sql.cells_from_frame(frame["__segment"].astype(str).to_numpy(), values, ok,
                                      [frame[c].to_numpy(dtype=object) for c in strata], m.adjust_for)


def summarise_frame(frame: pd.DataFrame, metrics: Sequence[MetricConfig], names: Sequence[str]) -> PeriodData:
    """Per-segment summaries and values for each metric, counting what is unusable.

    Values are converted to float here, in one place. Text that does not parse as a
    number, non-finite values (a stored NaN included) and (under ``log``/``log1p``)
    values outside the transform's domain are counted and dropped; rows with a NULL
    segment are counted and not grouped. Pass an ``object`` frame (as
    :meth:`Source.fetch` does) so that a NULL (``None``) and a stored NaN stay apart;
    in a float frame both read as NULL.
    """
    import pandas as pd

    null_seg = int(frame["__segment"].isna().sum())
    frame = frame[frame["__segment"].notna()]
    segments_all = frame["__segment"].astype(str)
    segment_names = tuple(sorted(segments_all.unique()))
    inputs = []
    for m, name in zip(metrics, names):
        raw = frame[name]
        if raw.dtype == object:
            is_null = raw.map(lambda v: v is None or v is pd.NA).to_numpy(dtype=bool)
            is_nan = raw.map(_is_nan).to_numpy(dtype=bool)
        else:
            is_null = raw.isna().to_numpy(dtype=bool)
            is_nan = np.zeros(len(raw), dtype=bool)
        num = pd.to_numeric(raw, errors="coerce").astype(float)
        unparsed = num.isna().to_numpy()
        non_numeric = unparsed & ~is_null & ~is_nan
        arr = num.to_numpy(dtype=float)
        non_finite = (~np.isfinite(arr) & ~unparsed) | is_nan
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
