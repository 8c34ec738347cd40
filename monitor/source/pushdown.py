"""The aggregate SQL that lets the database do the heavy work: one scan per period.

For a period, :func:`aggregate_query` builds ONE ``SELECT ... GROUP BY segment`` that
returns, per segment and for every metric, what the comparison needs from the rows:

* the number of rows, of non-NULL values, of numbers (SQLite: ``typeof``), of finite
  numbers, and of usable values (finite and, under ``log``/``log1p``, in the
  transform's domain); the data-quality counts are differences of these;
* the minimum and maximum of the usable (transformed) values;
* the shifted power sums ``S_p = sum((v - k)^p)``, ``p = 1..4``, with one shift ``k``
  per metric taken near the data by a cheap probe (:func:`probe_query`).

That query tests every value row by row (``CASE``). Where no value can be text and no
metric has a transform, :func:`direct_query` is sent first: the same sums as plain
aggregates over the table, which engines run in parallel and at the speed of a plain
sum; it is right exactly when every value is finite, which :func:`direct_clean` checks
on its result (a NaN or infinity makes a minimum, maximum or sum non-finite), and the
row-by-row query runs only when it is not. :func:`ill_shifted` finds metrics whose one
shift lies too far from some segment's data; they are summed again with one shift per
segment.

:func:`read_aggregate` turns the rows into per-segment
:class:`~monitor.stats.summary.Moments` with
:meth:`~monitor.stats.summary.Moments.from_shifted_sums` (exact rational conversion).

Why shifted sums
----------------
The textbook one-pass form ``sum(x^2) - (sum x)^2 / n`` loses every digit the mean
shares with the data (negative variances have been seen in several engines). Summing
powers of ``x - k`` with ``k`` near the mean keeps the condition number of the
variance near ``1 + n (mean - k)^2 / M2`` (Chan, Golub & LeVeque 1983), i.e. near 1
when ``k`` is within a few standard deviations of the mean. The probe takes ``k`` as
the mean of the first (at most) :data:`PROBE_ROWS` usable values the database hands
out for the window, which is such a value for any but pathological data. The higher
central sums follow from the same shifted sums by the binomial expansion (Pébay 2008).

Exact where the data are exact
------------------------------
A ``NUMERIC``/``DECIMAL`` column with no transform keeps the database's decimal
arithmetic on PostgreSQL (arbitrary precision) and on MySQL/MariaDB (when the column
has at most 15 digits after the point and 17 before it, so that fourth powers of the
shifted values stay inside the server's 65-81 digit decimals); the sums arrive as
Python ``Decimal`` and the summaries stay exact until the final statistics. Here the
shift is a data value (the smallest usable value of the probe), so every term is
exact. Every other column (floating point, integer, and decimals on other engines)
is cast to double precision.

What is counted where
---------------------
* NULL: ``COUNT(*) - COUNT(x)``.
* Non-numeric: only SQLite can store text in a numeric column; there a value whose
  ``typeof`` is neither ``integer`` nor ``real`` is non-numeric. Elsewhere the column's
  type decides: a column that is not numeric is not pushed down at all (see
  :func:`plan_metrics`).
* Non-finite: ``x - x = 0`` is true exactly for finite numbers on every engine (inf -
  inf and NaN - NaN are NaN, or NULL in SQLite, and NaN = 0 is false even where NaN =
  NaN is true, as in PostgreSQL). MySQL/MariaDB cannot store inf or NaN, so the test
  is left out there.
* Out of domain: values ``<= 0`` under ``log``, ``<= -1`` under ``log1p``. The
  transform is ``ln(x)`` / ``ln(1 + x)`` in SQL (every supported engine has ``ln``;
  SQLite builds without math functions get a Python ``ln`` from :mod:`monitor.engines.sqlite`).

Column names never enter SQL text: every column is a reflected column object of the
source relation, quoted by SQLAlchemy per dialect. Conditional aggregates are written
with ``CASE`` (MySQL has no ``FILTER``).

References
----------
.. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1983). Algorithms for computing
   the sample variance: analysis and recommendations. The American Statistician
   37(3), 242-247.
.. [2] Pébay, P. (2008). Formulas for robust, one-pass parallel computation of
   covariances and arbitrary-order statistical moments. Sandia Report SAND2008-6212.
.. [3] Dekker, T. J. (1971). A floating-point technique for extending the available
   precision. Numerische Mathematik 18, 224-242.
.. [4] Higham, N. J. (2002). Accuracy and Stability of Numerical Algorithms, 2nd ed.
   SIAM. Chapter 4 (summation).
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass
from decimal import Decimal, localcontext
from fractions import Fraction
from typing import Any, Iterable, Mapping, Sequence

import sqlalchemy as sa

from ..config import MetricConfig
from ..engines import EngineTraits, to_double  # EngineTraits: also read from here
from ..model import QualityCounts
from ..stats.summary import Moments
from ..stats.warnings import InaccurateResultWarning

log = logging.getLogger(__name__)

#: Rows the shift probe reads at most (it stops there: ``LIMIT``).
PROBE_ROWS = 1000


# ------------------------------------------------------------------ planning


@dataclass(frozen=True)
class MetricPlan:
    """How one metric is read in SQL.

    Attributes
    ----------
    position : int
        Index of the metric in the job's ``metrics`` (labels ``n0``, ``s1_0``, ...).
    metric : MetricConfig
        The metric.
    key : str
        The source column's key on the relation.
    kind : str
        ``float`` (cast to double), ``exact`` (decimal arithmetic) or ``bool``
        (cast to integer first).
    """

    position: int
    metric: MetricConfig
    key: str
    kind: str

    @property
    def exact(self) -> bool:
        return self.kind == "exact"

    @property
    def transform(self) -> str:
        return self.metric.transform


def plan_metrics(
    rel: sa.FromClause, metrics: Sequence[MetricConfig], traits: EngineTraits
) -> tuple[tuple[MetricPlan, ...], str | None]:
    """Decide how each metric column is read, or why the period cannot be pushed down.

    Returns
    -------
    plans : tuple of MetricPlan
    reason : str or None
        Why the push-down is not possible (a metric column whose reflected type is
        not numeric, e.g. text), in which case the caller reads the rows instead.

    Notes
    -----
    Column types: integer and floating point columns are read as doubles; NUMERIC /
    DECIMAL as exact decimals where the engine can (see the module notes), otherwise
    as doubles; boolean as 0/1; an unknown type (a ``query:`` source, or an SQLite
    column declared without a type) as a number, cast to double. Any other type
    (text, dates, ...) is refused here.
    """
    plans = []
    for i, m in enumerate(metrics):
        col = rel.c[m.column]
        ctype = traits.engine.column_type(col.type)
        if isinstance(ctype, sa.types.NullType):
            kind = "float"
        elif isinstance(ctype, sa.Boolean):
            kind = "bool"
        elif isinstance(ctype, sa.Float) or isinstance(ctype, sa.Integer):
            kind = "float"
        elif isinstance(ctype, sa.Numeric):
            kind = "exact" if _exact_ok(ctype, traits) and m.transform == "none" else "float"
        else:
            return (), (
                f"metric column {m.column!r} has type {_type_name(ctype)}, not a number; "
                "the push-down needs numeric columns"
            )
        plans.append(MetricPlan(i, m, m.column, kind))
    return tuple(plans), None


def _exact_ok(ctype: sa.Numeric, traits: EngineTraits) -> bool:
    return traits.exact and traits.engine.exact_decimal(ctype)


def _type_name(ctype: Any) -> str:
    try:
        return str(ctype)
    except Exception:  # noqa: BLE001 - some types cannot render without a dialect
        return type(ctype).__name__


# ------------------------------------------------------------------ expressions


def _number(plan: MetricPlan, col: sa.ColumnElement) -> sa.ColumnElement:
    """The column as a number of the plan's kind (not yet cast to double)."""
    if plan.kind == "bool":
        return sa.cast(col, sa.Integer())
    return col


def is_number(plan: MetricPlan, col: sa.ColumnElement, traits: EngineTraits) -> sa.ColumnElement[bool]:
    """True for a value that is a number (SQLite: stored as integer or real)."""
    if traits.typeof:
        return sa.func.typeof(col).in_(["integer", "real"])
    return col.is_not(None)


def is_finite(plan: MetricPlan, col: sa.ColumnElement, traits: EngineTraits) -> sa.ColumnElement[bool]:
    """True for a finite number (``x - x = 0``; see the module notes)."""
    num = _number(plan, col)
    cond = (num - num) == 0
    if traits.typeof:
        cond = sa.and_(is_number(plan, col, traits), cond)
    elif not traits.non_finite:
        cond = col.is_not(None)
    return cond


def in_domain(plan: MetricPlan, col: sa.ColumnElement) -> sa.ColumnElement[bool] | None:
    """The transform's domain (None when there is no transform)."""
    num = _number(plan, col)
    if plan.transform == "log":
        return num > 0
    if plan.transform == "log1p":
        return num > -1
    return None


def usable(plan: MetricPlan, col: sa.ColumnElement, traits: EngineTraits) -> sa.ColumnElement[bool]:
    """A finite number inside the transform's domain."""
    cond = is_finite(plan, col, traits)
    dom = in_domain(plan, col)
    return cond if dom is None else sa.and_(cond, dom)


def raw_value(plan: MetricPlan, col: sa.ColumnElement) -> sa.ColumnElement:
    """The value before the transform: a double, or the decimal itself when exact."""
    if plan.exact:
        return col
    return to_double(_number(plan, col))


def transformed(plan: MetricPlan, col: sa.ColumnElement) -> sa.ColumnElement:
    """The value on the analysis scale: ``ln(x)``, ``ln(1 + x)`` or ``x``."""
    x = raw_value(plan, col)
    if plan.transform == "log":
        return sa.func.ln(x)
    if plan.transform == "log1p":
        return sa.func.ln(x + 1)
    return x


def value_or_null(plan: MetricPlan, col: sa.ColumnElement, traits: EngineTraits, *,
                  transform: bool = True) -> sa.ColumnElement:
    """``CASE WHEN usable THEN value END`` (NULL for anything unusable)."""
    v = transformed(plan, col) if transform else raw_value(plan, col)
    return sa.case((usable(plan, col, traits), v))


def _shift_literal(plan: MetricPlan, shift: Any, traits: EngineTraits | None) -> sa.ColumnElement:
    if plan.exact:
        if traits is not None:  # the engine's decimal literal (Spark: a typed CAST)
            return traits.engine.decimal_literal(Decimal(shift))
        return sa.literal(Decimal(shift), sa.Numeric())
    return sa.literal(float(shift), sa.Double())


def _shift_expr(plan: MetricPlan, shift: Shift, seg: sa.ColumnElement,
                traits: EngineTraits | None = None) -> sa.ColumnElement:
    """The shift as SQL: one literal, or ``CASE segment WHEN ... THEN k_g ... END``."""
    if not shift.segments:
        return _shift_literal(plan, shift.k, traits)
    return sa.case({raw: _shift_literal(plan, k, traits) for raw, k in shift.segments}, value=seg,
                   else_=_shift_literal(plan, shift.k, traits))


def _high_power_base(plan: MetricPlan, d: sa.ColumnElement, traits: EngineTraits | None) -> sa.ColumnElement:
    """The shifted value whose third and fourth powers are summed: a double where the
    engine keeps only the lower powers of an exact metric in decimals (Spark)."""
    if plan.exact and traits is not None and traits.engine.exact_powers < 3:
        return to_double(d)
    return d


# ------------------------------------------------------------------ queries


@dataclass(frozen=True)
class Shift:
    """A metric's shift ``k`` and, for doubles, the power-of-two grid ``scale`` of the split.

    ``scale`` is ``2**(12 - ceil(log2(R)))`` with ``R`` the range of the probe's values
    (or ``|k|``, or 1, when that is 0): shifted values within the probe's range become
    at most 2^13 steps of the grid ``1/scale``. Exact metrics have ``scale`` None.
    """

    k: Any
    scale: float | None = None
    segments: tuple[tuple[Any, float], ...] = ()

    def for_segment(self, raw: Any) -> Any:
        """The shift used for the rows of one segment (raw segment value)."""
        for value, k in self.segments:
            if value == raw:
                return k
        return self.k

    def per_segment(self, means: Mapping[Any, float]) -> Shift:
        """This shift with one value per segment: the segments' means from a first pass.

        An exact (decimal) shift keeps the probe value's decimal places: the mean is
        rounded to them, so ``value - k`` stays in the column's own digits (Spark's
        38-digit budget, :mod:`monitor.engines.spark`) and is written as a decimal
        literal the driver can send."""
        finite = [(raw, float(m)) for raw, m in means.items() if math.isfinite(float(m))]
        if self.scale is None and isinstance(self.k, Decimal) and self.k.is_finite():
            places = Decimal(1).scaleb(min(0, self.k.as_tuple().exponent))
            with localcontext() as ctx:
                ctx.prec = 80
                return Shift(self.k, None, tuple((raw, Decimal(repr(m)).quantize(places)) for raw, m in finite))
        return Shift(self.k, self.scale, tuple(finite))

    @classmethod
    def from_probe(cls, plan: MetricPlan, k: Any, spread: Any) -> Shift:
        if plan.exact:
            return cls(_dec(0 if k is None else k))
        k = 0.0 if k is None else float(k)
        width = float(spread) if spread is not None else 0.0
        if not (width > 0 and math.isfinite(width)):
            width = abs(k) if k != 0 and math.isfinite(k) else 1.0
        exponent = 12 - math.ceil(math.log2(width))
        return cls(k, 2.0 ** max(-300, min(300, exponent)))


def probe_query(rel: sa.FromClause, plans: Sequence[MetricPlan], where: sa.ColumnElement[bool],
                traits: EngineTraits, limit: int = PROBE_ROWS,
                order_by: Sequence[sa.ColumnElement] = ()) -> sa.Select:
    """The shift probe: one row with a value near the data for every metric.

    Reads at most ``limit`` rows of the window (the database stops there) and returns
    ``k<i>``: the mean of the usable values among them (float metrics), or their
    smallest value (exact metrics, so that the shift is a data value and every
    shifted term is exact), and ``r<i>``, their range (float metrics). NULL when none
    of those rows has a usable value; see :func:`first_value_query`.

    Which rows are the first is the engine's choice (:meth:`~monitor.engines.base.Engine.first_rows`):
    the scan order on single-node engines; on Spark, whose parallel tasks may hand out other
    rows on every run, the first by ``order_by`` (the time column) and every selected column.
    """
    keys = _distinct([p.key for p in plans])
    picked = [rel.c[k] for k in keys]
    sub = traits.engine.first_rows(sa.select(*picked).where(where), [*order_by, *picked], limit)
    sub = sub.subquery("segwatch_probe")
    cols = []
    for p in plans:
        v = value_or_null(p, sub.c[p.key], traits)
        if p.exact:
            cols.append(sa.func.min(v).label(f"k{p.position}"))
        else:
            cols.append(sa.func.avg(v).label(f"k{p.position}"))
            cols.append((sa.func.max(v) - sa.func.min(v)).label(f"r{p.position}"))
    return sa.select(*cols)


def first_value_query(rel: sa.FromClause, plan: MetricPlan, where: sa.ColumnElement[bool],
                      traits: EngineTraits, order_by: Sequence[sa.ColumnElement] = ()) -> sa.Select:
    """The first usable value of one metric in the window (``LIMIT 1``): the fallback
    shift when the probe's rows held none (first as in :func:`probe_query`)."""
    col = rel.c[plan.key]
    stmt = sa.select(transformed(plan, col).label("k")).where(where, usable(plan, col, traits))
    return traits.engine.first_rows(stmt, [*order_by, col], 1)


def _fence(stmt: sa.Select, traits: EngineTraits) -> sa.Select:
    """Keep the planner from inlining a subquery's expressions into every use.

    PostgreSQL and SQLite substitute a subquery's select-list expressions into the
    outer query, so a ``CASE`` used by six aggregates would run six times per row;
    ``OFFSET 0`` (SQLite: ``LIMIT -1 OFFSET 0``) is the customary fence. DuckDB
    eliminates common subexpressions itself, MySQL would materialise a fenced
    derived table, and other engines are left as they are
    (:meth:`monitor.engines.base.Engine.fence`).
    """
    return traits.engine.fence(stmt)


def aggregate_query(rel: sa.FromClause, segment_key: str, plans: Sequence[MetricPlan],
                    where: sa.ColumnElement[bool], shifts: Mapping[int, Shift],
                    traits: EngineTraits) -> sa.Select:
    """The one aggregate query of a period (see the module notes).

    Parameters
    ----------
    rel : FromClause
        The reflected source table, or the wrapped ``query:`` subquery.
    segment_key : str
        The segment column's key on ``rel``.
    plans : sequence of MetricPlan
        From :func:`plan_metrics`.
    where : ColumnElement
        The period window.
    shifts : mapping of int to Shift
        Per metric position, from :meth:`Shift.from_probe`.
    traits : EngineTraits

    Returns
    -------
    Select
        Columns ``seg``, ``rows`` and per metric position ``i``: ``nn<i>`` (non-NULL),
        ``num<i>`` (numbers; SQLite only), ``fin<i>`` (finite numbers; engines with
        inf/NaN), ``n<i>`` (usable), ``lo<i>``, ``hi<i>``, and the shifted sums:
        exact metrics ``s1_<i>`` .. ``s4_<i>``; doubles ``s1h_<i>``, ``s1l_<i>``,
        ``s2h_<i>``, ``s2m_<i>``, ``s2l_<i>``, ``s3_<i>``, ``s4_<i>``.

    Notes
    -----
    For doubles the shifted value ``d = v - k`` is split as ``d = h + l`` with ``h =
    round(d * scale) / scale`` on a power-of-two grid (Dekker 1971's splitting idea).
    Within the probe's range ``h`` has at most 14 significant bits, so ``h`` and
    ``h^2`` are sums of exact terms that the database adds without rounding (up to
    2^27 rows per segment); the remainders ``l`` (at most half a grid step) carry the
    rest. ``S1 = sum h + sum l`` and ``S2 = sum h^2 + 2 sum h l + sum l^2`` are then
    accurate to far below the rounding of a plain sum of squares, whatever order the
    engine adds in, which keeps the F statistic on NIST StRD data as accurate as
    pairwise-summing libraries on the same doubles. ``S3`` and ``S4`` are plain
    shifted sums.

    The query is three nested SELECTs: the rows' flags and usable values, then the
    shifted values and their split, then the aggregates; :func:`_fence` keeps the
    inner expressions from being evaluated once per use.
    """
    seg = rel.c[segment_key]
    one, zero = sa.literal(1), sa.literal(0)
    inner: list[sa.ColumnElement] = [seg.label("seg")]
    for p in plans:
        i = p.position
        col = rel.c[p.key]
        inner.append(sa.case((col.is_(None), zero), else_=one).label(f"nn{i}"))
        if traits.typeof:
            inner.append(sa.case((is_number(p, col, traits), one), else_=zero).label(f"num{i}"))
        if traits.non_finite:
            inner.append(sa.case((is_finite(p, col, traits), one), else_=zero).label(f"fin{i}"))
        inner.append(value_or_null(p, col, traits).label(f"v{i}"))
    rows = _fence(sa.select(*inner).where(where), traits).subquery("segwatch_rows")

    middle: list[sa.ColumnElement] = list(rows.c)
    for p in plans:
        i = p.position
        shift = shifts[i]
        d = rows.c[f"v{i}"] - _shift_expr(p, shift, rows.c.seg, traits)
        middle.append(d.label(f"d{i}"))
        if not p.exact:
            scale = sa.literal(shift.scale, sa.Double())
            middle.append((sa.func.round(d * scale) / scale).label(f"h{i}"))
    shifted = _fence(sa.select(*middle), traits).subquery("segwatch_shifted")

    c = shifted.c
    cols: list[sa.ColumnElement] = [c.seg.label("seg"), sa.func.count().label("rows")]
    for p in plans:
        i = p.position
        v, d = c[f"v{i}"], c[f"d{i}"]
        cols.append(sa.func.sum(c[f"nn{i}"]).label(f"nn{i}"))
        if traits.typeof:
            cols.append(sa.func.sum(c[f"num{i}"]).label(f"num{i}"))
        if traits.non_finite:
            cols.append(sa.func.sum(c[f"fin{i}"]).label(f"fin{i}"))
        cols += [
            sa.func.count(v).label(f"n{i}"),
            sa.func.min(v).label(f"lo{i}"),
            sa.func.max(v).label(f"hi{i}"),
        ]
        if p.exact:
            cols += [
                sa.func.sum(d).label(f"s1_{i}"),
                sa.func.sum(d * d).label(f"s2_{i}"),
            ]
        else:
            h = c[f"h{i}"]
            low = d - h
            cols += [
                sa.func.sum(h).label(f"s1h_{i}"),
                sa.func.sum(low).label(f"s1l_{i}"),
                sa.func.sum(h * h).label(f"s2h_{i}"),
                sa.func.sum(h * low).label(f"s2m_{i}"),
                sa.func.sum(low * low).label(f"s2l_{i}"),
            ]
        e = _high_power_base(p, d, traits)
        cols += [
            sa.func.sum(e * e * e).label(f"s3_{i}"),
            sa.func.sum(e * e * e * e).label(f"s4_{i}"),
        ]
    return sa.select(*cols).group_by(c.seg)


def direct_possible(plans: Sequence[MetricPlan], traits: EngineTraits) -> bool:
    """Whether the period may first be tried with :func:`direct_query`.

    Not on engines that can store text in a numeric column (SQLite: every value must
    be tested with ``typeof``), and not when a metric has a transform (its domain
    must be tested per row).
    """
    return not traits.typeof and all(p.transform == "none" for p in plans)


def direct_query(rel: sa.FromClause, segment_key: str, plans: Sequence[MetricPlan],
                 where: sa.ColumnElement[bool], shifts: Mapping[int, Shift],
                 traits: EngineTraits | None = None) -> sa.Select:
    """The aggregate query without per-row tests: the fast form tried first.

    One flat ``SELECT ... GROUP BY segment`` over the table with, per metric,
    ``COUNT(x)``, ``MIN(x)``, ``MAX(x)`` and the shifted sums ``sum((x - k)^p)``,
    ``p = 1..4`` (columns ``nn<i>``, ``lo<i>``, ``hi<i>``, ``s1_<i>`` .. ``s4_<i>``).
    It has no ``CASE`` and no subquery, so an engine can aggregate it in parallel
    workers (PostgreSQL) and evaluate it at the speed of a plain sum.

    It is right exactly when every non-NULL value is a finite number: a NaN or an
    infinity makes that segment's ``MIN``/``MAX`` or sums non-finite, which
    :func:`direct_clean` detects; the caller then runs :func:`aggregate_query`, which
    counts and excludes such values row by row. Doubles are summed without the split
    of :func:`aggregate_query`: with ``k`` near the data the variance keeps a
    condition number near 1 (Chan, Golub & LeVeque 1983), and a plain sum of ``n``
    squares has a relative error of at most about ``n`` units in the last place
    (Higham 2002, section 4.2), about 2e-10 at 2,000,000 rows and typically far less.
    Exact metrics are summed in decimal arithmetic as in :func:`aggregate_query`.
    """
    seg = rel.c[segment_key]
    cols: list[sa.ColumnElement] = [seg.label("seg"), sa.func.count().label("rows")]
    for p in plans:
        i = p.position
        col = rel.c[p.key]
        v = raw_value(p, col)
        d = v - _shift_expr(p, shifts[i], seg, traits)
        e = _high_power_base(p, d, traits)
        cols += [
            sa.func.count(col).label(f"nn{i}"),
            sa.func.min(v).label(f"lo{i}"),
            sa.func.max(v).label(f"hi{i}"),
            sa.func.sum(d).label(f"s1_{i}"),
            sa.func.sum(d * d).label(f"s2_{i}"),
            sa.func.sum(e * e * e).label(f"s3_{i}"),
            sa.func.sum(e * e * e * e).label(f"s4_{i}"),
        ]
    return sa.select(*cols).where(where).group_by(seg)


def direct_clean(rows: Sequence[Mapping[str, Any]], plans: Sequence[MetricPlan]) -> bool:
    """True when :func:`direct_query`'s result holds no non-finite minimum, maximum or sum."""
    names = [f"{prefix}{p.position}" for p in plans for prefix in ("lo", "hi", "s1_", "s2_", "s3_", "s4_")]
    for row in rows:
        for name in names:
            x = row[name]
            if x is None:
                continue
            if isinstance(x, Decimal):
                if not x.is_finite():
                    return False
            elif not math.isfinite(float(x)):
                return False
    return True


#: A segment whose mean lies further than this many of its standard deviations from
#: its metric's shift is summed again with a shift of its own (see :func:`ill_shifted`).
SHIFT_DISTANCE_LIMIT = 100.0


def ill_shifted(agg: Aggregate, plans: Sequence[MetricPlan], shifts: Mapping[int, Shift]
                ) -> dict[int, dict[Any, float]]:
    """Metrics whose shift lies too far from some segment's data, with every segment's mean.

    Shifted sums keep a segment's variance accurate while the shift ``k`` is within a
    few standard deviations of the segment's mean: the condition number of the
    computed variance is ``1 + z^2`` with ``z = (mean - k) / sd`` (Chan, Golub &
    LeVeque 1983), and the result loses about ``log10(1 + z^2)`` digits. One shift per
    metric, taken from the probe, serves segments whose levels differ by many of their
    standard deviations badly (segments at 10^9 and at 1, or a probe that met an
    outlier). For each float metric with a segment beyond :data:`SHIFT_DISTANCE_LIMIT`
    (more than about 4 digits at stake) this returns, per raw segment value, the mean
    from this first pass (accurate to several digits even then): the caller sums those
    metrics again with one shift per segment, so each segment's ``z`` becomes about 0.
    """
    out: dict[int, dict[Any, float]] = {}
    limit = SHIFT_DISTANCE_LIMIT**2
    for p in plans:
        if p.exact or shifts[p.position].segments:
            continue
        per = agg.metrics[p.position]
        k = float(shifts[p.position].k)
        far = False
        for label, summary in per.items():
            m = summary.moments
            if m.n < 2 or m.min == m.max:
                continue
            m2, gap = float(m.m2), float(m.mean) - k
            if not (math.isfinite(m2) and math.isfinite(gap)):
                continue
            if gap * gap * m.n > limit * m2:  # z^2 = gap^2 / (m2 / n)
                far = True
                break
        if far:
            out[p.position] = {raw: float(per[label].moments.mean)
                               for label, raws in agg.raw.items() for raw in raws
                               if per[label].moments.n}
    return out


def hash_kind(traits: EngineTraits) -> str:
    """``int64`` where the engine has a fast seeded 64-bit hash (PostgreSQL 11+), ``md5_60``
    (DuckDB), else ``md5`` (:meth:`monitor.engines.base.Engine.hash_kind`)."""
    return traits.engine.hash_kind(traits.version)


def hash_expr(key_columns: Sequence[sa.ColumnElement], seed: int, traits: EngineTraits) -> sa.ColumnElement:
    """The sampling hash of a row's key and the seed (see :mod:`monitor.source.sampling`).

    ``md5``: lowercase hex MD5 of ``key1|key2|...:seed``. PostgreSQL, MySQL/MariaDB and
    DuckDB have ``md5(text)``; Trino hashes bytes (``lower(to_hex(md5(to_utf8(...))))``);
    SQLite gets the Python function that :mod:`monitor.engines.sqlite` registers on segwatch's
    connections. ``int64`` (PostgreSQL 11+, :func:`hash_kind`):
    ``hashint8extended(key, seed)`` for one integer key column, else
    ``hashtextextended(key1|key2|..., seed)``. ``md5_60`` (DuckDB): the first 15 hex
    digits of the same MD5 as a ``BIGINT``, which orders rows as the hex digest does.
    A NULL key part counts as an empty string (as 0 for the integer hash). Each form is
    written by its engine module (:meth:`monitor.engines.base.Engine.sample_hash`).
    """
    return traits.engine.sample_hash(key_columns, seed, hash_kind(traits))


def values_query(rel: sa.FromClause, segment_key: str, plans: Sequence[MetricPlan],
                 where: sa.ColumnElement[bool], traits: EngineTraits, *,
                 hashed: sa.ColumnElement | None = None,
                 thresholds: Sequence[tuple[str, Sequence[Any]]] = (),
                 only_listed: bool = False) -> sa.Select:
    """Rows for the rank test and the value checks: all, or a hash-bounded superset of a sample.

    Returns columns ``seg``, ``h`` (the row's hash, when ``hashed`` is given) and
    ``v<i>``: the usable value before the transform (NULL otherwise). With
    ``thresholds`` (pairs of a bound and the raw segment values it applies to: an
    8-digit hex threshold for ``md5`` hashes, passed when below; a 64-bit integer for
    ``int64`` hashes, passed when at most), a row of a listed segment is returned
    only when its hash passes its segment's bound; rows of other segments are all returned (none with
    ``only_listed``). Rows with a NULL segment never are. A threshold of ``"g"``
    sorts after every hex digest: all rows of its segments pass.
    """
    seg = rel.c[segment_key]
    cols: list[sa.ColumnElement] = [seg.label("seg")]
    if hashed is not None:
        cols.append(hashed.label("h"))
    for p in plans:
        cols.append(value_or_null(p, rel.c[p.key], traits, transform=False).label(f"v{p.position}"))
    conds = [where, seg.is_not(None)]
    if thresholds:
        assert hashed is not None
        listed = [v for _, segs in thresholds for v in segs]
        integer = isinstance(thresholds[0][0], int)
        kind = sa.BigInteger() if integer else sa.String()
        limit = sa.case(*[(seg.in_(list(segs)), sa.literal(t, kind)) for t, segs in thresholds])
        passes = hashed <= limit if integer else hashed < limit
        if only_listed:
            conds.append(passes)
        else:
            conds.append(sa.or_(seg.not_in(listed), passes))
    return sa.select(*cols).where(*conds)


# ------------------------------------------------------------------ reading results


@dataclass(frozen=True)
class SegmentSummary:
    """One segment's aggregate for one metric."""

    moments: Moments
    quality: QualityCounts


@dataclass(frozen=True)
class Aggregate:
    """The aggregate query's result, keyed by segment label.

    Attributes
    ----------
    labels : tuple of str
        Segment labels (``str`` of the raw value), sorted.
    raw : dict
        Label -> the raw segment values the database grouped by (one, unless two
        values print alike, e.g. ``1`` and ``'1'`` in SQLite).
    rows : dict
        Label -> number of rows.
    null_segment_rows : int
        Rows whose segment is NULL.
    metrics : dict
        Metric position -> label -> :class:`SegmentSummary`.
    """

    labels: tuple[str, ...]
    raw: dict[str, tuple[Any, ...]]
    rows: dict[str, int]
    null_segment_rows: int
    metrics: dict[int, dict[str, SegmentSummary]]

    @property
    def total_rows(self) -> int:
        return sum(self.rows.values()) + self.null_segment_rows


def read_aggregate(rows: Iterable[Mapping[str, Any]], plans: Sequence[MetricPlan],
                   shifts: Mapping[int, Shift], traits: EngineTraits, *, direct: bool = False) -> Aggregate:
    """Turn the aggregate rows into per-segment summaries and quality counts.

    ``direct`` says the rows come from :func:`direct_query` (checked clean by
    :func:`direct_clean`): every non-NULL value is then a usable number.

    Types are converted here, in one place: counts to ``int`` (MySQL returns
    ``Decimal`` for sums of integers), sums to ``float`` or, for exact metrics,
    ``Decimal``. A segment whose usable values are all equal gets exact zeros for
    its central sums (as :meth:`Moments.from_values` does), not rounding noise.
    """
    raw: dict[str, list[Any]] = {}
    counts: dict[str, int] = {}
    nulls = 0
    per: dict[int, dict[str, SegmentSummary]] = {p.position: {} for p in plans}
    for row in rows:
        seg = row["seg"]
        n_rows = _int(row["rows"])
        if seg is None:
            nulls += n_rows
            continue
        label = str(seg)
        raw.setdefault(label, []).append(seg)
        counts[label] = counts.get(label, 0) + n_rows
        for p in plans:
            summary = _summary(row, p, n_rows, shifts[p.position], traits, direct)
            old = per[p.position].get(label)
            if old is not None:
                summary = SegmentSummary(
                    _merge(old.moments, summary.moments), add_quality(old.quality, summary.quality)
                )
            per[p.position][label] = summary
    labels = tuple(sorted(raw))
    return Aggregate(labels, {k: tuple(v) for k, v in raw.items()}, counts, nulls, per)


def _summary(row: Mapping[str, Any], p: MetricPlan, n_rows: int, shift: Shift,
             traits: EngineTraits, direct: bool = False) -> SegmentSummary:
    i = p.position
    nn = _int(row[f"nn{i}"])
    if direct:
        num = fin = n = nn
    else:
        num = _int(row[f"num{i}"]) if traits.typeof else nn
        fin = _int(row[f"fin{i}"]) if traits.non_finite else num
        n = _int(row[f"n{i}"])
    quality = QualityCounts(
        rows=n_rows,
        null=n_rows - nn,
        non_numeric=nn - num,
        non_finite=num - fin,
        out_of_domain=fin - n,
    )
    if n == 0:
        return SegmentSummary(Moments.empty(), quality)
    conv = _dec if p.exact else _flt
    lo, hi = conv(row[f"lo{i}"]), conv(row[f"hi{i}"])
    if lo == hi:
        zero = Decimal(0) if p.exact else 0.0
        return SegmentSummary(Moments(n, lo, zero, zero, zero, lo, hi), quality)
    if p.exact or direct:
        s1, s2 = conv(row[f"s1_{i}"]), conv(row[f"s2_{i}"])
    else:
        s1 = _exact_sum((1, row[f"s1h_{i}"]), (1, row[f"s1l_{i}"]))
        s2 = _exact_sum((1, row[f"s2h_{i}"]), (2, row[f"s2m_{i}"]), (1, row[f"s2l_{i}"]))
    sums = [s1, s2, conv(row[f"s3_{i}"]), conv(row[f"s4_{i}"])]
    k = conv(shift.for_segment(row["seg"]))
    if not p.exact and quality.non_finite == 0 and _overflowed(k, sums, lo, hi):
        # finite values whose powers overflow a double (|x - k| beyond ~1e77 for the fourth
        # power): the mean still follows from the first sum, the spread cannot; as a local
        # summary of the same values gives (Moments.from_values)
        mean = float(Fraction(k) + Fraction(s1) / n)
        return SegmentSummary(Moments(n, mean, math.inf, math.nan, math.inf, lo, hi), quality)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InaccurateResultWarning)
        moments = Moments.from_shifted_sums(n, conv(shift.for_segment(row["seg"])), *sums, lo, hi)
    for w in caught:
        log.warning("metric %s: %s", p.metric.name, w.message)
    return SegmentSummary(moments, quality)


def _overflowed(k: float, sums: Sequence[float], lo: float, hi: float) -> bool:
    """True when the shift, the first sum and the extremes are finite numbers but a higher sum is not."""
    finite = [k, sums[0], lo, hi]
    return all(math.isfinite(x) for x in finite) and not all(math.isfinite(x) for x in sums[1:])


def _merge(a: Moments, b: Moments) -> Moments:
    if a.is_exact != b.is_exact and a.n and b.n:
        return a.as_float().merge(b.as_float())
    return a.merge(b)


def add_quality(a: QualityCounts, b: QualityCounts) -> QualityCounts:
    """The counts of two disjoint sets of rows, added."""
    return QualityCounts(
        rows=a.rows + b.rows, null=a.null + b.null, non_numeric=a.non_numeric + b.non_numeric,
        non_finite=a.non_finite + b.non_finite, out_of_domain=a.out_of_domain + b.out_of_domain,
    )


def _int(x: Any) -> int:
    return 0 if x is None else int(x)


def _exact_sum(*terms: tuple[int, Any]) -> float:
    """``sum(c * x)`` in exact rational arithmetic, rounded once; NaN if a part is not finite."""
    total = Fraction(0)
    for coef, x in terms:
        x = 0.0 if x is None else float(x)
        if not math.isfinite(x):
            return math.nan
        total += coef * Fraction(x)
    return float(total)


def _flt(x: Any) -> float:
    return float("nan") if x is None else float(x)


def _dec(x: Any) -> Decimal:
    if x is None:
        return Decimal("NaN")
    if isinstance(x, Decimal):
        return x
    if isinstance(x, int):
        return Decimal(x)
    return Decimal(str(x))


def _distinct(items: Iterable[str]) -> list[str]:
    seen: dict[str, None] = {}
    for x in items:
        seen.setdefault(x, None)
    return list(seen)
