"""The decision rule of a job: when a metric "now differs", when an assumption check
"now fails", and when either is taken back.

:mod:`monitor.analysis` judges each period alone (p-values, q-values across the
period's metrics, pairs and segment directions). This module turns those numbers,
with what the history holds of the *immediately preceding* period, into the verdicts
that events announce (``decision:`` in the config):

``two_period`` (the default)
    Per metric, this period's p-value ``p_t`` and the previous period's ``p_{t-1}``
    give the evidence ``p* = min(1, p_t / w, p_S / (1 - w))`` with Stouffer's
    combination ``p_S`` (:class:`monitor.stats.evidence.TwoPeriodRule`). ``p*`` is held
    to the level ``B / (P m)`` for a budget of ``B`` false alarms a year
    (``decision.false_alarms_per_year``), ``P`` periods a year and ``m`` metrics with a
    p-value this period (:class:`monitor.stats.evidence.Budget`): Bonferroni's
    inequality bounds the expected number of false alarms by ``B`` a year whatever the
    other metrics do (unlike Benjamini-Hochberg, the level does not loosen when other
    metrics truly differ). An announcement is taken back only after
    ``decision.quiet_periods`` periods in a row whose two-period window has every
    p-value above ``decision.clear_above`` (:class:`monitor.stats.evidence.Hysteresis`):
    a standing difference whose p-value hovers near the level stays announced.
    The watched assumption checks (their p-values: Brown-Forsythe, normality) follow
    the same rule with their own budget (``decision.check_alarms_per_year``) over the
    period's (metric, check) pairs.

    Segment flags live inside an announced metric: a segment is flagged when this
    period's pairs say so (at ``alpha``, within the metric's family); an announced flag
    is kept while the metric stays announced, until ``quiet_periods`` periods in a row
    without that direction (counted in :attr:`~monitor.model.SegmentRow.held`), or the
    opposite direction.

``per_period``
    Each period alone: a metric differs when ``q <= fdr.level`` (with ``confirm: K``,
    replayed from history in :mod:`monitor.events`), assumption events whenever a watched
    check's verdict changes. This is the rule of releases before the choice existed.

When the previous period is not in the history (it failed, had no rows, or was never
computed), ``p_{t-1}`` is missing: the period is judged alone at the same level
(``p* = p_t``, still a valid p-value) and the verdict says so (``before`` is None);
the announced state is carried over from the latest stored period.

References
----------
Stouffer, S. A. et al. (1949). The American Soldier, vol. 1. Princeton University Press.
Whitlock, M. C. (2005). Combining probability from independent tests: the weighted
Z-method is superior to Fisher's approach. J. Evol. Biol. 18, 1368-1373.
See :mod:`monitor.stats.evidence` for the proof that the budget holds.
"""

from __future__ import annotations

import logging
import math
from dataclasses import replace
from typing import Any, Mapping, Protocol, Sequence

from .analysis import gate
from .config import JobConfig, MetricConfig
from .model import RULE_PER_PERIOD, RULE_TWO_PERIOD, MetricResult, SegmentRow, Verdict
from . import stats  # stats.evidence loads scipy: reached on first use (the lazy package), not at import

log = logging.getLogger(__name__)

__all__ = ["Previous", "decide_period", "important", "large_enough", "previous_state", "segment_gap"]


class StoredLike(Protocol):
    """What the decision rule reads of the previous stored period
    (:class:`monitor.store.history.StoredPeriod` has these fields)."""

    period: str
    segments: Sequence[str]
    metrics: Mapping[str, Mapping[str, Any]]


def segment_gap(result: MetricResult, segment: str, metric: MetricConfig | None) -> float:
    """The practical size of one segment's difference: against the reference segment
    in a reference job, else against the mean of the other segments' records; in the
    metric's units, or as a percentage when ``min_difference`` is one (under ``log``
    the percentage of the ratio of geometric means). NaN when it cannot be measured."""
    rows = {s.segment: s for s in result.segments}
    row = rows.get(segment)
    if row is None or not math.isfinite(row.mean):
        return math.nan
    if result.reference is not None:
        ref = rows.get(result.reference)
        if ref is None or segment == result.reference or not math.isfinite(ref.mean):
            return math.nan
        gap, base = row.mean - ref.mean, ref.mean
    else:
        gap, base = row.diff_vs_rest, row.mean - row.diff_vs_rest
    if not math.isfinite(gap):
        return math.nan
    if metric is None or not metric.min_difference_percent:
        return abs(gap)
    if metric.transform == "log":
        return 100.0 * abs(math.exp(gap) - 1.0)
    return 100.0 * abs(gap) / abs(base) if base else math.nan


def large_enough(result: MetricResult, segment: str, metric: MetricConfig | None) -> bool:
    """Whether one segment's difference reaches the metric's ``min_difference`` (True when none is set)."""
    if metric is None or metric.min_difference is None:
        return True
    size = segment_gap(result, segment, metric)
    return math.isfinite(size) and size >= metric.min_difference


def important(result: MetricResult, metric: MetricConfig | None) -> bool:
    """Whether the metric's difference reaches its practical thresholds: ``min_effect``
    (omega-squared units) and ``min_difference`` (some segment's difference, see
    :func:`segment_gap`); True when neither is set."""
    if metric is None:
        return True
    if metric.min_effect is not None:
        eff = result.effect_size.value if result.effect_size is not None else math.nan
        if not (eff is not None and math.isfinite(eff) and eff >= metric.min_effect):
            return False
    if metric.min_difference is not None:
        return any(large_enough(result, s.segment, metric) for s in result.segments
                   if not s.excluded and s.segment != result.reference)
    return True


class Previous:
    """What the decision rule takes from the latest stored period before this one.

    ``adjacent`` says whether that period is the immediately preceding one: only then
    do its p-values enter this period's evidence; its announced states carry over
    either way.
    """

    def __init__(self, stored: StoredLike | None, adjacent: bool, job: JobConfig) -> None:
        self.period = stored.period if stored is not None else None
        self.adjacent = bool(adjacent and stored is not None)
        self._entries = dict(stored.metrics) if stored is not None else {}
        self._segments = frozenset(stored.segments) if stored is not None else frozenset()
        self._job = job

    def entry(self, metric: str) -> Mapping[str, Any] | None:
        return self._entries.get(metric)

    def p_value(self, metric: str) -> float | None:
        entry = self.entry(metric)
        if not self.adjacent or not entry:
            return None
        return _p(entry.get("p_value"))

    def state(self, metric: str) -> stats.evidence.State | None:
        """The announced state of ``metric`` the previous period left."""
        entry = self.entry(metric)
        if not entry:
            return None
        d = entry.get("decision")
        if d and d.get("rule") == RULE_TWO_PERIOD:
            return stats.evidence.State(bool(d.get("on")), int(d.get("quiet") or 0))
        # stored under the per-period rule (or before rules were stored): its verdict as the state
        cfg = next((m for m in self._job.metrics if m.name == metric), None)
        eff = (entry.get("effect_size") or {}).get("value")
        ok = cfg is None or cfg.min_effect is None or (eff is not None and eff >= cfg.min_effect)
        return stats.evidence.State(bool(entry.get("significant")) and ok, 0)

    def check_p(self, metric: str, check: str) -> float | None:
        entry = self.entry(metric)
        if not self.adjacent or not entry:
            return None
        return _p(((entry.get("assumptions") or {}).get(check) or {}).get("value"))

    def check_state(self, metric: str, check: str) -> stats.evidence.State | None:
        entry = self.entry(metric)
        if not entry:
            return None
        d = (entry.get("check_decisions") or {}).get(check)
        if d and d.get("rule") == RULE_TWO_PERIOD:
            return stats.evidence.State(bool(d.get("on")), int(d.get("quiet") or 0))
        stored = (entry.get("assumptions") or {}).get(check) or {}
        return stats.evidence.State(stored.get("passed") is False and bool(stored.get("watched", True)), 0)

    def flags(self, metric: str) -> dict[str, tuple[str, int]]:
        """Announced segment flags of ``metric``: segment -> (flag, periods held without evidence)."""
        entry = self.entry(metric)
        if not entry:
            return {}
        return {s["segment"]: (s["flag"], int(s.get("held") or 0)) for s in entry.get("segments") or ()
                if s.get("flag")}


def previous_state(stored: Sequence[StoredLike], period_before: str, job: JobConfig) -> Previous:
    """:class:`Previous` from stored periods newest first (``History.recent``), where
    ``period_before`` names the period immediately preceding the one being judged."""
    newest = stored[0] if stored else None
    return Previous(newest, newest is not None and newest.period == period_before, job)


def decide_period(results: Sequence[MetricResult], job: JobConfig, previous: Previous) -> tuple[MetricResult, ...]:
    """The period's verdicts under ``job.decision`` (see the module notes).

    Under ``per_period`` every metric gets a :class:`~monitor.model.Verdict` that
    records ``q <= fdr.level``; significance and flags are those of
    :func:`monitor.analysis.finalise`. Under ``two_period`` ``significant`` becomes the
    announced state, the flags and pairs are gated by it, and each metric carries the
    verdicts of its watched checks.
    """
    d = job.decision
    cfg = {m.name: m for m in job.metrics}
    if d.rule == RULE_PER_PERIOD:
        return tuple(replace(r, segments=_sized(r, cfg.get(r.metric)),
                             decision=Verdict(RULE_PER_PERIOD, r.q_value, job.fdr.level, r.significant,
                                              r.significant)) for r in results)
    rule = stats.evidence.TwoPeriodRule(weight_now=d.weight_now)
    hysteresis = stats.evidence.Hysteresis(clear_above=d.clear_above, quiet_periods=d.quiet_periods)
    before = previous.period if previous.adjacent else None

    tracks = {r.metric: stats.evidence.Track(_p(r.p_value), previous.p_value(r.metric), previous.state(r.metric),
                                 important(r, cfg.get(r.metric))) for r in results}
    budget = stats.evidence.Budget(d.false_alarms_per_year, job.period)
    metric_decisions = stats.evidence.decide(rule, hysteresis, budget, tracks)

    check_tracks = {}
    for r in results:
        for name in r.relevant_checks:
            chk = r.assumptions.get(name)
            # a break is announced only in a period whose own check fails (never "fails" beside a
            # passing p-value, whatever the budget's level for few monthly checks)
            check_tracks[(r.metric, name)] = stats.evidence.Track(
                _p(chk.value) if chk is not None and chk.passed is not None else None,
                previous.check_p(r.metric, name), previous.check_state(r.metric, name),
                important=chk is not None and chk.passed is False)
    check_budget = stats.evidence.Budget(d.check_alarms_per_year, job.period)
    check_decisions = stats.evidence.decide(rule, hysteresis, check_budget, check_tracks)

    on_count = sum(1 for x in metric_decisions.decisions.values() if x.state.on)
    computed = sum(1 for r in results if r.computed)
    pair_level = job.alpha * on_count / computed if job.fdr.pairs == "selective" and computed else job.alpha
    # every gap to a reference inside an announced metric is an alarm of its own: the budget's
    # level over all of them (Bonferroni over the gaps' many-to-one adjusted p-values: conservative)
    gap_tests = sum(1 for r in results if r.reference is not None and metric_decisions.decisions[r.metric].state.on
                    for p in r.pairs if p.b == r.reference and _p(p.p_adj) is not None)
    gap_level = stats.evidence.Budget(d.false_alarms_per_year, job.period).level(gap_tests)
    out = []
    for r in results:
        dec = metric_decisions.decisions[r.metric]
        verdict = _verdict(dec, before)
        checks = {name: _verdict(check_decisions.decisions[(r.metric, name)], before)
                  for name in r.relevant_checks}
        on = dec.state.on
        gated = gate(r, on, pair_level, job)
        gated = replace(gated, segments=_sized(gated, cfg.get(r.metric)))
        if r.reference is not None:
            segments = _gap_flags(gated, previous, on, rule, hysteresis, gap_level, cfg.get(r.metric))
        else:
            segments = _held_flags(gated.segments, r, previous.flags(r.metric), on, hysteresis.quiet_periods)
        out.append(replace(gated, segments=segments, decision=verdict, check_decisions=checks))
    return tuple(out)


def _sized(r: MetricResult, metric: MetricConfig | None) -> tuple[SegmentRow, ...]:
    """The segment rows with the flags (and directions) of differences below
    ``min_difference`` taken away."""
    if metric is None or metric.min_difference is None:
        return r.segments
    return tuple(s if (s.flag is None and s.direction is None) or large_enough(r, s.segment, metric)
                 else replace(s, flag=None, direction=None) for s in r.segments)


def _gap_flags(r: MetricResult, previous: Previous, on: bool, rule: stats.evidence.Rule,
               hysteresis: stats.evidence.Hysteresis,
               level: float, metric: MetricConfig | None) -> tuple[SegmentRow, ...]:
    """Gaps to the reference under the two-period rule: each segment's gap is a test of
    its own (its many-to-one adjusted p-value, combined with the previous period's when
    the gap kept its sign), announced at the metric's level and taken back with the same
    hysteresis; only inside an announced metric. ``held`` counts the quiet periods of an
    announced gap."""
    if not on:
        return r.segments
    pairs = {p.a: p for p in r.pairs if p.b == r.reference}
    entry = previous.entry(r.metric) if previous.adjacent else None
    before_pairs = {p.get("a"): p for p in (entry or {}).get("pairs") or () if p.get("b") == r.reference}
    before_flags = previous.flags(r.metric)
    out = []
    for s in r.segments:
        pair = pairs.get(s.segment)
        if pair is None or s.excluded or not math.isfinite(pair.diff) or pair.diff == 0:
            out.append(replace(s, flag=None, held=0))
            continue
        direction = "high" if pair.diff > 0 else "low"
        held = before_flags.get(s.segment)
        prior = before_pairs.get(s.segment) or {}
        prior_diff = prior.get("diff")
        same_sign = isinstance(prior_diff, (int, float)) and prior_diff * pair.diff > 0
        p_before = _p(prior.get("p_adj")) if same_sign else None
        important = large_enough(r, s.segment, metric)
        kept = None if held is None or held[0] != direction else stats.evidence.State(True, held[1])
        dec = stats.evidence.step(rule, hysteresis, kept,
                                  _p(pair.p_adj), p_before, level, important=important)
        if held is not None and held[0] != direction and not dec.state.on:
            # the announced gap changed sign without evidence for the new one: no evidence for the old
            # direction this period (p = 1), which counts towards clearing it like any quiet period
            old = stats.evidence.step(rule, hysteresis, stats.evidence.State(True, held[1]), 1.0,
                          _p(prior.get("p_adj")) if not same_sign else None, level)
            if old.state.on:
                out.append(replace(s, flag=held[0], direction=None, held=old.state.quiet))
                continue
        if dec.state.on:
            out.append(replace(s, flag=direction, direction=direction, held=dec.state.quiet))
        else:
            out.append(replace(s, flag=None, direction=direction if dec.reject else None, held=0))
    return tuple(out)


def _held_flags(rows: Sequence[SegmentRow], r: MetricResult, before: Mapping[str, tuple[str, int]], on: bool,
                quiet_periods: int) -> tuple[SegmentRow, ...]:
    """Segment flags with hysteresis: an announced flag is kept while the metric stays
    announced and the segment has records, until ``quiet_periods`` periods in a row
    without that direction (or the opposite direction)."""
    if not on:
        return tuple(rows)
    out = []
    for s in rows:
        held = before.get(s.segment)
        if s.flag or held is None or s.excluded or s.n == 0 or not r.computed:
            out.append(s)
            continue
        flag, count = held
        if count + 1 >= quiet_periods:
            out.append(s)
        else:
            out.append(replace(s, flag=flag, held=count + 1))
    return tuple(out)


def _verdict(dec: stats.evidence.Decision, before: str | None) -> Verdict:
    e = dec.evidence
    return Verdict(RULE_TWO_PERIOD, e.p_star, dec.level, dec.reject, dec.state.on, dec.state.quiet, dec.change,
                   e.p_before, e.p_combined if math.isfinite(e.p_combined) else None,
                   before if e.p_before is not None else None)


def _p(x: Any) -> float | None:
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return min(1.0, max(0.0, v)) if math.isfinite(v) else None
