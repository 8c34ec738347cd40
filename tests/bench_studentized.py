"""Benchmark: monitor.stats.studentized against scipy.stats.studentized_range.

Run:  python tests/bench_studentized.py [--segments 20] [--k 20] [--ppf-sample 8]

Prints one table: time per value for the upper tail (sf) and the quantile (ppf),
one value per call and as one vector of all pairs of ``--segments`` segments,
each pair with its own (Welch-Satterthwaite-like, non-integer) df as in
Games-Howell; the speed-up; and the largest differences from scipy on the
same values. Per-call figures are medians of single calls. scipy's ppf takes
~0.1-0.2 s a value, so only ``--ppf-sample`` values are timed for it and its
per-vector time is that median times the pair count (marked ``~``). Not a
test: timings depend on the machine and its load; quote ratios from one run.
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np


def _median_time(fn, repeat: int) -> float:
    """Median wall time of ``repeat`` runs of ``fn()`` (seconds)."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def _per_call(fn, args_list) -> float:
    """Median wall time of one call ``fn(*args)`` over ``args_list`` (seconds)."""
    times = []
    for args in args_list:
        t0 = time.perf_counter()
        fn(*args)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--segments", type=int, default=20)
    ap.add_argument("--k", type=int, default=None, help="number of means (default: --segments)")
    ap.add_argument("--ppf-sample", type=int, default=8)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()

    from scipy import stats

    from monitor.stats import studentized
    from monitor.stats.studentized import srange_ppf, srange_sf

    k = args.k or args.segments
    pairs = args.segments * (args.segments - 1) // 2
    rng = np.random.default_rng(0)
    q = rng.uniform(1.0, 7.0, pairs)  # p-values from ~0.999 to ~1e-3
    df = rng.uniform(8.0, 300.0, pairs)  # one non-integer df per pair
    level = 0.95

    # first call for a new k builds the range table (cached afterwards)
    studentized._range_tail.cache_clear()
    t0 = time.perf_counter()
    srange_sf(q[0], k, df[0])
    cold = time.perf_counter() - t0

    # --- upper tail (medians of per-call times, so a busy machine hurts both alike)
    sf_args = [(q[i], k, df[i]) for i in range(pairs)]
    sp_sf = np.array([stats.studentized_range.sf(*a) for a in sf_args[:5]])  # warm-up
    sp_sf_each = _per_call(stats.studentized_range.sf, sf_args)
    t0 = time.perf_counter()
    sp_sf = stats.studentized_range.sf(q, k, df)
    sp_sf_vec = time.perf_counter() - t0

    ours_sf = srange_sf(q, k, df)
    our_sf_each = _per_call(srange_sf, sf_args * args.repeat)
    our_sf_vec = _median_time(lambda: srange_sf(q, k, df), args.repeat)

    # --- quantile -----------------------------------------------------------
    m = min(args.ppf_sample, pairs)
    ppf_args = [(level, k, df[i]) for i in range(pairs)]
    sp_ppf = np.array([stats.studentized_range.ppf(*a) for a in ppf_args[:m]])
    sp_ppf_each = _per_call(stats.studentized_range.ppf, ppf_args[:m])

    ours_ppf = srange_ppf(level, k, df)
    our_ppf_each = _per_call(srange_ppf, ppf_args)
    our_ppf_vec = _median_time(lambda: srange_ppf(level, k, df), args.repeat)

    abs_sf = float(np.max(np.abs(ours_sf - sp_sf)))
    rel_sf = float(np.max(np.abs(ours_sf / sp_sf - 1.0)))
    rel_ppf = float(np.max(np.abs(ours_ppf[:m] / sp_ppf - 1.0)))

    cpu = platform.processor() or platform.machine()
    try:
        load = f"{os.getloadavg()[0]:.1f}"
    except OSError:  # pragma: no cover - not on every platform
        load = "n/a"
    print(f"studentized range, k={k}, {pairs} pairs with distinct df; {cpu}, "
          f"{os.cpu_count()} cpu(s), load {load}")
    header = f"{'what':<34}{'scipy':>12}{'ours':>12}{'speed-up':>10}"
    print(header)
    print("-" * len(header))

    def row(name: str, theirs: float, ours: float, approx: bool = False) -> None:
        mark = "~" if approx else ""
        print(f"{name:<34}{mark + _fmt(theirs):>12}{_fmt(ours):>12}{theirs / ours:>9.0f}x")

    row("sf, one value per call", sp_sf_each, our_sf_each)
    row(f"sf, one vector of {pairs}", sp_sf_vec, our_sf_vec)
    row("sf, per value in that vector", sp_sf_vec / pairs, our_sf_vec / pairs)
    row(f"ppf({level}), one value per call", sp_ppf_each, our_ppf_each)
    row(f"ppf({level}), one vector of {pairs}", sp_ppf_each * pairs, our_ppf_vec, approx=True)
    print(f"{'first call for a new k (table)':<34}{'':>12}{_fmt(cold):>12}")
    print()
    print(f"largest |ours - scipy| of sf: {abs_sf:.1e} (relative {rel_sf:.1e}); "
          f"ppf relative difference on {m} values: {rel_ppf:.1e}")


def _fmt(seconds: float) -> str:
    if seconds >= 1.0:
        return f"{seconds:.2f} s"
    if seconds >= 1e-3:
        return f"{seconds * 1e3:.2f} ms"
    return f"{seconds * 1e6:.0f} us"


if __name__ == "__main__":
    main()
