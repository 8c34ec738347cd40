"""Welch's ANOVA with tiny segments: its false-positive rate by segment size and count.

Run from the repository root::

    python -m tests.sim.welch_floor --reps 10000                # the table in docs/error_rates.md
    python -m tests.sim.welch_floor --reps 4000 --sizes 20,30,50 --counts 200,1000 --no-ranks

Every cell draws ``k`` segments of ``n`` records each from one normal distribution
(no difference at all, equal spreads: the situation where every test should reject
at its nominal level) and counts how often Welch's ANOVA, Fisher's ANOVA and
Kruskal-Wallis give ``p <= 0.05``. A second block draws segment sds of 1 and 3
alternately (equal means), where Fisher's ANOVA is known to drift with unequal sizes
but Welch's approximation is what is measured.

Welch's statistic is computed vectorised (Welch 1951, the formulas of
:func:`monitor.stats.omnibus.welch_anova`); the first replications of every cell are
computed again with the project's routine through the method registry and must agree,
so the table measures the code segwatch runs. The table is what ``docs/error_rates.md``
quotes for the size floor :data:`monitor.methods.welch.SIZE_FLOOR`.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
from scipy import stats as sps  # noqa: E402

from monitor import methods  # noqa: E402
from monitor.methods import Segments  # noqa: E402
from monitor.stats.summary import Moments  # noqa: E402

SEED = 20261203
ALPHA = 0.05
SIZES = (3, 5, 8, 10, 15, 20, 30, 50)
COUNTS = (3, 5, 10, 20, 50, 100, 200, 1000)
CHECKED = 25  # replications per cell recomputed by the project's routine


def welch_p(x: np.ndarray) -> np.ndarray:
    """Welch's p-value for every replication of ``x`` (shape reps x k x n)."""
    reps, k, n = x.shape
    mean = x.mean(axis=2)
    var = x.var(axis=2, ddof=1)
    w = n / var
    wsum = w.sum(axis=1, keepdims=True)
    m = (w * mean).sum(axis=1, keepdims=True) / wsum
    a = (w * (mean - m) ** 2).sum(axis=1) / (k - 1)
    t = ((1 - w / wsum) ** 2 / (n - 1)).sum(axis=1)
    f = a / (1 + 2 * (k - 2) * t / (k * k - 1))
    df2 = (k * k - 1) / (3 * t)
    return sps.f.sf(f, k - 1, df2)


def fisher_p(x: np.ndarray) -> np.ndarray:
    reps, k, n = x.shape
    mean = x.mean(axis=2)
    grand = mean.mean(axis=1, keepdims=True)
    ssb = n * ((mean - grand) ** 2).sum(axis=1)
    ssw = ((x - mean[..., None]) ** 2).sum(axis=(1, 2))
    f = (ssb / (k - 1)) / (ssw / (k * (n - 1)))
    return sps.f.sf(f, k - 1, k * (n - 1))


def kruskal_p(x: np.ndarray) -> np.ndarray:
    reps, k, n = x.shape
    flat = x.reshape(reps, k * n)
    ranks = sps.rankdata(flat, axis=1).reshape(reps, k, n)  # continuous data: no ties
    big_n = k * n
    h = 12.0 / (big_n * (big_n + 1)) * (ranks.sum(axis=2) ** 2 / n).sum(axis=1) - 3 * (big_n + 1)
    return sps.chi2.sf(h, k - 1)


def cell(k: int, n: int, reps: int, sds: np.ndarray, seed: int, ranks: bool = True) -> tuple[float, float, float]:
    rng = np.random.default_rng(np.random.SeedSequence([SEED, k, n, seed]))
    chunk = max(1, min(reps, 2_000_000 // (k * n)))
    hits = np.zeros(3)
    done = 0
    welch = methods.get("welch")
    while done < reps:
        m = min(chunk, reps - done)
        x = 50.0 + rng.normal(0.0, 1.0, size=(m, k, n)) * sds[None, :, None]
        pw = welch_p(x)
        if done == 0:  # the vectorised statistic is the project's
            for r in range(min(CHECKED, m)):
                groups = [Moments.from_values(x[r, j]) for j in range(k)]
                mine = welch.omnibus(Segments.of([str(j) for j in range(k)], groups)).p_value
                if not math.isclose(mine, pw[r], rel_tol=1e-6, abs_tol=1e-12):
                    raise SystemExit(f"k={k} n={n}: vectorised Welch p {pw[r]} != segwatch's {mine}")
        hits += [np.sum(pw <= ALPHA), np.sum(fisher_p(x) <= ALPHA),
                 np.sum(kruskal_p(x) <= ALPHA) if ranks else np.nan]
        done += m
    return tuple(hits / reps)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=20_000)
    ap.add_argument("--sizes", default=",".join(map(str, SIZES)), help="records per segment, comma-separated")
    ap.add_argument("--counts", default=",".join(map(str, COUNTS)), help="numbers of segments, comma-separated")
    ap.add_argument("--no-ranks", action="store_true", help="leave Kruskal-Wallis out (ranking is the slow part)")
    ap.add_argument("--no-spreads", action="store_true", help="only the equal-spread block")
    args = ap.parse_args(argv)
    sizes = [int(v) for v in args.sizes.split(",")]
    counts = [int(v) for v in args.counts.split(",")]
    se = math.sqrt(ALPHA * (1 - ALPHA) / args.reps)
    print(f"false-positive rate at the 5% level, {args.reps} null replications per cell "
          f"(Monte Carlo se {se:.4f} at 0.05)\n")
    blocks = (("equal spreads", False),) + (() if args.no_spreads else (("sds 1 and 3 alternately", True),))
    for title, spread in blocks:
        print(f"### {title}\n")
        print("| n per segment | " + " | ".join(f"k = {k}" for k in counts) + " |")
        print("|---|" + "---|" * len(counts), flush=True)
        for n in sizes:
            row = []
            for k in counts:
                sds = np.where(np.arange(k) % 2 == 1, 3.0, 1.0) if spread else np.ones(k)
                w, f, kw = cell(k, n, args.reps, sds, int(spread), ranks=not args.no_ranks)
                row.append(f"{w:.3f} / {f:.3f}" + ("" if args.no_ranks else f" / {kw:.3f}"))
            print(f"| {n} | " + " | ".join(row) + " |", flush=True)
        print("\n(each cell: Welch / Fisher" + ("" if args.no_ranks else " / Kruskal-Wallis") + ")\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
