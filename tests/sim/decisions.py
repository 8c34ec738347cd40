"""Calibration of the cross-period decision rule (:mod:`monitor.stats.evidence`) by simulation.

Run from the repository root::

    python -m tests.sim.decisions                  # every table (tens of minutes on two cores)
    python -m tests.sim.decisions --quick          # a tenth of the replications
    python -m tests.sim.decisions --only null,shift --workers 2 --out /tmp/decisions.md

Each period's p-values come from the real analysis (:func:`tests.sim.engine.screen_metric`:
method choice, checks, omnibus test), or for 0/1 metrics also from
:func:`monitor.stats.proportions.homogeneity`. The decision rules are then applied to
the p-value streams, metric by metric:

``bh 0.05`` / ``bh 0.02``
    Today's per-period rule: significant when the Benjamini-Hochberg q-value across
    the period's metrics is at most the level; announced state = this period's verdict
    (``confirm: 1``), so an alarm is raised whenever a metric turns significant.
``budget, one period``
    :class:`~monitor.stats.evidence.OnePeriodRule` at the level of a budget of one
    false alarm a year (``1 / (52.18 m)``), with :class:`~monitor.stats.evidence.Hysteresis`.
``budget, two periods``
    :class:`~monitor.stats.evidence.TwoPeriodRule` (w = 0.2) at the same level, with
    hysteresis: the proposed default.

Metric-level decisions only (segment flags come with the analysis). Under a
Bonferroni-type budget a metric's decision does not depend on the other metrics'
p-values, only on their number; under BH it does, which is why every scenario
simulates all its metrics.

Counted per rule: *false alarms* (an ``on`` change on a metric without a true
difference in that period), per 52 periods, with the between-run standard error;
*flapping* (a false alarm cleared again within 2 periods); and for shifted metrics the
periods from the shift to the first period announced (0 = in the shift's first period;
"within 2" = announced in the shift's first or second period).

Seeds: ``numpy.random.SeedSequence([20261202, scenario, chunk])``; ``--seed`` replaces the first
entry (an independent replication).
"""

from __future__ import annotations

import argparse
import math
import multiprocessing as mp
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

if __package__ in (None, ""):  # run as a file
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

from monitor.stats import multiplicity, proportions  # noqa: E402
from monitor.stats.evidence import Budget, Hysteresis, OnePeriodRule, State, TwoPeriodRule, step  # noqa: E402
from monitor.stats.summary import Moments  # noqa: E402
from tests.sim.engine import Design, draw, metric_inputs, screen_metric, shift_for_f, sim_job  # noqa: E402

SEED = 20261202
PERIODS_PER_YEAR = 52
HYSTERESIS = Hysteresis()


# ---------------------------------------------------------------- scenarios


@dataclass(frozen=True)
class Scenario:
    """A simulated job.

    ``kind`` is the data: ``normal``/``lognormal``/``t3`` errors on ``design``;
    ``binary`` 0/1 values with share ``rate`` of 1s; ``ties`` integer counts
    (Poisson with mean ``rate``). Metrics ``0 .. shifted-1`` move by Cohen's
    ``effect_f`` (one segment up) from period ``shift_at``; ``standing`` further
    metrics (after the shifted ones) differ by ``standing_f`` in every period.
    ``binary_test`` adds the proportions test as a second p-value stream for 0/1 data.
    """

    key: str
    title: str
    design: Design
    kind: str = "normal"
    metrics: int = 20
    periods: int = 52
    shifted: int = 0
    effect_f: float = 0.0
    shift_at: int = 1
    standing: int = 0
    standing_f: float = 0.0
    rate: float = 0.07
    runs: int = 150


def _binary(rng: np.random.Generator, sizes: Sequence[int], rates: Sequence[float]) -> list[np.ndarray]:
    return [(rng.random(int(n)) < r).astype(float) for n, r in zip(sizes, rates)]


def _values(rng: np.random.Generator, sc: Scenario, i: int, t: int) -> list[np.ndarray]:
    """One metric's values in one period."""
    d = sc.design
    true_shift = i < sc.shifted and t >= sc.shift_at
    standing = sc.shifted <= i < sc.shifted + sc.standing
    f = sc.effect_f if true_shift else (sc.standing_f if standing else 0.0)
    if sc.kind == "binary":
        rates = np.full(d.k, sc.rate)
        if f:
            # one segment's share moved so that Cohen's w (= f for a 0/1 metric) is f
            rates[0] = min(0.999, sc.rate + shift_for_f(Design(d.sizes), f)[0] * math.sqrt(sc.rate * (1 - sc.rate)))
        return _binary(rng, d.sizes, rates)
    if sc.kind == "ties":
        means = np.full(d.k, sc.rate)
        if f:
            means[0] += shift_for_f(Design(d.sizes), f)[0] * math.sqrt(sc.rate)
        return [rng.poisson(means[j], int(n)).astype(float) for j, n in enumerate(d.sizes)]
    means = shift_for_f(d, f) if f else None
    return draw(rng, d, means)


def pvalue_streams(sc: Scenario, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """p-values ``[period, metric]`` of one run: ``analysis`` (today's analysis, the
    metric's ``auto`` test) and, for 0/1 data, ``proportions``."""
    job = sim_job(sc.metrics)
    labels = sc.design.labels
    out = {"analysis": np.full((sc.periods, sc.metrics), np.nan)}
    if sc.kind == "binary":
        out["proportions"] = np.full((sc.periods, sc.metrics), np.nan)
    for t in range(sc.periods):
        values = [_values(rng, sc, i, t) for i in range(sc.metrics)]
        for i, res in enumerate(screen_metric(x, job) for x in metric_inputs(job, labels, values)):
            out["analysis"][t, i] = res.p_value
        if sc.kind == "binary":
            for i, vals in enumerate(values):
                counts = [proportions.counts_from_moments(Moments.from_values(v)) for v in vals]
                res = proportions.homogeneity([c[0] for c in counts], [c[1] for c in counts])
                out["proportions"][t, i] = res.p_value
    return out


# ---------------------------------------------------------------- rules on a stream


RULES = ("bh 0.05", "bh 0.02", "budget, one period", "budget, two periods")


def announced(p: np.ndarray, rule: str) -> tuple[np.ndarray, np.ndarray]:
    """Per period and metric: the announced state after the period, and whether the
    state changed to on there (an alarm)."""
    periods, m = p.shape
    on = np.zeros((periods, m), bool)
    if rule.startswith("bh"):
        level = float(rule.split()[1])
        for t in range(periods):
            on[t] = multiplicity.adjust(p[t], "bh") <= level
        alarm = on & ~np.vstack([np.zeros((1, m), bool), on[:-1]])
        return on, alarm
    rule_obj = TwoPeriodRule() if rule.endswith("two periods") else OnePeriodRule()
    budget = Budget(1.0, "week")
    alarm = np.zeros((periods, m), bool)
    for i in range(m):
        state: State | None = None
        before = None
        for t in range(periods):
            tested = int(np.sum(np.isfinite(p[t])))
            d = step(rule_obj, HYSTERESIS, state, p[t, i], before, budget.level(tested))
            state = d.state
            on[t, i] = state.on
            alarm[t, i] = d.change == "on"
            before = p[t, i] if math.isfinite(p[t, i]) else None
    return on, alarm


def tally(sc: Scenario, p: np.ndarray, rule: str) -> dict[str, Any]:
    """One run's counts for one rule."""
    on, alarm = announced(p, rule)
    periods, m = p.shape
    truth = np.zeros((periods, m), bool)
    truth[sc.shift_at:, :sc.shifted] = True
    truth[:, sc.shifted:sc.shifted + sc.standing] = True
    false = alarm & ~truth
    flap = 0
    for t, i in zip(*np.nonzero(false)):
        later = on[t + 1:t + 3, i]
        flap += bool(later.size and not later.all())
    delays = []
    for i in range(sc.shifted):
        hits = np.flatnonzero(on[sc.shift_at:, i])
        delays.append(int(hits[0]) if hits.size else None)
    return {"false": int(false.sum()), "flap": int(flap), "periods": periods, "delays": delays,
            "nan": int(np.sum(~np.isfinite(p[:, sc.shifted + sc.standing:])))}


def chunk(sc: Scenario, runs: int, key: tuple[int, ...]) -> list[dict[str, dict[str, Any]]]:
    rng = np.random.default_rng(np.random.SeedSequence([SEED, *key]))
    out = []
    for _ in range(runs):
        streams = pvalue_streams(sc, rng)
        out.append({f"{source}|{rule}": tally(sc, p, rule) for source, p in streams.items() for rule in RULES})
    return out


# ---------------------------------------------------------------- summaries


def mean_se(values: Sequence[float]) -> tuple[float, float]:
    v = np.asarray(values, float)
    return float(v.mean()), float(v.std(ddof=1) / math.sqrt(v.size)) if v.size > 1 else math.nan


def share_se(hits: Sequence[bool]) -> tuple[float, float]:
    h = np.asarray(hits, float)
    p = float(h.mean())
    return p, math.sqrt(p * (1 - p) / h.size)


def summarise(sc: Scenario, runs: list[dict[str, dict[str, Any]]]) -> list[list[str]]:
    rows = []
    for key in runs[0]:
        source, rule = key.split("|")
        per_year = [r[key]["false"] * PERIODS_PER_YEAR / r[key]["periods"] for r in runs]
        flaps = [r[key]["flap"] * PERIODS_PER_YEAR / r[key]["periods"] for r in runs]
        fa, fa_se = mean_se(per_year)
        fl, fl_se = mean_se(flaps)
        row = [source, rule, f"{fa:.2f} ± {fa_se:.2f}", f"{fl:.2f} ± {fl_se:.2f}"]
        if sc.shifted:
            delays = [d for r in runs for d in r[key]["delays"]]
            d = np.array([x if x is not None else np.inf for x in delays], float)
            w2, w2_se = share_se(d <= 1)
            first, first_se = share_se(d <= 0)
            med = float(np.median(d)) + 1
            row += [f"{100 * first:.1f} ± {100 * first_se:.1f}", f"{100 * w2:.1f} ± {100 * w2_se:.1f}",
                    f"{med:g}" if math.isfinite(med) else f"> {sc.periods - sc.shift_at}"]
        rows.append(row)
    return rows


def table(head: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


# ---------------------------------------------------------------- the scenarios


EQUAL = Design((50,) * 5, name="5 x 50")
UNEQUAL_SKEW = Design((15, 25, 50, 75, 135), distribution="lognormal", name="15-135, lognormal")
DEPOTS = Design((135, 95, 120, 130, 105, 85, 80, 110), name="8 depots, 80-135")
SMALL = Design((20,) * 5, name="5 x 20")


def scenarios(quick: bool) -> list[Scenario]:
    f = 10 if quick else 1
    return [
        Scenario("null", "No true difference: 20 weekly metrics, 5 normal segments of 50", EQUAL, runs=300 // f),
        Scenario("shift", "2 of 20 metrics shift by f = 0.25 in the second period (5 x 50, normal); "
                 "watched for 8 periods", EQUAL, periods=9, shifted=2, effect_f=0.25, runs=500 // f),
        Scenario("shift1", "1 of 20 metrics shifts by f = 0.25 (5 x 50, normal)", EQUAL, periods=9, shifted=1,
                 effect_f=0.25, runs=500 // f),
        Scenario("standing", "19 null metrics beside one standing difference (f = 0.4 every period; "
                 "5 x 50, normal)", EQUAL, standing=1, standing_f=0.4, runs=300 // f),
        Scenario("skewed", "No true difference, skewed data with unequal sizes (15-135, lognormal)",
                 UNEQUAL_SKEW, runs=150 // f),
        Scenario("ties", "No true difference, tied counts (Poisson mean 2, 5 x 50)", Design((50,) * 5),
                 kind="ties", rate=2.0, runs=150 // f),
        Scenario("binary", "No true difference, 0/1 metric with 7% of 1s, 8 depots of 80-135 (a segment "
                 "with no 1s now and then)", DEPOTS, kind="binary", metrics=5, runs=300 // f),
        Scenario("binary_small", "No true difference, 0/1 metric with 7% of 1s, 5 segments of 20 (small "
                 "expected counts)", SMALL, kind="binary", metrics=5, runs=300 // f),
        Scenario("binary_shift", "0/1 metric, 7% of 1s, 8 depots: 1 of 5 metrics shifts by w = 0.25",
                 DEPOTS, kind="binary", metrics=5, periods=9, shifted=1, effect_f=0.25, runs=400 // f),
    ]


def run_all(only: set[str] | None, quick: bool, workers: int) -> str:
    pool = ProcessPoolExecutor(workers, mp_context=mp.get_context("fork")) if workers > 1 else None
    out = []
    try:
        for n, sc in enumerate(scenarios(quick)):
            if only and sc.key not in only:
                continue
            started = time.time()
            sizes = [10] * (sc.runs // 10) + ([sc.runs % 10] if sc.runs % 10 else [])
            calls = [(sc, size, (n, c)) for c, size in enumerate(sizes)]
            if pool is None:
                parts = [chunk(*c) for c in calls]
            else:
                parts = [f.result() for f in [pool.submit(chunk, *c) for c in calls]]
            runs = [r for part in parts for r in part]
            head = ["p-values from", "rule", "false alarms / year", "flapping / year"]
            if sc.shifted:
                head += ["in 1st period %", "within 2 %", "median periods"]
            out.append(f"### {sc.key}: {sc.title}\n\n{len(runs)} runs of {sc.periods} periods, {sc.metrics} "
                       f"metrics ({time.time() - started:.0f} s).\n\n" + table(head, summarise(sc, runs)) + "\n")
            print(out[-1], flush=True)
    finally:
        if pool is not None:
            pool.shutdown()
    return "\n".join(out)


def _set_seed(seed: int) -> None:
    """Replace :data:`SEED` (read by :func:`chunk` here and, through fork, in the workers)."""
    global SEED
    SEED = seed


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.sim.decisions", description=__doc__.splitlines()[0])
    ap.add_argument("--only", help="comma-separated scenario keys")
    ap.add_argument("--quick", action="store_true", help="a tenth of the replications")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--out", help="also write the tables to this file")
    ap.add_argument("--seed", type=int, default=SEED, help=f"first entry of every run's seed sequence ({SEED})")
    args = ap.parse_args(argv)
    _set_seed(args.seed)
    text = run_all(set(args.only.split(",")) if args.only else None, args.quick, args.workers)
    if args.out:
        Path(args.out).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
