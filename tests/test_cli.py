"""The command line as a user meets it: global options in either position, log lines,
a pipe closed early, start-up imports, exit codes and what the terminal is shown.

The data are a small invented SQLite table (three hubs, two ISO weeks), built here.
"""

from __future__ import annotations

import ast
import json
import os
import re
import sqlite3
import subprocess
import sys
import tomllib
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from monitor.cli import EXIT_PIPE_CLOSED, build_parser, main

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": str(ROOT)}
WEEK1 = datetime(2026, 3, 2)  # Monday of 2026-W10
STAMP = r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z"


def _write_project(folder: Path, hubs=("A", "B", "C"), weeks: int = 2, column: str = "hub") -> Path:
    rng = np.random.default_rng(11)
    con = sqlite3.connect(folder / "src.sqlite")
    con.execute(f"CREATE TABLE parcels (ts TEXT, {column} TEXT, dwell REAL)")
    rows = []
    for w in range(weeks):
        monday = WEEK1 + timedelta(days=7 * w)
        for i, h in enumerate(hubs):
            for _ in range(30):
                ts = monday + timedelta(hours=float(rng.uniform(0, 167)))
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), h, float(rng.normal(20 + (5 * w if i == 0 else 0), 3))))
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    cfg = folder / "job.yaml"
    cfg.write_text(
        "job: hubs\n"
        f"source:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n  segment_column: {column}\n"
        "period: week\ntimezone: UTC\n"
        "metrics:\n  - column: dwell\n    test: anova\n"
        "history: {url: 'sqlite:///state/history.sqlite'}\n"
        "alerts:\n  - type: log\n    path: logs/alerts.jsonl\n")
    return cfg


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    return _write_project(tmp_path)


# ------------------------------------------------------------------ global options


@pytest.mark.parametrize("argv", [
    ["-v", "run", "job.yaml"], ["run", "job.yaml", "-v"], ["run", "-v", "job.yaml"],
    ["--verbose", "history", "job.yaml"], ["history", "job.yaml", "--verbose"],
])
def test_verbose_is_honoured_before_or_after_the_command(argv):
    assert build_parser().parse_args(argv).verbose is True


@pytest.mark.parametrize("argv", [["--debug", "check", "x.yaml"], ["check", "x.yaml", "--debug"]])
def test_debug_is_honoured_before_or_after_the_command(argv):
    args = build_parser().parse_args(argv)
    assert args.debug is True and args.verbose is False


@pytest.mark.parametrize("argv", [["-q", "run", "x.yaml"], ["run", "x.yaml", "-q"], ["--quiet", "serve", "x.yaml"]])
def test_quiet_is_accepted_in_either_position(argv):
    assert build_parser().parse_args(argv).quiet is True


def test_log_format_either_position_and_default():
    parser = build_parser()
    assert parser.parse_args(["run", "x.yaml"]).log_format == "text"
    assert parser.parse_args(["--log-format", "json", "run", "x.yaml"]).log_format == "json"
    assert parser.parse_args(["run", "x.yaml", "--log-format", "json"]).log_format == "json"


def test_debug_before_the_command_shows_the_traceback(project: Path, capsys):
    assert main(["--debug", "run", str(project), "--period", "nonsense"]) == 2
    assert "Traceback" in capsys.readouterr().err


def test_verbose_before_the_command_logs_timestamped_lines(project: Path, capsys):
    assert main(["-v", "run", str(project), "--period", "2026-W10"]) == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert err, "-v before the command printed no log lines"
    for line in err:
        assert re.match(rf"^{STAMP} (INFO|WARNING|ERROR|DEBUG) [\w.]+: ", line), line
    assert any("computing 2026-W10" in line for line in err)


def test_json_log_format_writes_json_lines(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W10", "-v", "--log-format", "json"]) == 0
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines
    for line in lines:
        rec = json.loads(line)
        assert set(rec) >= {"time", "level", "logger", "message"}
        assert re.fullmatch(STAMP, rec["time"]) and rec["level"] in {"info", "warning", "error", "debug"}


def test_json_log_format_error_is_one_json_line_with_the_exit_code(project: Path, capsys):
    assert main(["--log-format", "json", "run", str(project), "--period", "2026-03"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1
    rec = json.loads(lines[0])
    assert rec["level"] == "error" and rec["exit_code"] == 2 and "2026-03" in rec["message"]


def test_quiet_run_prints_nothing_on_stderr(project: Path, capsys):
    assert main(["-q", "run", str(project), "--period", "2026-W10"]) == 0
    assert capsys.readouterr().err == ""


def test_a_newline_in_a_logged_value_cannot_forge_a_log_line():
    import logging

    from monitor.logs import TextFormatter

    rec = logging.LogRecord("monitor.x", logging.WARNING, __file__, 1, "segment %s", ("A\nERROR forged\x1b[31m",),
                            None)
    line = TextFormatter().format(rec)
    assert "\n" not in line and "\x1b" not in line and "A\\nERROR forged\\x1b[31m" in line


# ------------------------------------------------------------------ a pipe closed early


def _closed_stdout(argv: list[str], cwd: Path) -> subprocess.CompletedProcess:
    """Run segwatch with a stdout whose reader has already gone (as ``| head`` leaves it)."""
    proc = subprocess.Popen([sys.executable, "-m", "monitor", *argv], cwd=cwd, env=ENV,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    proc.stdout.close()  # no reader left: the first write fails with EPIPE
    err = proc.stderr.read()
    proc.stderr.close()
    return subprocess.CompletedProcess(argv, proc.wait(), "", err)


def test_history_json_into_a_closed_pipe_ends_quietly(project: Path):
    assert main(["run", str(project), "--period", "2026-W10"]) == 0
    done = _closed_stdout(["history", str(project), "--json"], project.parent)
    assert done.stderr == "" and done.returncode == EXIT_PIPE_CLOSED == 141


def test_help_into_a_closed_pipe_ends_quietly(tmp_path: Path):
    done = _closed_stdout(["--help"], tmp_path)
    assert done.stderr == "" and done.returncode == 141


def test_a_broken_pipe_elsewhere_is_still_an_error(project: Path, capsys, monkeypatch):
    """Only stdout's reader going away is quiet; a broken pipe inside a command is reported."""
    import monitor.cli as cli

    def boom(args, out):
        raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setitem(cli.COMMANDS, "check", boom)
    assert main(["check", str(project)]) == 1
    assert "BrokenPipeError" in capsys.readouterr().err


# ------------------------------------------------------------------ start-up


_IMPORTS = """
import sys
from monitor.cli import main
try:
    code = main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
heavy = sorted({m.split(".")[0] for m in sys.modules} & {"sqlalchemy", "apscheduler", "numpy", "scipy", "pandas",
                                                         "matplotlib", "statsmodels"})
print("exit", code, "heavy", ",".join(heavy) or "none", file=sys.stderr)
"""


@pytest.mark.parametrize("argv", [["--help"], ["--version"], ["run", "missing.yaml"], ["run", "bad.yaml"],
                                  ["check", "late.yaml"]])
def test_help_version_and_config_errors_import_no_heavy_module(tmp_path: Path, argv):
    (tmp_path / "bad.yaml").write_text(
        "source: {url: 'sqlite:///a.sqlite', table: t, time_column: ts, segment_column: s}\n"
        "period: weak\nmetrics: [{column: x}]\n")
    # a mistake after the URL and the schedule: found before SQLAlchemy or APScheduler is loaded
    (tmp_path / "late.yaml").write_text(
        "source: {url: 'postgresql://u@db.example:5432/x', table: t, time_column: ts, segment_column: s}\n"
        "period: week\nmetrics: [{column: x}]\nschedule: '0 6 * * mon'\nconfirm: 0\n")
    proc = subprocess.run([sys.executable, "-c", _IMPORTS, *argv], cwd=tmp_path, env=ENV,
                          capture_output=True, text=True)
    last = proc.stderr.strip().splitlines()[-1]
    assert last.endswith("heavy none"), proc.stderr
    assert last.startswith("exit 0" if argv[0].startswith("--") else "exit 2"), proc.stderr


def test_cli_imports_where_fcntl_does_not_exist(tmp_path: Path):
    """As on Windows: no fcntl module. The command line starts and the alert log is written."""
    code = (
        "import sys\n"
        "sys.modules['fcntl'] = None  # import fcntl now raises ImportError\n"
        "import monitor.cli, monitor.runner, monitor.delivery.sinks.log as log_sink\n"
        "from pathlib import Path\n"
        "sink = log_sink.LogSink(Path(sys.argv[1]))\n"
        "sink.send('job', '2026-W10', [{'event_key': 'k1', 'kind': 'emerged', 'metric': 'm', 'segment': None,\n"
        "           'message': 'x', 'period': '2026-W10', 'job': 'job', 'detected_at': '2026-01-01T00:00:00Z'}])\n"
        "print(log_sink.fcntl)\n")
    out = tmp_path / "alerts.jsonl"
    proc = subprocess.run([sys.executable, "-c", code, str(out)], env=ENV, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "None"
    assert json.loads(out.read_text().splitlines()[0])["event_key"] == "k1"


def test_statsmodels_is_a_test_dependency_only():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    runtime = [re.split(r"[<>=!\[ ]", d)[0].lower() for d in project["dependencies"]]
    assert "statsmodels" not in runtime
    assert any(d.lower().startswith("statsmodels") for d in project["optional-dependencies"]["test"])
    importers = []
    for path in (ROOT / "monitor").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(n == "statsmodels" or n.startswith("statsmodels.") for n in names):
                importers.append(str(path.relative_to(ROOT)))
    assert importers == []


def test_top_level_api_is_importable_lazily():
    proc = subprocess.run([sys.executable, "-c",
                           "import sys, monitor; assert 'monitor.runner' not in sys.modules; "
                           "from monitor import Job, load_config; print(Job.__name__, load_config.__name__)"],
                          env=ENV, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["Job", "load_config"]


# ------------------------------------------------------------------ exit codes


def test_a_period_held_by_a_process_on_another_host_exits_3(project: Path, capsys, monkeypatch):
    """A lease left by a crashed run under another host name (a container restarted under a new
    name): this host cannot tell that process is gone, so the run is skipped -- with its own exit
    code, which a cron wrapper can retry on -- and the line says when the lease runs out."""
    from monitor.store import ledger as ledger_mod
    from monitor.config import load_config
    from monitor.runner import Job

    with Job(load_config(project)) as job, monkeypatch.context() as m:
        m.setattr(ledger_mod, "new_owner", lambda: "otherbox:14861:0123")
        assert job.ledger.claim("2026-W10").won
    assert main(["run", str(project), "--period", "2026-W10"]) == 3
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert err[0].startswith("Skipped: period 2026-W10 of job hubs is being computed by otherbox:14861:0123 until ")
    assert "if that process has stopped, run again after that time" in err[0]
    assert main(["run", str(project), "--period", "2026-W11"]) == 0  # other periods are not blocked


def test_a_future_period_is_refused_in_one_line(project: Path, capsys):
    assert main(["run", str(project), "--period", "2999-W01"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Error: period 2999-W01: ")
    assert "has not started yet" in err[0] and "the latest complete period is " in err[0]
    assert not (project.parent / "logs" / "alerts.jsonl").exists()  # nothing ran, nothing was written


def test_backfill_into_the_future_is_refused_before_anything_runs(project: Path, capsys):
    from monitor.clock import SystemClock

    next_year = f"{SystemClock().now().year + 1}-W01"
    assert main(["backfill", str(project), "--from", "2026-W10", "--to", next_year]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and f"--to {next_year}" in err[0] and "has not started yet" in err[0]
    assert main(["history", str(project), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["metrics"] == []  # not even the first week was computed


def test_job_periods_refuses_a_range_past_the_clock(project: Path):
    from datetime import timezone

    from monitor.clock import FixedClock
    from monitor.config import load_config
    from monitor.errors import PeriodError
    from monitor.runner import Job

    with Job(load_config(project), clock=FixedClock(datetime(2026, 3, 20, tzinfo=timezone.utc))) as job:
        assert [p.ident for p in job.periods("2026-W10", "2026-W12")] == ["2026-W10", "2026-W11", "2026-W12"]
        with pytest.raises(PeriodError, match="--to 2026-W13: .* has not started yet .* is 2026-W11"):
            job.periods("2026-W10", "2026-W13")
        with pytest.raises(PeriodError, match="period 2026-W13: "):
            job.period("2026-W13")


def test_run_of_a_period_without_rows_says_so_and_exits_4(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W20"]) == 4
    cap = capsys.readouterr()
    err = cap.err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Note: period 2026-W20 of job hubs had no rows (parcels.ts in [")
    assert "nothing stored" in err[0] and "source.time_column" in err[0]
    assert "nothing changed" not in cap.out and "no rows" in cap.out
    assert main(["run", str(project), "--period", "2026-W20", "--json"]) == 4
    doc = json.loads(capsys.readouterr().out)
    assert doc["rows"] == 0 and doc["metrics"] == [] and "no rows" in doc["note"]


def test_run_of_the_latest_period_after_the_data_ended_says_the_latest_is_empty(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W11"]) == 0
    capsys.readouterr()
    assert main(["run", str(project)]) == 4  # the latest complete week: long after the data end
    cap = capsys.readouterr()
    err = cap.err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Note: the latest complete period, ")
    assert "the newest stored period is 2026-W11" in err[0]
    assert "nothing changed" not in cap.out


def test_backfill_tells_empty_periods_apart(project: Path, capsys):
    assert main(["backfill", str(project), "--from", "2026-W10", "--to", "2026-W13"]) == 0
    out = capsys.readouterr().out
    assert "4 periods computed" in out and "2 had no rows, nothing stored for them: 2026-W12, 2026-W13" in out
    assert main(["backfill", str(project), "--from", "2026-W20", "--to", "2026-W22"]) == 4
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no period from 2026-W20 to 2026-W22 of job hubs had rows" in err[0]


def test_json_log_format_notice_for_an_empty_period(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W20", "--log-format", "json"]) == 4
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and json.loads(lines[0])["exit_code"] == 4


# ------------------------------------------------------------------ the terminal


HOSTILE = ("\x1b]0;pwned\x07Osc", "Nl\nforged  line", "\u202eRtl", "\x1b[31mRed")


def test_hostile_labels_are_shown_escaped_in_run_and_history(tmp_path: Path, capsys):
    cfg = _write_project(tmp_path, hubs=HOSTILE)
    assert main(["run", str(cfg), "--period", "2026-W11"]) == 0
    assert main(["history", str(cfg), "--metric", "dwell"]) == 0
    assert main(["history", str(cfg)]) == 0
    out = capsys.readouterr().out
    for bad in ("\x1b", "\x07", "\u202e", "Nl\nforged"):
        assert bad not in out
    assert "\\x1b]0;pwned\\x07Osc" in out and "\\u202eRtl" in out and "Nl\\nforged  line" in out
    # the stored label is the real one: only the terminal copy is escaped
    assert main(["run", str(cfg), "--period", "2026-W11", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert set(HOSTILE) <= {s["segment"] for s in doc["metrics"][0]["segments"]}


def _metric(segments, df, method="anova"):
    return {"metric": "m", "method": method, "statistic": 3.2, "df": df, "p_value": 0.01, "q_value": 0.02,
            "significant": True, "effect_size": {"name": "omega_squared", "value": 0.1}, "segments": segments,
            "assumptions": {}}


def test_long_flag_lists_show_the_furthest_segments_then_plus_n_more():
    from monitor.cli import METRIC_HEADER, TOP_SEGMENTS, _metric_row

    segs = [{"segment": f"s{i:02d}", "n": 10, "mean": 50.0 + (i if i < 25 else 0),
             "flag": "high" if i < 25 else None} for i in range(50)]
    cell = _metric_row(_metric(segs, [49, 1_000_000]))[METRIC_HEADER.index("stands apart")]
    assert cell.endswith(f"+{25 - TOP_SEGMENTS} more")
    assert cell.split(", ")[0] == "s24 ▲"  # the furthest from the overall mean first
    assert cell.count("▲") == TOP_SEGMENTS


@pytest.mark.parametrize(("df", "method", "shown"), [
    ([49, 1_000_000], "anova", "F(49, 1000000)"),
    ([4.0, 88.234], "welch", "F(4, 88.2)"),
    ([3], "kruskal", "H(3)"),
])
def test_degrees_of_freedom_print_as_integers_where_whole(df, method, shown):
    from monitor.cli import _metric_row

    assert _metric_row(_metric([], df, method))[2].startswith(shown + " = ")


# ------------------------------------------------------------------ trying a config safely, exports


def _table_counts(project: Path) -> dict[str, int]:
    db = project.parent / "state" / "history.sqlite"
    if not db.exists():
        return {}
    con = sqlite3.connect(db)
    try:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
        return {n: con.execute(f"SELECT COUNT(*) FROM {n}").fetchone()[0] for n in names}
    finally:
        con.close()


def test_dry_run_prints_results_and_stores_and_sends_nothing(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W10"]) == 0
    before = _table_counts(project)
    log = project.parent / "logs" / "alerts.jsonl"
    lines = log.read_text() if log.exists() else None
    capsys.readouterr()
    assert main(["run", str(project), "--period", "2026-W11", "--dry-run", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["note"] == "dry run: nothing stored, nothing sent"
    # hub A shifts up in W11 (the data above): the comparison with the stored W10 finds it
    assert ("emerged", "dwell") in {(e["kind"], e["metric"]) for e in doc["events"]}
    assert _table_counts(project) == before and (log.read_text() if log.exists() else None) == lines
    assert main(["run", str(project), "--period", "2026-W11", "--dry-run"]) == 0
    assert "dry run: nothing stored, nothing sent" in capsys.readouterr().out
    # the real run afterwards finds the same events (the dry run left no trace to compare with)
    assert main(["run", str(project), "--period", "2026-W11", "--json"]) == 0
    real = json.loads(capsys.readouterr().out)
    assert [e["message"] for e in real["events"]] == [e["message"] for e in doc["events"]]


def test_dry_run_on_a_new_job_creates_no_history(project: Path, capsys):
    assert main(["run", str(project), "--period", "2026-W10", "--dry-run"]) == 0
    assert "dwell" in capsys.readouterr().out
    assert _table_counts(project) == {}
    assert not (project.parent / "logs").exists()


def test_job_run_store_false_deliver_false(project: Path):
    from monitor import Job, load_config

    with Job(load_config(project)) as job:
        report = job.run("2026-W11", store=False, deliver=False)
        assert report.rows == 90 and report.metrics and report.delivery.sent == 0
        with pytest.raises(ValueError, match="deliver=True needs store=True"):
            job.run("2026-W11", store=False, deliver=True)
        job.run("2026-W10")
        kept = job.run("2026-W11", deliver=False)  # stored, its alerts left pending in the outbox
        assert kept.delivery.sent == 0 and kept.new_events > 0
        assert len(job.history.alerts(("pending",))) == kept.new_events
    log = project.parent / "logs" / "alerts.jsonl"
    assert not log.exists() or "2026-W11" not in log.read_text()


def test_history_as_csv_and_json_lines(project: Path, capsys):
    import csv
    import io

    assert main(["backfill", str(project), "--from", "2026-W10", "--to", "2026-W11"]) == 0
    capsys.readouterr()
    assert main(["history", str(project), "--format", "csv"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert len(rows) == 2 * 3  # two weeks x three hubs, one metric
    assert {(r["period"], r["segment"]) for r in rows} == {(w, h) for w in ("2026-W10", "2026-W11") for h in "ABC"}
    assert all(r["metric"] == "dwell" and r["method"] == "anova" and int(r["n"]) == 30 for r in rows)
    assert main(["history", str(project), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    means = {(e["period"], s["segment"]): s["mean"] for e in doc["metrics"] for s in e["segments"]}
    assert {(r["period"], r["segment"]): float(r["mean"]) for r in rows} == means
    assert main(["history", str(project), "--format", "jsonl"]) == 0
    records = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r["period"] for r in records if r["record"] == "metric"] == ["2026-W10", "2026-W11"]
    assert len([r for r in records if r["record"] == "event"]) == len(doc["events"])


def test_sentences_need_no_plural_of_the_segment_column(tmp_path: Path, capsys):
    cfg = _write_project(tmp_path, column="branch")
    assert main(["backfill", str(cfg), "--from", "2026-W10", "--to", "2026-W11"]) == 0
    out = capsys.readouterr().out
    assert "dwell now differs by branch (" in out and "branch A now stands above the rest on dwell" in out
    assert "branchs" not in out
    html = tmp_path / "report.html"
    assert main(["report", str(cfg), "--period", "2026-W11", "--out", str(html)]) == 0
    page = html.read_text()
    assert "differ by branch this week" in page and "branchs" not in page
