"""One period's comparison for every metric: method choice, omnibus test, effect size,
post-hoc pairs, segment flags and assumption checks, then false-discovery control
across the metrics.

This module sits between the statistics package (pure numbers) and the pipeline
(SQL, history, alerts). Its input is per-segment data that the source already
checked and converted: a :class:`~monitor.stats.summary.Moments` per segment and,
where available, the values themselves (all of them, or a bounded sample) for the
rank test and the diagnostics that need values.

Decision rules, written down once
---------------------------------
* A segment with fewer values than ``quality.min_rows_per_segment`` (at least 2)
  is left out of the comparison and named in the metric's ``note``.
* Each method (its omnibus test, effect size, post-hoc and many-to-one families,
  segment-against-the-rest contrast, watched checks) is a module of
  :mod:`monitor.methods`, found by name; nothing here switches on a method's name.
* ``test: auto`` runs the assumption checks and picks the method with
  :func:`monitor.methods.choose` (the rule: :func:`monitor.stats.diagnostics.choose_method`);
  the reason is kept.
* A metric is *significant* when its q-value (the p-value adjusted across all
  metrics of the period by ``fdr.method``) is at most ``fdr.level``.
* Pairs and segment flags are a second stage: they are read only inside a
  significant metric (a gate that keeps the per-metric false discovery control
  meaningful), at level ``alpha`` with their own within-metric adjustment.
* A segment is flagged ``high``/``low`` when, in the post-hoc pairs, it is
  significantly above (below) more than half of the other segments and below
  (above) none (:func:`monitor.stats.flags.majority_of_pairs`). With a
  ``reference`` segment, the pairs are the method's many-to-one family (Dunnett
  after ANOVA) and a segment is flagged when its gap to the reference is significant.
* Only the checks in ``relevant_checks`` (marked ``watched`` in the JSON) raise
  assumption events; see :func:`monitor.methods.watched_checks`.
* A statistic that cannot be computed is ``None`` in the output with the reason in
  ``note``; it is never significant.
"""

from __future__ import annotations

import logging
import math
import threading
from dataclasses import replace
from typing import TYPE_CHECKING, Any, Sequence

import numpy as np

from . import methods, stats
from .config import JobConfig
from .methods import Segments
from .model import (  # noqa: F401 - the shared vocabulary, re-exported for callers of this module
    QUANTILE_KEYS, QUANTILE_LEVELS, Check, EffectSize, MetricInput, MetricResult, PairRow, QualityCounts,
    SegmentInput, SegmentRow, Sensitivity,
)

if TYPE_CHECKING:
    from .stats.summary import Moments

# The statistical routines (monitor.stats.diagnostics and its siblings) bring in scipy:
# about 65 MB and most of a second of start-up. They are reached as attributes of the
# lazy ``monitor.stats`` package (``stats.posthoc``), which imports each on first use,
# because this module's result types are needed by every command. A run loads them
# either while a database server computes the period's sums (the process only waits
# then: :func:`load_statistics_in_background`) or, for an engine that works inside this
# process (DuckDB, SQLite), after the source has been read and closed, so that the
# engine's buffers and scipy are never resident at once.

log = logging.getLogger(__name__)


def load_statistics() -> None:
    """Import the statistical routines now (they are otherwise imported on first use)."""
    stats.load()


def load_statistics_in_background() -> threading.Thread:
    """Start :func:`load_statistics` in a daemon thread and return it (join it before
    the statistics run). An import error is left for the first real use to raise."""
    def load() -> None:
        try:
            load_statistics()
        except Exception:  # noqa: BLE001 - the same import in the caller reports it
            log.debug("loading the statistical routines in the background failed", exc_info=True)

    thread = threading.Thread(target=load, name="segwatch-load-statistics", daemon=True)
    thread.start()
    return thread


_LEVELS = np.array(QUANTILE_LEVELS)


def segment_quantiles(values: np.ndarray | None, *, presorted: np.ndarray | None = None) -> tuple[float, ...]:
    """The :data:`QUANTILE_LEVELS` of one segment's values, or ``()`` when there are none.

    Linear interpolation between order statistics (Hyndman & Fan 1996, definition 7;
    numpy's default). The values are on the analysed scale (after ``transform``), all
    of them when read locally, or the bounded random sample when sums are pushed down,
    in which case the quantiles are estimates. ``presorted`` is ``numpy.sort`` of the
    values when the caller has it (the result is the same, bit for bit; see
    :func:`monitor.stats.diagnostics.quantiles_of_sorted`).
    """
    if values is None or len(values) == 0:
        return ()
    if presorted is None:
        presorted = np.sort(np.asarray(values, dtype=float).ravel())
    return tuple(stats.diagnostics.quantiles_of_sorted(presorted, _LEVELS).tolist())


# ---------------------------------------------------------------- per metric


MAX_PAIR_SEGMENTS = 100  # beyond this many segments, pairs are skipped (k(k-1)/2 grows too fast)
DEFAULT_THRESHOLD_F = 0.25  # Cohen's "medium" f (common practice)


def analyse_metric(data: MetricInput, job: JobConfig, n_metrics: int = 1) -> MetricResult:
    """Compare the segments of one metric. q-value and the gated flags come later,
    from :func:`finalise`."""
    m = data.metric
    min_n = max(2, job.quality.min_rows_per_segment)
    # each segment's values sorted once: quantiles, medians, quartiles and Shapiro-Wilk read them
    ordered = {id(s): np.sort(np.asarray(s.values, dtype=float).ravel())
               for s in data.segments if s.values is not None}
    kept = [s for s in data.segments if s.moments.n >= min_n]
    dropped = [s for s in data.segments if s.moments.n < min_n]
    notes: list[str] = []
    if dropped:
        names = ", ".join(f"{s.segment} (n={s.moments.n})" for s in dropped)
        notes.append(f"left out for having fewer than {min_n} values: {names}")

    if data.sample_size is not None:
        notes.append(f"rank test, checks and quantiles use a seeded sample of {data.sample_size} values "
                     "(means, sds and the ANOVAs use every value)")
    labels = [s.segment for s in kept]
    groups = [s.moments for s in kept]
    samples = [s.values if s.values is not None else np.empty(0) for s in kept]
    has_values = all(s.values is not None for s in kept)

    rows = [
        SegmentRow(s.segment, s.moments.n, _f(s.moments.mean), _f(s.moments.sd), excluded=s.moments.n < min_n,
                   quantiles=segment_quantiles(s.values, presorted=ordered.get(id(s))))
        for s in data.segments
    ]

    if len(kept) < 2:
        reason = (
            "fewer than two segments have enough values to compare"
            if data.segments
            else "no values in this period"
        )
        notes.insert(0, reason)
        named = methods.named(m.test)
        return MetricResult(
            metric=m.name, column=m.column, requested=m.test, method=named.name,
            method_reason="not computed: " + reason, statistic=math.nan,
            df=named.nan_df,
            p_value=math.nan, effect_size=None, segments=tuple(rows), pairs=(),
            posthoc=None, assumptions={}, quality=data.quality, note="; ".join(notes),
            unit=m.unit, sample_size=data.sample_size,
        )

    checks: dict[str, Check] = (
        stats.diagnostics.run_checks(labels, groups, samples, presorted=[ordered[id(s)] for s in kept])
        if has_values else {}
    )
    segs = Segments.of(labels, groups, samples if has_values else None)
    choice = methods.choose(m.test, segs, checks)
    method, reason = choice.method, choice.reason
    res = choice.result if choice.result is not None else method.omnibus(segs)
    if not method.checks_apply:  # checks of means say nothing here (0/1 data: spreads follow the shares)
        checks = {}
    if res.note:
        notes.append(res.note)

    effect = method.effect_size(res, job.posthoc.confidence)
    extra = method.other_effect_sizes(res)

    reference = m.reference
    if reference is not None and reference not in labels:
        notes.append(f"reference segment {reference!r} has no usable values this period; "
                     "no comparisons with it were made")
    pairs: tuple[PairRow, ...] = ()
    family: methods.Family | None = method.posthoc
    conf, adjust = job.posthoc.confidence, job.posthoc.dunn_adjust
    if math.isfinite(res.statistic):
        if reference is not None:
            if reference in labels:
                family = method.many_to_one
                ph = method.pairs_to_reference(segs, reference, confidence=conf, adjust=adjust)
            else:
                ph = None
        elif len(labels) > MAX_PAIR_SEGMENTS:
            ph = None
            family = None
            notes.append(f"{len(labels)} segments: more than {MAX_PAIR_SEGMENTS}, so no pairwise comparisons "
                         "were made; segments are flagged by their contrast with the rest instead")
        else:
            ph = method.pairs(segs, confidence=conf, adjust=adjust)
        # a diff on the log scale is a log ratio, unless the family compares mean ranks (Dunn)
        log_scale = m.transform == "log" and family is not None and not family.ranks
        if ph is not None:
            if ph.note:
                notes.append(ph.note)
            pairs = tuple(
                PairRow(p.a, p.b, p.diff, p.p_adj, p.ci_low, p.ci_high, log_scale=log_scale) for p in ph.pairs
            )
        if family is None:  # too many segments for pairs: flag by each segment's contrast with the rest
            contrasts = method.versus_rest(segs, alpha=job.alpha)
            verdicts = {c.segment: (int(c.direction == "high"), int(c.direction == "low"), c.direction)
                        for c in contrasts}
        else:
            verdicts = _segment_verdicts(labels, pairs, reference, job.alpha)
        rest = _mean_minus_rest(labels, groups)  # in the metric's units, whatever the method
        rows = [
            replace(r, diff_vs_rest=rest.get(r.segment, math.nan),
                    above=verdicts[r.segment][0], below=verdicts[r.segment][1],
                    direction=verdicts[r.segment][2])
            if r.segment in verdicts else r
            for r in rows
        ]

    return MetricResult(
        metric=m.name, column=m.column, requested=m.test, method=method.name,
        method_reason=reason, statistic=res.statistic, df=tuple(res.df),
        p_value=res.p_value, effect_size=effect, segments=tuple(rows), pairs=pairs,
        posthoc=family.name if family is not None else None, assumptions=checks, quality=data.quality,
        note="; ".join(notes) or None, unit=m.unit, sample_size=data.sample_size,
        extra_effects=tuple(extra), reference=reference,
        relevant_checks=methods.watched_checks(m.test, method, groups),
        sensitivity=sensitivity(groups, job, n_metrics, m.min_effect),
    )


def sensitivity(groups: Sequence[Moments], job: JobConfig, n_metrics: int,
                min_effect: float | None = None) -> Sensitivity | None:
    """The minimum detectable effect for these segment sizes (see :class:`Sensitivity`).

    The level is ``fdr.level / m`` for m metrics: the threshold a lone discovery
    must pass under Benjamini-Hochberg (and Holm, Bonferroni), so "detectable"
    means detectable even when nothing else in the period is.
    """
    sizes = [g.n for g in groups]
    if len(sizes) < 2 or sum(sizes) - len(sizes) < 1:
        return None
    alpha = job.fdr.level / max(1, n_metrics) if job.fdr.method != "none" else job.fdr.level
    min_f = stats.power.minimum_detectable_f(sizes, alpha=alpha, power=job.power)
    df_within = sum(sizes) - len(sizes)
    pooled_sd = math.sqrt(float(sum(_f(g.m2) for g in groups)) / df_within)
    min_diff = min_f * pooled_sd if math.isfinite(min_f) else math.nan
    threshold = math.sqrt(min_effect / (1 - min_effect)) if min_effect else DEFAULT_THRESHOLD_F
    return Sensitivity(job.power, alpha, min_f, min_diff, threshold,
                       bool(math.isfinite(min_f) and min_f > threshold))


def _mean_minus_rest(labels: Sequence[str], groups: Sequence[Moments]) -> dict[str, float]:
    """Each segment's mean minus the mean of the other segments' records (descriptive)."""
    n = np.array([g.n for g in groups], dtype=float)
    mean = np.array([_f(g.mean) for g in groups])
    total, weighted = n.sum(), n * mean
    with np.errstate(all="ignore"):
        rest = (weighted.sum() - weighted) / (total - n)
    return {s: float(mean[i] - rest[i]) for i, s in enumerate(labels)}


def _segment_verdicts(labels: Sequence[str], pairs: Sequence[PairRow], reference: str | None,
                      alpha: float) -> dict[str, tuple[int, int, str | None]]:
    """(above, below, direction) per segment, before the metric's significance gate.

    Without a reference: the majority-of-pairs rule of
    :func:`monitor.stats.flags.majority_of_pairs`. With a reference: a segment is
    ``high``/``low`` when its gap to the reference is significant (the reference
    itself is never flagged).
    """
    if reference is None:
        verdicts = stats.flags.majority_of_pairs(labels, [(p.a, p.b, p.diff, p.p_adj) for p in pairs], alpha)
        return {v.segment: (v.above, v.below, v.direction) for v in verdicts}
    out: dict[str, tuple[int, int, str | None]] = {s: (0, 0, None) for s in labels}
    for p in pairs:
        if math.isfinite(p.p_adj) and p.p_adj <= alpha and math.isfinite(p.diff) and p.diff != 0:
            out[p.a] = (1, 0, "high") if p.diff > 0 else (0, 1, "low")
    return out


# ---------------------------------------------------------------- across metrics


def finalise(results: Sequence[MetricResult], job: JobConfig) -> tuple[MetricResult, ...]:
    """Adjust the p-values across metrics and apply the significance gate.

    q-values follow ``fdr.method`` over the metrics whose p-value could be
    computed (see :func:`monitor.stats.multiplicity.adjust`). A metric is
    significant when ``q <= fdr.level``; its pairs and segment flags count only
    then. Pairs are read at level ``alpha`` (``fdr.pairs: within``: each metric's
    post-hoc family keeps its own familywise error rate), or at ``alpha * R / m``
    with R of m metrics selected (``fdr.pairs: selective``: Benjamini & Bogomolov
    2014, which bounds the expected average error rate over the selected metrics'
    families). ``min_effect``, when set, is recorded but does not change
    significance here (the event layer decides what to announce).

    References
    ----------
    Benjamini, Y. and Bogomolov, M. (2014). Selective inference on multiple
    families of hypotheses. JRSS B 76(1), 297-318.
    """
    p = np.array([r.p_value for r in results], dtype=float)
    q = stats.multiplicity.adjust(p, job.fdr.method) if len(p) else p
    sig_all = [bool(math.isfinite(qv) and qv <= job.fdr.level) for qv in q]
    m = int(np.isfinite(p).sum())
    level = job.alpha
    if job.fdr.pairs == "selective" and m:
        level = job.alpha * sum(sig_all) / m
    return tuple(gate(replace(r, q_value=float(qv)), sig, level, job) for r, qv, sig in zip(results, q, sig_all))


def gate(r: MetricResult, significant: bool, level: float, job: JobConfig) -> MetricResult:
    """``r`` with the significance gate applied: ``significant`` set, its pairs read at
    ``level`` only when it is significant, and each segment's flag its direction then.

    Used by :func:`finalise` (``significant`` is ``q <= fdr.level``) and by the decision
    rule of :mod:`monitor.decisions` (``significant`` is the announced state).
    """
    pairs = tuple(
        _with_significant(pr, bool(significant and math.isfinite(pr.p_adj) and pr.p_adj <= level))
        for pr in r.pairs
    )
    segs = r.segments
    if level != job.alpha and r.posthoc is not None:
        labels = [s.segment for s in r.segments if not s.excluded and s.n > 0]
        verdicts = _segment_verdicts(labels, r.pairs, r.reference, level)
        segs = tuple(
            replace(s, above=verdicts[s.segment][0], below=verdicts[s.segment][1],
                    direction=verdicts[s.segment][2]) if s.segment in verdicts else s
            for s in segs
        )
    segs = tuple(replace(s, flag=s.direction if significant else None, held=0) for s in segs)
    return replace(r, significant=significant, pairs=pairs, segments=segs, pair_level=level)


def _with_significant(pair: PairRow, significant: bool) -> PairRow:
    """``replace(pair, significant=significant)``, cheaply: tens of thousands of pairs per period.

    The same pair when nothing changes (the rows are frozen); otherwise a copy of its
    fields with the new verdict (PairRow has no ``__post_init__`` for ``replace`` to run).
    """
    if pair.significant is significant:
        return pair
    new = object.__new__(PairRow)
    new.__dict__.update(pair.__dict__)
    new.__dict__["significant"] = significant
    return new


def analyse_period(inputs: Sequence[MetricInput], job: JobConfig) -> tuple[MetricResult, ...]:
    """Analyse every metric of a period and control the false discovery rate across them."""
    from . import adjustment  # metrics with adjust_for: the adjusted verdict, the raw one beside it

    return finalise([adjustment.apply(analyse_metric(d, job, len(inputs)), d, job) for d in inputs], job)


# ---------------------------------------------------------------- helpers


def _f(x: Any) -> float:
    try:
        return float(x)
    except (TypeError, ValueError):
        return math.nan
