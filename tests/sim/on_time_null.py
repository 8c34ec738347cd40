"""The depot demo's ``on_time`` metric alone, under no difference: false alarms per year.

Run from the repository root (this release), or against another checkout's package::

    python -m tests.sim.on_time_null --years 100
    PYTHONPATH=/path/to/other/checkout python tests/sim/on_time_null.py --years 100

Each simulated week draws the demo's depots as :mod:`sample_db.depots` does (its
volumes with the same week-to-week noise, every depot on time with probability
``ON_TIME_RATE``, Northpoint absent in the first 8 weeks of a year and Fenwick in week
18), so no depot differs from another. A one-metric job (``on_time``, ``test: auto``,
the demo's defaults otherwise) analyses every week with the real analysis
(:func:`monitor.analysis.analyse_period`) and the real event rules
(:func:`monitor.events.derive_events`, each week against the previous one), and
counts metric-level ``emerged`` (all false here) per 52 weeks, with the between-year
standard error; also the share of weeks with ``p <= 0.05`` and which methods ran.

With one metric, the q-value is the p-value; in the demo's 5-metric job
Benjamini-Hochberg makes a lone null metric's threshold stricter or looser depending
on the other metrics (``python -m tests.sim.field_depots`` measures that job whole).
"""

from __future__ import annotations

import argparse
import collections
import math
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(HERE / "sample_db"))

import numpy as np  # noqa: E402

import depots  # noqa: E402
from monitor import events  # noqa: E402
from monitor.analysis import MetricInput, SegmentInput, analyse_period  # noqa: E402
from monitor.config import parse_config  # noqa: E402
from monitor.stats.summary import Moments  # noqa: E402

SEED = 20261203


def job():
    return parse_config({
        "job": "on-time", "period": "week", "timezone": "Europe/Berlin",
        "source": {"url": "sqlite:///x.sqlite", "table": "shipments", "time_column": "shipped_at",
                   "segment_column": "depot"},
        "metrics": [{"column": "on_time", "test": "auto"}],
    }, Path("on_time.yaml").absolute(), environ={})


def week_inputs(rng: np.random.Generator, week: int, metric) -> tuple[MetricInput, list[str]]:
    segs, labels = [], []
    for depot in depots.DEPOTS:
        if not depots._depot_present(depot, week):
            continue
        n = int(np.clip(round(depots.DEPOT_VOLUME[depot] * rng.lognormal(0.0, 0.12)),
                        depots.MIN_PER_WEEK, depots.MAX_PER_WEEK))
        v = (rng.random(n) < depots.ON_TIME_RATE).astype(float)
        segs.append(SegmentInput(depot, Moments.from_values(v), v))
        labels.append(depot)
    return MetricInput(metric, tuple(segs)), labels


def run_year(year: int, config) -> dict:
    rng = np.random.default_rng(np.random.SeedSequence([SEED, year]))
    baseline = events.Baseline.empty()
    emerged, rejected = 0, 0
    used: collections.Counter = collections.Counter()
    for week in range(1, 53):
        data, labels = week_inputs(rng, (week - 1) % 26 + 1, config.metrics[0])
        (r,) = analyse_period([data], config)
        used[r.method] += 1
        rejected += bool(math.isfinite(r.p_value) and r.p_value <= 0.05)
        evs = events.derive_events(config, [r], labels, 0, sum(s.moments.n for s in data.segments), baseline)
        emerged += sum(1 for e in evs if e.kind == "emerged" and e.segment is None)
        baseline = events.Baseline.from_stored(f"2026-W{week:02d}", labels, {r.metric: r.to_json()}, config)
    return {"emerged": emerged, "rejected": rejected, "used": used}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--years", type=int, default=100)
    args = ap.parse_args(argv)
    config = job()
    results = [run_year(y, config) for y in range(args.years)]
    e = np.array([r["emerged"] for r in results], float)
    weeks = 52 * args.years
    rej = sum(r["rejected"] for r in results) / weeks
    used = sum((r["used"] for r in results), collections.Counter())
    import monitor

    print(f"segwatch package: {Path(monitor.__file__).resolve().parent}")
    print(f"{args.years} simulated years of 52 null weeks, on_time alone")
    print(f"false metric-level emerged per year: {e.mean():.2f} ± {e.std(ddof=1) / math.sqrt(len(e)):.2f}")
    print(f"weeks with p <= 0.05: {rej:.4f} ± {math.sqrt(rej * (1 - rej) / weeks):.4f}")
    print("methods used: " + ", ".join(f"{m} {c / weeks:.1%}" for m, c in used.most_common()))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
