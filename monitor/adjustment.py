"""A metric compared within strata (``adjust_for``): the adjusted verdict and the raw one beside it.

:func:`apply` takes one metric's ordinary result (the one-way comparison of the period) and its
per-(segment, stratum) cells, fits the additive model of :mod:`monitor.stats.adjusted` and
returns the result with

* ``statistic``, ``df`` and ``p_value`` of the segment term adjusted for the strata (Type II),
  so that the false-discovery control across metrics and every verdict use the adjusted test;
* ``pairs``: the adjusted gaps to the reference (simultaneous Dunnett-type family), so flags,
  events and alerts speak of the adjusted gaps;
* ``adjustment``: the model (columns, covariance, strata and additivity tests, every gap with
  its raw gap and the share of it that composition explains) and the raw comparison (method,
  statistic, df, p-value, pairs) it replaced.

The covariance follows the test the metric uses: Fisher's ANOVA (equal spreads) keeps the
classic one; Welch's ANOVA or Kruskal-Wallis (spreads or shapes differ) the
heteroscedasticity-consistent HC3 one. ``method`` becomes ``anova-adjusted`` or
``hc3-adjusted``; its ``df`` is ``[q, N - rank]``.
"""

from __future__ import annotations

import logging
import math
from dataclasses import replace
from typing import TYPE_CHECKING

from .model import Adjustment, EffectSize, GapRow, MetricInput, MetricResult, PairRow, TermRow

if TYPE_CHECKING:
    from .config import JobConfig

__all__ = ["ADJUSTED_METHODS", "apply"]

log = logging.getLogger(__name__)

#: ``method`` values of adjusted metrics, by covariance.
ADJUSTED_METHODS = {"classic": "anova-adjusted", "hc3": "hc3-adjusted"}
POSTHOC = "dunnett-adjusted"


def apply(result: MetricResult, data: MetricInput, job: JobConfig) -> MetricResult:
    """The adjusted verdict for a metric with ``adjust_for`` (the result as it is otherwise)."""
    m = data.metric
    columns = tuple(getattr(m, "adjust_for", ()) or ())
    if not columns:
        return result
    if data.cells is None:
        return replace(result, note=_join(result.note, "adjust_for is set but no per-stratum sums were read, "
                                                       "so the comparison is not adjusted"))
    from .stats.adjusted import adjusted_comparison

    labels = [s.segment for s in result.segments if not s.excluded and s.n > 0]
    cells = [c for c in data.cells.cells if c.segment in labels]
    from . import methods

    # the model follows the test used: equal spreads assumed -> classic, else HC3 (also when
    # auto picked a rank test, whose adjusted stand-in is the robust model)
    used = methods.find(result.method)
    covariance = (used.adjusted_covariance if used is not None else None) or "hc3"
    log_scale = m.transform == "log"
    res = adjusted_comparison(cells, m.reference, columns, segments=labels, covariance=covariance,
                              confidence=job.posthoc.confidence, log_scale=log_scale)
    test = res.segment_test
    pairs = tuple(PairRow(g.segment, g.reference, g.adjusted, g.p_adj, g.ci_low, g.ci_high, log_scale=log_scale)
                  for g in res.gaps)
    verdicts = _verdicts(labels, pairs, job.alpha)
    rows = tuple(
        replace(r, above=verdicts[r.segment][0], below=verdicts[r.segment][1], direction=verdicts[r.segment][2])
        if r.segment in verdicts else r
        for r in result.segments
    )
    adjustment = Adjustment(
        columns=columns, covariance=covariance,
        strata_tests=tuple(_term(t) for t in res.strata_tests), additivity=_term(res.additivity),
        gaps=tuple(GapRow(g.segment, g.reference, g.n, g.adjusted, g.ci_low, g.ci_high, g.p_adj, g.raw,
                          g.explained, log_scale, g.note) for g in res.gaps),
        critical_value=res.critical_value, cells=res.cells, missing=data.cells.missing,
        raw_method=result.method, raw_statistic=result.statistic, raw_df=tuple(result.df),
        raw_p_value=result.p_value, raw_pairs=result.pairs, note=res.note,
    )
    notes = [result.note] if result.note else []
    if res.note:
        notes.append(res.note)
    if data.cells.missing:
        notes.append(f"{data.cells.missing} values with a NULL in {', '.join(columns)} were left out of the "
                     "adjusted comparison")
    if math.isfinite(res.additivity.p_value) and res.additivity.p_value <= job.alpha:
        notes.append(f"the additive model fits poorly (additivity p = {res.additivity.p_value:.3g}): the gaps "
                     f"may differ between strata of {', '.join(columns)}")
    reason = (f"{result.method_reason}; adjusted for {', '.join(columns)} (additive model, Type II, "
              f"{'classic' if covariance == 'classic' else 'HC3'} covariance)")
    return replace(
        result, method=ADJUSTED_METHODS[covariance], method_reason=reason, statistic=test.statistic,
        df=(float(test.df), test.df_resid), p_value=test.p_value,
        effect_size=_partial_omega_squared(test.statistic, test.df, res.n),
        extra_effects=tuple(e for e in (result.effect_size,) if e is not None),
        pairs=pairs, posthoc=POSTHOC, segments=rows, adjustment=adjustment,
        note="; ".join(notes) or None,
    )


def _term(t) -> TermRow:
    return TermRow(t.term, t.statistic, (float(t.df), t.df_resid), t.p_value, t.ss)


def _verdicts(labels, pairs, alpha: float) -> dict[str, tuple[int, int, str | None]]:
    """(above, below, direction) per segment from its adjusted gap (the reference rule of
    :func:`monitor.analysis._segment_verdicts`)."""
    out: dict[str, tuple[int, int, str | None]] = {s: (0, 0, None) for s in labels}
    for p in pairs:
        if math.isfinite(p.p_adj) and p.p_adj <= alpha and math.isfinite(p.diff) and p.diff != 0:
            out[p.a] = (1, 0, "high") if p.diff > 0 else (0, 1, "low")
    return out


def _partial_omega_squared(f: float, df: int, n: int) -> EffectSize | None:
    """Partial omega squared of the segment term from its F, ``df (F - 1) / (df (F - 1) + N)``.

    Notes
    -----
    Olejnik and Algina (2003), Generalized eta and omega squared statistics, Psychological
    Methods 8(4), 434-447 (the partial form, computed from F, df and N); truncated at 0.
    """
    if not math.isfinite(f) or df < 1 or n < 1:
        return None
    num = df * (f - 1.0)
    return EffectSize("partial_omega_squared", max(0.0, num / (num + n)))


def _join(note: str | None, extra: str) -> str:
    return f"{note}; {extra}" if note else extra
