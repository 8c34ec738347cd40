"""segwatch's shared vocabulary: the types every floor speaks, and their JSON.

Input types (what the source hands the analysis): :class:`QualityCounts`,
:class:`SegmentInput`, :class:`MetricInput`. Result types (what the analysis gives,
the history stores and reads back, and events, the report and the command line
read): :class:`EffectSize`, :class:`Check`, :class:`SegmentRow`, :class:`PairRow`,
:class:`Sensitivity`, :class:`MetricResult`, :class:`Event`, and
:class:`RunSettings`, everything a stored verdict was judged by.

This module sits at the bottom of the package: it imports numpy and the standard
library only (no scipy, no SQL, no YAML), so any floor may import it.

JSON
----
Every type has ``to_json()`` and ``from_json()``; ``from_json(x.to_json())`` gives
back an equal object (NaN is written as ``null`` and read back as NaN). What the
history stores carries a format number, :data:`FORMAT`:

* format 0: histories written before stored entries carried a number (the entry is
  the ``run --json`` metric entry; the run's settings were not recorded);
* format 1: the same entry plus ``"format": 1`` and ``"requested"`` (the test the
  config asked for); each stored run records its :class:`RunSettings`;
* format 2: the same entry; the history may keep a large entry packed (LZMA) beside
  a small stand-in that names its metric and ``"packed"`` (see
  :mod:`monitor.store.history`), so that a release reading only format 1 refuses it
  instead of reading the stand-in as a result.

Read back from the history, a period comes as :class:`StoredRun` (its window, rows and
the :class:`RunSettings` it was judged by, when recorded) and each metric's entry as
:class:`StoredResult` (the :class:`MetricResult` with its period and the level its
verdict was judged at).

``from_json`` reads every format up to :data:`FORMAT` and refuses a newer one with a
:class:`~monitor.errors.HistoryError` that says to upgrade segwatch.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np

from .errors import HistoryError

if TYPE_CHECKING:  # type names only: these modules sit above this one
    from .config import JobConfig, MetricConfig
    from .stats.cells import CellData
    from .stats.summary import Moments

#: The newest format of stored JSON this release writes and reads.
FORMAT = 2

#: The event kinds of the contract (CONTRACT.md, "Event kinds"); operational events
#: (``op_...``) are apart from these.
EVENT_KINDS = (
    "emerged",
    "cleared",
    "assumption_broken",
    "assumption_restored",
    "segment_new",
    "segment_missing",
    "data_quality",
)

#: Per-segment quantiles kept for box plots: 5%, 25%, median, 75%, 95% (whiskers at 5% and 95%).
QUANTILE_LEVELS = (0.05, 0.25, 0.50, 0.75, 0.95)
QUANTILE_KEYS = ("q05", "q25", "q50", "q75", "q95")

#: The decision rules a verdict can be judged by (``decision.rule`` in the config):
#: ``per_period`` - a metric differs when its q-value is at most ``fdr.level`` (with
#: ``confirm: K``), an event is raised only when its effect is at least ``min_effect``;
#: ``two_period`` - the evidence of this period and the previous one held to a level
#: set from a yearly false-alarm budget, with hysteresis (see :mod:`monitor.decisions`).
RULE_PER_PERIOD = "per_period"
RULE_TWO_PERIOD = "two_period"
RULES = (RULE_TWO_PERIOD, RULE_PER_PERIOD)
#: The name histories written before the rule could be chosen give the per-period rule.
RULE_Q_LEVEL = "q-at-most-level"

#: How many of a metric's pairs are written in a bounded form (``run --json`` by default,
#: the history): every pair when there are at most :data:`FULL_PAIRS` (all pairs of up to
#: 24 segments, the report's matrix) or the metric has a reference segment (one pair per
#: other segment); otherwise the :data:`TOP_PAIRS` with the smallest adjusted p-values.
FULL_PAIRS = 276
TOP_PAIRS = 20
#: Which pairs a metric entry holds: ``top`` (bounded, see above), ``significant`` (``top``
#: plus every significant pair of a significant metric: the history's form), ``all``.
PAIR_FORMS = ("top", "significant", "all")


def check_format(data: Mapping[str, Any], what: str) -> int:
    """The format number of a stored JSON object (0 when absent); newer than :data:`FORMAT` is refused."""
    fmt = data.get("format", 0)
    if not isinstance(fmt, int) or isinstance(fmt, bool) or fmt < 0:
        raise HistoryError(f"{what}: stored format {fmt!r} is not a format number; the history may be damaged")
    if fmt > FORMAT:
        raise HistoryError(f"{what}: stored in format {fmt}, newer than this segwatch reads (up to {FORMAT}); "
                           "upgrade segwatch to read this history")
    return fmt


# ---------------------------------------------------------------- inputs


@dataclass(frozen=True)
class QualityCounts:
    """What the source found wrong with one metric's values in one period."""

    rows: int = 0  # rows in the window with a segment value
    null: int = 0  # NULL values
    non_numeric: int = 0  # values that are not numbers (text in a numeric column)
    non_finite: int = 0  # inf, -inf, NaN
    out_of_domain: int = 0  # values the transform cannot take (<= 0 under log)

    @property
    def bad(self) -> int:
        return self.null + self.non_numeric + self.non_finite + self.out_of_domain

    @property
    def bad_share(self) -> float:
        return self.bad / self.rows if self.rows else 0.0

    def to_json(self) -> dict[str, Any]:
        return {
            "rows": self.rows,
            "null": self.null,
            "non_numeric": self.non_numeric,
            "non_finite": self.non_finite,
            "out_of_domain": self.out_of_domain,
            "bad_share": _num(self.bad_share),
        }

    @classmethod
    def from_json(cls, data: Mapping[str, Any] | None) -> "QualityCounts":
        d = data or {}
        return cls(int(d.get("rows") or 0), int(d.get("null") or 0), int(d.get("non_numeric") or 0),
                   int(d.get("non_finite") or 0), int(d.get("out_of_domain") or 0))


@dataclass(frozen=True)
class SegmentInput:
    """One segment's data for one metric: its summary and (optionally) its values."""

    segment: str
    moments: Moments
    values: np.ndarray | None = None

    def to_json(self) -> dict[str, Any]:
        m = self.moments
        return {"segment": self.segment,
                "moments": {"n": int(m.n), **{k: _exact(getattr(m, k)) for k in _MOMENT_FIELDS},
                            "mean_residual": float(m.mean_residual)},
                "values": None if self.values is None else [float(v) for v in np.asarray(self.values).ravel()]}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "SegmentInput":
        # the summary type lives with the statistics (floor 1): imported when an input is read back
        from .stats.summary import Moments

        mo = data["moments"]
        moments = Moments(int(mo["n"]), *(_unexact(mo[k]) for k in _MOMENT_FIELDS),
                          mean_residual=float(mo.get("mean_residual") or 0.0))
        values = data.get("values")
        return cls(data["segment"], moments, None if values is None else np.asarray(values, dtype=float))


_MOMENT_FIELDS = ("mean", "m2", "m3", "m4", "min", "max")


@dataclass(frozen=True)
class MetricInput:
    """Everything the analysis needs for one metric in one period."""

    metric: MetricConfig
    segments: tuple[SegmentInput, ...]
    quality: QualityCounts = QualityCounts()
    sample_size: int | None = None  # set when values are a sample, not all values
    cells: CellData | None = None  # per-(segment, stratum) summaries when the metric has adjust_for

    def to_json(self) -> dict[str, Any]:
        return {"metric": self.metric.name, "segments": [s.to_json() for s in self.segments],
                "quality": self.quality.to_json(), "sample_size": self.sample_size}

    @classmethod
    def from_json(cls, data: Mapping[str, Any], metric: MetricConfig) -> "MetricInput":
        """Read back an input; ``metric`` is the config entry named by ``data['metric']``."""
        if metric.name != data.get("metric"):
            raise ValueError(f"input of metric {data.get('metric')!r} read with the config of {metric.name!r}")
        return cls(metric, tuple(SegmentInput.from_json(s) for s in data.get("segments") or ()),
                   QualityCounts.from_json(data.get("quality")), data.get("sample_size"))


# ---------------------------------------------------------------- results


@dataclass(frozen=True)
class EffectSize:
    """One effect size, optionally with a confidence interval.

    Attributes
    ----------
    name : str
        ``"eta_squared"``, ``"omega_squared"``, ``"cohens_f"`` or ``"epsilon_squared"``.
    value : float
        Point estimate; NaN if it cannot be computed.
    ci_low, ci_high : float
        Confidence limits (NaN where no interval is computed).
    note : str or None
        Why ``value`` is NaN, or a caveat about it.
    """

    name: str
    value: float
    ci_low: float = math.nan
    ci_high: float = math.nan
    note: str | None = None

    def to_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "value": _num(self.value)}
        if math.isfinite(self.ci_low) or math.isfinite(self.ci_high):
            out["ci"] = [_num(self.ci_low), _num(self.ci_high)]
        if self.note:
            out["note"] = self.note
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "EffectSize":
        ci = data.get("ci") or (None, None)
        return cls(data["name"], _nan(data.get("value")), _nan(ci[0]), _nan(ci[1]), data.get("note"))


@dataclass(frozen=True)
class Check:
    """The outcome of one assumption check.

    Attributes
    ----------
    name : str
        One of :data:`monitor.stats.diagnostics.CHECK_NAMES`.
    value : float
        The measured value (a p-value, a ratio or a share); NaN if not computed.
    threshold : float
        What ``value`` was held against.
    passed : bool or None
        Whether the assumption looks tenable; None if it could not be checked.
    detail : str
        One plain sentence a person can read.
    """

    name: str
    value: float
    threshold: float
    passed: bool | None
    detail: str

    def to_json(self, watched: bool = False) -> dict[str, Any]:
        """The check's entry (the name is its key in ``assumptions``); ``watched`` when it raises events."""
        return {"value": _num(self.value), "threshold": _num(self.threshold), "passed": self.passed,
                "detail": self.detail, "watched": watched}

    @classmethod
    def from_json(cls, data: Mapping[str, Any], name: str) -> "Check":
        passed = data.get("passed")
        return cls(name, _nan(data.get("value")), _nan(data.get("threshold")),
                   None if passed is None else bool(passed), str(data.get("detail") or ""))


@dataclass(frozen=True)
class Sensitivity:
    """What Fisher's ANOVA could detect with this period's segment sizes.

    ``min_f`` is the smallest Cohen's f detected with probability ``power`` at level
    ``alpha``; ``min_diff`` the same in the metric's units (f times the pooled sd:
    the sd of the segment means that would be detected). ``underpowered`` is set when
    ``min_f`` exceeds ``threshold_f``, the practical threshold (``min_effect``
    converted from omega squared, f = sqrt(w / (1 - w)); Cohen's medium f = 0.25
    when ``min_effect`` is not set, common practice).
    """

    power: float
    alpha: float
    min_f: float
    min_diff: float
    threshold_f: float
    underpowered: bool

    def to_json(self) -> dict[str, Any]:
        return {"power": self.power, "alpha": _num(self.alpha), "min_detectable_f": _num(self.min_f),
                "min_detectable_diff": _num(self.min_diff), "threshold_f": _num(self.threshold_f),
                "underpowered": self.underpowered}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "Sensitivity":
        return cls(_nan(data.get("power")), _nan(data.get("alpha")), _nan(data.get("min_detectable_f")),
                   _nan(data.get("min_detectable_diff")), _nan(data.get("threshold_f")),
                   bool(data.get("underpowered")))


@dataclass(frozen=True)
class SegmentRow:
    segment: str
    n: int
    mean: float
    sd: float
    flag: str | None = None
    diff_vs_rest: float = math.nan  # descriptive: segment mean minus the mean of the other segments' records
    above: int = 0  # other segments it is significantly above (in the post-hoc pairs)
    below: int = 0
    direction: str | None = None  # the pair verdict before the metric's significance gate (not stored)
    excluded: bool = False
    quantiles: tuple[float, ...] = ()  # at QUANTILE_LEVELS; () when no values were available
    held: int = 0  # periods in a row the announced flag was kept without this period's evidence

    def to_json(self) -> dict[str, Any]:
        out = {
            "segment": self.segment,
            "n": self.n,
            "mean": _num(self.mean),
            "sd": _num(self.sd),
            "flag": self.flag,
            "diff_vs_rest": _num(self.diff_vs_rest),
            "above": self.above,
            "below": self.below,
            "excluded": self.excluded,
            "quantiles": dict(zip(QUANTILE_KEYS, map(_num, self.quantiles))) if self.quantiles else None,
        }
        if self.held:
            out["held"] = self.held
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "SegmentRow":
        q = data.get("quantiles")
        quantiles = tuple(_nan(q.get(k)) for k in QUANTILE_KEYS) if q else ()
        return cls(data["segment"], int(data.get("n") or 0), _nan(data.get("mean")), _nan(data.get("sd")),
                   data.get("flag"), _nan(data.get("diff_vs_rest")), int(data.get("above") or 0),
                   int(data.get("below") or 0), None, bool(data.get("excluded")), quantiles,
                   int(data.get("held") or 0))


@dataclass(frozen=True)
class PairRow:
    a: str
    b: str
    diff: float
    p_adj: float
    ci_low: float = math.nan
    ci_high: float = math.nan
    significant: bool = False
    log_scale: bool = False  # diff is a difference of logs: report ratios too

    def to_json(self) -> dict[str, Any]:
        out = {
            "a": self.a,
            "b": self.b,
            "diff": _num(self.diff),
            "p_adj": _num(self.p_adj),
            "significant": self.significant,
            "ci_low": _num(self.ci_low),
            "ci_high": _num(self.ci_high),
        }
        if self.log_scale:
            # ratio of geometric means a/b and its simultaneous interval (same family as p_adj)
            out["ratio"] = _num(_exp(self.diff))
            out["ratio_low"] = _num(_exp(self.ci_low))
            out["ratio_high"] = _num(_exp(self.ci_high))
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "PairRow":
        return cls(data["a"], data["b"], _nan(data.get("diff")), _nan(data.get("p_adj")),
                   _nan(data.get("ci_low")), _nan(data.get("ci_high")), bool(data.get("significant")),
                   "ratio" in data)


@dataclass(frozen=True)
class TermRow:
    """The test of one term of an adjusted model (``adjust_for``): F on ``df`` = (q, residual df)."""

    term: str
    statistic: float
    df: tuple[float, float]
    p_value: float
    ss: float = math.nan  # Type II sum of squares (NaN for HC3 Wald tests)

    def to_json(self) -> dict[str, Any]:
        return {"term": self.term, "statistic": _num(self.statistic), "df": [_num(d) for d in self.df],
                "p_value": _num(self.p_value), "ss": _num(self.ss)}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "TermRow":
        df = tuple(_nan(d) for d in data.get("df") or (None, None))
        return cls(data["term"], _nan(data.get("statistic")), (df[0], df[1]), _nan(data.get("p_value")),
                   _nan(data.get("ss")))


@dataclass(frozen=True)
class GapRow:
    """One segment's gap to the reference within strata, with the raw gap beside it.

    ``gap`` (and ``raw_gap``) are in the metric's analysis units: a difference of means, or of
    mean logs under ``transform: log`` (then also read as ratios and per cent).
    """

    segment: str
    reference: str
    n: int
    gap: float
    ci_low: float
    ci_high: float
    p_adj: float
    raw_gap: float
    explained: float
    log_scale: bool = False
    note: str | None = None

    def to_json(self, significant: bool = False) -> dict[str, Any]:
        out: dict[str, Any] = {
            "segment": self.segment, "reference": self.reference, "n": self.n, "gap": _num(self.gap),
            "ci_low": _num(self.ci_low), "ci_high": _num(self.ci_high), "p_adj": _num(self.p_adj),
            "significant": significant, "raw_gap": _num(self.raw_gap), "explained": _num(self.explained),
        }
        if self.log_scale:
            for key, value in (("ratio", self.gap), ("ratio_low", self.ci_low), ("ratio_high", self.ci_high),
                               ("raw_ratio", self.raw_gap)):
                out[key] = _num(_exp(value))
            for key, value in (("percent", self.gap), ("percent_low", self.ci_low),
                               ("percent_high", self.ci_high), ("raw_percent", self.raw_gap)):
                out[key] = _num(100.0 * (_exp(value) - 1.0))
        if self.note:
            out["note"] = self.note
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "GapRow":
        return cls(data["segment"], data["reference"], int(data.get("n") or 0), _nan(data.get("gap")),
                   _nan(data.get("ci_low")), _nan(data.get("ci_high")), _nan(data.get("p_adj")),
                   _nan(data.get("raw_gap")), _nan(data.get("explained")), "ratio" in data, data.get("note"))


@dataclass(frozen=True)
class Adjustment:
    """A metric compared within strata (``adjust_for``), and the raw comparison it replaced.

    The metric's ``statistic``/``df``/``p_value`` and ``pairs`` are the adjusted ones; the
    ``raw_*`` fields keep the plain comparison of the same period beside them.
    """

    columns: tuple[str, ...]
    covariance: str
    strata_tests: tuple[TermRow, ...]
    additivity: TermRow
    gaps: tuple[GapRow, ...]
    critical_value: float
    cells: int
    missing: int
    raw_method: str
    raw_statistic: float
    raw_df: tuple[float, ...]
    raw_p_value: float
    raw_pairs: tuple[PairRow, ...] = ()
    note: str | None = None

    def gap(self, segment: str) -> GapRow | None:
        return next((g for g in self.gaps if g.segment == segment), None)

    def to_json(self, significant: Mapping[str, bool] | None = None) -> dict[str, Any]:
        significant = significant or {}
        return {
            "columns": list(self.columns),
            "model": "additive: segment + " + " + ".join(self.columns),
            "covariance": self.covariance,
            "strata_tests": [t.to_json() for t in self.strata_tests],
            "additivity": self.additivity.to_json(),
            "gaps": [g.to_json(significant.get(g.segment, False)) for g in self.gaps],
            "critical_value": _num(self.critical_value),
            "cells": self.cells,
            "missing_strata": self.missing,
            "note": self.note,
            "raw": {"method": self.raw_method, "statistic": _num(self.raw_statistic),
                    "df": [_num(d) for d in self.raw_df], "p_value": _num(self.raw_p_value),
                    "pairs": [p.to_json() for p in self.raw_pairs]},
        }

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "Adjustment":
        raw = data.get("raw") or {}
        return cls(
            tuple(data.get("columns") or ()), data.get("covariance") or "classic",
            tuple(TermRow.from_json(t) for t in data.get("strata_tests") or ()),
            TermRow.from_json(data.get("additivity") or {"term": "additivity"}),
            tuple(GapRow.from_json(g) for g in data.get("gaps") or ()), _nan(data.get("critical_value")),
            int(data.get("cells") or 0), int(data.get("missing_strata") or 0), raw.get("method") or "",
            _nan(raw.get("statistic")), tuple(_nan(d) for d in raw.get("df") or ()), _nan(raw.get("p_value")),
            tuple(PairRow.from_json(p) for p in raw.get("pairs") or ()), data.get("note"),
        )


@dataclass(frozen=True)
class Verdict:
    """How a decision rule judged one test (a metric, or one assumption check of it) in
    one period, and the announced state it left (see :mod:`monitor.decisions`).

    Attributes
    ----------
    rule : str
        One of :data:`RULES`.
    evidence : float
        What was held to ``level``: under ``two_period`` the combined evidence
        ``p* = min(1, p_t / w, p_S / (1 - w))``; under ``per_period`` the q-value.
        NaN when the test had no p-value this period.
    level : float
        The level ``evidence`` was held to.
    reject : bool
        ``evidence <= level`` and the effect large enough to matter.
    on : bool
        Announced as differing (for a check: as broken) after this period.
    quiet : int
        Consecutive quiet periods while announced (towards clearing).
    change : str or None
        ``'on'`` (announced this period), ``'off'`` (taken back) or None.
    p_before : float or None
        The previous period's p-value that entered the evidence (None: none did).
    combined : float or None
        Stouffer's combination of this and the previous period's p-values.
    before : str or None
        The previous period whose p-value was used.
    """

    rule: str
    evidence: float
    level: float
    reject: bool
    on: bool
    quiet: int = 0
    change: str | None = None
    p_before: float | None = None
    combined: float | None = None
    before: str | None = None

    def to_json(self) -> dict[str, Any]:
        return {"rule": self.rule, "evidence": _num(self.evidence), "level": _num(self.level),
                "reject": self.reject, "on": self.on, "quiet": self.quiet, "change": self.change,
                "p_before": _num(self.p_before), "combined": _num(self.combined), "before": self.before}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "Verdict":
        return cls(str(data.get("rule") or RULE_TWO_PERIOD), _nan(data.get("evidence")), _nan(data.get("level")),
                   bool(data.get("reject")), bool(data.get("on")), int(data.get("quiet") or 0),
                   data.get("change"), _opt(data.get("p_before")), _opt(data.get("combined")),
                   data.get("before"))


@dataclass(frozen=True)
class MetricResult:
    """The verdict for one metric in one period (the contract's ``metrics[]`` entry)."""

    metric: str
    column: str
    requested: str
    method: str
    method_reason: str
    statistic: float
    df: tuple[float, ...]
    p_value: float
    effect_size: EffectSize | None
    segments: tuple[SegmentRow, ...]
    pairs: tuple[PairRow, ...]
    posthoc: str | None
    assumptions: Mapping[str, Check]
    quality: QualityCounts
    note: str | None = None
    q_value: float = math.nan
    significant: bool = False
    unit: str | None = None
    sample_size: int | None = None
    extra_effects: tuple[EffectSize, ...] = field(default=())
    reference: str | None = None
    relevant_checks: tuple[str, ...] = ()
    sensitivity: Sensitivity | None = None
    pair_level: float = math.nan  # the level pairs and flags were read at
    adjustment: Adjustment | None = None  # adjust_for: the additive model and the raw comparison beside it
    pairs_left_out: int = 0  # pairs computed but not kept (a bounded entry read back)
    decision: Verdict | None = None  # the decision rule's verdict on the metric (None: not judged yet)
    check_decisions: Mapping[str, Verdict] = field(default_factory=dict)  # watched check -> verdict

    @property
    def computed(self) -> bool:
        return math.isfinite(self.p_value)

    @property
    def flagged(self) -> dict[str, str]:
        return {s.segment: s.flag for s in self.segments if s.flag}

    @property
    def watched_failing(self) -> tuple[str, ...]:
        """Names of the watched assumption checks that failed."""
        return tuple(k for k in self.relevant_checks
                     if k in self.assumptions and self.assumptions[k].passed is False)

    def kept_pairs(self, form: str = "all") -> tuple[PairRow, ...]:
        """The pairs an entry of ``form`` (one of :data:`PAIR_FORMS`) holds, in their order.

        ``top``: every pair when there are at most :data:`FULL_PAIRS` or the metric has
        a reference segment, else the :data:`TOP_PAIRS` smallest adjusted p-values (NaN
        last, ties in order); ``significant`` adds every significant pair of a
        significant metric; ``all`` keeps every pair.
        """
        if form not in PAIR_FORMS:
            raise ValueError(f"pair form {form!r} is not one of {', '.join(PAIR_FORMS)}")
        pairs = self.pairs
        if form == "all" or self.reference is not None or len(pairs) <= FULL_PAIRS:
            return pairs
        ps = np.array([p.p_adj for p in pairs], dtype=float)
        ps[~np.isfinite(ps)] = np.inf
        keep = np.zeros(len(pairs), dtype=bool)
        keep[np.argsort(ps, kind="stable")[:TOP_PAIRS]] = True
        if form == "significant" and self.significant:
            keep |= np.fromiter((p.significant for p in pairs), dtype=bool, count=len(pairs))
        return tuple(p for p, k in zip(pairs, keep) if k)

    def to_json(self, *, stored: bool = False, pairs: str = "all") -> dict[str, Any]:
        """The ``run --json`` metric entry; ``stored`` adds the format number and the requested test.

        ``pairs`` is one of :data:`PAIR_FORMS`; ``pairs_left_out`` counts the pairs the
        entry does not hold (those left out now and those left out when it was stored).
        """
        kept = self.kept_pairs(pairs)
        out: dict[str, Any] = {
            "metric": self.metric,
            "column": self.column,
            "method": self.method,
            "method_reason": self.method_reason,
            "statistic": _num(self.statistic),
            "df": [_num(d) for d in self.df],
            "p_value": _num(self.p_value),
            "q_value": _num(self.q_value),
            "significant": self.significant,
            "effect_size": self.effect_size.to_json() if self.effect_size is not None else None,
            "other_effect_sizes": [e.to_json() for e in self.extra_effects],
            "posthoc": self.posthoc,
            "pair_level": _num(self.pair_level),
            "segments": [s.to_json() for s in self.segments],
            "pairs": [p.to_json() for p in kept],
            "pairs_left_out": self.pairs_left_out + len(self.pairs) - len(kept),
            "assumptions": {k: c.to_json(k in self.relevant_checks) for k, c in self.assumptions.items()},
            "data_quality": self.quality.to_json(),
            "note": self.note,
        }
        if self.sensitivity is not None:
            out["sensitivity"] = self.sensitivity.to_json()
        if self.reference is not None:
            out["reference"] = self.reference
        if self.unit:
            out["unit"] = self.unit
        if self.sample_size is not None:
            out["sample_size"] = self.sample_size
        if self.adjustment is not None:
            out["adjustment"] = self.adjustment.to_json({p.a: p.significant for p in self.pairs})
        if self.decision is not None:
            out["decision"] = self.decision.to_json()
        if self.check_decisions:
            out["check_decisions"] = {k: v.to_json() for k, v in self.check_decisions.items()}
        if stored:
            out["format"] = FORMAT
            out["requested"] = self.requested
        return out

    @classmethod
    def from_json(cls, data: Mapping[str, Any], requested: str | None = None) -> "MetricResult":
        """Read a metric entry back (any stored format up to :data:`FORMAT`, or ``run --json``).

        ``requested`` is the test asked for when the entry does not say (format 0
        entries do not: pass the run's settings' value, or the method is assumed).
        """
        check_format(data, f"stored result of metric {data.get('metric')!r}")
        assumptions = {k: Check.from_json(v, k) for k, v in (data.get("assumptions") or {}).items()}
        eff = data.get("effect_size")
        sens = data.get("sensitivity")
        return cls(
            metric=data["metric"], column=data.get("column") or data["metric"],
            requested=data.get("requested") or requested or data.get("method") or "",
            method=data.get("method") or "", method_reason=data.get("method_reason") or "",
            statistic=_nan(data.get("statistic")), df=tuple(_nan(d) for d in data.get("df") or ()),
            p_value=_nan(data.get("p_value")), effect_size=EffectSize.from_json(eff) if eff else None,
            segments=tuple(SegmentRow.from_json(s) for s in data.get("segments") or ()),
            pairs=tuple(PairRow.from_json(p) for p in data.get("pairs") or ()),
            posthoc=data.get("posthoc"), assumptions=assumptions,
            quality=QualityCounts.from_json(data.get("data_quality")), note=data.get("note"),
            q_value=_nan(data.get("q_value")), significant=bool(data.get("significant")),
            unit=data.get("unit"), sample_size=data.get("sample_size"),
            extra_effects=tuple(EffectSize.from_json(e) for e in data.get("other_effect_sizes") or ()),
            reference=data.get("reference"),
            relevant_checks=tuple(k for k, v in (data.get("assumptions") or {}).items() if v.get("watched")),
            sensitivity=Sensitivity.from_json(sens) if sens else None,
            pair_level=_nan(data.get("pair_level")),
            adjustment=Adjustment.from_json(data["adjustment"]) if data.get("adjustment") else None,
            pairs_left_out=int(data.get("pairs_left_out") or 0),
            decision=Verdict.from_json(data["decision"]) if data.get("decision") else None,
            check_decisions={k: Verdict.from_json(v) for k, v in (data.get("check_decisions") or {}).items()},
        )


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

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "Event":
        """An event from its JSON (``subject`` is not part of it: the key is stored beside it)."""
        return cls(data["kind"], data.get("metric"), data.get("segment"), data.get("message") or "",
                   dict(data.get("detail") or {}))


# ---------------------------------------------------------------- settings


@dataclass(frozen=True)
class MetricSettings:
    """What one metric's verdict was judged by: the test asked for and the one used."""

    name: str
    requested: str
    used: str | None = None
    min_effect: float | None = None
    reference: str | None = None
    transform: str = "none"

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "requested": self.requested, "used": self.used,
                "min_effect": self.min_effect, "reference": self.reference, "transform": self.transform}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "MetricSettings":
        return cls(data["name"], data.get("requested") or "", data.get("used"), data.get("min_effect"),
                   data.get("reference"), data.get("transform") or "none")


@dataclass(frozen=True)
class RunSettings:
    """Everything a stored period's verdicts were judged by.

    Recorded with each stored run, so that a stored verdict is always read by the
    settings it was made under, never by today's config: a report of an old week
    states the level that week was judged at.
    """

    fdr_method: str
    fdr_level: float
    alpha: float
    pairs: str
    confirm: int
    rule: str
    metrics: tuple[MetricSettings, ...]
    version: str  # segwatch's version that computed the run
    format: int = FORMAT
    decision: Mapping[str, Any] = field(default_factory=dict)  # the decision rule's settings (config's decision:)

    def metric(self, name: str) -> MetricSettings | None:
        return next((m for m in self.metrics if m.name == name), None)

    @classmethod
    def of(cls, job: JobConfig, results: Sequence[MetricResult] = (), version: str | None = None) -> "RunSettings":
        """The settings of ``job`` now, with the tests ``results`` used."""
        if version is None:
            from . import __version__ as version
        used = {r.metric: r.method for r in results}
        return cls(job.fdr.method, float(job.fdr.level), float(job.alpha), job.fdr.pairs, int(job.confirm),
                   job.decision.rule,
                   tuple(MetricSettings(m.name, m.test, used.get(m.name), m.min_effect, m.reference, m.transform)
                         for m in job.metrics),
                   str(version), decision=job.decision.to_json())

    def to_json(self) -> dict[str, Any]:
        return {"format": self.format, "version": self.version, "fdr_method": self.fdr_method,
                "fdr_level": self.fdr_level, "alpha": self.alpha, "pairs": self.pairs, "confirm": self.confirm,
                "rule": self.rule, "decision": dict(self.decision), "metrics": [m.to_json() for m in self.metrics]}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "RunSettings":
        """Read stored settings back; keys a later release added are ignored, keys an
        earlier one did not write take their defaults (a level not written reads as NaN)."""
        fmt = check_format(data, "stored run settings")
        return cls(str(data.get("fdr_method") or ""), _nan(data.get("fdr_level")), _nan(data.get("alpha")),
                   data.get("pairs") or "within", int(data.get("confirm") or 1), data.get("rule") or RULE_Q_LEVEL,
                   tuple(MetricSettings.from_json(m) for m in data.get("metrics") or ()),
                   str(data.get("version") or ""), fmt, dict(data.get("decision") or {}))


# ---------------------------------------------------------------- read back from the history


@dataclass(frozen=True)
class StoredRun:
    """One stored period: its window, what was read, and the settings it was judged by.

    ``settings`` is None for a period stored before runs recorded their settings
    (histories of schema 0); its verdicts are then read as stored, by no level.
    """

    period: str
    period_start: str  # ISO 8601 with the job's offset
    period_end: str
    computed_at: str | None  # ISO 8601 UTC with a Z
    fingerprint: str
    rows: int
    null_segment_rows: int
    segments: tuple[str, ...]
    settings: RunSettings | None = None

    @property
    def level(self) -> float | None:
        """The false-discovery level the period's verdicts were judged at, if recorded."""
        if self.settings is None or not math.isfinite(self.settings.fdr_level):
            return None
        return self.settings.fdr_level

    def to_json(self) -> dict[str, Any]:
        return {"format": FORMAT, "period": self.period, "period_start": self.period_start,
                "period_end": self.period_end, "computed_at": self.computed_at, "fingerprint": self.fingerprint,
                "rows": self.rows, "null_segment_rows": self.null_segment_rows, "segments": list(self.segments),
                "settings": self.settings.to_json() if self.settings is not None else None}

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> "StoredRun":
        check_format(data, f"stored run of period {data.get('period')!r}")
        settings = data.get("settings")
        return cls(str(data["period"]), str(data.get("period_start") or ""), str(data.get("period_end") or ""),
                   data.get("computed_at"), str(data.get("fingerprint") or ""), int(data.get("rows") or 0),
                   int(data.get("null_segment_rows") or 0), tuple(data.get("segments") or ()),
                   RunSettings.from_json(settings) if settings else None)


@dataclass(frozen=True)
class StoredResult:
    """One metric's stored verdict in one period, with the level it was judged at.

    ``judged_at`` is the stored run's ``fdr_level``; None when the run did not record
    its settings, and then ``result.significant`` (the verdict as stored) is all there
    is: a stored verdict is never judged again by today's config.
    """

    period: str
    result: MetricResult
    judged_at: float | None = None

    @property
    def metric(self) -> str:
        return self.result.metric

    def to_json(self) -> dict[str, Any]:
        """The entry as stored (``MetricResult.to_json(stored=True)``), with its period and ``judged_at``."""
        return {"period": self.period, **self.result.to_json(stored=True), "judged_at": _num(self.judged_at)}

    @classmethod
    def from_json(cls, data: Mapping[str, Any], requested: str | None = None) -> "StoredResult":
        level = data.get("judged_at")
        return cls(str(data["period"]), MetricResult.from_json(data, requested),
                   None if level is None else float(level))


# ---------------------------------------------------------------- JSON helpers


def _exp(x: float) -> float:
    return math.exp(x) if math.isfinite(x) else math.nan


def _nan(x: Any) -> float:
    """A stored number back as a float: NaN for ``null``."""
    return math.nan if x is None else float(x)


def _opt(x: Any) -> float | None:
    """A stored number back as a float, or None for ``null``."""
    return None if x is None else float(x)


def _exact(x: Any) -> Any:
    """A moment as JSON: a float, or an exact value (Decimal/Fraction) as its string."""
    if isinstance(x, (float, int, np.floating, np.integer)):
        return _num(x)
    return {"exact": str(x), "type": type(x).__name__}


def _unexact(x: Any) -> Any:
    if isinstance(x, dict):
        from decimal import Decimal
        from fractions import Fraction

        return Decimal(x["exact"]) if x.get("type") == "Decimal" else Fraction(x["exact"])
    return math.nan if x is None else float(x)


def _num(x: Any) -> float | int | None:
    """A JSON-safe number: None for NaN/inf/None."""
    if type(x) is float:  # the usual case, first
        return x if math.isfinite(x) else None
    if x is None:
        return None
    if isinstance(x, (bool, np.bool_)):
        return bool(x)
    if isinstance(x, (int, np.integer)):
        return int(x)
    v = float(x)
    return v if math.isfinite(v) else None
