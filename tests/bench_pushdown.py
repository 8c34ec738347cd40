"""Benchmark: one period pushed down vs pulled into pandas (a script, not a test).

    python tests/bench_pushdown.py                       # 2,000,000 rows x 20 metrics x 50 segments
    python tests/bench_pushdown.py --rows 200000 --engines duckdb
    python tests/bench_pushdown.py --rows 20000000 --engines duckdb --skip-pull
    python tests/bench_pushdown.py --engines spark,sqlite,postgresql --skip-pull \
        --spark hive://segwatch@127.0.0.1:PORT/default

For each engine (SQLite, DuckDB, PostgreSQL; Spark SQL with ``--spark``) it builds a table of ``--rows`` rows
(generated inside the database with SQL, so generation stays fast), then measures,
each in a fresh child process so that peak memory (``ru_maxrss`` from ``wait4``) is
that of the measured work alone:

``run (process)``
    the whole ``python -m monitor run CONFIG --period 2026-W10`` (start-up and
    imports, probe, aggregate query, sampled values, statistics, history write).
``run (in-process)``
    ``Job.run`` alone, timed inside the child (imports excluded), with the statistical
    routines loaded beforehand, as in a scheduler process after its first period: the
    steady state of a long-running process, time and peak memory. (A one-shot ``run``
    on an engine inside the process, DuckDB or SQLite, loads scipy only after the
    source is read, so its peak can be lower than this one.)
``aggregate query``
    the bare aggregate query segwatch sends, timed around its execution alone
    (the shift probe before it is not timed); its peak memory includes imports.
``pull + scipy``
    every row of the period into pandas, then ``scipy.stats.f_oneway`` and
    ``kruskal`` per metric: the approach the push-down replaces.

Each measurement is repeated ``--repeat`` times (default 3, interleaved); the table gives
the median time and the largest peak. It prints one table; the ratios are what matter
(one invocation, on the machine noted).
The database server's own memory is not included. Times are wall-clock seconds.
PostgreSQL is reached at ``--postgres`` (default the CI database); it is skipped
with a note when unreachable.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PERIOD = "2026-W10"
TABLE = "bench_events"
MONDAY_EPOCH = 1772409600  # 2026-03-02 00:00:00 UTC, the period's first second


ALL_DIFFER = False  # --all-differ: a segment effect on every metric (every metric significant)


def metric_expr(j: int, rand: str, i: str) -> str:
    """Metric j: a level, a small segment effect on two metrics of three (every metric with
    ``--all-differ``), uniform noise, a few NULLs."""
    effect = 0.05 * (j % 3 + (1 if ALL_DIFFER else 0))
    return (f"CASE WHEN {i} % 101 = {j} THEN NULL ELSE {100.0 * (j + 1)} + ({i} % 50) * {effect} "
            f"+ 10.0 * {rand} END")


def generate_sql(engine: str, rows: int, metrics: int) -> list[str]:
    cols = ", ".join(f"m{j} DOUBLE PRECISION" if engine != "sqlite" else f"m{j} REAL" for j in range(metrics))
    if engine == "postgresql":
        exprs = ", ".join(metric_expr(j, "random()", "i") for j in range(metrics))
        return [
            f"DROP TABLE IF EXISTS {TABLE}",
            f"CREATE TABLE {TABLE} (id BIGINT PRIMARY KEY, ts TIMESTAMP, seg TEXT, {cols})",
            "SELECT setseed(0.42)",
            f"INSERT INTO {TABLE} SELECT i, TIMESTAMP '2026-03-02' + (i % 604800) * INTERVAL '1 second', "
            f"'depot' || lpad((i % 50)::text, 2, '0'), {exprs} FROM generate_series(1, {rows}) AS g(i)",
            f"VACUUM ANALYZE {TABLE}",
        ]
    if engine == "duckdb":
        exprs = ", ".join(f"{metric_expr(j, 'random()', 'i')} AS m{j}" for j in range(metrics))
        return [
            "SELECT setseed(0.42)",
            f"DROP TABLE IF EXISTS {TABLE}",
            f"CREATE TABLE {TABLE} (id BIGINT PRIMARY KEY, ts TIMESTAMP, seg VARCHAR, {cols})",
            f"INSERT INTO {TABLE} SELECT i, TIMESTAMP '2026-03-02' + to_seconds(i % 604800), "
            f"'depot' || lpad(CAST(i % 50 AS VARCHAR), 2, '0'), {', '.join(metric_expr(j, 'random()', 'i') for j in range(metrics))} "
            f"FROM range(1, {rows + 1}) AS t(i)",
        ]
    if engine == "sqlite":
        rand = "((random() & 1048575) / 1048576.0)"
        exprs = ", ".join(metric_expr(j, rand, "i") for j in range(metrics))
        return [
            f"DROP TABLE IF EXISTS {TABLE}",
            f"CREATE TABLE {TABLE} (id INTEGER PRIMARY KEY, ts TEXT, seg TEXT, {cols})",
            f"WITH RECURSIVE c(i) AS (SELECT 1 UNION ALL SELECT i + 1 FROM c WHERE i < {rows}) "
            f"INSERT INTO {TABLE} SELECT i, datetime('2026-03-02', '+' || (i % 604800) || ' seconds'), "
            f"'depot' || printf('%02d', i % 50), {exprs} FROM c",
        ]
    if engine == "spark":  # a parquet table written by the Thrift server's own executors
        exprs = ", ".join(f"CAST({metric_expr(j, f'rand({42 + j})', 'id')} AS DOUBLE) AS m{j}" for j in range(metrics))
        return [
            f"DROP TABLE IF EXISTS {TABLE}",
            f"CREATE TABLE {TABLE} USING parquet AS SELECT id, timestamp_seconds({MONDAY_EPOCH} + id % 604800) AS ts, "
            f"concat('depot', lpad(CAST(id % 50 AS STRING), 2, '0')) AS seg, {exprs} FROM range(1, {rows + 1})",
        ]
    raise ValueError(engine)


def build(engine: str, url: str, rows: int, metrics: int) -> float:
    import sqlalchemy as sa

    t0 = time.perf_counter()
    eng = sa.create_engine(url)
    try:  # an existing table of the right size is reused
        with eng.connect() as conn:
            if conn.exec_driver_sql(f"SELECT COUNT(*) FROM {TABLE}").scalar() == rows:
                eng.dispose()
                return 0.0
    except Exception:  # noqa: BLE001 - no table yet
        pass
    eng.dispose()
    eng = sa.create_engine(url)
    with eng.begin() as conn:
        for stmt in generate_sql(engine, rows, metrics):
            if stmt.startswith("VACUUM"):
                continue
            conn.exec_driver_sql(stmt.replace("%", "%%") if engine in ("postgresql", "spark") else stmt)
    if engine == "postgresql":
        with eng.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
            conn.exec_driver_sql(f"VACUUM ANALYZE {TABLE}")
    eng.dispose()
    return time.perf_counter() - t0


def write_config(folder: Path, engine: str, url: str, metrics: int) -> Path:
    lines = [
        f"job: bench-{engine}",
        "source:",
        f"  url: {url}",
        f"  table: {TABLE}",
        "  time_column: ts",
        "  segment_column: seg",
        "  naive_time: utc",
        "period: week",
        "timezone: UTC",
        "metrics:",
        *[f"  - column: m{j}" for j in range(metrics)],
        "history:",
        f"  url: sqlite:///{folder / f'history-{engine}.sqlite'}",
    ]
    path = folder / f"bench-{engine}.yaml"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def measure(argv: list[str], env: dict | None = None) -> tuple[float, float, str]:
    """Wall seconds, peak RSS in MB, and stdout of one child process."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=ROOT, env=env)
    out, err = proc.stdout.read(), proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode not in (0,):
        raise RuntimeError(f"{argv[:4]} failed ({proc.returncode}): {err.decode()[-2000:]}")
    return wall, usage.ru_maxrss / 1024.0, out.decode()


IN_PROCESS = textwrap.dedent("""
    import sys, time
    from monitor.analysis import load_statistics
    from monitor.config import load_config
    from monitor.runner import Job
    load_statistics()  # as a scheduler has them after its first period
    job = Job(load_config(sys.argv[1]))
    t0 = time.perf_counter()
    job.run(sys.argv[2])
    print(time.perf_counter() - t0)
""")

AGGREGATE = textwrap.dedent("""
    import sys, time
    from monitor.source import pushdown
    from monitor.source import reader as source
    from monitor.config import load_config
    from monitor.periods import parse_period
    from monitor.source import Source
    cfg = load_config(sys.argv[1])
    src = Source(cfg)
    period = parse_period(cfg.period, sys.argv[2], cfg.timezone)
    rel = src._relation()
    traits = pushdown.EngineTraits.of(src.engine.dialect)
    plans, _ = pushdown.plan_metrics(rel, cfg.metrics, traits)
    where = src.window_clause(period)
    with src.engine.connect() as conn, conn.begin():
        source._tune_session(conn, traits)  # the session settings segwatch uses (PostgreSQL: no JIT)
        shifts = src._shifts(conn, rel, plans, where, traits)
        if pushdown.direct_possible(plans, traits):  # the form segwatch sends first
            stmt = pushdown.direct_query(rel, cfg.source.segment_column, plans, where, shifts)
        else:
            stmt = pushdown.aggregate_query(rel, cfg.source.segment_column, plans, where, shifts, traits)
        t0 = time.perf_counter()
        rows = conn.execute(stmt).all()
        print(time.perf_counter() - t0, len(rows))
""")

PULL = textwrap.dedent("""
    import sys, time
    import pandas as pd, sqlalchemy as sa
    from scipy import stats
    url, metrics, engine = sys.argv[1], int(sys.argv[2]), sys.argv[3]
    from monitor.engines import create_engine
    eng = create_engine(url, "source", read_only=True)
    cols = ", ".join(f"m{j}" for j in range(metrics))
    if engine == "spark":  # segwatch's engine sets the session zone to UTC
        where = "ts >= TIMESTAMP '2026-03-02 00:00:00+00:00' AND ts < TIMESTAMP '2026-03-09 00:00:00+00:00'"
    elif engine == "sqlite":
        where = "datetime(ts) >= '2026-03-02 00:00:00' AND datetime(ts) < '2026-03-09 00:00:00'"
    else:
        where = "ts >= TIMESTAMP '2026-03-02 00:00:00' AND ts < TIMESTAMP '2026-03-09 00:00:00'"
    t0 = time.perf_counter()
    with eng.connect() as conn:
        frame = pd.read_sql(sa.text(f"SELECT seg, {cols} FROM bench_events WHERE {where}"), conn)
    for j in range(metrics):
        groups = [g.dropna().to_numpy() for _, g in frame.groupby("seg")[f"m{j}"]]
        stats.f_oneway(*groups)
        stats.kruskal(*groups)
    print(time.perf_counter() - t0)
""")


def machine() -> str:
    cpu = "unknown CPU"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return f"{os.cpu_count()} CPUs ({cpu}), {mem:.0f} GiB RAM, {platform.platform()}, Python {platform.python_version()}"


def main() -> int:
    global ALL_DIFFER
    if len(sys.argv) == 7 and sys.argv[1] == "--build":
        engine, url, rows, metrics = sys.argv[2], sys.argv[3], int(sys.argv[4]), int(sys.argv[5])
        ALL_DIFFER = sys.argv[6] == "all-differ"
        print(build(engine, url, rows, metrics))
        return 0
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--metrics", type=int, default=20)
    ap.add_argument("--engines", default="sqlite,duckdb,postgresql")
    ap.add_argument("--postgres", default="postgresql+psycopg://postgres@127.0.0.1:5432/segwatch_test")
    ap.add_argument("--spark", default=None,
                    help="a Spark Thrift server's URL, hive://user@host:port/database (engine 'spark'; "
                         "bash .ci/spark.sh start DIR starts one, its port in DIR/local.port)")
    ap.add_argument("--workdir", default=None, help="folder for the SQLite/DuckDB files (default: a temp folder)")
    ap.add_argument("--skip-pull", action="store_true", help="leave out the pull-into-pandas measurement")
    ap.add_argument("--all-differ", action="store_true",
                    help="a segment effect on every metric, so that every metric is significant "
                         "(a table built without it is rebuilt: use another --workdir or database)")
    ap.add_argument("--repeat", type=int, default=3,
                    help="runs of each measurement; the table gives the median time and the largest peak")
    args = ap.parse_args()

    folder = Path(args.workdir or tempfile.mkdtemp(prefix="segwatch-bench-"))
    folder.mkdir(parents=True, exist_ok=True)
    py = sys.executable
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    table = []
    for engine in args.engines.split(","):
        url = {
            "sqlite": f"sqlite:///{folder / 'bench.sqlite'}",
            "duckdb": f"duckdb:///{folder / 'bench.duckdb'}",
            "postgresql": args.postgres,
            "spark": args.spark,
        }[engine]
        if url is None:
            print(f"{engine}: skipped (give its URL with --{engine})", file=sys.stderr)
            continue
        try:  # in a child process, so that no connection to the file outlives it
            _, _, out = measure([py, str(Path(__file__).resolve()), "--build", engine, url,
                                 str(args.rows), str(args.metrics),
                                 "all-differ" if args.all_differ else "two-of-three"], env)
            gen = float(out.split()[-1])
        except Exception as exc:  # noqa: BLE001 - a missing server skips that engine
            print(f"{engine}: skipped ({str(exc).strip().splitlines()[-1]})", file=sys.stderr)
            continue
        print(f"{engine}: {args.rows:,} rows generated in {gen:.1f} s", file=sys.stderr, flush=True)
        cfg = write_config(folder, engine, url, args.metrics)
        runs: dict[str, list[tuple[float, float]]] = {}
        measure([py, "-c", AGGREGATE, str(cfg), PERIOD], env)  # warm-up: the table into the OS cache
        for _ in range(max(1, args.repeat)):  # interleaved, so that a slow spell hits every row alike
            wall, rss, out = measure([py, "-c", AGGREGATE, str(cfg), PERIOD], env)
            runs.setdefault("aggregate query", []).append((float(out.split()[-2]), rss))
            wall, rss, out = measure([py, "-c", IN_PROCESS, str(cfg), PERIOD], env)
            runs.setdefault("run (in-process)", []).append((float(out.split()[-1]), rss))
            wall, rss, _ = measure([py, "-m", "monitor", "run", str(cfg), "--period", PERIOD], env)
            runs.setdefault("run (process)", []).append((wall, rss))
            if not args.skip_pull:
                wall, rss, out = measure([py, "-c", PULL, url, str(args.metrics), engine], env)
                runs.setdefault("pull + scipy", []).append((float(out.split()[-1]), rss))
        for what, got in runs.items():
            table.append((engine, what, statistics.median(t for t, _ in got), max(r for _, r in got)))
        print(f"{engine}: measured", file=sys.stderr, flush=True)

    print(f"\n{args.rows:,} rows x {args.metrics} metrics x 50 segments; {machine()}\n")
    print("| engine | measured | seconds | x aggregate query | peak RSS (MB) |")
    print("|---|---|---:|---:|---:|")
    base = {e: s for e, what, s, _ in table if what == "aggregate query"}
    for engine, what, secs, rss in table:
        print(f"| {engine} | {what} | {secs:.2f} | {secs / base[engine]:.2f} | {rss:.0f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
