"""Per-(segment, stratum) sums for the adjusted comparison, pushed down in SQL.

A metric with ``adjust_for: [a, b]`` needs, besides the per-segment sums of
:mod:`monitor.source.pushdown`, one count, mean and sum of squared deviations per
(segment, a, b) cell (:class:`~monitor.stats.cells.Cell`): the normal equations of the
additive model ``y ~ segment + a + b`` and its residual sum of squares are functions of
these alone (see :mod:`monitor.stats.adjusted`). :func:`cell_query` builds

    SELECT seg, a0, a1, COUNT(v), MIN(v), MAX(v), SUM(d) ..., SUM(d*d) ...
    FROM (rows of the window, v the usable value on the analysis scale, d = v - k_segment)
    GROUP BY seg, a0, a1

with the same usable-value rule, transform and shifted, split sums as the per-segment
query (so the cells of a segment add up to its summary), and the shift ``k`` of each
segment taken from that segment's mean in the first pass, which keeps the sums well
conditioned in every cell. :func:`read_cells` turns the rows into cells in exact rational
arithmetic; :func:`cells_from_frame` does the same for ``compute: local`` from the rows.

Records whose adjustment value is NULL cannot be placed in a stratum; they are left out of
the adjusted comparison and counted (``missing``), never silently dropped.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Iterable, Mapping, Sequence
from fractions import Fraction
from typing import Any

import numpy as np
import sqlalchemy as sa

from ..engines import EngineTraits
from ..stats.cells import Cell, CellData, merge_cells
from .pushdown import MetricPlan, Shift, _exact_sum, _fence, _int, _shift_expr, value_or_null

__all__ = ["cell_query", "cells_from_frame", "read_cells"]

log = logging.getLogger(__name__)


def cell_query(rel: sa.FromClause, segment_key: str, plan: MetricPlan, strata_keys: Sequence[str],
               where: sa.ColumnElement[bool], shift: Shift, traits: EngineTraits) -> sa.Select:
    """The per-(segment, stratum) aggregate of one metric.

    Returns columns ``seg``, ``a0`` .. ``a<p-1>`` (the adjustment values), ``n``, ``lo``,
    ``hi`` and the shifted sums ``s1``, ``s2`` (exact metrics) or ``s1h``, ``s1l``,
    ``s2h``, ``s2m``, ``s2l`` (doubles, split as in
    :func:`monitor.source.pushdown.aggregate_query`).
    """
    seg = rel.c[segment_key]
    inner: list[sa.ColumnElement] = [seg.label("seg")]
    inner += [rel.c[k].label(f"a{j}") for j, k in enumerate(strata_keys)]
    inner.append(value_or_null(plan, rel.c[plan.key], traits).label("v"))
    rows = _fence(sa.select(*inner).where(where), traits).subquery("segwatch_cell_rows")
    d = rows.c.v - _shift_expr(plan, shift, rows.c.seg, traits)
    middle: list[sa.ColumnElement] = [*rows.c, d.label("d")]
    if not plan.exact:
        scale = sa.literal(shift.scale, sa.Double())
        middle.append((sa.func.round(d * scale) / scale).label("h"))
    shifted = _fence(sa.select(*middle), traits).subquery("segwatch_cell_shifted")
    c = shifted.c
    keys = [c.seg] + [c[f"a{j}"] for j in range(len(strata_keys))]
    cols: list[sa.ColumnElement] = [*keys, sa.func.count(c.v).label("n"),
                                    sa.func.min(c.v).label("lo"), sa.func.max(c.v).label("hi")]
    if plan.exact:
        cols += [sa.func.sum(c.d).label("s1"), sa.func.sum(c.d * c.d).label("s2")]
    else:
        low = c.d - c.h
        cols += [sa.func.sum(c.h).label("s1h"), sa.func.sum(low).label("s1l"),
                 sa.func.sum(c.h * c.h).label("s2h"), sa.func.sum(c.h * low).label("s2m"),
                 sa.func.sum(low * low).label("s2l")]
    return sa.select(*cols).group_by(*keys)


def read_cells(rows: Iterable[Mapping[str, Any]], plan: MetricPlan, columns: Sequence[str],
               shift: Shift) -> CellData:
    """Cells from the rows of :func:`cell_query` (exact rational conversion, rounded once)."""
    out = []
    missing = 0
    p = len(columns)
    for row in rows:
        seg = row["seg"]
        n = _int(row["n"])
        if seg is None or n == 0:
            continue
        levels = tuple(row[f"a{j}"] for j in range(p))
        if any(v is None for v in levels):
            missing += n
            continue
        lo, hi = row["lo"], row["hi"]
        k = shift.for_segment(seg)
        if lo == hi:
            out.append(Cell(str(seg), _level_text(levels), n, float(lo), 0.0))
            continue
        if plan.exact:
            s1, s2 = Fraction(row["s1"]), Fraction(row["s2"])
        else:
            s1 = Fraction(_exact_sum((1, row["s1h"]), (1, row["s1l"])))
            s2 = Fraction(_exact_sum((1, row["s2h"]), (2, row["s2m"]), (1, row["s2l"])))
        a = s1 / n
        mean = Fraction(k) + a
        m2 = s2 - n * a * a
        if m2 < 0:  # rounding of the given sums (a near-constant cell)
            m2 = Fraction(0)
        mean_f = float(mean)
        out.append(Cell(str(seg), _level_text(levels), n, mean_f, float(m2), float(mean - Fraction(mean_f))))
    return CellData(tuple(columns), merge_cells(out), missing)


def cells_from_frame(segments: np.ndarray, values: np.ndarray, usable: np.ndarray,
                     strata: Sequence[np.ndarray], columns: Sequence[str]) -> CellData:
    """Cells from rows read locally (``compute: local``).

    Parameters
    ----------
    segments : array of str
        The rows' segment labels (rows with a NULL segment already removed).
    values : array of float
        The rows' values on the analysis scale.
    usable : array of bool
        Which values are usable (finite, in the transform's domain).
    strata : sequence of arrays
        The rows' adjustment values (``None`` for NULL), one array per column.
    columns : sequence of str
        The adjustment columns.
    """
    from ..stats.summary import Moments

    has_all = np.ones(len(values), dtype=bool)
    for col in strata:
        has_all &= np.array([v is not None and not (isinstance(v, float) and math.isnan(v)) for v in col],
                            dtype=bool)
    missing = int(np.sum(usable & ~has_all))
    keep = usable & has_all
    keys: dict[tuple, list[int]] = {}
    rows = np.flatnonzero(keep)
    level_rows = [[col[i] for col in strata] for i in rows]
    for i, levels in zip(rows, level_rows):
        keys.setdefault((str(segments[i]), _level_text(levels)), []).append(int(i))
    out = []
    for (seg, levels), idx in keys.items():
        m = Moments.from_values(values[np.asarray(idx)])
        out.append(Cell.from_moments(seg, levels, m))
    return CellData(tuple(columns), tuple(out), missing)


def _level_text(levels: Sequence[Any]) -> tuple[str, ...]:
    """Adjustment values as text, the way segment labels are (``str`` of the raw value);
    a whole float prints as an integer so that ``2`` and ``2.0`` are one level."""
    out = []
    for v in levels:
        if isinstance(v, float) and v.is_integer():
            v = int(v)
        out.append(str(v))
    return tuple(out)
