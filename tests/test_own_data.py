"""The first hour with one's own data: what ``check`` and ``run`` say about tables and
files that are not the demo's.

Each mistake here once passed ``check`` with "ok" and then ran as "0 rows" (issue 15):
a time column of ``dd/mm/yyyy HH:MM`` text or of Unix epoch integers, a text metric
column, a mistyped SQLite path (created as an empty file), a period whose window holds
no rows. Each must now end in one line naming the key, the column and the fix. And
files as sources: an in-memory DuckDB over a CSV named relative to the config file, the
``source.file`` shorthand for CSV and Parquet, the real DuckDB version in ``check``.

The data are invented (parcel depots); the numbers a run computes from a file are
compared with the same rows in SQLite, whose path is itself checked against scipy and
NIST StRD in ``test_source_pushdown.py`` and ``test_engines.py``.
"""

from __future__ import annotations

import csv
import json
import sqlite3
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.config import load_config
from monitor.errors import EXIT_EMPTY, SourceError
from monitor.source import Source

MONDAY = datetime(2026, 3, 2)  # 2026-W10
SEGMENTS = ("north", "south", "east")


def parcel_rows(n: int = 240) -> list[tuple[datetime, str, float]]:
    """Three depots, every 41 minutes from Monday 2 March 2026 (about six and a half days)."""
    rows = []
    for i in range(n):
        seg = SEGMENTS[i % 3]
        rows.append((MONDAY + timedelta(minutes=41 * i), seg, 10.0 + (i % 3) + ((i * 7919) % 13) / 4.0))
    return rows


def write_sqlite(path: Path, time_type: str, time_of, *, metric_type: str = "REAL", metric_of=float) -> None:
    con = sqlite3.connect(path)
    con.execute(f"CREATE TABLE parcels (t {time_type}, depot TEXT, dwell {metric_type})")
    con.executemany("INSERT INTO parcels VALUES (?, ?, ?)",
                    [(time_of(t), seg, metric_of(v)) for t, seg, v in parcel_rows()])
    con.commit()
    con.close()


def write_config(folder: Path, source: dict, name: str = "job.yaml", metrics=None) -> Path:
    path = folder / name
    path.write_text(json.dumps({  # JSON is YAML
        "job": "own", "period": "week", "timezone": "UTC",
        "source": {"time_column": "t", "segment_column": "depot", **source},
        "metrics": metrics or [{"column": "dwell"}],
        "history": {"url": "sqlite:///history.sqlite"},
    }), encoding="utf-8")
    return path


def cli(argv, capsys) -> tuple[int, str, list[str]]:
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err.strip().splitlines()


def iso(t: datetime) -> str:
    return f"{t:%Y-%m-%d %H:%M:%S}"


# ---------------------------------------------------------------- the time column


def test_check_refuses_day_month_year_text(tmp_path, capsys):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", lambda t: f"{t:%d/%m/%Y %H:%M}")
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1 and "ok" not in out.split()
    assert err[0].startswith(f"Error: {cfg}: source.time_column: 't' holds text segwatch cannot place in time "
                             "(e.g. '02/03/2026 00:00'; 100 of the 100 values read)"), err
    # the fix: what is read, and SQLite's conversion for this shape
    assert "ISO 8601 text (2026-03-02 14:30:00" in err[0]
    assert "substr(t, 7, 4) || '-' || substr(t, 4, 2) || '-' || substr(t, 1, 2) || substr(t, 11) AS t" in err[0]


def test_the_suggested_sqlite_conversion_places_the_rows(tmp_path, capsys):
    """The fix check names, pasted into a source.query, gives the week its rows."""
    write_sqlite(tmp_path / "own.sqlite", "TEXT", lambda t: f"{t:%d/%m/%Y %H:%M}")
    conv = "substr(t, 7, 4) || '-' || substr(t, 4, 2) || '-' || substr(t, 1, 2) || substr(t, 11) AS t"
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "query": f"SELECT {conv}, depot, dwell FROM parcels"})
    code, out, err = cli(["check", str(cfg), "--period", "2026-W10"], capsys)
    assert code == 0 and out.strip().endswith("ok"), (out, err)
    assert "2026-W10: 2 queries of the period answered; 240 rows in it" in out


@pytest.mark.parametrize("declared", ["INTEGER", ""])  # a typed column, and SQLite's typeless one
def test_check_refuses_epoch_integers(tmp_path, capsys, declared):
    write_sqlite(tmp_path / "own.sqlite", declared, lambda t: int(t.replace(tzinfo=timezone.utc).timestamp()))
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1, err
    head = (f"Error: {cfg}: source.time_column: 't' has type INTEGER, numbers, not timestamps or dates" if declared
            else f"Error: {cfg}: source.time_column: 't' holds numbers (e.g. 1772409600; 100 of the 100 values "
                 "read), not timestamps or dates")
    assert err[0].startswith(head), err
    assert "if they are Unix epoch seconds, convert them in a source.query: datetime(t, 'unixepoch') AS t" in err[0]


def test_iso_text_with_a_zone_and_dates_pass(tmp_path, capsys):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", lambda t: f"{t:%Y-%m-%dT%H:%M:%S}+00:00")
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["check", str(cfg), "--period", "2026-W10"], capsys)
    assert code == 0 and "240 rows in it" in out, (out, err)


# ---------------------------------------------------------------- metric columns


def test_check_refuses_a_text_metric_column(tmp_path, capsys):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", iso, metric_type="TEXT", metric_of=lambda v: f"{v:.2f} h")
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1, err
    assert err[0] == (f"Error: {cfg}: metrics[0].column: 'dwell' has type TEXT, not a number; point the metric "
                      "at a numeric column, or convert it in a source.query (CAST(dwell AS DOUBLE PRECISION) AS dwell)")


def test_check_refuses_text_in_a_query_sources_metric(tmp_path, capsys):
    """A query: source has no column types: check reads the values (DuckDB over a CSV)."""
    pytest.importorskip("duckdb_engine")
    with open(tmp_path / "parcels.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t", "depot", "dwell"])
        w.writerows([(iso(t), seg, f"{v:.2f} h") for t, seg, v in parcel_rows()])
    cfg = write_config(tmp_path, {"url": "duckdb:///:memory:",
                                  "query": "SELECT * FROM read_csv_auto('parcels.csv')"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1, err
    assert err[0].startswith(f"Error: {cfg}: metrics[0].column: 'dwell' holds text (e.g. '10.00 h'; "
                             "100 of the 100 values read), not numbers"), err


# ---------------------------------------------------------------- the window, counted


def test_check_counts_the_period_and_says_when_it_is_empty(tmp_path, capsys):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", iso)
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["check", str(cfg), "--period", "2026-W10"], capsys)
    assert code == 0 and "window   2026-W10: 2 queries of the period answered; 240 rows in it" in out
    # the default: the latest complete week by today's clock, long after the data end
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == EXIT_EMPTY and "ok" not in out.split(), out
    assert len(err) == 1 and err[0].startswith("Note: period ") and " of job own has no rows (parcels.t in [" in err[0]
    newest = iso(parcel_rows()[-1][0])
    assert f"the newest record is {newest}: check an earlier period with --period" in err[0]


def test_run_of_an_empty_latest_period_names_the_newest_record(tmp_path, capsys):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", iso)
    cfg = write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})
    code, out, err = cli(["run", str(cfg)], capsys)
    assert code == EXIT_EMPTY and len(err) == 1, err
    assert "nothing stored; the newest record is " + iso(parcel_rows()[-1][0]) + "; nothing is stored yet" in err[0]


# ---------------------------------------------------------------- SQLite files: read-only, never created


def test_a_mistyped_sqlite_path_is_not_created(tmp_path, capsys, monkeypatch):
    monkeypatch.setattr("monitor.source.reader.RETRY_BASE_SECONDS", 0.0)
    write_sqlite(tmp_path / "own.sqlite", "TEXT", iso)
    cfg = write_config(tmp_path, {"url": "sqlite:///onw.sqlite", "table": "parcels"})
    for command in ("check", "run"):
        code, out, err = cli([command, str(cfg)], capsys)
        assert code == 1 and len(err) == 1, err
        assert err[0] == (f"Error: cannot connect to the source sqlite:///{tmp_path / 'onw.sqlite'} after 3 attempts: "
                          f"no such file: {tmp_path / 'onw.sqlite'} (a SQLite source is opened read-only, never "
                          "created; check the path in source.url: a relative one is taken from the config file's "
                          "folder)")
        assert not (tmp_path / "onw.sqlite").exists()


def test_a_sqlite_source_is_opened_read_only(tmp_path):
    write_sqlite(tmp_path / "own.sqlite", "TEXT", iso)
    src = Source(load_config(write_config(tmp_path, {"url": "sqlite:///own.sqlite", "table": "parcels"})))
    try:
        with src.engine.connect() as conn:
            with pytest.raises(SourceError, match="SQLite refused it .attempt to write a readonly database"):
                conn.exec_driver_sql("DELETE FROM parcels")
            assert conn.exec_driver_sql("SELECT COUNT(*) FROM parcels").scalar() == 240
    finally:
        src.dispose()


# ---------------------------------------------------------------- DuckDB over files


def _csv(path: Path) -> None:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t", "depot", "dwell"])
        w.writerows([(iso(t), seg, repr(v)) for t, seg, v in parcel_rows()])


def _reference(tmp_path: Path):
    """The same rows through SQLite: the statistic and p of the week."""
    write_sqlite(tmp_path / "ref.sqlite", "TEXT", iso)
    return _run_json(write_config(tmp_path, {"url": "sqlite:///ref.sqlite", "table": "parcels"}, "ref.yaml"))


def _run_json(cfg: Path) -> dict:
    import io
    from contextlib import redirect_stdout

    buf = io.StringIO()
    with redirect_stdout(buf):
        assert main(["run", str(cfg), "--period", "2026-W10", "--json", "--dry-run"]) == 0
    return json.loads(buf.getvalue())


def _same_numbers(doc: dict, ref: dict) -> None:
    assert doc["rows"] == ref["rows"] == 240
    (m,), (r,) = doc["metrics"], ref["metrics"]
    assert m["statistic"] == pytest.approx(r["statistic"], rel=1e-12)
    assert m["p_value"] == pytest.approx(r["p_value"], rel=1e-9)


def test_in_memory_duckdb_reads_a_csv_named_relative_to_the_config(tmp_path, monkeypatch, capsys):
    pytest.importorskip("duckdb_engine")
    (tmp_path / "jobs" / "data").mkdir(parents=True)
    _csv(tmp_path / "jobs" / "data" / "parcels.csv")
    cfg = write_config(tmp_path / "jobs", {"url": "duckdb:///:memory:",
                                           "query": "SELECT * FROM read_csv_auto('data/parcels.csv')"})
    monkeypatch.chdir(tmp_path)  # not the config's folder
    _same_numbers(_run_json(cfg), _reference(tmp_path))
    code, out, err = cli(["check", str(cfg), "--period", "2026-W10"], capsys)
    import duckdb

    assert code == 0, err
    assert f"source   duckdb {duckdb.__version__}: 3 columns" in out  # not duckdb-engine's "8.0"


@pytest.mark.parametrize("kind", ["csv", "parquet"])
def test_source_file_shorthand(tmp_path, monkeypatch, capsys, kind):
    pytest.importorskip("duckdb_engine")
    (tmp_path / "jobs").mkdir()
    _csv(tmp_path / "parcels.csv")
    name = "parcels.csv"
    if kind == "parquet":
        import duckdb

        con = duckdb.connect()
        con.execute(f"COPY (SELECT * FROM read_csv_auto('{tmp_path / 'parcels.csv'}')) "
                    f"TO '{tmp_path / 'parcels.parquet'}' (FORMAT parquet)")
        con.close()
        name = "parcels.parquet"
    cfg = write_config(tmp_path / "jobs", {"file": f"../{name}"})
    monkeypatch.chdir(tmp_path / "jobs")
    _same_numbers(_run_json(cfg), _reference(tmp_path))
    code, out, err = cli(["check", str(cfg), "--period", "2026-W10"], capsys)
    assert code == 0 and "240 rows in it" in out, err


@pytest.mark.parametrize("source, words", [
    ({"file": "parcels.xlsx"}, "source.file: is not a file segwatch can read by its name's ending (given: "
                               "'parcels.xlsx'; accepted: a .csv, .tsv, .csv.gz, .tsv.gz, .parquet file"),
    ({"file": "parcel.csv"}, "source.file: no such file: {folder}/parcel.csv (given: 'parcel.csv'"),
    ({"file": "parcels.csv", "table": "parcels"}, "source.table: cannot be combined with source.file"),
])
def test_source_file_is_checked_at_the_edge(tmp_path, capsys, source, words):
    _csv(tmp_path / "parcels.csv")
    cfg = write_config(tmp_path, source)
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1 and f"Error: {cfg}: " + words.format(folder=tmp_path) in err[0], err


def test_a_query_over_a_day_month_year_csv_is_refused_with_duckdbs_fix(tmp_path, capsys):
    pytest.importorskip("duckdb_engine")
    with open(tmp_path / "parcels.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(["t", "depot", "dwell"])
        w.writerows([(f"{t:%d/%m/%Y %H:%M}", seg, v) for t, seg, v in parcel_rows()])
    cfg = write_config(tmp_path, {"file": "parcels.csv", "naive_time": "utc"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1, err
    assert "source.time_column: 't' holds text segwatch cannot place in time (e.g. '02/03/2026 00:00'" in err[0]
    assert "strptime(t, '%d/%m/%Y %H:%M') AS t" in err[0]
    # the fix, pasted in: the week's rows
    fixed = write_config(tmp_path, {"url": "duckdb:///:memory:", "query": (
        "SELECT strptime(t, '%d/%m/%Y %H:%M') AS t, depot, dwell FROM read_csv_auto('parcels.csv', all_varchar=true)")},
        "fixed.yaml", metrics=[{"column": "dwell"}])
    code, out, err = cli(["check", str(fixed), "--period", "2026-W10"], capsys)
    assert code == 2 and "metrics[0].column: 'dwell' holds text" in err[0]  # all_varchar: the metric is text too
    fixed = write_config(tmp_path, {"url": "duckdb:///:memory:", "query": (
        "SELECT strptime(t, '%d/%m/%Y %H:%M') AS t, depot, dwell FROM read_csv_auto('parcels.csv', "
        "types={'t': 'VARCHAR'})")}, "fixed.yaml")
    code, out, err = cli(["check", str(fixed), "--period", "2026-W10"], capsys)
    assert code == 0 and "240 rows in it" in out, (out, err)



def test_source_file_without_duckdb_says_what_to_install(tmp_path, capsys, monkeypatch):
    import importlib.util

    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "duckdb_engine" else real(name, *a))
    _csv(tmp_path / "parcels.csv")
    cfg = write_config(tmp_path, {"file": "parcels.csv"})
    code, out, err = cli(["check", str(cfg)], capsys)
    assert code == 2 and len(err) == 1, err
    assert err[0] == (f"Error: {cfg}: source.file: is read through DuckDB, which is not installed (given: "
                      "'parcels.csv'; accepted: pip install duckdb duckdb-engine (or the engines extra: "
                      "pip install -e '.[engines]'))")
