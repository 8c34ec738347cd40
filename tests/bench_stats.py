"""Benchmark: metric-tests per second from summaries, 20 segments, post-hoc pairs included.

Run:  OMP_NUM_THREADS=1 python tests/bench_stats.py [--metrics 10000] [--segments 20]
      [--per-metric-sample 100] [--repeat 3]

Prints one table: the batch routines (tests/support/batch.py) and the per-metric
routines (monitor/stats/omnibus.py + posthoc.py) on the same summaries, one core.
Each row is the best of ``--repeat`` runs (the machine may be shared). The batch
p-values come from interpolation tables built once per number of segments; the
one-time build is timed separately, and the table's largest difference from the
exact studentized range tail is shown for a sample of pairs.
Not a test: timings depend on the machine; quote ratios from one run.
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np


def _best(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--metrics", type=int, default=10_000)
    ap.add_argument("--segments", type=int, default=20)
    ap.add_argument("--per-metric-sample", type=int, default=100)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    from monitor.stats import omnibus, posthoc
    from tests.support.batch import anova_tukey, welch_games_howell
    from monitor.stats.studentized import srange_sf
    from monitor.stats.summary import Moments

    rng = np.random.default_rng(0)
    m, k = args.metrics, args.segments
    n = rng.integers(20, 200, size=(m, k)).astype(float)
    mean = rng.normal(50, 2, size=(m, k))
    m2 = (n - 1) * rng.uniform(4, 16, size=(m, k))

    build = None
    try:  # the interpolation tables (absent before they were introduced)
        from monitor.stats import srange_table

        t0 = time.perf_counter()
        srange_table._table(k)
        build = time.perf_counter() - t0
    except (ImportError, AttributeError):
        pass

    rows = []
    accuracy = []
    for name, fn in (("batch: Fisher ANOVA + Tukey-Kramer", anova_tukey),
                     ("batch: Welch ANOVA + Games-Howell", welch_games_howell)):
        fn(n[:10], mean[:10], m2[:10])  # warm caches
        dt = _best(lambda fn=fn: fn(n, mean, m2), args.repeat)
        rows.append((name, m, dt, m / dt))
        # the tables against the exact tail on a sample of metrics
        few = min(m, 20)
        res = fn(n[:few], mean[:few], m2[:few])
        a, b = res.pairs[:, 0], res.pairs[:, 1]
        if res.method == "anova":
            msw = m2[:few].sum(axis=1) / res.df2
            se = np.sqrt(msw[:, None] / 2 * (1 / n[:few, a] + 1 / n[:few, b]))
            q, df = np.abs(res.diff) / se, np.broadcast_to(res.df2[:, None], se.shape)
        else:
            v = m2[:few] / (n[:few] - 1) / n[:few]
            q = np.abs(res.diff) / np.sqrt((v[:, a] + v[:, b]) / 2)
            df = (v[:, a] + v[:, b]) ** 2 / (v[:, a] ** 2 / (n[:few, a] - 1) + v[:, b] ** 2 / (n[:few, b] - 1))
        exact = srange_sf(q, k, df)
        big = exact >= 1e-10
        accuracy.append((name, float(np.max(np.abs(res.p_adj - exact))),
                         float(np.max(np.abs(res.p_adj[big] / exact[big] - 1))), exact.size))

    labels = [f"s{j}" for j in range(k)]
    sample = min(args.per_metric_sample, m)
    sd = np.sqrt(m2 / (n - 1))
    groups = [[Moments(int(n[i, j]), mean[i, j], m2[i, j], 0.0, 0.0,
                       mean[i, j] - 3 * sd[i, j], mean[i, j] + 3 * sd[i, j]) for j in range(k)]
              for i in range(sample)]
    for name, omni, ph in (("per metric: Fisher + Tukey-Kramer", omnibus.fisher_anova, posthoc.tukey_kramer),
                           ("per metric: Welch + Games-Howell", omnibus.welch_anova, posthoc.games_howell)):
        def run(omni=omni, ph=ph):
            for g in groups:
                omni(g)
                ph(labels, g)
        run()  # warm caches
        dt = _best(run, args.repeat)
        rows.append((name, sample, dt, sample / dt))

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as fh:
            cpu = next(line.split(":", 1)[1].strip() for line in fh if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    threads = os.environ.get("OMP_NUM_THREADS", "unset")
    print(f"machine: {cpu}, {os.cpu_count()} cores (OMP_NUM_THREADS={threads}); "
          f"{k} segments ({k * (k - 1) // 2} pairs) per metric; best of {args.repeat}")
    if build is not None:
        print(f"one-time interpolation table for k={k}: {1e3 * build:.0f} ms (not in the timings below)")
    print(f"{'routine':<38} {'metrics':>8} {'seconds':>9} {'metric-tests/s':>15}")
    for name, count, dt, rate in rows:
        print(f"{name:<38} {count:>8} {dt:>9.3f} {rate:>15,.0f}")
    for name, worst_abs, worst_rel, count in accuracy:
        print(f"{name}: p-values vs exact srange_sf on {count} pairs: max abs diff {worst_abs:.1e}, "
              f"max rel diff {worst_rel:.1e} (tails >= 1e-10)")


if __name__ == "__main__":
    main()
