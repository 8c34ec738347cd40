"""The whole loop through the command line, on a small SQLite source built here.

Two ISO weeks of a toy table: in the first week the three hubs do not differ; in the
second, hub C's dwell time is shifted up. The statistics printed by ``run --json`` are
checked against the reference libraries on the same rows (scipy, statsmodels), and
the stored history, events and alert lines are checked for the re-run rule: running
a period again replaces it and never duplicates results, events or alert lines.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.oneway import anova_oneway

from monitor.cli import main

HUBS = ("A", "B", "C")
WEEK1 = datetime(2026, 3, 2)  # Monday of 2026-W10
WEEK2 = datetime(2026, 3, 9)  # Monday of 2026-W11


def _rows(rng, monday, shift_c):
    rows = []
    for h in HUBS:
        n = {"A": 40, "B": 55, "C": 35}[h]
        for i in range(n):
            ts = monday + timedelta(hours=float(rng.uniform(0, 7 * 24 - 0.01)))
            dwell = rng.normal(20 + (shift_c if h == "C" else 0), 3 if h != "B" else 4)
            cost = float(rng.gamma(2.0, 5.0))
            rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), h, float(dwell), cost))
    return rows


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    rng = np.random.default_rng(7)
    db = tmp_path / "src.sqlite"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE parcels (id INTEGER PRIMARY KEY, ts TEXT, hub TEXT, dwell REAL, cost REAL)")
    rows = _rows(rng, WEEK1, 0.0) + _rows(rng, WEEK2, 6.0)
    rows.append((WEEK2.strftime("%Y-%m-%d 10:00:00"), None, 21.0, 3.0))  # a row without a hub
    rows.append((WEEK2.strftime("%Y-%m-%d 11:00:00"), "A", None, 3.0))  # a NULL value
    # boundary rows: exactly at the start of week 2 (belongs to W11) and a second before it (W10)
    rows.append(("2026-03-09 00:00:00", "B", 20.0, 1.0))
    rows.append(("2026-03-08 23:59:59", "B", 20.0, 1.0))
    con.executemany("INSERT INTO parcels (ts, hub, dwell, cost) VALUES (?, ?, ?, ?)", rows)
    con.commit()
    con.close()
    (tmp_path / "job.yaml").write_text(
        "job: hubs\n"
        "source:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n  segment_column: hub\n"
        "period: week\ntimezone: Europe/Berlin\n"
        "metrics:\n  - column: dwell\n    test: anova\n  - column: cost\n    test: welch\n"
        "  - name: dwell_ranks\n    column: dwell\n    test: kruskal\n"
        "fdr: {method: bh, level: 0.05}\n"
        "history: {url: 'sqlite:///state/history.sqlite'}\n"
        "alerts:\n  - type: log\n    path: logs/alerts.jsonl\n"
    )
    return tmp_path


def _week_values(db: Path, monday: datetime, column: str) -> dict[str, np.ndarray]:
    con = sqlite3.connect(db)
    end = monday + timedelta(days=7)
    out = {}
    for h in HUBS:
        vals = con.execute(
            f"SELECT {column} FROM parcels WHERE hub = ? AND ts >= ? AND ts < ? AND {column} IS NOT NULL",
            (h, monday.strftime("%Y-%m-%d %H:%M:%S"), end.strftime("%Y-%m-%d %H:%M:%S")),
        ).fetchall()
        out[h] = np.array([v[0] for v in vals], dtype=float)
    con.close()
    return out


def _run_json(capsys, cfg: Path, period: str) -> dict:
    assert main(["run", str(cfg), "--period", period, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_two_periods_match_references_and_rerun_does_not_duplicate(project: Path, capsys):
    cfg = project / "job.yaml"
    first = _run_json(capsys, cfg, "2026-W10")
    second = _run_json(capsys, cfg, "2026-W11")

    # contract fields, top level
    assert set(first) >= {"job", "period", "start", "end", "metrics", "events"}
    assert first["job"] == "hubs" and first["period"] == "2026-W10"
    assert first["start"] == "2026-03-02T00:00:00+01:00" and first["end"] == "2026-03-09T00:00:00+01:00"

    by = {m["metric"]: m for m in second["metrics"]}
    assert list(by) == ["dwell", "cost", "dwell_ranks"]
    for m in second["metrics"]:
        assert set(m) >= {"metric", "method", "statistic", "df", "p_value", "q_value", "significant",
                          "effect_size", "segments", "pairs", "assumptions"}

    groups = _week_values(project / "src.sqlite", WEEK2, "dwell")
    ref = stats.f_oneway(*groups.values())  # reference: scipy.stats.f_oneway
    assert by["dwell"]["method"] == "anova"
    assert by["dwell"]["statistic"] == pytest.approx(ref.statistic, rel=1e-9)
    assert by["dwell"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-6)
    n = sum(len(v) for v in groups.values())
    assert by["dwell"]["df"] == [2, n - 3]
    seg = {s["segment"]: s for s in by["dwell"]["segments"]}
    assert seg["B"]["n"] == len(groups["B"])  # the 00:00:00 boundary row belongs to W11
    assert seg["B"]["sd"] == pytest.approx(np.std(groups["B"], ddof=1), rel=1e-9)  # reference: numpy

    costs = _week_values(project / "src.sqlite", WEEK2, "cost")
    w = anova_oneway(list(costs.values()), use_var="unequal")  # reference: statsmodels Welch ANOVA
    assert by["cost"]["statistic"] == pytest.approx(w.statistic, rel=1e-6)
    assert by["cost"]["df"][1] == pytest.approx(w.df_denom, rel=1e-6)

    kw = stats.kruskal(*groups.values())  # reference: scipy.stats.kruskal (tie-corrected)
    assert by["dwell_ranks"]["method"] == "kruskal"
    assert by["dwell_ranks"]["statistic"] == pytest.approx(kw.statistic, rel=1e-9)
    assert by["dwell_ranks"]["df"] == [2]

    # q-values: Benjamini-Hochberg across the three metrics (reference: statsmodels multipletests)
    p = [m["p_value"] for m in second["metrics"]]
    q = multipletests(p, method="fdr_bh")[1]
    assert [m["q_value"] for m in second["metrics"]] == pytest.approx(list(q), rel=1e-12)

    # the planted shift: dwell significant in W11, C flagged high; not in W10
    assert by["dwell"]["significant"] is True
    assert seg["C"]["flag"] == "high"
    assert {s["flag"] for s in seg.values() if s["segment"] != "C"} <= {None, "low"}
    kinds2 = {(e["kind"], e["metric"], e["segment"]) for e in second["events"]}
    assert ("emerged", "dwell", None) in kinds2
    assert ("emerged", "dwell", "C") in kinds2
    first_dwell = next(m for m in first["metrics"] if m["metric"] == "dwell")
    assert first_dwell["significant"] is False
    # the NULL-hub row is counted and reported, not grouped
    assert second["null_segment_rows"] == 1
    assert any(e["kind"] == "data_quality" and e["metric"] is None for e in second["events"])

    # history holds each period once; alert log holds each event once
    hist = sa.create_engine(f"sqlite:///{project / 'state' / 'history.sqlite'}")
    with hist.connect() as c:
        def count(table: str) -> int:
            return c.execute(sa.text(f"SELECT COUNT(*) FROM {table}")).scalar_one()
        before = {t: count(t) for t in ("sw_runs", "sw_metric_results", "sw_segment_results",
                                        "sw_pair_results", "sw_events", "sw_outbox")}
    log_path = project / "logs" / "alerts.jsonl"
    lines_before = log_path.read_text().splitlines()
    assert before["sw_runs"] == 2 and before["sw_metric_results"] == 6
    assert len(lines_before) == before["sw_events"] == len(first["events"]) + len(second["events"])
    for line in lines_before:
        rec = json.loads(line)
        assert {"job", "period", "kind", "metric", "segment", "message", "detected_at"} <= set(rec)
        assert rec["detected_at"].endswith("Z")

    again = _run_json(capsys, cfg, "2026-W11")
    assert again["metrics"] == second["metrics"]
    with hist.connect() as c:
        after = {t: c.execute(sa.text(f"SELECT COUNT(*) FROM {t}")).scalar_one() for t in before}
    assert after == before
    assert log_path.read_text().splitlines() == lines_before


def test_history_and_check_commands(project: Path, capsys):
    cfg = project / "job.yaml"
    assert main(["check", str(cfg), "--period", "2026-W10"]) == 0  # a week with data
    out = capsys.readouterr().out
    assert "all configured columns present" in out and out.strip().endswith("ok")
    assert main(["history", str(cfg)]) == 0
    assert "No stored periods" in capsys.readouterr().out
    assert main(["backfill", str(cfg), "--from", "2026-W10", "--to", "2026-W11"]) == 0
    text = capsys.readouterr().out
    assert "2 periods computed" in text and "emerged" in text
    assert main(["history", str(cfg), "--metric", "dwell"]) == 0
    table = capsys.readouterr().out
    assert "2026-W10" in table and "2026-W11" in table and "▲" in table
    assert main(["history", str(cfg), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert {e["period"] for e in doc["metrics"]} == {"2026-W10", "2026-W11"}


# ------------------------------------------------------------------ bad inputs


def test_bad_period_is_usage_error(project: Path, capsys):
    assert main(["run", str(project / "job.yaml"), "--period", "2026-03"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("Error: ") and "2026-03" in err and "week" in err
    assert len(err.strip().splitlines()) == 1


def test_missing_column_lists_real_columns(project: Path, capsys):
    cfg = project / "job.yaml"
    cfg.write_text(cfg.read_text().replace("column: cost", "column: costs"))
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 2
    err = capsys.readouterr().err.strip()
    assert "metrics[1].column" in err and "'costs'" in err and "columns there: id, ts, hub, dwell, cost" in err
    assert len(err.splitlines()) == 1


def test_missing_table_lists_tables(project: Path, capsys):
    cfg = project / "job.yaml"
    cfg.write_text(cfg.read_text().replace("table: parcels", "table: parcel"))
    assert main(["check", str(cfg)]) == 2
    err = capsys.readouterr().err.strip()
    assert "source.table" in err and "no table 'parcel'" in err and "tables there: parcels" in err


def test_unreachable_source_is_run_failure(project: Path, capsys, monkeypatch):
    monkeypatch.setattr("monitor.source.reader.RETRY_BASE_SECONDS", 0.0)
    cfg = project / "job.yaml"
    cfg.write_text(cfg.read_text().replace("sqlite:///src.sqlite", "sqlite:///missing/dir/src.sqlite"))
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("Error: ") and "src.sqlite" in err and "Traceback" not in err
    assert len(err.splitlines()) == 1


def test_bad_sql_in_query_source_is_run_failure(project: Path, capsys):
    cfg = project / "job.yaml"
    text = cfg.read_text().replace("  table: parcels\n", "  query: SELECT * FROM nowhere\n")
    cfg.write_text(text)
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 1
    err = capsys.readouterr().err.strip()
    assert "no such table: nowhere" in err and len(err.splitlines()) == 1


def test_query_source_wrapped_as_subquery(project: Path, capsys):
    cfg = project / "job.yaml"
    cfg.write_text(cfg.read_text().replace(
        "  table: parcels\n", "  query: \"SELECT ts, hub, dwell, cost FROM parcels WHERE hub <> 'B'\"\n"))
    doc = _run_json(capsys, cfg, "2026-W11")
    segs = {s["segment"] for s in doc["metrics"][0]["segments"]}
    assert segs == {"A", "C"}


def test_history_not_writable_is_run_failure(project: Path, capsys):
    cfg = project / "job.yaml"
    (project / "blocker").write_text("a file where a folder should be")
    cfg.write_text(cfg.read_text().replace("sqlite:///state/history.sqlite", "sqlite:///blocker/h.sqlite"))
    assert main(["run", str(cfg), "--period", "2026-W10"]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("Error: ") and "blocker" in err and len(err.splitlines()) == 1


def test_debug_shows_traceback(project: Path, capsys):
    assert main(["run", str(project / "job.yaml"), "--period", "nonsense", "--debug"]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_python_dash_m_is_the_same_program(project: Path):
    proc = subprocess.run([sys.executable, "-m", "monitor", "run", str(project / "job.yaml"),
                           "--period", "2026-W99"], capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.startswith("Error: ") and "2026-W99" in proc.stderr


# A run's memory peak: the statistical routines (scipy) and the source's work are kept apart.
# In a fresh interpreter: the command line imports no scipy; an engine inside the process
# (SQLite here, as DuckDB) is read before scipy is loaded; for a server, scipy is loaded
# while the server works, by the time the fetch returns. The run's output must still agree
# with scipy (checked by the other tests here), so loading late cannot lose a result.
_LOAD_ORDER = """
import sys
import monitor.cli
from monitor import source
from monitor.config import load_config
from monitor.runner import Job
print("scipy at import:", any(m == "scipy" or m.startswith("scipy.") for m in sys.modules))
import monitor.runner as runner
started = []
background = runner.load_statistics_in_background
def loader():
    started.append(True)
    return background()
runner.load_statistics_in_background = loader
fetch = source.Source.fetch
def watched(self, period):
    print("scipy before fetch:", "scipy.stats" in sys.modules)
    out = fetch(self, period)
    # Whether the loading started while the source worked (not whether it has finished:
    # that depends on the machine's load).
    print("loader started before the fetch ended:", bool(started))
    if not started:
        print("scipy after fetch:", "scipy.stats" in sys.modules)
    return out
source.Source.fetch = watched
if sys.argv[2] == "remote":  # as a database server would be
    source.Source.remote = property(lambda self: True)
report = Job(load_config(sys.argv[1])).run("2026-W11")
print("scipy after run:", "scipy.stats" in sys.modules, [m.method for m in report.metrics])
"""


@pytest.mark.parametrize("where", ["in-process", "remote"])
def test_statistics_load_apart_from_the_source(project: Path, where: str):
    proc = subprocess.run([sys.executable, "-c", _LOAD_ORDER, str(project / "job.yaml"), where],
                          capture_output=True, text=True, cwd=project)
    assert proc.returncode == 0, proc.stderr
    lines = dict(line.split(": ", 1) for line in proc.stdout.splitlines())
    assert lines["scipy at import"] == "False"
    if where == "in-process":  # remote: the loader thread starts just before the fetch and may win the race
        assert lines["scipy before fetch"] == "False"
    assert lines["loader started before the fetch ended"] == ("True" if where == "remote" else "False")
    if where == "in-process":
        assert lines["scipy after fetch"] == "False"
    assert lines["scipy after run"].startswith("True")
    assert "anova" in lines["scipy after run"] and "kruskal" in lines["scipy after run"]


def test_run_json_pairs_option_keeps_small_families_whole(project: Path, capsys):
    # a few hubs: every pair is printed in every form, and nothing is counted as left out
    cfg = project / "job.yaml"
    default = _run_json(capsys, cfg, "2026-W10")
    assert main(["run", str(cfg), "--period", "2026-W10", "--json", "--pairs", "all"]) == 0
    full = json.loads(capsys.readouterr().out)
    for a, b in zip(default["metrics"], full["metrics"]):
        k = len(a["segments"])
        assert a["pairs"] == b["pairs"] and len(b["pairs"]) == k * (k - 1) // 2
        assert a["pairs_left_out"] == b["pairs_left_out"] == 0
    with pytest.raises(SystemExit):
        main(["run", str(cfg), "--json", "--pairs", "some"])
