"""The engine against the real pipeline: the same data through SQL and through memory.

:func:`compare` writes simulated weeks into a SQLite table, runs them through a real
job (:class:`monitor.runner.Job`: the source's SQL, the analysis, the history
database, the event rules) with a fixed clock, runs the same values through
:class:`tests.sim.engine.Pipeline`, and compares the events week by week and the
p-values metric by metric.
"""

from __future__ import annotations

import inspect
import math
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np

from monitor import runner
from monitor.clock import FixedClock
from monitor.config import load_config
from tests.sim.engine import FIRST_MONDAY, Design, Pipeline, draw, metric_inputs, period_ident, shift_for_f

TESTS = ("auto", "anova", "welch", "kruskal")
DESIGN = Design((40, 30, 25))
SHIFTED = (0, 2)  # metrics m01 (auto) and m03 (welch) move ...
SHIFT_WEEK = 5  # ... from the sixth week on
EFFECT_F = 0.45


@dataclass(frozen=True)
class Comparison:
    """The outcome of :func:`compare`."""

    weeks: int
    engine_events: int
    job_events: int
    agree: bool
    max_p_rel_diff: float
    differences: tuple[tuple[str, str, str, str | None, str | None], ...]  # (side, week, kind, metric, segment)
    note: str | None = None


def runner_supports_confirm() -> bool:
    """Whether :class:`monitor.runner.Job` builds its baseline with ``Baseline.from_history``."""
    return "from_history" in inspect.getsource(runner)


def simulate_values(weeks: int, seed: int) -> list[list[list[np.ndarray]]]:
    """``values[t][i][j]``: week t, metric i, segment j."""
    rng = np.random.default_rng(seed)
    moved = shift_for_f(DESIGN, EFFECT_F)
    return [[draw(rng, DESIGN, moved if (i in SHIFTED and t >= SHIFT_WEEK) else None)
             for i in range(len(TESTS))] for t in range(weeks)]


def write_project(folder: Path, values: list[list[list[np.ndarray]]], confirm: int, seed: int) -> Path:
    """The SQLite source (table ``records``) and the job's YAML file; returns the YAML path."""
    rng = np.random.default_rng(seed + 1)
    con = sqlite3.connect(folder / "records.sqlite")
    cols = ", ".join(f"m{i + 1:02d} REAL" for i in range(len(TESTS)))
    con.execute(f"CREATE TABLE records (id INTEGER PRIMARY KEY, ts TEXT, segment TEXT, {cols})")
    rows = []
    for t, week in enumerate(values):
        monday = datetime.combine(FIRST_MONDAY + timedelta(weeks=t), datetime.min.time())
        for j, label in enumerate(DESIGN.labels):
            for r in range(DESIGN.sizes[j]):
                ts = monday + timedelta(seconds=int(rng.integers(0, 7 * 24 * 3600)))
                values = (float(week[i][j][r]) for i in range(len(TESTS)))
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), label, *values))
    marks = ", ".join("?" for _ in range(len(TESTS) + 2))
    names = ", ".join(f"m{i + 1:02d}" for i in range(len(TESTS)))
    con.executemany(f"INSERT INTO records (ts, segment, {names}) VALUES ({marks})", rows)
    con.commit()
    con.close()
    metrics = "".join(f"  - column: m{i + 1:02d}\n    test: {t}\n" for i, t in enumerate(TESTS))
    path = folder / "job.yaml"
    path.write_text(
        "job: e2e\n"
        "source:\n  url: sqlite:///records.sqlite\n  table: records\n  time_column: ts\n  segment_column: segment\n"
        "period: week\ntimezone: UTC\n"
        f"metrics:\n{metrics}"
        "fdr: {method: bh, level: 0.05}\n"
        f"confirm: {confirm}\n"
        + ("decision: {rule: per_period}\n" if confirm > 1 else "")
        +
        "history: {url: 'sqlite:///history.sqlite'}\n",
        encoding="utf-8",
    )
    return path


def compare(folder: Path, *, confirm: int = 1, weeks: int = 12, seed: int = 7) -> Comparison:
    """Run ``weeks`` simulated weeks through a real job and through the engine; compare."""
    values = simulate_values(weeks, seed)
    path = write_project(folder, values, confirm, seed)
    cfg = load_config(path)
    first, last = period_ident(0), period_ident(weeks - 1)
    clock = FixedClock(datetime.combine(FIRST_MONDAY + timedelta(weeks=weeks + 1), datetime.min.time(),
                                        tzinfo=timezone.utc))
    job = runner.Job(cfg, clock=clock)
    try:
        reports = job.backfill(first, last)
    finally:
        job.close()
    real = {(r.period.ident, e.kind, e.metric, e.segment) for r in reports for e in r.events}

    pipe = Pipeline(cfg)
    mine = set()
    worst = 0.0
    for t, report in enumerate(reports):
        out = pipe.run(period_ident(t), metric_inputs(cfg, DESIGN.labels, values[t]), DESIGN.labels)
        mine |= {(out.period, e.kind, e.metric, e.segment) for e in out.events[cfg.confirm]}
        theirs = {m.metric: m.p_value for m in report.metrics}
        for res in out.results:
            a, b = res.p_value, theirs[res.metric]
            if math.isfinite(a) and math.isfinite(b):
                worst = max(worst, abs(a - b) / max(abs(b), 1e-300))
    diff = tuple(sorted([("engine only", *x) for x in mine - real] + [("job only", *x) for x in real - mine],
                        key=lambda x: tuple(str(v) for v in x)))
    note = None
    if confirm > 1 and not runner_supports_confirm():
        note = "monitor.runner still builds the baseline from one stored period (confirm is ignored there)"
    return Comparison(weeks, len(mine), len(real), not diff, worst, diff, note)
