"""The error-rate harness as one command: ``python -m tests.sim`` or ``python tests/sim/run.py``.

Sections (``--only`` takes a comma-separated list; default all):

``null``      global null, 20 metrics: per-test Type I error and per-period false alarms
              for each method and FDR method, 6 shapes x 3 distributions
``mixed``     4 of 20 metrics shifted: realised FDR and power per method and FDR method
``fisher``    three small unequal segments: Fisher's ANOVA against Welch, Kruskal-Wallis, auto
``power``     one metric: per-test power of each method, equal spreads
``alarms``    the event stream under no difference: false ``emerged`` per year by level and confirm
``delay``     2 of 20 metrics shifted: periods until ``emerged``, by f, n, level and confirm
``target``    the issue's target setting (f = 0.25, 50 per segment), with segment flags
``e2e``       the engine against a real job (SQLite source, history, ``monitor.runner.Job``)

Printing happens here only; the engine (:mod:`tests.sim.engine`) prints nothing.
"""

from __future__ import annotations

import argparse
import logging
import math
import multiprocessing as mp
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any, Callable, Sequence

if __package__ in (None, ""):  # run as a file: python tests/sim/run.py
    sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import numpy as np  # noqa: E402

from tests.sim.engine import DISTRIBUTIONS, LOGNORMAL_SIGMA, Design, StreamSpec  # noqa: E402
from tests.sim import experiments as ex  # noqa: E402

SECTIONS = ("null", "mixed", "fisher", "power", "alarms", "delay", "target", "e2e")
LEVELS = (0.01, 0.02, 0.03, 0.05, 0.10)
CONFIRMS = (1, 2, 3)
HORIZON = 8  # periods watched after a shift


class Runner:
    """Runs chunk tasks, in worker processes when ``workers > 1``."""

    def __init__(self, workers: int):
        self.workers = workers
        self.pool = (ProcessPoolExecutor(workers, mp_context=mp.get_context("fork"))
                     if workers > 1 else None)

    def map(self, fn: Callable[..., Any], calls: Sequence[tuple]) -> list[Any]:
        if self.pool is None:
            return [fn(*args) for args in calls]
        futures = [self.pool.submit(fn, *args) for args in calls]
        return [f.result() for f in futures]

    def close(self) -> None:
        if self.pool is not None:
            self.pool.shutdown()


def table(head: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    lines = ["| " + " | ".join(head) + " |", "|" + "|".join("---" for _ in head) + "|"]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


def pct(r: ex.Rate) -> str:
    if not math.isfinite(r.value):
        return "n/a"
    return f"{100 * r.value:.1f} ± {100 * r.se:.1f}"


def chunks_of(total: int, size: int) -> list[int]:
    out = [size] * (total // size)
    if total % size:
        out.append(total % size)
    return out


# ---------------------------------------------------------------- sections


def section_null(run: Runner, scale: float) -> str:
    periods = max(20, int(600 * scale))
    metrics = 20
    calls, keys = [], []
    for si, shape in enumerate(ex.SHAPES):
        for di, dist in enumerate(DISTRIBUTIONS):
            for ci, n in enumerate(chunks_of(periods, 50)):
                calls.append((ex.design(shape, dist), metrics, n, 0, 0.0, (1, si, di, ci)))
                keys.append((shape, dist))
    results = run.map(ex.pvalue_chunk, calls)
    by: dict[tuple[str, str], list] = {}
    for k, r in zip(keys, results):
        by.setdefault(k, []).append(r)
    truth = np.zeros(metrics, bool)
    head1 = ["shape", "errors", "auto picked"] + [f"{c}" for c in ex.COLUMNS]
    rows1, rows2 = [], []
    for (shape, dist), parts in by.items():
        p, picks = ex.join_chunks(parts)
        rates = ex.per_test_rates(p)
        rows1.append([shape, dist, ex.auto_picks(picks)] + [pct(rates[c]) for c in ex.COLUMNS])
        fr = ex.fdr_rates(p, truth)
        for col in ex.COLUMNS:
            rows2.append([shape, dist, col] + [pct(fr[(col, fm)]["any"]) for fm in ex.FDR_METHODS])
    return "\n\n".join([
        f"### Global null: per-test Type I error at 0.05 (%, ± MC SE)\n\n"
        f"{periods} periods x {metrics} metrics = {periods * metrics} tests per row; 5 segments; "
        f"lognormal sigma {LOGNORMAL_SIGMA}.\n\n" + table(head1, rows1),
        f"### Global null: periods with any false discovery, level 0.05 (%, ± MC SE)\n\n"
        f"Under the global null this is also the realised FDR. {periods} periods of {metrics} metrics "
        f"per row.\n\n" + table(["shape", "errors", "test"] + list(ex.FDR_METHODS), rows2),
    ])


def section_mixed(run: Runner, scale: float) -> str:
    periods = max(20, int(600 * scale))
    metrics, shifted, f = 20, 4, 0.25
    calls, keys = [], []
    for si, (shape, dist) in enumerate([("equal, n=50", "normal"), ("equal, n=50", "lognormal"),
                                        ("both, wide in small", "normal")]):
        for ci, n in enumerate(chunks_of(periods, 50)):
            calls.append((ex.design(shape, dist), metrics, n, shifted, f, (2, si, ci)))
            keys.append((shape, dist))
    results = run.map(ex.pvalue_chunk, calls)
    by: dict[tuple[str, str], list] = {}
    for k, r in zip(keys, results):
        by.setdefault(k, []).append(r)
    truth = np.arange(metrics) < shifted
    rows = []
    for (shape, dist), parts in by.items():
        p, _ = ex.join_chunks(parts)
        fr = ex.fdr_rates(p, truth)
        for col in ex.COLUMNS:
            for fm in ex.FDR_METHODS:
                r = fr[(col, fm)]
                rows.append([shape, dist, col, fm, pct(r["fdr"]), pct(r["any"]), pct(r["power"])])
    return (f"### Partial null: {shifted} of {metrics} metrics shifted (f = {f}), level 0.05\n\n"
            f"{periods} periods per row; realised FDR = mean over periods of V / max(R, 1); "
            f"bound for BH: level x m0/m = {0.05 * (metrics - shifted) / metrics:.3f}.\n\n"
            + table(["shape", "errors", "test", "fdr", "realised FDR %", "any false %", "power %"], rows))


def section_fisher(run: Runner, scale: float) -> str:
    reps = max(200, int(5000 * scale))
    calls, keys = [], []
    for si, shape in enumerate(ex.SMALL_SHAPES):
        for di, dist in enumerate(DISTRIBUTIONS):
            for ci, n in enumerate(chunks_of(reps, 1000)):
                calls.append((ex.design(shape, dist, small=True), 1, n, 0, 0.0, (3, si, di, ci)))
                keys.append((shape, dist))
    results = run.map(ex.pvalue_chunk, calls)
    by: dict[tuple[str, str], list] = {}
    for k, r in zip(keys, results):
        by.setdefault(k, []).append(r)
    rows = []
    for (shape, dist), parts in by.items():
        p, picks = ex.join_chunks(parts)
        rates = ex.per_test_rates(p)
        diff = ex.paired_difference(p[..., ex.COLUMNS.index("auto")] <= 0.05,
                                    p[..., ex.COLUMNS.index("welch")] <= 0.05)
        rows.append([shape, dist] + [pct(rates[c]) for c in ex.COLUMNS] + [pct(diff), ex.auto_picks(picks)])
    head = ["segments", "errors"] + list(ex.COLUMNS) + ["auto - welch", "auto picked"]
    return (f"### Violated assumptions: Type I error at 0.05, three segments (%, ± MC SE)\n\n"
            f"{reps} replications per row, one metric (no FDR step).\n\n" + table(head, rows))


def section_power(run: Runner, scale: float) -> str:
    reps = max(100, int(2000 * scale))
    calls, keys = [], []
    for fi, f in enumerate((0.1, 0.25, 0.4)):
        for ni, n in enumerate((10, 20, 50, 100)):
            for ci, m in enumerate(chunks_of(reps, 500)):
                calls.append((Design((n,) * 5), 1, m, 1, f, (4, fi, ni, ci)))
                keys.append((f, n))
    results = run.map(ex.pvalue_chunk, calls)
    by: dict[tuple[float, int], list] = {}
    for k, r in zip(keys, results):
        by.setdefault(k, []).append(r)
    rows = []
    for (f, n), parts in by.items():
        p, _ = ex.join_chunks(parts)
        rates = ex.per_test_rates(p)
        rows.append([f, n] + [pct(rates[c]) for c in ex.COLUMNS])
    return (f"### Power of one test at 0.05, 5 equal normal segments, one moved (%, ± MC SE)\n\n"
            f"{reps} replications per row.\n\n" + table(["f", "n per segment"] + list(ex.COLUMNS), rows))


def section_alarms(run: Runner, scale: float) -> str:
    years = max(4, int(150 * scale))
    out = []
    for mi, metrics in enumerate((20, 10)):
        spec = StreamSpec(Design((50,) * 5), metrics=metrics, periods=ex.PERIODS_PER_YEAR, levels=LEVELS,
                          confirms=CONFIRMS)
        calls = [(spec, 1, (5, mi, y)) for y in range(years)]
        runs = [r for chunk in run.map(ex.stream_chunk, calls) for r in chunk]
        total = ex.merge_runs(runs)
        rows = []
        for lv in LEVELS:
            for k in CONFIRMS:
                t = total[(lv, k)]
                per_test = t.null_significant / t.metric_periods_null
                model = metrics * ex.PERIODS_PER_YEAR * (1 - per_test) * per_test ** k
                rows.append([lv, k,
                             ex.per_year(runs, (lv, k), "false_metric_emerged"),
                             f"{model:.3g}",
                             ex.per_year(runs, (lv, k), "false_segment_emerged"),
                             ex.per_year(runs, (lv, k), "periods_with_false_emerged"),
                             f"{100 * per_test:.3f}"])
        out.append(
            f"### No true difference: false `emerged` per year, {metrics} metrics weekly (± MC SE)\n\n"
            f"{years} simulated years x 52 weeks; test auto, BH; 5 segments x 50 records, normal. "
            f"'model' = m x 52 x (1 - p) p^K with p the per-metric significance rate "
            f"(independent periods).\n\n"
            + table(["fdr.level", "confirm", "metric emerged / yr", "model", "segment emerged / yr",
                     "weeks with a false emerged / yr", "p per metric-week %"], rows))
    return "\n\n".join(out)


def section_delay(run: Runner, scale: float) -> str:
    runs_n = max(10, int(100 * scale))
    rows = []
    for fi, f in enumerate((0.1, 0.25, 0.4)):
        for ni, n in enumerate((10, 20, 50, 100, 200)):
            spec = StreamSpec(Design((n,) * 5), metrics=20, periods=1 + HORIZON, levels=(0.02, 0.05),
                              confirms=CONFIRMS, shifted=2, effect_f=f, shift_at=1, gated=False)
            calls = [(spec, m, (6, fi, ni, ci)) for ci, m in enumerate(chunks_of(runs_n, 25))]
            runs = [r for chunk in run.map(ex.stream_chunk, calls) for r in chunk]
            total = ex.merge_runs(runs)
            for lv in (0.02, 0.05):
                for k in CONFIRMS:
                    t = total[(lv, k)]
                    d = ex.delay_summary(t.delays, HORIZON - 1)
                    power = ex.proportion([1] * t.true_significant + [0] * (t.metric_periods_true - t.true_significant))
                    rows.append([f, n, lv, k, pct(power), ex.fmt_delay(d["median"] + 1, HORIZON),
                                 pct(d["first"]), pct(d["within2"]), pct(d["within_h"])])
    return (f"### Shift in 2 of 20 metrics: periods until the metric `emerged` (1 = the shift's first period)\n\n"
            f"{runs_n} runs per row x 2 shifted metrics; 5 normal segments of n, one moved by Cohen's f; "
            f"test auto, BH; watched for {HORIZON} periods after the shift. Power = share of shifted "
            f"metric-periods significant.\n\n"
            + table(["f", "n per segment", "fdr.level", "confirm", "power per period %", "median periods",
                     "in 1st %", "within 2 %", f"within {HORIZON} %"], rows))


def section_target(run: Runner, scale: float) -> str:
    out = []
    runs_n = max(10, int(400 * scale))
    for si, shifted in enumerate((2, 1)):
        spec = StreamSpec(Design((50,) * 5), metrics=20, periods=1 + HORIZON, levels=LEVELS, confirms=CONFIRMS,
                          shifted=shifted, effect_f=0.25, shift_at=1, gated=False)
        calls = [(spec, m, (7, si, ci)) for ci, m in enumerate(chunks_of(runs_n, 25))]
        total = ex.merge_runs([r for chunk in run.map(ex.stream_chunk, calls) for r in chunk])
        rows = []
        for lv in LEVELS:
            for k in CONFIRMS:
                t = total[(lv, k)]
                d = ex.delay_summary(t.delays, HORIZON - 1)
                power = ex.proportion([1] * t.true_significant + [0] * (t.metric_periods_true - t.true_significant))
                rows.append([lv, k, pct(power), ex.fmt_delay(d["median"] + 1, HORIZON), pct(d["first"]),
                             pct(d["within2"]), f"{100 * t.fdp_sum / t.periods:.1f}"])
        out.append(
            f"### Target setting, metric level: f = 0.25, 50 records per segment, {shifted} of 20 metrics shifted\n\n"
            f"{runs_n} runs x {shifted} shifted metric(s); 5 normal segments; test auto, BH; the shift starts "
            f"in the second period and is watched for {HORIZON} periods. Realised FDR over all periods.\n\n"
            + table(["fdr.level", "confirm", "power per period %", "median periods", "in 1st %", "within 2 %",
                     "realised FDR %"], rows))
    runs_n = max(10, int(400 * scale))
    levels = (0.02, 0.05)
    spec = StreamSpec(Design((50,) * 5), metrics=20, periods=1 + HORIZON, levels=levels, confirms=CONFIRMS,
                      shifted=2, effect_f=0.25, shift_at=1, gated=True)
    calls = [(spec, m, (8, ci)) for ci, m in enumerate(chunks_of(runs_n, 10))]
    total = ex.merge_runs([r for chunk in run.map(ex.stream_chunk, calls) for r in chunk])
    rows = []
    for lv in levels:
        for k in CONFIRMS:
            t = total[(lv, k)]
            d = ex.delay_summary(t.delays, HORIZON - 1)
            s = ex.delay_summary(t.segment_delays, HORIZON - 1)
            rows.append([lv, k, ex.fmt_delay(d["median"] + 1, HORIZON), pct(d["within2"]),
                         ex.fmt_delay(s["median"] + 1, HORIZON), pct(s["within2"]),
                         f"{t.false_segment_emerged - t.false_segment_on_true}", f"{t.false_segment_on_true}"])
    out.append(
        f"### Target setting, segment level: the moved segment announced `high`\n\n"
        f"{runs_n} runs x 2 shifted metrics (of 20); full analysis (post-hoc pairs, flags) of every "
        f"significant metric. False segment `emerged` are counted over the {runs_n} x 9 periods: on the 18 "
        f"null metrics, and on the shifted metrics for a segment that did not move.\n\n"
        + table(["fdr.level", "confirm", "median periods (metric)", "metric within 2 %",
                 "median periods (segment)", "segment within 2 %", "false segment emerged: null metrics",
                 "... shifted metrics"], rows))
    return "\n\n".join(out)


def section_e2e(run: Runner, scale: float) -> str:
    import tempfile

    from tests.sim import endtoend

    rows = []
    for confirm in (1, 2):
        with tempfile.TemporaryDirectory() as tmp:
            out = endtoend.compare(Path(tmp), confirm=confirm, weeks=12, seed=7)
        rows.append([confirm, out.weeks, out.engine_events, out.job_events,
                     "yes" if out.agree else "no", f"{out.max_p_rel_diff:.1e}", out.note or ""])
    return ("### The engine against a real job (SQLite source, history, monitor.runner.Job)\n\n"
            "3 segments (40, 30, 25 normal records), 4 metrics (auto, anova, welch, kruskal), 12 ISO weeks; "
            "two metrics (auto, welch) shifted by f = 0.45 from the sixth week.\n\n"
            + table(["confirm", "weeks", "engine events", "job events", "same events", "max rel. p diff",
                     "note"], rows))


RUNNERS: dict[str, Callable[[Runner, float], str]] = {
    "null": section_null, "mixed": section_mixed, "fisher": section_fisher, "power": section_power,
    "alarms": section_alarms, "delay": section_delay, "target": section_target, "e2e": section_e2e,
}


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m tests.sim", description=__doc__.split("\n\nPrinting")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--only", default=",".join(SECTIONS),
                   help=f"comma-separated sections (default all): {', '.join(SECTIONS)}")
    p.add_argument("--quick", action="store_true", help="a tenth of the replications (a smoke run)")
    p.add_argument("--scale", type=float, default=1.0, help="multiply every replication count by this")
    p.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="worker processes")
    p.add_argument("--out", type=Path, help="also write the tables to this file")
    return p


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    chosen = [s.strip() for s in args.only.split(",") if s.strip()]
    unknown = [s for s in chosen if s not in SECTIONS]
    if unknown:
        print(f"Error: unknown section {unknown[0]!r}; accepted: {', '.join(SECTIONS)}", file=sys.stderr)
        return 2
    logging.basicConfig(level=logging.ERROR)
    scale = args.scale * (0.1 if args.quick else 1.0)
    runner = Runner(max(1, args.workers))
    parts = []
    try:
        for name in chosen:
            t0 = time.perf_counter()
            text = RUNNERS[name](runner, scale)
            took = time.perf_counter() - t0
            text += f"\n\n_(section `{name}`: {took / 60:.1f} min with {runner.workers} worker(s))_"
            print(text + "\n", flush=True)
            parts.append(text)
    finally:
        runner.close()
    if args.out:
        args.out.write_text("\n\n".join(parts) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
