"""Simulated periods through the analysis and the event rules: false alarms and delay.

This is the engine behind the error-rate harness (``python -m tests.sim``) and its
tests. It draws synthetic segment data, sends it through the real statistics
(:mod:`monitor.stats`), the real analysis (:func:`monitor.analysis.finalise`,
:func:`monitor.analysis.analyse_period`) and the real event rules
(:func:`monitor.events.derive_events` with :meth:`monitor.events.Baseline.from_history`
over an in-memory history of the stored JSON entries), and counts what comes out.
Only SQL is missing: the harness checks separately that a job run through
:class:`monitor.runner.Job` with a SQLite source gives the same events.

Two ways through the analysis
-----------------------------
* :func:`method_pvalues` computes, on one metric's data, the omnibus p-value of each
  method (Fisher, Welch, Kruskal-Wallis, and the method ``auto`` picks), so that the
  per-method tables compare the methods on the same draws.
* :func:`analyse_gated` returns what :func:`~monitor.analysis.analyse_period` returns
  for everything the event rules read, faster: every metric is first *screened*
  (:func:`screen_metric`: method choice, omnibus test, effect size and checks,
  without post-hoc pairs), q-values are computed across the metrics, and only the
  significant metrics are analysed in full. Pairs and segment flags are read only
  inside significant metrics (the analysis' significance gate), so for the events
  the two are the same; the tests hold the screened verdicts to the full ones.

Scenarios
---------
A :class:`Design` is one metric's segments: sizes, spreads (multipliers of a
standardised error) and the error distribution (:data:`DISTRIBUTIONS`). A true
difference is one segment's mean moved so that Cohen's f takes a given value
(:func:`shift_for_f`). A :class:`StreamSpec` is a job: how many metrics, which of
them shift and from which period, the test, the FDR setting and the values of
``confirm`` to evaluate; :func:`run_stream` runs it once and returns a
:class:`StreamTally` per ``confirm`` value (the analysis is shared, only the event
rules differ).

Everything is seeded by the caller's :class:`numpy.random.Generator`; nothing here
prints or reads files.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field, replace
from datetime import date, timedelta
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from monitor.analysis import (
    MetricInput,
    MetricResult,
    SegmentInput,
    SegmentRow,
    analyse_period,
    finalise,
)
from monitor import methods
from monitor.config import JobConfig, parse_config
from monitor.decisions import decide_period, previous_state
from monitor.events import Baseline, Event, derive_events, lookback
from monitor.periods import parse_period
from monitor.methods import Segments
from monitor.stats import diagnostics
from monitor.stats.summary import Moments

log = logging.getLogger(__name__)

#: Error distributions, each standardised to mean 0 and standard deviation 1.
DISTRIBUTIONS = ("normal", "lognormal", "t3")

#: Log-scale sd of the lognormal errors: skewness 3.7, excess kurtosis 29 (strongly skewed).
LOGNORMAL_SIGMA = 0.8

#: The methods the harness compares on the same draws (the registered methods for
#: continuous values, then ``auto``); each is run through the registry.
METHODS = ("anova", "welch", "kruskal", methods.AUTO)

#: The first simulated period (an ISO week); later ones follow week by week.
FIRST_MONDAY = date(2026, 1, 5)


# ---------------------------------------------------------------- data


def standardised(rng: np.random.Generator, distribution: str, size: int) -> np.ndarray:
    """Errors with mean 0 and sd 1 from one of :data:`DISTRIBUTIONS`.

    Parameters
    ----------
    rng : numpy.random.Generator
    distribution : {'normal', 'lognormal', 't3'}
        ``lognormal``: ``exp(s Z)`` with ``s`` = :data:`LOGNORMAL_SIGMA`, centred and
        scaled by its exact mean ``exp(s^2/2)`` and sd ``sqrt((e^{s^2}-1) e^{s^2})``
        (skewed to the right). ``t3``: Student's t with 3 degrees of freedom divided
        by ``sqrt(3)``, its sd (heavy tails: the fourth moment is infinite).
    size : int

    Returns
    -------
    numpy.ndarray

    Notes
    -----
    Moments of the lognormal from Johnson, Kotz & Balakrishnan (1994),
    *Continuous Univariate Distributions* vol. 1, ch. 14.
    """
    if distribution == "normal":
        return rng.standard_normal(size)
    if distribution == "lognormal":
        s2 = LOGNORMAL_SIGMA ** 2
        x = np.exp(LOGNORMAL_SIGMA * rng.standard_normal(size))
        return (x - math.exp(s2 / 2)) / math.sqrt((math.exp(s2) - 1) * math.exp(s2))
    if distribution == "t3":
        return rng.standard_t(3, size) / math.sqrt(3.0)
    raise ValueError(f"unknown distribution {distribution!r}; accepted: {', '.join(DISTRIBUTIONS)}")


@dataclass(frozen=True)
class Design:
    """One metric's segments: sizes, spreads and the error distribution.

    Segment ``j`` draws ``mean_j + sds[j] * e`` with ``e`` from :func:`standardised`.
    ``sds`` defaults to all ones.
    """

    sizes: tuple[int, ...]
    sds: tuple[float, ...] = ()
    distribution: str = "normal"
    name: str = ""

    def __post_init__(self) -> None:
        if len(self.sizes) < 2:
            raise ValueError(f"a design needs at least 2 segments (given sizes: {self.sizes})")
        if any(int(n) < 2 for n in self.sizes):
            raise ValueError(f"every segment needs at least 2 records (given sizes: {self.sizes})")
        if not self.sds:
            object.__setattr__(self, "sds", (1.0,) * len(self.sizes))
        if len(self.sds) != len(self.sizes):
            raise ValueError(f"sds has {len(self.sds)} entries for {len(self.sizes)} segments")
        if any(not (s > 0 and math.isfinite(s)) for s in self.sds):
            raise ValueError(f"every sd must be a positive number (given sds: {self.sds})")
        if self.distribution not in DISTRIBUTIONS:
            raise ValueError(f"unknown distribution {self.distribution!r}; accepted: {', '.join(DISTRIBUTIONS)}")

    @property
    def k(self) -> int:
        return len(self.sizes)

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(f"S{j + 1:02d}" for j in range(self.k))

    @property
    def pooled_sd(self) -> float:
        """The within-segment sd pooled over records, ``sqrt(sum n_j sd_j^2 / N)``."""
        n = np.asarray(self.sizes, float)
        return float(math.sqrt(np.sum(n * np.square(self.sds)) / n.sum()))


def cohens_f(design: Design, means: Sequence[float]) -> float:
    """Cohen's f of segment means: the sd of the means over the within-segment sd.

    ``f = sigma_m / sigma`` with ``sigma_m^2 = sum n_j (mu_j - mu)^2 / N`` (``mu``
    the size-weighted grand mean) and ``sigma`` = :attr:`Design.pooled_sd`.

    Notes
    -----
    Cohen, J. (1988). *Statistical Power Analysis for the Behavioral Sciences*, 2nd
    ed., sec. 8.2 (f = 0.10, 0.25, 0.40 are his small, medium and large effects); the
    size-weighted form is his for unequal sizes (sec. 8.2.1, case 2).
    """
    n = np.asarray(design.sizes, float)
    mu = np.asarray(means, float)
    grand = np.sum(n * mu) / n.sum()
    return float(math.sqrt(np.sum(n * (mu - grand) ** 2) / n.sum()) / design.pooled_sd)


def shift_for_f(design: Design, f: float, segment: int = 0) -> np.ndarray:
    """Segment means with one segment moved up so that :func:`cohens_f` equals ``f``.

    Moving segment ``s`` by ``d`` gives ``f = d sqrt(n_s (N - n_s)) / (N sigma)``, so
    ``d = f N sigma / sqrt(n_s (N - n_s))`` (for k equal segments,
    ``d = f sigma k / sqrt(k - 1)``: 0.625 sd for f = 0.25 and k = 5).
    """
    n = np.asarray(design.sizes, float)
    total = n.sum()
    d = f * total * design.pooled_sd / math.sqrt(n[segment] * (total - n[segment]))
    means = np.zeros(design.k)
    means[segment] = d
    return means


def draw(rng: np.random.Generator, design: Design, means: Sequence[float] | None = None) -> list[np.ndarray]:
    """One period's values of one metric, per segment."""
    means = np.zeros(design.k) if means is None else np.asarray(means, float)
    return [means[j] + design.sds[j] * standardised(rng, design.distribution, int(design.sizes[j]))
            for j in range(design.k)]


# ---------------------------------------------------------------- per-method p-values


@dataclass(frozen=True)
class MethodPValues:
    """The omnibus p-value of each method on one metric's data, and ``auto``'s pick.

    ``spreads_look_equal`` is True when neither the Brown-Forsythe check nor the
    sd-ratio check failed (the checks ``auto`` reads for its Welch branch).
    """

    anova: float
    welch: float
    kruskal: float
    auto: float
    auto_method: str
    spreads_look_equal: bool = True

    def get(self, method: str) -> float:
        return float(getattr(self, method))


def method_pvalues(labels: Sequence[str], samples: Sequence[np.ndarray]) -> MethodPValues:
    """Fisher's, Welch's and Kruskal-Wallis p-values on the same data, and ``auto``'s.

    Each method's omnibus test through the registry (:func:`monitor.methods.get`) and,
    for ``auto``, :func:`monitor.stats.diagnostics.run_checks` with
    :func:`monitor.methods.choose`, exactly as the analysis does.
    """
    groups = [Moments.from_values(v) for v in samples]
    segs = Segments.of(labels, groups, samples)
    p = {name: methods.get(name).omnibus(segs).p_value for name in METHODS if name != methods.AUTO}
    checks = diagnostics.run_checks(labels, groups, samples)
    choice = methods.choose(methods.AUTO, segs, checks)
    equal = all(checks[name].passed is not False for name in ("brown_forsythe", "sd_ratio"))
    return MethodPValues(p["anova"], p["welch"], p["kruskal"], p[choice.method.name], choice.method.name, equal)


# ---------------------------------------------------------------- the job and its inputs


def sim_job(metrics: int, *, test: str = "auto", fdr_method: str = "bh", level: float = 0.05,
            confirm: int = 1, min_rows: int | None = None, extra: Mapping[str, Any] | None = None) -> JobConfig:
    """A validated job over ``metrics`` simulated metrics ``m01, m02, ...``.

    Built by :func:`monitor.config.parse_config` from the same mapping a YAML file
    would give, so every setting is checked as a user's would be. The source and
    history URLs are placeholders (the simulation reads and writes neither). The
    decision rule is ``per_period`` (the rule the FDR and ``confirm`` tables measure)
    unless ``extra`` names one (``extra={"decision": {"rule": "two_period"}}``).
    """
    data: dict[str, Any] = {
        "job": "sim",
        "source": {"url": "sqlite:///sim.sqlite", "table": "records", "time_column": "ts",
                   "segment_column": "segment"},
        "period": "week",
        "timezone": "UTC",
        "metrics": [{"column": metric_name(i), "test": test} for i in range(metrics)],
        "fdr": {"method": fdr_method, "level": level},
        "confirm": confirm,
        "decision": {"rule": "per_period"},
    }
    if min_rows is not None:
        data["quality"] = {"min_rows_per_segment": min_rows}
    if extra:
        data.update(extra)
    return parse_config(data, Path("sim.yaml").absolute(), environ={})


def metric_name(i: int) -> str:
    return f"m{i + 1:02d}"


def period_ident(t: int) -> str:
    """The ISO week identifier of simulated period ``t`` (0 is 2026-W02)."""
    y, w, _ = (FIRST_MONDAY + timedelta(weeks=t)).isocalendar()
    return f"{y}-W{w:02d}"


def metric_inputs(job: JobConfig, labels: Sequence[str], values: Sequence[Sequence[np.ndarray]]
                  ) -> tuple[MetricInput, ...]:
    """The analysis inputs of one period: ``values[i][j]`` is metric i, segment j."""
    return tuple(
        MetricInput(m, tuple(SegmentInput(s, Moments.from_values(v), np.asarray(v, float))
                             for s, v in zip(labels, vals)))
        for m, vals in zip(job.metrics, values)
    )


# ---------------------------------------------------------------- analysis, screened then gated


def screen_metric(data: MetricInput, job: JobConfig, *, checks: bool = True) -> MetricResult:
    """One metric's omnibus stage, as in :func:`monitor.analysis.analyse_metric`, without pairs.

    The same segment exclusion, assumption checks, method choice (``auto`` via
    :func:`~monitor.stats.diagnostics.choose_method`), omnibus test and effect size;
    no post-hoc pairs, so no segment verdicts (every ``direction`` is None). q-values
    and significance come afterwards from :func:`monitor.analysis.finalise`.
    ``checks=False`` skips the assumption checks of a metric whose test is fixed (they
    change no verdict there, only the ``assumptions`` entry); ``auto`` always runs them.
    """
    m = data.metric
    min_n = max(2, job.quality.min_rows_per_segment)
    kept = [s for s in data.segments if s.moments.n >= min_n]
    rows = tuple(SegmentRow(s.segment, s.moments.n, _f(s.moments.mean), _f(s.moments.sd),
                            excluded=s.moments.n < min_n) for s in data.segments)
    base = dict(metric=m.name, column=m.column, requested=m.test, pairs=(), posthoc=None,
                quality=data.quality, unit=m.unit, sample_size=data.sample_size, segments=rows)
    if len(kept) < 2:
        named = methods.named(m.test)
        return MetricResult(method=named.name, method_reason="not computed", statistic=math.nan,
                            df=named.nan_df,
                            p_value=math.nan, effect_size=None, assumptions={},
                            note="fewer than two segments have enough values to compare", **base)
    labels = [s.segment for s in kept]
    groups = [s.moments for s in kept]
    has_values = all(s.values is not None for s in kept)
    samples = [s.values if s.values is not None else np.empty(0) for s in kept]
    found = diagnostics.run_checks(labels, groups, samples) if has_values and (checks or m.test == "auto") else {}
    segs = Segments.of(labels, groups, samples if has_values else None)
    choice = methods.choose(m.test, segs, found)
    res = choice.method.omnibus(segs)
    effect = choice.method.effect_size(res, job.posthoc.confidence)
    return MetricResult(method=choice.method.name, method_reason=choice.reason, statistic=res.statistic,
                        df=tuple(res.df), p_value=res.p_value, effect_size=effect, assumptions=found,
                        note=res.note, relevant_checks=methods.watched_checks(m.test, choice.method, groups),
                        **base)


def analyse_gated(inputs: Sequence[MetricInput], job: JobConfig) -> tuple[MetricResult, ...]:
    """:func:`~monitor.analysis.analyse_period`'s verdicts, with pairs only where they count.

    Screens every metric (:func:`screen_metric`), computes q-values across all of
    them (:func:`~monitor.analysis.finalise`), analyses the significant ones in full
    (:func:`~monitor.analysis.analyse_period`: pairs and segment flags) and computes
    the q-values and the significance gate again over the merged list. Metrics that
    are not significant keep their screened entry (no pairs), which is all the event
    rules read of them: their flags are empty either way.
    """
    screened = finalise([screen_metric(d, job) for d in inputs], job)
    wanted = [i for i, r in enumerate(screened) if r.significant]
    if not wanted:
        return screened
    merged = list(screened)
    for i, full in zip(wanted, analyse_period([inputs[i] for i in wanted], job)):
        merged[i] = full
    return finalise(merged, job)


# ---------------------------------------------------------------- an in-memory job


@dataclass(frozen=True)
class _Stored:
    """One simulated stored period (the fields of :class:`monitor.store.history.StoredPeriod`)."""

    period: str
    segments: tuple[str, ...]
    metrics: Mapping[str, Mapping[str, Any]]


@dataclass(frozen=True)
class PeriodOutcome:
    """One period of a simulated job: the results and, per ``confirm`` value, the events."""

    period: str
    results: tuple[MetricResult, ...]
    events: Mapping[int, tuple[Event, ...]]


class Pipeline:
    """A job run period after period without SQL: analysis, decisions, events, an in-memory history.

    Each period's results go through the job's decision rule
    (:func:`monitor.decisions.decide_period`, against the previous stored period, as
    :class:`monitor.runner.Job` does) and are kept as their JSON entries (what the
    history stores); the baseline for the next period is :meth:`Baseline.from_history`
    over the latest :func:`~monitor.events.lookback` of them, once per value in
    ``confirms`` (the analysis is shared; the decisions and event rules differ, and so
    does each one's history). ``confirm`` values above 1 belong to the per-period rule.

    Parameters
    ----------
    job : JobConfig
    confirms : sequence of int
        The ``confirm`` values to derive events for; default ``(job.confirm,)``.
    full : bool
        Analyse every metric in full (:func:`~monitor.analysis.analyse_period`)
        instead of :func:`analyse_gated` (which, under the two-period rule, also
        analyses in full every metric announced before or with a p-value that could
        give evidence).
    """

    def __init__(self, job: JobConfig, confirms: Sequence[int] | None = None, *, full: bool = False):
        self.job = job
        self.confirms = tuple(confirms) if confirms else (job.confirm,)
        self.jobs = {k: job if k == job.confirm else _with_confirm(job, k) for k in self.confirms}
        self.full = full
        self.histories: dict[int, list[_Stored]] = {k: [] for k in self.confirms}  # newest first

    @property
    def history(self) -> list[_Stored]:
        return self.histories[self.confirms[0]]

    def run(self, ident: str, inputs: Sequence[MetricInput], segments: Sequence[str]) -> PeriodOutcome:
        if self.full or any(j.decision.rule != "per_period" for j in self.jobs.values()):
            results = analyse_period(inputs, self.job)  # flags of announced metrics need their pairs
        else:
            results = analyse_gated(inputs, self.job)
        return self.record(ident, results, segments)

    def record(self, ident: str, results: Sequence[MetricResult], segments: Sequence[str]) -> PeriodOutcome:
        """Decide the period, derive its events from ``results`` and store them (as :meth:`run` does)."""
        events = {}
        decided_first: tuple[MetricResult, ...] = ()
        before = parse_period(self.job.period, ident, self.job.timezone).previous().ident
        for k, job in self.jobs.items():
            history = self.histories[k]
            decided = decide_period(results, job, previous_state(history, before, job))
            base = Baseline.from_history(history[:lookback(k)], job)
            events[k] = tuple(derive_events(job, decided, segments, 0, 0, base))
            history.insert(0, _Stored(ident, tuple(segments), {r.metric: r.to_json() for r in decided}))
            del history[max(lookback(k), 1):]
            decided_first = decided_first or decided
        return PeriodOutcome(ident, decided_first, events)


def _with_confirm(job: JobConfig, confirm: int) -> JobConfig:
    if confirm > 1:
        return replace(job, confirm=confirm, decision=replace(job.decision, rule="per_period"))
    return replace(job, confirm=confirm)


# ---------------------------------------------------------------- streams: false alarms and delay


@dataclass(frozen=True)
class StreamSpec:
    """A simulated job: ``metrics`` metrics on one design, the first ``shifted`` of them
    moving (one segment up by Cohen's ``effect_f``) from period ``shift_at`` on.

    Every combination of ``levels`` (``fdr.level``) and ``confirms`` (``confirm``) is
    evaluated on the same draws. ``gated=False`` skips the full analysis of
    significant metrics: metric-level events only (no segment flags).
    """

    design: Design
    metrics: int = 20
    periods: int = 52
    test: str = "auto"
    fdr_method: str = "bh"
    levels: tuple[float, ...] = (0.05,)
    confirms: tuple[int, ...] = (1,)
    shifted: int = 0
    effect_f: float = 0.0
    shift_at: int = 0
    gated: bool = True


@dataclass
class StreamTally:
    """What runs of a :class:`StreamSpec` produced for one (level, confirm) setting.

    Counts add up over runs (:meth:`add`). A *false* ``emerged`` is one on a metric
    without a true difference in that period (a null metric, or a shifted one before
    its shift); for segments also one naming another segment than the moved one, or
    the wrong direction. ``delays`` holds, per shifted metric and run, the periods
    from the shift to the first period the metric is announced as differing (0: in
    the shift's own period), or None when that did not happen within the run;
    ``segment_delays`` the same for the moved segment announced ``high``.
    """

    periods: int = 0
    metric_periods_null: int = 0  # metric-periods without a true difference
    null_significant: int = 0  # ... of which significant (the raw verdict)
    metric_periods_true: int = 0  # metric-periods with a true difference
    true_significant: int = 0
    false_metric_emerged: int = 0
    false_segment_emerged: int = 0
    false_segment_on_true: int = 0  # ... of which on a metric with a true difference (another segment)
    true_segment_emerged: int = 0
    periods_with_false_emerged: int = 0
    periods_with_false_discovery: int = 0  # some null metric significant
    fdp_sum: float = 0.0  # sum over periods of V / max(R, 1)
    delays: list[int | None] = field(default_factory=list)
    segment_delays: list[int | None] = field(default_factory=list)

    def add(self, other: "StreamTally") -> None:
        for name in ("periods", "metric_periods_null", "null_significant", "metric_periods_true",
                     "true_significant", "false_metric_emerged", "false_segment_emerged",
                     "false_segment_on_true", "true_segment_emerged", "periods_with_false_emerged",
                     "periods_with_false_discovery", "fdp_sum"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.delays.extend(other.delays)
        self.segment_delays.extend(other.segment_delays)


class _Watch:
    """Follows one (level, confirm) setting's events and fills its :class:`StreamTally`."""

    def __init__(self, spec: StreamSpec, names: Sequence[str], moved_segment: str):
        self.spec = spec
        self.shifted = list(names[:spec.shifted])
        self.moved = moved_segment
        self.tally = StreamTally()
        self.on: dict[str, bool] = {}
        self.flags: dict[tuple[str, str], str | None] = {}
        self.first_on: dict[str, int] = {}
        self.first_flag: dict[str, int] = {}

    def period(self, t: int, results: Sequence[MetricResult], events: Sequence[Event], true_now: set[str]) -> None:
        tally = self.tally
        sig = {r.metric for r in results if r.significant}
        v = len(sig - true_now)
        tally.periods += 1
        tally.metric_periods_null += len(results) - len(true_now)
        tally.metric_periods_true += len(true_now)
        tally.null_significant += v
        tally.true_significant += len(sig & true_now)
        tally.periods_with_false_discovery += v > 0
        tally.fdp_sum += v / max(len(sig), 1)
        false_here = 0
        for e in events:
            if e.kind not in ("emerged", "cleared"):
                continue
            if e.segment is None:
                self.on[e.metric] = e.kind == "emerged"
                if e.kind == "emerged" and e.metric not in true_now:
                    tally.false_metric_emerged += 1
                    false_here += 1
                continue
            key = (e.metric, e.segment)
            if e.kind == "cleared":
                if self.flags.get(key) == e.detail.get("previous_flag"):
                    self.flags[key] = None
                continue
            self.flags[key] = e.detail.get("flag")
            if e.metric in true_now and e.segment == self.moved and e.detail.get("flag") == "high":
                tally.true_segment_emerged += 1
            else:
                tally.false_segment_emerged += 1
                tally.false_segment_on_true += e.metric in true_now
                false_here += 1
        tally.periods_with_false_emerged += false_here > 0
        if t >= self.spec.shift_at:
            for name in self.shifted:
                if self.on.get(name) and name not in self.first_on:
                    self.first_on[name] = t - self.spec.shift_at
                if self.flags.get((name, self.moved)) == "high" and name not in self.first_flag:
                    self.first_flag[name] = t - self.spec.shift_at

    def close(self) -> StreamTally:
        for name in self.shifted:
            self.tally.delays.append(self.first_on.get(name))
            if self.spec.gated:
                self.tally.segment_delays.append(self.first_flag.get(name))
        return self.tally


def run_stream(spec: StreamSpec, rng: np.random.Generator) -> dict[tuple[float, int], StreamTally]:
    """Run ``spec`` once (``spec.periods`` periods); a tally per (level, confirm) setting.

    Each period: draw every metric, screen every metric once (:func:`screen_metric`),
    then per level compute q-values and significance (:func:`~monitor.analysis.finalise`),
    analyse in full the metrics significant at any level (once each), and derive the
    events per ``confirm`` value from that level's in-memory history.
    """
    design = spec.design
    labels = design.labels
    names = [metric_name(i) for i in range(spec.metrics)]
    jobs = {lv: sim_job(spec.metrics, test=spec.test, fdr_method=spec.fdr_method, level=lv,
                        confirm=spec.confirms[0]) for lv in spec.levels}
    pipes = {lv: Pipeline(job, spec.confirms) for lv, job in jobs.items()}
    base_job = jobs[spec.levels[0]]
    moved = shift_for_f(design, spec.effect_f) if spec.shifted else None
    watches = {(lv, k): _Watch(spec, names, labels[0]) for lv in spec.levels for k in spec.confirms}
    for t in range(spec.periods):
        true_now = set(names[:spec.shifted]) if t >= spec.shift_at else set()
        values = [draw(rng, design, moved if names[i] in true_now else None) for i in range(spec.metrics)]
        inputs = metric_inputs(base_job, labels, values)
        screened = [screen_metric(d, base_job) for d in inputs]
        per_level = {lv: finalise(screened, job) for lv, job in jobs.items()}
        if spec.gated:
            wanted = sorted({i for res in per_level.values() for i, r in enumerate(res) if r.significant})
            if wanted:
                merged = list(screened)
                for i, full in zip(wanted, analyse_period([inputs[i] for i in wanted], base_job)):
                    merged[i] = full
                per_level = {lv: finalise(merged, job) for lv, job in jobs.items()}
        for lv, results in per_level.items():
            out = pipes[lv].record(period_ident(t), results, labels)
            for k, events in out.events.items():
                watches[(lv, k)].period(t, results, events, true_now)
    return {key: w.close() for key, w in watches.items()}


def _f(x: Any) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan
