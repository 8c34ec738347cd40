"""Benchmark: CPU time of ``segwatch report`` and of its pictures (a script, not a test).

    python tests/bench_report.py                       # 5 metrics x 8 segments x 12 weekly periods
    python tests/bench_report.py --metrics 5 --segments 8 --periods 52

Builds a SQLite source of parcel-depot data (invented: one depot slower from the
eighth week on), stores ``--periods`` weeks into a fresh history through the Python
API, then writes the report of the latest week ``--repeat`` times and prints the
median CPU seconds of this process (``resource.getrusage``, user + system: load on
the machine barely moves it), split by picture kind (box plot, small multiples over
time, q-value chart) and the rest (reading the history, the HTML). matplotlib's
import is counted once, before the first report, and shown on its own row.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import sqlite3
import statistics
import sys
import tempfile
import time
from datetime import date, timedelta
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def build(folder: Path, metrics: int, segments: int, periods: int, per_segment: int) -> Path:
    conn = sqlite3.connect(folder / "source.sqlite")
    cols = ", ".join(f"m{j} REAL" for j in range(metrics))
    conn.execute(f"CREATE TABLE ev (id INTEGER PRIMARY KEY, ts TEXT, seg TEXT, {cols})")
    rows = segments * per_segment * periods
    rand = "((random() & 1048575) / 1048576.0)"
    # depot 0 is slower from the eighth week on (on every metric)
    exprs = ", ".join(f"{10.0 * (j + 1)} + 4.0 * {rand} + CASE WHEN i % {segments} = 0 AND "
                      f"(i / {segments * per_segment}) >= 7 THEN 1.5 ELSE 0 END" for j in range(metrics))
    conn.execute(
        f"WITH RECURSIVE c(i) AS (SELECT 0 UNION ALL SELECT i + 1 FROM c WHERE i < {rows - 1}) "
        f"INSERT INTO ev SELECT i, datetime('2026-01-05', '+' || ((i / {segments * per_segment}) * 604800 "
        f"+ (i * 7919) % 604800) || ' seconds'), 'depot' || printf('%02d', i % {segments}), {exprs} FROM c")
    conn.commit()
    conn.close()
    lines = ["job: report-bench", "source:", f"  url: sqlite:///{folder / 'source.sqlite'}", "  table: ev",
             "  time_column: ts", "  segment_column: seg", "  naive_time: utc", "period: week", "timezone: UTC",
             "metrics:", *[f"  - column: m{j}" for j in range(metrics)], "history:",
             f"  url: sqlite:///{folder / 'history.sqlite'}"]
    path = folder / "job.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def weeks(periods: int) -> list[str]:
    first = date(2026, 1, 5)
    out = []
    for w in range(periods):
        y, n, _ = (first + timedelta(weeks=w)).isocalendar()
        out.append(f"{y}-W{n:02d}")
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--metrics", type=int, default=5)
    ap.add_argument("--segments", type=int, default=8)
    ap.add_argument("--periods", type=int, default=12)
    ap.add_argument("--rows-per-segment", type=int, default=60)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    from monitor.config import load_config
    from monitor.runner import Job

    folder = Path(tempfile.mkdtemp(prefix="segwatch-report-"))
    cfg = load_config(str(build(folder, args.metrics, args.segments, args.periods, args.rows_per_segment)))
    ids = weeks(args.periods)
    t0 = time.perf_counter()
    with Job(cfg) as job:
        for p in ids:
            job.run(p)
    print(f"history of {args.periods} periods built in {time.perf_counter() - t0:.1f} s", file=sys.stderr)

    c0 = cpu()
    from monitor.present import plots, report
    c_import = cpu() - c0

    spent: dict[str, float] = {}
    for name in ("box_svg", "trend_svg", "qvalue_svg"):
        inner = getattr(plots, name)

        def timed(*a, _inner=inner, _name=name, **k):
            s = cpu()
            try:
                return _inner(*a, **k)
            finally:
                spent[_name] = spent.get(_name, 0.0) + cpu() - s
        setattr(plots, name, timed)

    totals, parts = [], {n: [] for n in ("box_svg", "trend_svg", "qvalue_svg")}
    with Job(cfg) as job:
        for i in range(args.repeat + 1):  # the first is a warm-up (fonts, caches)
            spent.clear()
            s = cpu()
            report.write_report(job, ids[-1], folder / "report.html", args.periods)
            if i:
                totals.append(cpu() - s)
                for n in parts:
                    parts[n].append(spent.get(n, 0.0))
    size = (folder / "report.html").stat().st_size
    med = statistics.median
    cpu_name = next((ln.split(":", 1)[1].strip() for ln in Path("/proc/cpuinfo").read_text().splitlines()
                     if ln.startswith("model name")), "unknown CPU")
    print(f"\n{args.metrics} metrics x {args.segments} segments x {args.periods} periods; median of "
          f"{args.repeat} reports after a warm-up; {os.cpu_count()} CPUs ({cpu_name}), {platform.platform()}, "
          f"Python {platform.python_version()}, load average {os.getloadavg()[0]:.1f}; report {size / 1024:.0f} KB\n")
    print("| part | CPU seconds |")
    print("|---|---:|")
    print(f"| import of the report and matplotlib (once per process) | {c_import:.2f} |")
    labels = {"box_svg": "box plots", "trend_svg": "small multiples over time", "qvalue_svg": "q-value charts"}
    for n, label in labels.items():
        print(f"| {label} ({args.metrics}) | {med(parts[n]):.2f} |")
    rest = med(t - sum(parts[n][i] for n in parts) for i, t in enumerate(totals))
    print(f"| the rest (history read, HTML) | {rest:.2f} |")
    print(f"| **report, total** | **{med(totals):.2f}** |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
