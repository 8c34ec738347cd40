"""Benchmark: metric-tests per second from summaries, 20 segments, post-hoc pairs included.

Run:  python tests/bench_stats.py [--metrics 10000] [--segments 20]

Prints one table: the batch routines (monitor/stats/batch.py) and the per-metric
routines (monitor/stats/omnibus.py + posthoc.py) on the same summaries, one core.
Not a test: timings depend on the machine; quote ratios from one run.
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--metrics", type=int, default=10_000)
    ap.add_argument("--segments", type=int, default=20)
    ap.add_argument("--per-metric-sample", type=int, default=100)
    args = ap.parse_args()

    from monitor.stats import omnibus, posthoc
    from monitor.stats.batch import anova_tukey, welch_games_howell
    from monitor.stats.summary import Moments

    rng = np.random.default_rng(0)
    m, k = args.metrics, args.segments
    n = rng.integers(20, 200, size=(m, k)).astype(float)
    mean = rng.normal(50, 2, size=(m, k))
    m2 = (n - 1) * rng.uniform(4, 16, size=(m, k))

    rows = []
    for name, fn in (("batch: Fisher ANOVA + Tukey-Kramer", anova_tukey),
                     ("batch: Welch ANOVA + Games-Howell", welch_games_howell)):
        fn(n[:10], mean[:10], m2[:10])  # warm caches
        t0 = time.perf_counter()
        fn(n, mean, m2)
        dt = time.perf_counter() - t0
        rows.append((name, m, dt, m / dt))

    labels = [f"s{j}" for j in range(k)]
    sample = min(args.per_metric_sample, m)
    groups = [[Moments(int(n[i, j]), mean[i, j], m2[i, j], 0.0, 0.0, 0.0, 0.0) for j in range(k)]
              for i in range(sample)]
    for name, omni, ph in (("per metric: Fisher + Tukey-Kramer", omnibus.fisher_anova, posthoc.tukey_kramer),
                           ("per metric: Welch + Games-Howell", omnibus.welch_anova, posthoc.games_howell)):
        t0 = time.perf_counter()
        for g in groups:
            omni(g)
            ph(labels, g)
        dt = time.perf_counter() - t0
        rows.append((name, sample, dt, sample / dt))

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as fh:
            cpu = next(line.split(":", 1)[1].strip() for line in fh if line.startswith("model name"))
    except (OSError, StopIteration):
        pass
    print(f"machine: {cpu}, {os.cpu_count()} cores; {k} segments ({k * (k - 1) // 2} pairs) per metric")
    print(f"{'routine':<38} {'metrics':>8} {'seconds':>9} {'metric-tests/s':>15}")
    for name, count, dt, rate in rows:
        print(f"{name:<38} {count:>8} {dt:>9.3f} {rate:>15,.0f}")


if __name__ == "__main__":
    main()
