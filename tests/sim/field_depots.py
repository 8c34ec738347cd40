"""Field test on the depot demo: what a new user's weekly job would have sent, over many seeds.

Run from the repository root::

    python -m tests.sim.field_depots --seeds 30 --workers 2       # about 1-2 minutes a seed
    python -m tests.sim.field_depots --seeds 3 --out /tmp/field.md

For each seed, :mod:`sample_db.depots` builds the demo table; the demo config
(``configs/demo.yaml``, with its defaults) is copied with the source, history and alert
paths moved into a temporary folder; ``segwatch backfill --from 2026-W01 --to
2026-W26 --json`` runs it as a user would (a subprocess of ``python -m monitor``);
and the events of the 26 weeks are scored against the planted stories
(:data:`sample_db.depots.STORIES`):

* a metric-level ``emerged`` is *false* on a metric in a week without a planted
  difference of means: ``on_time``, ``claim_cost`` and ``counter_wait_min`` (whose
  story changes the spread only) in every week, ``dwell_hours`` before Quarry's drift
  (W12). ``sort_minutes`` differs in every week (Millbrook's older sorter);
* an ``assumption_broken`` is *false* unless it is the equal-spread check of
  ``counter_wait_min`` from W14 on;
* *flapping*: a false metric-level ``emerged`` cleared again within 2 periods;
* Quarry's drift: the first week from W12 on in which ``dwell_hours`` is announced as
  differing (and Quarry flagged high), as periods after W12 (W12 itself = 0);
* the spread break: the first week from W14 with ``assumption_broken`` on
  ``counter_wait_min``'s equal-spread check;
* the other stories: ``segment_new`` Northpoint in W09, ``segment_missing`` Fenwick in
  W18, ``data_quality`` on ``sort_minutes`` in W07 (Eastgate's lost log), ``sort_minutes`` with
  Millbrook flagged high.

Rates per job-year are counts x 52 / 26, with the between-seed standard error.
``--set KEY=VALUE`` changes a top-level config key (YAML value), for example
``--set 'decision={rule: per_period}'``. ``--code DIR`` runs the backfill with the
segwatch package of another checkout (a release to compare with; the data, the config
and the scoring stay this checkout's). False metric-level ``emerged`` are also counted
per metric (``false emerged per job-year, by metric``).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any, Sequence

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import yaml  # noqa: E402

sys.path.insert(0, str(ROOT / "sample_db"))
import depots  # noqa: E402

WEEKS = 26
NULL_MEAN_METRICS = ("on_time", "claim_cost", "counter_wait_min")


def week_of(period: str) -> int:
    return int(period.split("-W")[1])


def backfill_demo(template: str, db_name: str, build, seed: int, first: str, last: str,
                  overrides: Sequence[str] = (), code: str | None = None) -> list[dict[str, Any]]:
    """Build one seed's demo table with ``build(path, seed=seed)``, copy ``configs/<template>``
    with the source, history and alert paths moved into a temporary folder (``overrides``:
    ``KEY=YAML`` for top-level keys), run ``segwatch backfill FIRST..LAST --json`` as a user
    would (with the package in ``code``, default this checkout) and return its documents."""
    with tempfile.TemporaryDirectory(prefix=f"segwatch-field-{seed}-") as tmp:
        folder = Path(tmp)
        db = build(folder / db_name, seed=seed)
        config = yaml.safe_load((ROOT / "configs" / template).read_text())
        config["source"]["url"] = f"sqlite:///{db}"
        config["history"]["url"] = f"sqlite:///{folder / 'history.sqlite'}"
        config["alerts"] = [{"type": "log", "path": str(folder / "alerts.jsonl")}]
        for item in overrides:
            key, _, value = item.partition("=")
            config[key] = yaml.safe_load(value)
        path = folder / template
        path.write_text(yaml.safe_dump(config, sort_keys=False))
        env = dict(os.environ, PYTHONPATH=str(code or ROOT), PYTHONDONTWRITEBYTECODE="1")
        proc = subprocess.run([sys.executable, "-m", "monitor", "backfill", str(path), "--from", first,
                               "--to", last, "--json"], capture_output=True, text=True, env=env, cwd=folder)
        if proc.returncode != 0:
            raise RuntimeError(f"seed {seed}: backfill failed ({proc.returncode}): {proc.stderr.strip()[-500:]}")
        return [json.loads(line) for line in proc.stdout.splitlines() if line.strip()]


def run_seed(seed: int, overrides: Sequence[str] = (), code: str | None = None) -> dict[str, Any]:
    """Build, backfill and score one seed; returns the counts (see the module notes)."""
    return score(backfill_demo("demo.yaml", "depots.sqlite", depots.build, seed, "2026-W01", f"2026-W{WEEKS:02d}",
                               overrides, code))


def score(docs: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """Counts of one seed's 26 weekly documents (``backfill --json``)."""
    out = {"false_emerged": 0, "false_broken": 0, "flapping": 0, "alerts": 0, "false_segment_emerged": 0,
           "noise_alerts": 0, "weeks_nothing_real": 0, "drift_week": None, "drift_segment_week": None,
           "spread_week": None, "opening": False, "missing": False, "burst": False, "offset": False,
           "false_by_metric": {}}
    on: dict[str, bool] = {}
    false_at: list[tuple[str, int]] = []
    cleared_at: dict[str, list[int]] = {}
    for doc in sorted(docs, key=lambda d: d["period"]):
        week = week_of(doc["period"])
        real = 0
        for e in doc.get("events", []):
            kind, metric, segment = e["kind"], e.get("metric"), e.get("segment")
            out["alerts"] += 1
            noise = False
            if kind in ("emerged", "cleared") and segment is None:
                on[metric] = kind == "emerged"
                if kind == "cleared":
                    cleared_at.setdefault(metric, []).append(week)
                if kind == "emerged" and (metric in NULL_MEAN_METRICS or (metric == "dwell_hours" and week < 12)):
                    out["false_emerged"] += 1
                    out["false_by_metric"][metric] = out["false_by_metric"].get(metric, 0) + 1
                    false_at.append((metric, week))
                    noise = True
            elif kind == "emerged":
                if not ((metric == "dwell_hours" and segment == "Quarry" and week >= 12)
                        or (metric == "sort_minutes" and segment == "Millbrook")):
                    out["false_segment_emerged"] += 1
                    noise = True
                if metric == "dwell_hours" and segment == "Quarry" and week >= 12 and out["drift_segment_week"] is None:
                    out["drift_segment_week"] = week
                if metric == "sort_minutes" and segment == "Millbrook":
                    out["offset"] = True
            elif kind == "cleared":
                noise = True  # a segment taken back: in these stories no true flag ends
            elif kind in ("assumption_broken", "assumption_restored"):
                check = (e.get("detail") or {}).get("check")
                true = metric == "counter_wait_min" and check == "brown_forsythe" and week >= 14
                if kind == "assumption_broken" and not true:
                    out["false_broken"] += 1
                if kind == "assumption_broken" and true and out["spread_week"] is None:
                    out["spread_week"] = week
                noise = not true
            elif kind == "segment_new" and segment == "Northpoint" and week == 9:
                out["opening"] = True
            elif kind == "segment_missing" and segment == "Fenwick" and week == 18:
                out["missing"] = True
            elif kind == "data_quality" and metric == "sort_minutes" and week == 7:
                out["burst"] = True
            out["noise_alerts"] += noise
            real += not noise
        if doc.get("events") and real == 0:
            out["weeks_nothing_real"] += 1
        if week >= 12 and on.get("dwell_hours") and out["drift_week"] is None:
            out["drift_week"] = week
    for metric, week in false_at:
        if any(week < w <= week + 2 for w in cleared_at.get(metric, [])):
            out["flapping"] += 1
    return out


def summarise(results: Sequence[dict[str, Any]]) -> str:
    n = len(results)
    per_year = 52 / WEEKS

    def rate(key: str) -> str:
        v = np.array([r[key] for r in results], float) * per_year
        return f"{v.mean():.2f} ± {v.std(ddof=1) / math.sqrt(n):.2f}" if n > 1 else f"{v.mean():.2f}"

    def weeks(key: str, start: int) -> str:
        v = [r[key] for r in results]
        found = [w - start for w in v if w is not None]
        med = float(np.median([w - start if w is not None else np.inf for w in v]))
        return (f"median {med:g} periods after W{start} (found in {len(found)}/{n} seeds; "
                f"range {min(found) if found else '-'}-{max(found) if found else '-'})")

    rows = [
        ("false metric-level `emerged` per job-year", rate("false_emerged")),
        ("false `assumption_broken` per job-year", rate("false_broken")),
        ("false alarm cleared within 2 periods (flapping) per job-year", rate("flapping")),
        ("false segment-level `emerged` per job-year", rate("false_segment_emerged")),
        ("alerts per job-year (all kinds)", rate("alerts")),
        ("noise alerts per job-year", rate("noise_alerts")),
        ("weekly digests with nothing real, per 26 weeks", f"{np.mean([r['weeks_nothing_real'] for r in results]):.2f}"),
        ("Quarry's drift: `dwell_hours` announced", weeks("drift_week", 12)),
        ("Quarry's drift: Quarry flagged high", weeks("drift_segment_week", 12)),
        ("spread break (W14): `assumption_broken`", weeks("spread_week", 14)),
        ("spread break by W15", f"{sum(1 for r in results if r['spread_week'] is not None and r['spread_week'] <= 15)}/{n} seeds"),
        ("Northpoint opening (W09), Fenwick missing (W18), Eastgate NULL burst (W07), Millbrook high on sort",
         f"{sum(r['opening'] for r in results)}, {sum(r['missing'] for r in results)}, "
         f"{sum(r['burst'] for r in results)}, {sum(r['offset'] for r in results)} of {n} seeds"),
    ]
    for metric in ("on_time", "claim_cost", "counter_wait_min", "dwell_hours"):
        v = np.array([r.get("false_by_metric", {}).get(metric, 0) for r in results], float) * per_year
        err = f" ± {v.std(ddof=1) / math.sqrt(n):.2f}" if n > 1 else ""
        rows.append((f"false `emerged` per job-year on `{metric}`", f"{v.mean():.2f}{err}"))
    lines = ["| measure (%d seeds) | value |" % n, "|---|---|"] + [f"| {a} | {b} |" for a, b in rows]
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.sim.field_depots", description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=30, help="seeds 1..N (default 30)")
    ap.add_argument("--first-seed", type=int, default=1)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--set", action="append", default=[], metavar="KEY=YAML", help="override a top-level config key")
    ap.add_argument("--out", help="also write the table to this file")
    ap.add_argument("--code", help="run the backfill with the segwatch package in this folder")
    args = ap.parse_args(argv)
    seeds = list(range(args.first_seed, args.first_seed + args.seeds))
    with ProcessPoolExecutor(args.workers) as pool:
        results = list(pool.map(run_seed, seeds, [tuple(args.set)] * len(seeds), [args.code] * len(seeds)))
    text = summarise(results)
    print(text)
    if args.out:
        Path(args.out).write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
