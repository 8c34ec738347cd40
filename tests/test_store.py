"""The history store (monitor/store/history.py): what a stored run records, how it reads back.

* every stored run records the settings it was judged by, and the ``history`` command and
  the report judge each stored period by its own stored level, never today's config (the
  bug of issue 13: after ``fdr.level`` went from 0.05 to 0.01 an old week read "q 0.016,
  at or below 0.01");
* results read back typed (:class:`~monitor.model.StoredRun`, :class:`~monitor.model.StoredResult`);
* the layout carries a version (``sw_schema``): an older history is upgraded when opened
  for writing, a newer one refused with one line naming the fix; the frozen fixture
  ``tests/fixtures/history_format0.sqlite`` (written by an earlier release, never
  regenerated) stays readable;
* long entries are stored packed and read back the same;
* reading (``history``, ``report``, ``alerts``) never creates or changes a table, so a
  read-only history works;
* labels of 250-300 characters store on PostgreSQL and MariaDB (issue 18, item 2), live
  on the local servers (skipped when they are not reachable).

The data are invented; the checks are against the values put in.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import sqlite3
import uuid
from dataclasses import replace
from datetime import datetime, timezone
from pathlib import Path

import pytest
import sqlalchemy as sa

from monitor.cli import main
from monitor.config import load_config
from monitor.errors import HistoryError
from monitor.model import (
    Check, EffectSize, MetricResult, PairRow, QualityCounts, RunSettings, SegmentRow, StoredResult, StoredRun,
)
from monitor.periods import parse_period
from monitor.present.report import collect, render_html
from monitor.store.history import PACK_ABOVE, PACK_MARK, SCHEMA_VERSION, History, metadata, metric_results, runs

ROOT = Path(__file__).resolve().parents[1]
FIXTURE = ROOT / "tests" / "fixtures" / "history_format0.sqlite"
T0 = datetime(2026, 3, 16, 6, 0, tzinfo=timezone.utc)
W11 = parse_period("week", "2026-W11", "UTC")
W12 = parse_period("week", "2026-W12", "UTC")


def _config(folder: Path, level: float, job: str = "hubs", history: str | None = None) -> Path:
    path = folder / "job.yaml"
    history = history or f"sqlite:///{folder / 'history.sqlite'}"
    path.write_text(
        f"job: {job}\n"
        "source:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n  segment_column: hub\n"
        "period: week\ntimezone: UTC\n"
        "metrics:\n  - column: dwell\n    test: anova\n    unit: h\n"
        f"fdr: {{method: bh, level: {level}}}\n"
        f"history: {{url: '{history}'}}\n",
        encoding="utf-8")
    return path


def _result(q: float, significant: bool, metric: str = "dwell", segments: tuple[str, ...] = ("A", "B", "C"),
            p: float = 0.004) -> MetricResult:
    segs = tuple(SegmentRow(s, 30 + i, 20.0 + i, 3.0, flag="high" if significant and i == len(segments) - 1
                            else None, diff_vs_rest=float(i) - 1.0, quantiles=(15.0, 18.0, 20.0 + i, 22.0, 25.0))
                 for i, s in enumerate(segments))
    pairs = tuple(PairRow(a, b, -1.0, 0.03, -2.0, 0.0, significant=significant)
                  for i, a in enumerate(segments) for b in segments[i + 1:])
    checks = {"brown_forsythe": Check("brown_forsythe", 0.6, 0.05, True, "spreads alike")}
    return MetricResult(
        metric=metric, column=metric, requested="anova", method="anova", method_reason="Fisher's ANOVA: as asked",
        statistic=5.1, df=(float(len(segments) - 1), 90.0), p_value=p, effect_size=EffectSize("omega_squared", 0.08),
        segments=segs, pairs=pairs, posthoc="tukey-kramer", assumptions=checks, quality=QualityCounts(93), q_value=q,
        significant=significant, unit="h", relevant_checks=("brown_forsythe",), pair_level=0.05)


def _store(history: History, period, results, settings: RunSettings | None, segments=("A", "B", "C")) -> None:
    history.store_period(period, results, [], [], computed_at=T0, fingerprint="f", rows=93, null_segment_rows=0,
                         segments=list(segments), settings=settings)


# ------------------------------------------------------------------ settings and the level a verdict was judged at


def test_each_run_records_its_settings_whole_and_reads_them_back(tmp_path: Path):
    cfg = load_config(_config(tmp_path, 0.05))
    settings = RunSettings.of(cfg, [_result(0.016, True)], version="9.9")
    h = History(cfg.history.url, cfg.job)
    try:
        _store(h, W11, [_result(0.016, True)], settings)
        (run,) = h.runs()
        assert isinstance(run, StoredRun) and run.settings == settings and run.level == 0.05
        assert run.segments == ("A", "B", "C") and run.rows == 93 and run.computed_at == "2026-03-16T06:00:00Z"
        with h.engine.connect() as conn:
            raw = conn.execute(sa.select(runs.c.settings)).scalar_one()
        assert json.loads(raw) == settings.to_json()  # the whole to_json(): fields added later travel with it
    finally:
        h.dispose()


def test_stored_settings_from_another_release_read_back_tolerantly():
    s = RunSettings.of(load_config_text(0.05), version="1.0")
    later = {**s.to_json(), "escalation": {"after": 3, "to": "pager"}}  # a key added by a later release
    assert RunSettings.from_json(later) == s
    earlier = {k: v for k, v in s.to_json().items() if k not in ("confirm", "rule", "pairs", "metrics")}
    back = RunSettings.from_json(earlier)
    assert back.fdr_level == 0.05 and back.confirm == 1 and back.metrics == ()


def load_config_text(level: float):
    from monitor.config import parse_config

    return parse_config({"job": "hubs", "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts",
                                                   "segment_column": "hub"},
                         "period": "week", "timezone": "UTC", "metrics": [{"column": "dwell"}],
                         "fdr": {"method": "bh", "level": level}}, "job.yaml")


def test_an_old_period_is_judged_by_its_stored_level_not_todays_config(tmp_path: Path, capsys):
    # the bug: judged at 0.05 when stored, q 0.016; then fdr.level became 0.01
    cfg = load_config(_config(tmp_path, 0.05))
    h = History(cfg.history.url, cfg.job)
    try:
        _store(h, W11, [_result(0.016, True)], RunSettings.of(cfg, version="x"))
    finally:
        h.dispose()
    path = _config(tmp_path, 0.01)  # today's config
    today = load_config(path)

    h = History(today.history.url, today.job)
    try:
        page = render_html(collect(h, today, "2026-W11"))
    finally:
        h.dispose()
    assert "q 0.016, at or below 0.05, the level it was judged at" in page
    assert "at or below 0.01" not in page and "level 0.01" not in page
    assert "q-values by Benjamini-Hochberg, level 0.05" in page

    assert main(["history", str(path)]) == 0
    text = capsys.readouterr().out
    assert text.splitlines()[0].startswith("hubs: q-value by period; * differs (q <= 0.05)")
    assert not re.search(r"0\.01(?!\d)", text)
    row = next(line for line in text.splitlines() if line.startswith("2026-W11"))
    assert "0.016*" in row

    assert main(["history", str(path), "--json"]) == 0
    (entry,) = json.loads(capsys.readouterr().out)["metrics"]
    assert entry["judged_at"] == 0.05 and entry["q_value"] == 0.016 and entry["significant"] is True

    assert main(["history", str(path), "--format", "csv"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].endswith(",judged_at") and all(line.endswith(",0.05") for line in lines[1:])


def test_periods_judged_at_different_levels_each_show_their_own(tmp_path: Path, capsys):
    cfg = load_config(_config(tmp_path, 0.05))
    h = History(cfg.history.url, cfg.job)
    try:
        _store(h, W11, [_result(0.016, True)], RunSettings.of(cfg, version="x"))
        strict = replace(RunSettings.of(cfg, version="x"), fdr_level=0.01)
        _store(h, W12, [_result(0.016, False)], strict)
        assert [r.judged_at for r in h.results()] == [0.05, 0.01]
    finally:
        h.dispose()
    path = _config(tmp_path, 0.2)
    assert main(["history", str(path)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert "column level" in lines[0] and "0.2" not in "\n".join(lines)
    assert lines[2].split()[:3] == ["period", "level", "dwell"]
    assert lines[4].split()[:3] == ["2026-W11", "0.05", "0.016*"]
    assert lines[5].split()[:3] == ["2026-W12", "0.01", "0.016"]
    h = History(cfg.history.url, cfg.job)
    try:
        page = render_html(collect(h, load_config(path), "2026-W12"))
    finally:
        h.dispose()
    assert "q 0.016, above 0.01, the level it was judged at" in page
    assert "each period judged at its own stored level" in page


def test_a_period_stored_without_settings_keeps_its_stored_verdict(tmp_path: Path, capsys):
    # the frozen fixture was stored before runs recorded their settings (judged at 0.05 then)
    folder = tmp_path / "old"
    folder.mkdir()
    shutil.copyfile(FIXTURE, folder / "history.sqlite")
    path = _config(folder, 0.0777, job="hubs-format0")
    before = {r.metric: r.result.significant for r in _results(folder / "history.sqlite", "hubs-format0")
              if r.period == "2026-W12"}
    assert any(before.values())  # something differed in that week, as stored
    assert main(["history", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert {e["judged_at"] for e in doc["metrics"]} == {None}
    assert {e["metric"]: e["significant"] for e in doc["metrics"] if e["period"] == "2026-W12"} == before
    assert main(["history", str(path)]) == 0
    text = capsys.readouterr().out
    assert "0.0777" not in text and "? a period stored without its settings" in text
    h = History(f"sqlite:///{folder / 'history.sqlite'}", "hubs-format0")
    try:
        cfg = load_config(path)
        page = render_html(collect(h, replace(cfg, metrics=()), "2026-W12"))
    finally:
        h.dispose()
    assert "level not recorded" in page and "0.0777" not in page


def _results(db: Path, job: str) -> list[StoredResult]:
    h = History(f"sqlite:///{db}", job)
    try:
        return h.results()
    finally:
        h.dispose()


# ------------------------------------------------------------------ typed read-back


def test_results_read_back_typed_and_equal_to_what_was_stored(tmp_path: Path):
    cfg = load_config(_config(tmp_path, 0.05))
    h = History(cfg.history.url, cfg.job)
    stored = _result(0.016, True)
    try:
        _store(h, W11, [stored], RunSettings.of(cfg, version="x"))
        (back,) = h.results("dwell")
        assert isinstance(back, StoredResult) and back.period == "2026-W11" and back.judged_at == 0.05
        assert back.result == stored
        assert StoredResult.from_json(back.to_json()) == back
        assert StoredRun.from_json(h.runs()[0].to_json()) == h.runs()[0]
        assert h.results("nothing-of-that-name") == []
    finally:
        h.dispose()


def test_long_entries_are_packed_and_read_back_the_same(tmp_path: Path):
    cfg = load_config(_config(tmp_path, 0.05))
    many = tuple(f"depot-{i:03d}" for i in range(60))  # 1,770 pairs: well over PACK_ABOVE characters
    big = _result(0.2, False, segments=many)
    small = _result(0.2, False, metric="tiny", segments=("A", "B"))
    h = History(cfg.history.url, cfg.job)
    try:
        _store(h, W11, [big, small], RunSettings.of(cfg, version="x"), segments=many)
        with h.engine.connect() as conn:
            rows = {r.metric: r for r in conn.execute(sa.select(metric_results))}
        assert bytes(rows["dwell"].packed).startswith(PACK_MARK)
        assert json.loads(rows["dwell"].payload) == {"format": 2, "metric": "dwell", "packed": "lzma"}
        assert len(rows["dwell"].packed) < len(json.dumps(big.to_json(stored=True, pairs="significant"))) / 3
        assert rows["tiny"].packed is None and json.loads(rows["tiny"].payload)["metric"] == "tiny"
        assert len(rows["tiny"].payload) <= PACK_ABOVE
        back = {r.metric: r.result for r in h.results()}
        assert back["dwell"] == replace(big, pairs=big.kept_pairs("significant"),
                                        pairs_left_out=len(big.pairs) - len(big.kept_pairs("significant")))
        assert back["tiny"] == small
        # event derivation reads the same entries
        (prev,) = h.recent(W12, 1)
        assert prev.metrics["dwell"]["segments"][0]["segment"] == "depot-000" and prev.settings.fdr_level == 0.05
        with h.begin() as conn:  # a damaged packed entry says so
            conn.execute(sa.update(metric_results).where(metric_results.c.metric == "dwell").values(
                packed=PACK_MARK + b"not lzma"))
        with pytest.raises(HistoryError, match=r"stored entry of metric 'dwell' cannot be unpacked"):
            h.results()
    finally:
        h.dispose()


# ------------------------------------------------------------------ the layout version


def test_a_new_history_carries_the_layout_version(tmp_path: Path):
    h = History(f"sqlite:///{tmp_path / 'h.sqlite'}", "hubs")
    try:
        h.ensure()
        with h.engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT name, version FROM sw_schema").all() == [("history", SCHEMA_VERSION)]
    finally:
        h.dispose()


def test_the_frozen_fixture_is_upgraded_when_opened_for_writing_and_reads_the_same(tmp_path: Path):
    db = tmp_path / "history.sqlite"
    shutil.copyfile(FIXTURE, db)
    before = _results(db, "hubs-format0")
    assert len(before) == 12 and {r.period for r in before} == {"2026-W10", "2026-W11", "2026-W12"}
    con = sqlite3.connect(db)
    assert "sw_schema" not in {n for (n,) in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    con.close()
    h = History(f"sqlite:///{db}", "hubs-format0")
    try:
        h.ensure()
        insp = sa.inspect(h.engine)
        assert "settings" in {c["name"] for c in insp.get_columns("sw_runs")}
        assert "packed" in {c["name"] for c in insp.get_columns("sw_metric_results")}
        with h.engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT version FROM sw_schema").scalar_one() == SCHEMA_VERSION
        assert h.results() == before
        assert [r.settings for r in h.runs()] == [None, None, None]
        # a later period stored into it records its settings beside the old ones
        cfg = load_config(_config(tmp_path, 0.05, job="hubs-format0"))
        _store(h, parse_period("week", "2026-W13", "UTC"), [_result(0.016, True)], RunSettings.of(cfg, version="x"))
        assert [r.level for r in h.runs()] == [None, None, None, 0.05]
    finally:
        h.dispose()


def test_a_newer_history_is_refused_with_one_line_naming_the_fix(tmp_path: Path, capsys):
    path = _config(tmp_path, 0.05)
    cfg = load_config(path)
    h = History(cfg.history.url, cfg.job)
    try:
        _store(h, W11, [_result(0.016, True)], RunSettings.of(cfg, version="x"))
        with h.begin() as conn:
            conn.exec_driver_sql("UPDATE sw_schema SET version = 99, written_by = '7.0'")
    finally:
        h.dispose()
    snapshot = (tmp_path / "history.sqlite").read_bytes()
    for argv in (["history", str(path)], ["report", str(path), "--out", str(tmp_path / "r.html")],
                 ["alerts", str(path)]):
        code = main(argv)
        err = capsys.readouterr().err
        assert code != 0 and err.count("\n") == 1, (argv, err)
        assert "has layout version 99, written by segwatch 7.0" in err and "upgrade segwatch" in err, err
    h = History(cfg.history.url, cfg.job)
    try:
        with pytest.raises(HistoryError, match="reads up to version 1: upgrade segwatch"):
            h.ensure()
    finally:
        h.dispose()
    assert (tmp_path / "history.sqlite").read_bytes() == snapshot  # nothing was changed


# ------------------------------------------------------------------ read-only reads


def _digest(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir()) if p.is_file()}


def test_history_report_and_alerts_read_a_read_only_history(tmp_path: Path, capsys):
    # SQLite's read-only open (mode=ro) refuses every write, as a read-only file does for
    # a user who may not write it (chmod is no barrier to root, who runs these tests in CI)
    folder = tmp_path / "ro"
    folder.mkdir()
    shutil.copyfile(FIXTURE, folder / "history.sqlite")
    url = f"sqlite:///file:{folder / 'history.sqlite'}?mode=ro&uri=true"
    path = _config(tmp_path, 0.05, job="hubs-format0", history=url)
    seen = _digest(folder)
    assert main(["history", str(path)]) == 0
    assert "2026-W12" in capsys.readouterr().out
    assert main(["history", str(path), "--metric", "dwell"]) == 0
    assert main(["report", str(path), "--period", "2026-W12", "--out", str(tmp_path / "r.html")]) == 0
    assert "Week 2026-W12" in (tmp_path / "r.html").read_text(encoding="utf-8")
    assert main(["alerts", str(path), "--json"]) == 0
    capsys.readouterr()
    assert _digest(folder) == seen  # nothing written, no table created


def test_reading_an_empty_read_only_history_creates_nothing(tmp_path: Path, capsys):
    db = tmp_path / "empty.sqlite"
    sqlite3.connect(db).close()
    url = f"sqlite:///file:{db}?mode=ro&uri=true"
    path = _config(tmp_path, 0.05, history=url)
    assert main(["history", str(path)]) == 0
    assert "No stored periods for job hubs yet" in capsys.readouterr().out
    assert main(["alerts", str(path)]) == 0
    assert "No pending or dead alerts" in capsys.readouterr().out
    assert main(["report", str(path), "--out", str(tmp_path / "r.html")]) == 2
    assert capsys.readouterr().err.startswith("Error: no stored periods for job hubs")
    assert sqlite3.connect(db).execute("SELECT COUNT(*) FROM sqlite_master").fetchone()[0] == 0


@pytest.mark.skipif(os.geteuid() == 0, reason="as root, chmod does not stop writes: see the mode=ro test")
def test_history_reads_a_history_in_a_read_only_folder(tmp_path: Path, capsys):
    folder = tmp_path / "ro"
    folder.mkdir()
    shutil.copyfile(FIXTURE, folder / "history.sqlite")
    path = _config(tmp_path, 0.05, job="hubs-format0", history=f"sqlite:///{folder / 'history.sqlite'}")
    (folder / "history.sqlite").chmod(0o444)
    folder.chmod(0o555)
    try:
        assert main(["history", str(path)]) == 0
        assert main(["alerts", str(path)]) == 0
    finally:
        folder.chmod(0o755)


# ------------------------------------------------------------------ long labels on server histories

PG_URLS = [os.environ.get("SEGWATCH_TEST_POSTGRES", ""), "postgresql+psycopg://postgres@127.0.0.1:5432/test"]
MARIADB_URLS = [os.environ.get("SEGWATCH_TEST_MARIADB", ""), "mysql+pymysql://root@127.0.0.1:3306/test"]


def _reachable(urls: list[str], what: str) -> sa.Engine:
    errors = []
    for url in (u for u in urls if u):
        try:
            engine = sa.create_engine(url)
            with engine.connect() as conn:
                conn.execute(sa.text("SELECT 1"))
            return engine
        except Exception as exc:  # noqa: BLE001 - any failure: try the next URL
            errors.append(str(exc).splitlines()[0])
    pytest.skip(f"{what} not reachable: {'; '.join(errors)[:300]}")


@pytest.fixture(params=["postgresql", "mariadb"])
def server_history(request):
    """An empty history on a live server: a schema of its own (PostgreSQL) or a database of its own (MariaDB)."""
    tag = f"sw_store_{uuid.uuid4().hex[:10]}"
    if request.param == "postgresql":
        pytest.importorskip("psycopg", reason="psycopg is not installed")
        admin = _reachable(PG_URLS, "PostgreSQL at 127.0.0.1:5432")
        with admin.begin() as conn:
            conn.exec_driver_sql(f'CREATE SCHEMA "{tag}"')
        url = admin.url.set(query={"options": f"-csearch_path={tag}"}).render_as_string(hide_password=False)
        drop = f'DROP SCHEMA "{tag}" CASCADE'
    else:
        pytest.importorskip("pymysql", reason="pymysql is not installed")
        admin = _reachable(MARIADB_URLS, "MariaDB at 127.0.0.1:3306")
        with admin.begin() as conn:
            conn.exec_driver_sql(f"CREATE DATABASE `{tag}` CHARACTER SET utf8mb4")
        url = admin.url.set(database=tag).render_as_string(hide_password=False)
        drop = f"DROP DATABASE `{tag}`"
    try:
        yield request.param, url
    finally:
        with admin.begin() as conn:
            conn.exec_driver_sql(drop)
        admin.dispose()


def _old_layout(url: str) -> None:
    """The tables as releases before schema 1 made them: VARCHAR(200) labels, no settings, no packed entries."""
    old = sa.MetaData()
    for table in metadata.sorted_tables:
        if table.name == "sw_schema":
            continue
        cols = []
        for c in table.columns:
            if c.name in ("settings", "packed"):
                continue
            kind = c.type
            if isinstance(kind, sa.String) and getattr(kind, "length", None) in (200, 400):
                kind = sa.String(kind.length)
            elif c.name == "payload":
                kind = sa.Text()
            cols.append(sa.Column(c.name, kind, primary_key=c.primary_key, nullable=c.nullable))
        # utf8mb3 on MySQL/MariaDB: in utf8mb4 these keys were too long to create at all
        copy = sa.Table(table.name, old, *cols, mysql_charset="utf8mb3")
        for ix in table.indexes:
            sa.Index(ix.name, *(copy.c[c.name] for c in ix.columns))
    engine = sa.create_engine(url)
    try:
        old.create_all(engine)
    finally:
        engine.dispose()


LONG_JOB = "j" * 249 + "é"  # 250 characters, one of them beyond ASCII
LONG_METRIC = "m" * 250
LONG_SEGMENTS = ("s" * 299 + "A", "s" * 299 + "B", "free text " * 30)  # 300 characters each, alike for 299


@pytest.mark.parametrize("upgrade", [False, True], ids=["new", "upgraded"])
def test_long_labels_store_on_postgresql_and_mariadb(server_history, upgrade):
    _engine, url = server_history
    if upgrade:
        _old_layout(url)
    h = History(url, LONG_JOB)
    try:
        cfg = load_config_text(0.05)
        results = [_result(0.016, True, metric=LONG_METRIC, segments=LONG_SEGMENTS)]
        from monitor.model import Event

        events = [Event("segment_new", LONG_METRIC, LONG_SEGMENTS[0], "a new segment"),
                  Event("segment_new", LONG_METRIC, LONG_SEGMENTS[1], "another new segment")]
        h.store_period(W11, results, events, ["log:" + "/very/long/path" * 40], computed_at=T0, fingerprint="f",
                       rows=93, null_segment_rows=0, segments=list(LONG_SEGMENTS), settings=RunSettings.of(cfg))
        (back,) = h.results()
        assert back.result.metric == LONG_METRIC and back.judged_at == 0.05
        assert [s.segment for s in back.result.segments] == list(LONG_SEGMENTS)
        assert h.runs()[0].segments == LONG_SEGMENTS
        assert sorted(e["segment"] for e in h.events()) == sorted(LONG_SEGMENTS[:2])
        assert {a.channel for a in h.alerts(("pending",))} == {"log:" + "/very/long/path" * 40}
        # a re-run replaces, never duplicates
        h.store_period(W11, results, events, ["log:x"], computed_at=T0, fingerprint="f", rows=93,
                       null_segment_rows=0, segments=list(LONG_SEGMENTS), settings=RunSettings.of(cfg))
        assert len(h.results()) == 1 and len(h.events()) == 2
        with h.engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT version FROM sw_schema").scalar_one() == SCHEMA_VERSION
    finally:
        h.dispose()
    # the upgrade leaves the table definitions whole: a history made afterwards still has its keys
    from sqlalchemy.dialects import sqlite

    for table in metadata.sorted_tables:
        assert "PRIMARY KEY" in str(sa.schema.CreateTable(table).compile(dialect=sqlite.dialect())), table.name


def test_setting_the_version_twice_keeps_one_row_and_a_lost_version_row_is_restored(tmp_path: Path):
    # two processes making the same history ready: the second finds the row and updates it
    url = f"sqlite:///{tmp_path / 'h.sqlite'}"
    first, second = History(url, "hubs"), History(url, "hubs")
    try:
        first.ensure()
        second._set_version()
        with first.engine.begin() as conn:
            assert conn.exec_driver_sql("SELECT COUNT(*) FROM sw_schema").scalar_one() == 1
            conn.exec_driver_sql("DELETE FROM sw_schema")  # tables of the current layout, no version: as version 0
        second.ensure()
        with first.engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT name, version FROM sw_schema").all() == [("history", SCHEMA_VERSION)]
    finally:
        first.dispose()
        second.dispose()


def test_alert_rows_and_ledger_entries_read_back_from_their_json(tmp_path: Path, capsys):
    from monitor.model import Event
    from monitor.store.history import AlertRow
    from monitor.store.ledger import LedgerEntry

    path = _config(tmp_path, 0.05)
    cfg = load_config(path)
    h = History(cfg.history.url, cfg.job)
    try:
        h.store_period(W11, [_result(0.016, True)], [Event("emerged", "dwell", None, "dwell now differs")],
                       ["log:/tmp/a.jsonl"], computed_at=T0, fingerprint="f", rows=93, null_segment_rows=0,
                       segments=["A", "B", "C"], settings=RunSettings.of(cfg, version="x"))
        rows = h.alerts(("pending",))
    finally:
        h.dispose()
    assert len(rows) == 1 and [AlertRow.from_json(r.to_json()) for r in rows] == rows
    assert main(["alerts", str(path), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert [AlertRow.from_json(a) for a in doc["alerts"]] == rows
    entry = LedgerEntry("2026-W11", "failed", 2, "boom", None, "host:1:x", T0, T0, T0)
    assert LedgerEntry.from_json(entry.to_json()) == entry
