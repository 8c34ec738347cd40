"""Benchmark: how much one period adds to the history, and what ``run --json`` prints (a script, not a test).

    python tests/bench_history.py                         # 50, 100 and 500 segments x 20 metrics
    python tests/bench_history.py --segments 100 --metrics 20 --periods 3

For each segment count it builds a SQLite source of null data (every segment drawn
from the same distribution, so that nothing is significant; ``--rows-per-segment``
rows per segment and week), runs ``--periods`` consecutive weeks into a fresh SQLite
history through the Python API, and prints per period: the history's growth (file
size after ``VACUUM``, first period left out so that the empty tables' pages do not
count), the stored metric entries per period (JSON, or LZMA-packed where long), the size of ``run --json`` in its default
(compact) form and with ``--pairs all``, and the CPU seconds to write each form.
Sizes are what matter; the seconds are CPU time of this process
(``resource.getrusage``), from one run on the machine noted.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import platform
import resource
import sqlite3
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

WEEKS = ("2026-W10", "2026-W11", "2026-W12", "2026-W13", "2026-W14", "2026-W15")


def cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def build_source(path: Path, segments: int, metrics: int, per_segment: int, weeks: int) -> None:
    """Null data: each metric uniform noise around its level in every segment, spread over ``weeks`` weeks."""
    conn = sqlite3.connect(path)
    cols = ", ".join(f"m{j} REAL" for j in range(metrics))
    conn.execute(f"CREATE TABLE ev (id INTEGER PRIMARY KEY, ts TEXT, seg TEXT, {cols})")
    rows = segments * per_segment * weeks
    rand = "((random() & 1048575) / 1048576.0)"
    exprs = ", ".join(f"{100.0 * (j + 1)} + 10.0 * {rand}" for j in range(metrics))
    seconds = 7 * 86400 * weeks
    conn.execute(
        f"WITH RECURSIVE c(i) AS (SELECT 0 UNION ALL SELECT i + 1 FROM c WHERE i < {rows - 1}) "
        f"INSERT INTO ev SELECT i, datetime('2026-03-02', '+' || ((i * 7919) % {seconds}) || ' seconds'), "
        f"'depot' || printf('%04d', i % {segments}), {exprs} FROM c")
    conn.commit()
    conn.close()


def write_config(folder: Path, segments: int, metrics: int) -> Path:
    lines = [
        f"job: growth-{segments}",
        "source:",
        f"  url: sqlite:///{folder / 'source.sqlite'}",
        "  table: ev",
        "  time_column: ts",
        "  segment_column: seg",
        "  naive_time: utc",
        "period: week",
        "timezone: UTC",
        "metrics:",
        *[f"  - column: m{j}" for j in range(metrics)],
        "history:",
        f"  url: sqlite:///{folder / 'history.sqlite'}",
    ]
    path = folder / "job.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def history_bytes(path: Path) -> int:
    conn = sqlite3.connect(path)
    conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    conn.execute("VACUUM")
    conn.close()
    return path.stat().st_size


def payload_bytes(path: Path) -> int:
    """The stored metric entries: their JSON, or where packed, the packed bytes and the stand-in."""
    conn = sqlite3.connect(path)
    cols = {r[1] for r in conn.execute("PRAGMA table_info(sw_metric_results)")}
    packed = " + COALESCE(LENGTH(packed), 0)" if "packed" in cols else ""
    n = conn.execute(f"SELECT COALESCE(SUM(LENGTH(payload){packed}), 0) FROM sw_metric_results").fetchone()[0]
    conn.close()
    return int(n)


def one(segments: int, metrics: int, per_segment: int, periods: int) -> dict[str, float]:
    try:
        from monitor.cli import dump_run
    except ImportError:  # a release before --pairs: its one form
        def dump_run(report, out, mode):
            json.dump(report.to_json(), out, indent=2)
    from monitor.config import load_config
    from monitor.runner import Job

    folder = Path(tempfile.mkdtemp(prefix=f"segwatch-growth-{segments}-"))
    build_source(folder / "source.sqlite", segments, metrics, per_segment, periods + 1)
    cfg = load_config(str(write_config(folder, segments, metrics)))
    hist = folder / "history.sqlite"
    sizes, compact, full, t_compact, t_full = [], [], [], [], []
    with Job(cfg) as job:
        for week in WEEKS[:periods + 1]:
            report = job.run(week)
            job.history.dispose()
            sizes.append(history_bytes(hist))
            for mode, into, times in (("top", compact, t_compact), ("all", full, t_full)):
                out = io.StringIO()
                t0 = cpu()
                dump_run(report, out, mode)
                times.append(cpu() - t0)
                into.append(len(out.getvalue().encode()))
    grown = [(b - a) for a, b in zip(sizes, sizes[1:])]
    per = lambda xs: sum(xs[1:]) / len(xs[1:])  # noqa: E731 - the first period holds the empty tables
    return {"segments": segments, "growth_kb": sum(grown) / len(grown) / 1024,
            "payload_kb": payload_bytes(hist) / (periods + 1) / 1024,
            "json_kb": per(compact) / 1024, "json_all_kb": per(full) / 1024,
            "t_json": per(t_compact), "t_json_all": per(t_full)}


def machine() -> str:
    cpu_name = "unknown CPU"
    for line in Path("/proc/cpuinfo").read_text().splitlines():
        if line.startswith("model name"):
            cpu_name = line.split(":", 1)[1].strip()
            break
    load = os.getloadavg()[0]
    return (f"{os.cpu_count()} CPUs ({cpu_name}), {platform.platform()}, Python {platform.python_version()}, "
            f"SQLite {sqlite3.sqlite_version}, load average {load:.1f} at the end")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--segments", default="50,100,500")
    ap.add_argument("--metrics", type=int, default=20)
    ap.add_argument("--rows-per-segment", type=int, default=40)
    ap.add_argument("--periods", type=int, default=2, help="periods measured after the first")
    args = ap.parse_args()
    rows = [one(int(k), args.metrics, args.rows_per_segment, args.periods) for k in args.segments.split(",")]
    print(f"\nnull data, {args.metrics} metrics, {args.rows_per_segment} rows per segment and week; {machine()}\n")
    print("| segments | history growth per period (KB) | stored metric JSON per period (KB) "
          "| run --json (KB) | run --json --pairs all (KB) | CPU to write run --json (s) | ... --pairs all (s) |")
    print("|---:|---:|---:|---:|---:|---:|---:|")
    for r in rows:
        print(f"| {r['segments']} | {r['growth_kb']:.0f} | {r['payload_kb']:.0f} | {r['json_kb']:.0f} "
              f"| {r['json_all_kb']:.0f} | {r['t_json']:.3f} | {r['t_json_all']:.3f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
