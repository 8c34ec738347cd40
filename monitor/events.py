"""Events: what changed between the previous stored period and this one.

Pure functions over the analysis results and the previous period's stored entries;
no database, no I/O. The kinds are those of the contract:

``emerged`` / ``cleared``
    A metric became significant (or stopped being), or a segment within it became
    flagged high/low (or stopped being). A metric whose effect size is below its
    ``min_effect`` is reported as significant in the results but does not raise
    ``emerged`` (significance is not importance).
``assumption_broken`` / ``assumption_restored``
    An assumption check of a metric failed (or passed again); the event carries the
    check's name, value and threshold.
``segment_new`` / ``segment_missing``
    A segment appears that the previous period did not have, or is absent now.
``data_quality``
    A metric's share of NULL, non-numeric, non-finite or out-of-domain values is over
    ``quality.max_bad_share``; a segment had too few values to be compared; rows had
    no segment value.

With no earlier period stored, the comparison is against an empty baseline: every
significant metric and flagged segment is ``emerged``, every failing check is
``assumption_broken``, and no ``segment_new`` is raised (every segment would be new).

Persistence: ``confirm: K``
---------------------------
``emerged`` and ``cleared`` announce changes of an *announced state*: per metric,
"differs" or not; per segment of a metric, flagged ``high``, ``low`` or not.

* **K = 1** (the default): the announced state is the previous stored period's
  verdict (:meth:`Baseline.from_stored`), so ``emerged`` means "significant now, not
  in the previous period" and ``cleared`` the reverse.
* **K >= 2**: the announced state changes only after K consecutive periods agree
  on the new verdict, the current one included. ``emerged`` is raised in the K-th
  consecutive significant period when the metric was announced as not differing;
  ``cleared`` in the K-th consecutive non-significant period when it was announced as
  differing. Segment flags follow the same rule, with the flag (``high``, ``low`` or
  none) as the verdict; a flag that turns from ``high`` to ``low`` in K periods gives
  ``emerged`` (low) and ``cleared`` (high) together. A verdict that alternates
  without K equal periods in a row changes nothing.

What a period's verdict is: for a metric, "significant and at least ``min_effect``";
for a segment, its flag when the metric was significant and at least ``min_effect``,
else none. A period in which a metric could not be computed (no p-value) gives no
verdict for it and its segments, and a period without records of a segment gives no
verdict for that segment: such periods neither count towards a run nor break one.

The announced state is *derived*, not stored: :meth:`Baseline.from_history` replays
the rule over the stored verdicts (:class:`~monitor.store.history.StoredPeriod` entries,
newest first, as ``History.recent`` returns them), starting from "not announced" at
the oldest period it is given. The replay is exact when the periods given reach back
to the job's first period or to a run of K equal verdicts before the current period
(after such a run the state is known whatever came before). Only when a verdict
alternated without K equal periods in a row through the whole window does the
replay start "not announced" where the truth may differ; the error is then at worst
one repeated ``emerged`` or one missing ``cleared``, and only in a period that
completes a run of K. :func:`lookback` gives the window: 26 * K periods (one for
K = 1). Because the state is a function of the stored verdicts alone, re-running
a period gives the same events, and changing K re-reads history under the new K.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Protocol, Sequence

from . import decisions, methods
from .config import JobConfig
from .model import (  # noqa: F401 - Event re-exported for callers of this module
    EVENT_KINDS, RULE_TWO_PERIOD, Event, MetricResult,
)

log = logging.getLogger(__name__)

#: Stored periods replayed per unit of ``confirm`` (see :func:`lookback`).
LOOKBACK_PER_CONFIRM = 26

KINDS = EVENT_KINDS

CHECK_NAMES = {
    "brown_forsythe": "equal-spread check (Brown-Forsythe)",
    "normality": "normality check",
    "sd_ratio": "spread-ratio check",
    "n_ratio": "size-ratio check",
    "outlier_share": "outlier check",
}


class StoredLike(Protocol):
    """What :meth:`Baseline.from_history` reads of a stored period
    (:class:`monitor.store.history.StoredPeriod` has these fields)."""

    period: str
    segments: Sequence[str]
    metrics: Mapping[str, Mapping[str, Any]]


@dataclass(frozen=True)
class Run:
    """The latest run of equal verdicts in the stored periods, for ``confirm: K``.

    ``verdict`` is True/False for a metric, ``'high'``, ``'low'`` or None for a
    segment's flag; ``length`` counts the periods with a verdict in the run and
    ``since`` names its first period.
    """

    verdict: bool | str | None
    length: int
    since: str


@dataclass(frozen=True)
class Baseline:
    """What the stored history says, reduced to what events compare.

    ``significant`` and ``flags`` are the announced state (see the module notes);
    ``period``, ``segments`` and ``checks`` are those of the latest stored period.
    ``metric_runs`` and ``flag_runs`` hold the latest run of equal verdicts per
    metric and per (metric, segment); they are filled for ``confirm`` >= 2 only.
    """

    period: str | None
    segments: frozenset[str]
    significant: Mapping[str, bool]  # metric -> announced as differing
    flags: Mapping[str, Mapping[str, str]]  # metric -> segment -> announced high/low
    checks: Mapping[str, Mapping[str, bool | None]]  # metric -> check -> passed
    confirm: int = 1
    metric_runs: Mapping[str, Run] = field(default_factory=dict)
    flag_runs: Mapping[str, Mapping[str, Run]] = field(default_factory=dict)

    @classmethod
    def empty(cls, confirm: int = 1) -> "Baseline":
        return cls(None, frozenset(), {}, {}, {}, confirm=confirm)

    @classmethod
    def from_stored(cls, period: str, segments: Sequence[str], metrics: Mapping[str, Mapping[str, Any]],
                    job: JobConfig) -> "Baseline":
        """The baseline of ``confirm: 1``: the verdicts of one stored period."""
        cfgs = {m.name: m for m in job.metrics}
        sig = {}
        flg = {}
        chk = {}
        for name, entry in metrics.items():
            # under the two-period rule the stored verdict is already the announced state
            important = _two_period(entry) or _entry_important(entry, cfgs.get(name))
            sig[name] = bool(entry.get("significant")) and important
            # flags of a metric below its min_effect were never announced (derive_events drops them)
            flg[name] = {s["segment"]: s["flag"] for s in entry.get("segments", []) if s.get("flag")} \
                if important else {}
            chk[name] = {k: v.get("passed") for k, v in (entry.get("assumptions") or {}).items()
                         if v.get("watched", True)}
        return cls(period, frozenset(segments), sig, flg, chk)

    @classmethod
    def from_history(cls, stored: Sequence[StoredLike], job: JobConfig) -> "Baseline":
        """The baseline for ``job.confirm``, from stored periods, newest first.

        With ``confirm: 1`` only the newest period is read (exactly
        :meth:`from_stored`). With ``confirm: K >= 2`` the announced state is
        replayed over all the periods given, oldest first (see the module notes);
        pass at least :func:`lookback` ``(K)`` of them when history has that many.
        """
        k = job.confirm
        if not stored:
            return cls.empty(k)
        newest = stored[0]
        base = cls.from_stored(newest.period, newest.segments, newest.metrics, job)
        if k == 1:
            return base
        cfgs = {m.name: m for m in job.metrics}
        announced: dict[str, bool] = {}
        metric_runs: dict[str, Run] = {}
        announced_flags: dict[str, dict[str, str | None]] = {}
        flag_runs: dict[str, dict[str, Run]] = {}
        for sp in reversed(stored):  # oldest first
            seen = set(sp.segments)
            for name, entry in sp.metrics.items():
                if entry.get("p_value") is None:  # not computed: no verdict for it or its segments
                    continue
                important = _entry_important(entry, cfgs.get(name))
                verdict = bool(entry.get("significant")) and important
                run = _extend(metric_runs.get(name), verdict, sp.period)
                metric_runs[name] = run
                if run.length >= k:
                    announced[name] = verdict
                flags_now = {s["segment"]: s["flag"] for s in entry.get("segments", [])
                             if important and s.get("flag")}
                runs = flag_runs.setdefault(name, {})
                states = announced_flags.setdefault(name, {})
                # a segment never flagged so far has nothing to announce or clear: its runs start
                # with its first flag (derive_events starts a run of one for a segment it has no run of)
                for seg in set(flags_now) | set(runs):
                    if seg not in seen:  # no records of the segment in that period: no verdict
                        continue
                    run = _extend(runs.get(seg), flags_now.get(seg), sp.period)
                    runs[seg] = run
                    if run.length >= k:
                        states[seg] = run.verdict
        flags = {name: {seg: f for seg, f in states.items() if f} for name, states in announced_flags.items()}
        return cls(base.period, base.segments, announced, flags, base.checks, confirm=k,
                   metric_runs=metric_runs, flag_runs=flag_runs)


def lookback(confirm: int) -> int:
    """How many stored periods :meth:`Baseline.from_history` should be given.

    One for ``confirm: 1``; ``26 * K`` otherwise (half a year of weekly periods per
    unit of K), enough for the replay to be exact unless a verdict alternated
    without K equal periods in a row through the whole window (see the module notes).
    """
    return 1 if confirm <= 1 else LOOKBACK_PER_CONFIRM * confirm


def _extend(run: Run | None, verdict: bool | str | None, period: str) -> Run:
    if run is not None and run.verdict == verdict:
        return Run(verdict, run.length + 1, run.since)
    return Run(verdict, 1, period)


def _two_period(entry: Mapping[str, Any]) -> bool:
    return (entry.get("decision") or {}).get("rule") == RULE_TWO_PERIOD


def _effect(entry: Mapping[str, Any]) -> float | None:
    return (entry.get("effect_size") or {}).get("value")


def _entry_important(entry: Mapping[str, Any], cfg: Any) -> bool:
    """:func:`monitor.decisions.important` of a stored entry (read back typed only when a
    ``min_difference`` needs the segment rows)."""
    if cfg is None:
        return True
    if cfg.min_difference is None:
        return _important(_effect(entry), cfg.min_effect)
    return decisions.important(MetricResult.from_json(entry), cfg)


def _important(effect: float | None, min_effect: float | None) -> bool:
    if min_effect is None:
        return True
    return effect is not None and math.isfinite(effect) and effect >= min_effect


def _fmt(x: float | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:.3g}"


def _p(x: float) -> str:
    if not math.isfinite(x):
        return "n/a"
    return f"{x:.1e}" if x < 0.001 else f"{x:.3f}"


def _value(x: float, unit: str | None, decimals: int | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    text = f"{x:,.{decimals}f}" if decimals is not None else f"{x:,.4g}"
    return f"{text} {unit}" if unit else text


def derive_events(
    job: JobConfig,
    results: Sequence[MetricResult],
    segments_now: Sequence[str],
    null_segment_rows: int,
    rows: int,
    baseline: Baseline,
) -> list[Event]:
    """Events of this period against ``baseline`` (see the module notes)."""
    out: list[Event] = []
    seg_word = job.source.segment_column
    cfg = {m.name: m for m in job.metrics}
    prev_label = f"in {baseline.period}" if baseline.period else "before"
    k = job.confirm
    if k > 1 and baseline.confirm != k:
        log.warning("job %s has confirm: %s but the baseline was built for confirm: %s; "
                    "build it with Baseline.from_history(history.recent(period, lookback(%s)), job)",
                    job.job, k, baseline.confirm, k)

    # segments appearing / disappearing (table level, metric None)
    now_set = set(segments_now)
    if baseline.period is not None:
        for s in sorted(now_set - baseline.segments):
            out.append(Event("segment_new", None, s,
                             f"{seg_word} {s} has records this period and had none in {baseline.period}."))
        for s in sorted(baseline.segments - now_set):
            out.append(Event("segment_missing", None, s,
                             f"{seg_word} {s} had records in {baseline.period} and has none this period."))
    if null_segment_rows:
        share = null_segment_rows / rows if rows else 0.0
        out.append(Event("data_quality", None, None,
                         f"{null_segment_rows} of {rows} rows have no {seg_word} value and were left out.",
                         {"problem": "null_segment", "count": null_segment_rows, "share": share},
                         subject="null_segment"))

    for r in results:
        m = cfg.get(r.metric)
        unit, decimals = (m.unit, m.decimals) if m else (None, None)
        q = r.quality
        if q.rows and q.bad_share > job.quality.max_bad_share:
            parts = [f"{n} {label}" for n, label in ((q.null, "null"), (q.non_numeric, "non-numeric"),
                                                     (q.non_finite, "non-finite"),
                                                     (q.out_of_domain, "outside the transform's domain")) if n]
            out.append(Event(
                "data_quality", r.metric, None,
                f"{r.metric}: {q.bad_share:.1%} of {q.rows} values are unusable ({', '.join(parts)}), "
                f"above the {job.quality.max_bad_share:.0%} threshold.",
                {"problem": "bad_values", **q.to_json(), "threshold": job.quality.max_bad_share},
                subject="bad_values"))
        for s in r.segments:
            if s.excluded and s.segment in now_set:
                out.append(Event(
                    "data_quality", r.metric, s.segment,
                    f"{r.metric}: {seg_word} {s.segment} has {s.n} usable value{'s' if s.n != 1 else ''}, "
                    f"too few to compare (at least {max(2, job.quality.min_rows_per_segment)} needed).",
                    {"problem": "too_few_rows", "n": s.n}, subject="too_few_rows"))

        if m is not None and m.reference is not None and m.reference not in {
                x.segment for x in r.segments if not x.excluded}:
            out.append(Event(
                "data_quality", r.metric, m.reference,
                f"{r.metric}: the reference {seg_word} {m.reference} has no usable values this period, "
                f"so no gaps to it were computed.",
                {"problem": "reference_missing", "reference": m.reference}, subject="reference_missing"))

        # metric-level significance, then segment flags
        was = baseline.significant.get(r.metric, False)
        eff = r.effect_size.value if r.effect_size else math.nan
        important = decisions.important(r, m)
        now_sig = r.significant and important
        prev_flags = baseline.flags.get(r.metric, {})
        now_flags = r.flagged if important else {}
        two = r.decision is not None and r.decision.rule == RULE_TWO_PERIOD
        if two or k == 1:
            if two:  # the announced state is the decision rule's (monitor.decisions): no second gate here
                now_flags = r.flagged
                if r.decision.change == "on":
                    out.append(_metric_emerged(r, seg_word, eff, None, prev_label))
                elif r.decision.change == "off":
                    out.append(_metric_cleared(r, m, seg_word, eff, important, None, job.decision.quiet_periods))
            elif now_sig and not was:
                out.append(_metric_emerged(r, seg_word, eff, None, prev_label))
            elif was and not now_sig and r.computed:
                out.append(_metric_cleared(r, m, seg_word, eff, important, None))
            for seg, flag in sorted(now_flags.items()):
                if prev_flags.get(seg) != flag:
                    out.append(_segment_emerged(r, seg, flag, seg_word, unit, decimals, None))
            for seg, flag in sorted(prev_flags.items()):
                if now_flags.get(seg) != flag and seg in now_set and r.computed:
                    out.append(_segment_cleared(r, seg, flag, seg_word, None))
        elif r.computed:  # confirm: K >= 2 (an uncomputed metric gives no verdict)
            run = _extend(baseline.metric_runs.get(r.metric), now_sig, "")
            if run.length >= k and now_sig != was:
                out.append(_metric_emerged(r, seg_word, eff, run, prev_label) if now_sig
                           else _metric_cleared(r, m, seg_word, eff, important, run))
            runs = baseline.flag_runs.get(r.metric, {})
            ups, downs = [], []
            for seg in sorted({s.segment for s in r.segments} | set(prev_flags) | set(runs)):
                if seg not in now_set:  # no records of the segment: no verdict
                    continue
                flag, before = now_flags.get(seg), prev_flags.get(seg)
                run = _extend(runs.get(seg), flag, "")
                if run.length >= k and flag != before:
                    if flag:
                        ups.append(_segment_emerged(r, seg, flag, seg_word, unit, decimals, run))
                    if before:
                        downs.append(_segment_cleared(r, seg, before, seg_word, run))
            out.extend(ups + downs)

        # assumptions
        prev_checks = baseline.checks.get(r.metric, {})
        if two:
            out.extend(_check_events(r))
            continue
        for name, chk in r.assumptions.items():
            if name not in r.relevant_checks:
                continue
            before = prev_checks.get(name, True if baseline.period is None else None)
            label = CHECK_NAMES.get(name, name)
            if chk.passed is False and before is not False:
                out.append(Event(
                    "assumption_broken", r.metric, None,
                    f"{r.metric}: the {label} fails this period ({chk.detail.rstrip('.')}); method used: {r.method}.",
                    {"check": name, "value": chk.value, "threshold": chk.threshold, "method": r.method},
                    subject=name))
            elif chk.passed is True and before is False:
                out.append(Event(
                    "assumption_restored", r.metric, None,
                    f"{r.metric}: the {label} passes again ({chk.detail.rstrip('.')}).",
                    {"check": name, "value": chk.value, "threshold": chk.threshold, "method": r.method},
                    subject=name))
    return out


def _check_events(r: MetricResult) -> list[Event]:
    """Assumption events under the two-period rule: a watched check announced as
    failing (or taken back) by its verdict (see :mod:`monitor.decisions`)."""
    out = []
    for name, verdict in r.check_decisions.items():
        chk = r.assumptions.get(name)
        if verdict.change is None or chk is None:
            continue
        label = CHECK_NAMES.get(name, name)
        detail = {"check": name, "value": chk.value, "threshold": chk.threshold, "method": r.method,
                  "evidence": verdict.evidence, "level": verdict.level}
        if verdict.change == "on":
            out.append(Event(
                "assumption_broken", r.metric, None,
                f"{r.metric}: the {label} fails ({chk.detail.rstrip('.')}; {_evidence_text(verdict)}); "
                f"method used: {r.method}.", detail, subject=name))
        else:
            out.append(Event(
                "assumption_restored", r.metric, None,
                f"{r.metric}: the {label} passes again ({chk.detail.rstrip('.')}).", detail, subject=name))
    return out


def _evidence_text(v: Any) -> str:
    """How strong the evidence was, in words people can check: this period alone or with the previous one."""
    if v.p_before is not None and v.combined is not None:
        return f"evidence {_p(v.evidence)} over this period and {v.before}, level {_p(v.level)}"
    return f"evidence {_p(v.evidence)} from this period alone, level {_p(v.level)}"


def _confirmed(run: Run | None) -> tuple[str, dict[str, Any]]:
    """The message tail and detail fields of an event raised under ``confirm: K >= 2``."""
    if run is None:
        return "", {}
    return (f"; confirmed over the last {run.length} periods, since {run.since}",
            {"confirmed_periods": run.length, "since": run.since})


def _metric_emerged(r: MetricResult, seg_word: str, eff: float, run: Run | None, prev_label: str) -> Event:
    eff_text = f", {r.effect_size.name.replace('_', ' ')} {_fmt(eff)}" if r.effect_size else ""
    tail, extra = _confirmed(run) if run is not None else (f"; it did not {prev_label}", {})
    v = r.decision
    if v is not None and v.rule == RULE_TWO_PERIOD:
        return Event(
            "emerged", r.metric, None,
            f"{r.metric} now differs by {seg_word} ({r.method}, p = {_p(r.p_value)}{eff_text}; "
            f"{_evidence_text(v)}).",
            {"method": r.method, "p_value": r.p_value, "q_value": r.q_value, "effect": eff,
             "evidence": v.evidence, "level": v.level, "p_before": v.p_before, "before": v.before})
    return Event(
        "emerged", r.metric, None,
        f"{r.metric} now differs by {seg_word} ({r.method}, q = {_p(r.q_value)}{eff_text}){tail}.",
        {"method": r.method, "p_value": r.p_value, "q_value": r.q_value, "effect": eff, **extra})


def _metric_cleared(r: MetricResult, m: Any, seg_word: str, eff: float, important: bool,
                    run: Run | None, quiet_periods: int = 1) -> Event:
    tail, extra = _confirmed(run)
    why = "" if r.significant else f" (q = {_p(r.q_value)})"
    v = r.decision
    if v is not None and v.rule == RULE_TWO_PERIOD:
        why = (f" (p = {_p(r.p_value)}; no evidence in {quiet_periods} periods in a row)" if quiet_periods > 1
               else f" (p = {_p(r.p_value)}; no evidence this period)")
    elif r.significant and not important:
        why = f" at the practical threshold ({r.effect_size.name.replace('_', ' ')} {_fmt(eff)} < {m.min_effect})"
    return Event(
        "cleared", r.metric, None,
        f"{r.metric} no longer differs by {seg_word}{why}{tail}.",
        {"method": r.method, "p_value": r.p_value, "q_value": r.q_value, "effect": eff, **extra})


def _segment_emerged(r: MetricResult, seg: str, flag: str, seg_word: str, unit: str | None,
                     decimals: int | None, run: Run | None) -> Event:
    tail, extra = _confirmed(run)
    row = next(s for s in r.segments if s.segment == seg)
    word = "above" if flag == "high" else "below"
    if r.reference is not None:
        gap = _gap_text(r, seg, unit, decimals)
        if gap is not None:
            return Event(
                "emerged", r.metric, seg,
                f"{seg_word} {seg}: the gap to the reference {seg_word} {r.reference} on {r.metric} is now "
                f"{gap}{tail}.",
                {"flag": flag, "mean": row.mean, "reference": r.reference, **_gap_detail(r, seg, unit),
                 **_adjusted_detail(r, seg), **extra})
        where = f"{word} the reference {seg_word} {r.reference}"
        count = ""
    else:
        where = f"{word} the rest"  # no plural of the segment column's name (no "branchs")
        n = row.above if flag == "high" else row.below
        count = f", significantly {word} {n} of {len(r.segments) - 1 - _excluded(r)} others"
    family = methods.family(r.posthoc)
    level = (f"share {_pp(row.mean, '%')}, {_pp(row.diff_vs_rest, ' pp', signed=True)}"
             if family is not None and family.points else
             f"mean {_value(row.mean, unit, decimals)}, {_signed(row.diff_vs_rest, unit, decimals)}")
    return Event(
        "emerged", r.metric, seg,
        f"{seg_word} {seg} now stands {where} on {r.metric} ({level} against the rest{count}){tail}.",
        {"flag": flag, "mean": row.mean, "diff_vs_rest": row.diff_vs_rest, "above": row.above,
         "below": row.below, "reference": r.reference, "unit": unit, **extra})


def _segment_cleared(r: MetricResult, seg: str, flag: str, seg_word: str, run: Run | None) -> Event:
    tail, extra = _confirmed(run)
    word = "above" if flag == "high" else "below"
    if r.reference is not None:
        gap = _gap_text(r, seg, None, None, with_test=False)
        now = f" (now {gap})" if gap else ""
        return Event(
            "cleared", r.metric, seg,
            f"{seg_word} {seg}: the gap to the reference {seg_word} {r.reference} on {r.metric} is no longer "
            f"significant{now}{tail}.",
            {"previous_flag": flag, "reference": r.reference, **_adjusted_detail(r, seg), **extra})
    return Event(
        "cleared", r.metric, seg,
        f"{seg_word} {seg} no longer stands {word} the rest on {r.metric}{tail}.",
        {"previous_flag": flag, **extra})


def _gap_text(r: MetricResult, seg: str, unit: str | None, decimals: int | None,
              with_test: bool = True) -> str | None:
    """The gap of ``seg`` to the reference with its simultaneous interval, as people read it:
    a percentage of the reference's geometric mean under ``log``, else in the metric's unit."""
    pair = next((p for p in r.pairs if p.a == seg and p.b == r.reference), None)
    if pair is None or not math.isfinite(pair.diff):
        return None
    rows = {s.segment: s for s in r.segments}
    test = f"; {r.posthoc}, adjusted p = {_p(pair.p_adj)}" if with_test and r.posthoc else ""
    adj = r.adjustment.gap(seg) if r.adjustment is not None else None
    if adj is not None:  # a gap within strata: the raw gap beside it, not the plain means
        within = f"within {', '.join(r.adjustment.columns)}"
        if pair.log_scale:
            pct = [100 * (math.exp(x) - 1) if math.isfinite(x) else math.nan
                   for x in (pair.diff, pair.ci_low, pair.ci_high, adj.raw_gap)]
            return (f"{pct[0]:+.1f}% [{pct[1]:+.1f}%, {pct[2]:+.1f}%] {within} (raw gap {pct[3]:+.1f}%{test})")
        return (f"{_signed(pair.diff, unit, decimals)} [{_signed(pair.ci_low, None, decimals)}, "
                f"{_signed(pair.ci_high, None, decimals)}] {within} "
                f"(raw gap {_signed(adj.raw_gap, unit, decimals)}{test})")
    if pair.log_scale:
        pct = [100 * (math.exp(x) - 1) if math.isfinite(x) else math.nan
               for x in (pair.diff, pair.ci_low, pair.ci_high)]
        if not with_test:
            return f"{pct[0]:+.1f}% [{pct[1]:+.1f}%, {pct[2]:+.1f}%]"
        gm = [math.exp(rows[x].mean) if x in rows and math.isfinite(rows[x].mean) else math.nan
              for x in (seg, r.reference)]
        return (f"{pct[0]:+.1f}% [{pct[1]:+.1f}%, {pct[2]:+.1f}%] (geometric means {_value(gm[0], unit, decimals)} "
                f"vs {_value(gm[1], unit, decimals)}{test})")
    family = methods.family(r.posthoc)
    if family is None or family.ranks:
        return None  # a mean-rank difference (Dunn) has no unit to speak in
    if family.points:  # a difference of proportions, in percentage points
        return (f"{_pp(pair.diff, ' pp', signed=True)} [{_pp(pair.ci_low, '', signed=True)}, "
                f"{_pp(pair.ci_high, '', signed=True)}] (difference of shares{test})")
    ref_mean = rows[r.reference].mean if r.reference in rows else math.nan
    share = f", {100 * pair.diff / ref_mean:+.1f}% of {r.reference}'s mean" if ref_mean else ""
    return (f"{_signed(pair.diff, unit, decimals)} [{_signed(pair.ci_low, None, decimals)}, "
            f"{_signed(pair.ci_high, None, decimals)}] ({'mean difference' + share}{test})")


def _gap_detail(r: MetricResult, seg: str, unit: str | None) -> dict[str, Any]:
    """The gap to the reference as numbers: ``gap`` with its simultaneous interval on the
    analysed scale and, under ``log``, the ratio of geometric means and the percentage
    (``percent = 100 (ratio - 1)``), with the geometric means themselves."""
    pair = next((p for p in r.pairs if p.a == seg and p.b == r.reference), None)
    if pair is None:
        return {"unit": unit}
    out: dict[str, Any] = {"gap": pair.diff, "gap_low": pair.ci_low, "gap_high": pair.ci_high, "unit": unit,
                           "p_adj": pair.p_adj}
    if pair.log_scale:
        ratios = [math.exp(x) if math.isfinite(x) else math.nan for x in (pair.diff, pair.ci_low, pair.ci_high)]
        rows = {s.segment: s for s in r.segments}
        gm = [math.exp(rows[x].mean) if x in rows and math.isfinite(rows[x].mean) else math.nan
              for x in (seg, r.reference)]
        out.update(ratio=ratios[0], ratio_low=ratios[1], ratio_high=ratios[2],
                   percent=100 * (ratios[0] - 1), percent_low=100 * (ratios[1] - 1),
                   percent_high=100 * (ratios[2] - 1), geometric_mean=gm[0], reference_geometric_mean=gm[1])
    return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in out.items()}


def _adjusted_detail(r: MetricResult, seg: str) -> dict[str, Any]:
    """The adjusted gap's numbers for an event's detail (empty without ``adjust_for``)."""
    adj = r.adjustment.gap(seg) if r.adjustment is not None else None
    if adj is None:
        return {}
    out = adj.to_json()
    out.pop("segment", None)
    out.pop("reference", None)
    out.pop("significant", None)
    return {"adjusted_for": list(r.adjustment.columns), **out}


def _excluded(r: MetricResult) -> int:
    return sum(1 for s in r.segments if s.excluded)


def _pp(share: float, suffix: str, signed: bool = False) -> str:
    """A proportion (or a difference of two) in percent or percentage points: ``-3.2 pp``."""
    if share is None or not math.isfinite(share):
        return "n/a"
    return f"{100 * share:{'+' if signed else ''}.1f}{suffix}"


def _signed(x: float, unit: str | None, decimals: int | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return ("+" if x >= 0 else "-") + _value(abs(x), unit, decimals)
