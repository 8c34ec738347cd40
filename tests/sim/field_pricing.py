"""Field test on the plan-tier demo: what a pricing analyst's monthly job would have sent, over many seeds.

Run from the repository root::

    python -m tests.sim.field_pricing --seeds 30 --workers 2
    python -m tests.sim.field_pricing --seeds 30 --set 'decision={rule: per_period}'

For each seed, :mod:`sample_db.plans` builds the demo table; ``configs/pricing.yaml`` is
copied with the source, history and alert paths moved into a temporary folder; ``segwatch
backfill --from 2025-01 --to 2026-12 --json`` runs it as a user would (a subprocess of
``python -m monitor``); and the gaps to Basic announced in the 24 months (``emerged``
events of a segment) are scored against the planted truth (:data:`sample_db.plans.STORIES`
and the tiers' spend levels, :data:`sample_db.plans.SPEND_MEAN`):

* true gaps: ``household_income`` of Premium (every month) and of Saver from 2026-01
  (the composition story: a raw gap); ``monthly_spend`` of Premium and Saver (every
  month: their spend levels differ from Basic's) and of Standard from 2025-10 (the price
  rise);
* a *false gap* is any other gap announced (Standard's or Green's income, Green's spend,
  Saver's income before 2026-01, Standard's spend before 2025-10);
* each true gap is *found in time* when announced in its first month or the next
  (2025-01/02 for the standing gaps, 2025-10/11, 2026-01/02).

Counts per seed; the table gives the mean over seeds and how many seeds had none.
"""

from __future__ import annotations

import argparse
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any, Sequence

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

sys.path.insert(0, str(ROOT / "sample_db"))
import plans  # noqa: E402

from tests.sim.field_depots import backfill_demo  # noqa: E402

#: (metric, tier) -> the first month the gap is in the data (its month and the next count as in time)
TRUE_GAPS = {
    ("household_income", "Premium"): "2025-01",
    ("household_income", plans.COMPOSITION_TIER): plans.month_id(plans.COMPOSITION_MONTH),
    ("monthly_spend", "Premium"): "2025-01",
    ("monthly_spend", "Saver"): "2025-01",
    ("monthly_spend", plans.PRICE_TIER): plans.month_id(plans.PRICE_MONTH),
}


def _next(month: str) -> str:
    y, m = map(int, month.split("-"))
    return f"{y + (m == 12)}-{m % 12 + 1:02d}"


def run_seed(seed: int, overrides: Sequence[str] = ()) -> dict[str, Any]:
    return score(backfill_demo("pricing.yaml", "plans.sqlite", plans.build, seed, "2025-01", "2026-12", overrides))


def score(docs: Sequence[dict[str, Any]]) -> dict[str, Any]:
    false_gaps: list[tuple[str, str, str]] = []
    found: dict[tuple[str, str], str] = {}
    for doc in sorted(docs, key=lambda d: d["period"]):
        for e in doc.get("events", []):
            if e["kind"] != "emerged" or e.get("segment") is None:
                continue
            key = (e["metric"], e["segment"])
            first = TRUE_GAPS.get(key)
            if first is None or doc["period"] < first:
                false_gaps.append((doc["period"], *key))
            else:
                found.setdefault(key, doc["period"])
    in_time = {k: k in found and found[k] <= _next(first) for k, first in TRUE_GAPS.items()}
    return {"false_gaps": false_gaps, "in_time": in_time}


def summarise(results: Sequence[dict[str, Any]]) -> str:
    n = len(results)
    counts = np.array([len(r["false_gaps"]) for r in results], float)
    rows = [("false gaps announced in 24 months", f"{counts.mean():.2f} per seed; none in {int((counts == 0).sum())}/{n} seeds")]
    for key in TRUE_GAPS:
        hits = sum(r["in_time"][key] for r in results)
        rows.append((f"{key[1]}'s gap on `{key[0]}` from {TRUE_GAPS[key]}, announced in its month or the next",
                     f"{hits}/{n} seeds"))
    where: dict[str, int] = {}
    for r in results:
        for _, metric, tier in r["false_gaps"]:
            where[f"{tier} on {metric}"] = where.get(f"{tier} on {metric}", 0) + 1
    if where:
        rows.append(("where the false gaps were", ", ".join(f"{k}: {v}" for k, v in sorted(where.items()))))
    return "\n".join(["| measure (%d seeds) | value |" % n, "|---|---|"] + [f"| {a} | {b} |" for a, b in rows])


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.sim.field_pricing", description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=30, help="seeds 1..N (default 30)")
    ap.add_argument("--first-seed", type=int, default=1)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--set", action="append", default=[], metavar="KEY=YAML", help="override a top-level config key")
    ap.add_argument("--out", help="also write the table to this file")
    args = ap.parse_args(argv)
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    with ProcessPoolExecutor(args.workers) as pool:
        results = list(pool.map(run_seed, seeds, [tuple(args.set)] * len(seeds)))
    text = summarise(results)
    print(text)
    if args.out:
        Path(args.out).write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
