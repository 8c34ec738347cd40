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
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

from .analysis import MetricResult
from .config import JobConfig

KINDS = (
    "emerged",
    "cleared",
    "assumption_broken",
    "assumption_restored",
    "segment_new",
    "segment_missing",
    "data_quality",
)

CHECK_NAMES = {
    "brown_forsythe": "equal-spread check (Brown-Forsythe)",
    "normality": "normality check",
    "sd_ratio": "spread-ratio check",
    "n_ratio": "size-ratio check",
    "outlier_share": "outlier check",
}


@dataclass(frozen=True)
class Event:
    """One event: a kind, where it happened, and a one-sentence message."""

    kind: str
    metric: str | None
    segment: str | None
    message: str
    detail: Mapping[str, Any] = field(default_factory=dict)
    subject: str = ""  # distinguishes events of one kind on the same metric/segment (e.g. the check name)

    def key(self, job: str, period: str) -> str:
        """A stable identity: the same event of the same period always has the same key."""
        raw = "\x1f".join([job, period, self.kind, self.metric or "", self.segment or "", self.subject])
        return hashlib.sha256(raw.encode()).hexdigest()[:32]

    def to_json(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "metric": self.metric,
            "segment": self.segment,
            "message": self.message,
            "detail": dict(self.detail),
        }


@dataclass(frozen=True)
class Baseline:
    """What the previous stored period said, reduced to what events compare."""

    period: str | None
    segments: frozenset[str]
    significant: Mapping[str, bool]  # metric -> significant and announced
    flags: Mapping[str, Mapping[str, str]]  # metric -> segment -> high/low
    checks: Mapping[str, Mapping[str, bool | None]]  # metric -> check -> passed

    @classmethod
    def empty(cls) -> "Baseline":
        return cls(None, frozenset(), {}, {}, {})

    @classmethod
    def from_stored(cls, period: str, segments: Sequence[str], metrics: Mapping[str, Mapping[str, Any]],
                    job: JobConfig) -> "Baseline":
        min_effect = {m.name: m.min_effect for m in job.metrics}
        sig = {}
        flg = {}
        chk = {}
        for name, entry in metrics.items():
            eff = (entry.get("effect_size") or {}).get("value")
            sig[name] = bool(entry.get("significant")) and _important(eff, min_effect.get(name))
            flg[name] = {s["segment"]: s["flag"] for s in entry.get("segments", []) if s.get("flag")}
            chk[name] = {k: v.get("passed") for k, v in (entry.get("assumptions") or {}).items()
                         if v.get("watched", True)}
        return cls(period, frozenset(segments), sig, flg, chk)


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

        # metric-level significance
        was = baseline.significant.get(r.metric, False)
        eff = r.effect_size.value if r.effect_size else math.nan
        important = _important(eff, m.min_effect if m else None)
        now_sig = r.significant and important
        eff_text = f", {r.effect_size.name.replace('_', ' ')} {_fmt(eff)}" if r.effect_size else ""
        if now_sig and not was:
            out.append(Event(
                "emerged", r.metric, None,
                f"{r.metric} now differs between {seg_word}s ({r.method}, q = {_p(r.q_value)}{eff_text}); "
                f"it did not {prev_label}.",
                {"method": r.method, "p_value": r.p_value, "q_value": r.q_value, "effect": eff}))
        elif was and not now_sig and r.computed:
            why = "" if r.significant else f" (q = {_p(r.q_value)})"
            if r.significant and not important:
                why = f" at the practical threshold ({r.effect_size.name.replace('_', ' ')} {_fmt(eff)} < {m.min_effect})"
            out.append(Event(
                "cleared", r.metric, None,
                f"{r.metric} no longer differs between {seg_word}s{why}.",
                {"method": r.method, "p_value": r.p_value, "q_value": r.q_value, "effect": eff}))

        # segment-level flags
        prev_flags = baseline.flags.get(r.metric, {})
        now_flags = r.flagged if important else {}
        means = {s.segment: s for s in r.segments}
        for seg, flag in sorted(now_flags.items()):
            if prev_flags.get(seg) != flag:
                row = means[seg]
                word = "above" if flag == "high" else "below"
                if r.reference is not None:
                    where = f"{word} the reference {seg_word} {r.reference}"
                    count = ""
                else:
                    where = f"{word} the other {seg_word}s"
                    n = row.above if flag == "high" else row.below
                    count = f", significantly {word} {n} of {len(r.segments) - 1 - _excluded(r)} others"
                out.append(Event(
                    "emerged", r.metric, seg,
                    f"{seg_word} {seg} now stands {where} on {r.metric} "
                    f"(mean {_value(row.mean, unit, decimals)}, {_signed(row.diff_vs_rest, unit, decimals)} "
                    f"against the rest{count}).",
                    {"flag": flag, "mean": row.mean, "diff_vs_rest": row.diff_vs_rest, "above": row.above,
                     "below": row.below, "reference": r.reference}))
        for seg, flag in sorted(prev_flags.items()):
            if now_flags.get(seg) != flag and seg in now_set and r.computed:
                word = "above" if flag == "high" else "below"
                out.append(Event(
                    "cleared", r.metric, seg,
                    f"{seg_word} {seg} no longer stands {word} the other {seg_word}s on {r.metric}.",
                    {"previous_flag": flag}))

        # assumptions
        prev_checks = baseline.checks.get(r.metric, {})
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


def _excluded(r: MetricResult) -> int:
    return sum(1 for s in r.segments if s.excluded)


def _signed(x: float, unit: str | None, decimals: int | None) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return ("+" if x >= 0 else "-") + _value(abs(x), unit, decimals)
