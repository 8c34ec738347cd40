"""The demo database (sample_db/depots.py) and its job config (configs/demo.yaml).

The generator is checked from outside: week membership comes from the standard library's ISO 8601
calendar, time zones from zoneinfo, and the planted statistical stories from scipy.stats.
"""

from __future__ import annotations

import importlib.util
import sqlite3
import sys
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
GENERATOR = ROOT / "sample_db" / "depots.py"
CONFIG = ROOT / "configs" / "demo.yaml"
BERLIN = ZoneInfo("Europe/Berlin")


def _load_generator():
    spec = importlib.util.spec_from_file_location("segwatch_sample_depots", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up here
    spec.loader.exec_module(module)
    return module


depots = _load_generator()


def week_start(week: int) -> date:
    # reference: datetime.date.fromisocalendar (ISO 8601 week date, Monday start)
    return date.fromisocalendar(2026, week, 1)


def rows(path: Path) -> list[tuple]:
    with sqlite3.connect(path) as con:
        out = con.execute("SELECT * FROM shipments ORDER BY id").fetchall()
    con.close()
    return out


@pytest.fixture(scope="module")
def db(tmp_path_factory) -> Path:
    return depots.build(tmp_path_factory.mktemp("demo") / "depots.sqlite", seed=depots.DEFAULT_SEED)


@pytest.fixture(scope="module")
def frame(db) -> pd.DataFrame:
    """All rows, metrics coerced to numbers ('n/a' -> NaN), with the local ISO week of each row."""
    with sqlite3.connect(db) as con:
        df = pd.read_sql("SELECT * FROM shipments", con)
    con.close()
    stamps = pd.to_datetime(df["shipped_at"], format="%Y-%m-%d %H:%M:%S")
    iso = stamps.dt.isocalendar()  # reference: ISO 8601 week numbering as implemented by pandas/stdlib
    df["iso_year"], df["week"] = iso["year"].astype(int), iso["week"].astype(int)
    for column in depots.METRICS:
        df[column] = pd.to_numeric(df[column], errors="coerce")
    return df


def groups(df: pd.DataFrame, week: int, column: str) -> dict[str, np.ndarray]:
    part = df[(df["week"] == week) & df["depot"].notna()]
    return {d: g[column].dropna().to_numpy() for d, g in part.groupby("depot")}


# --- arguments ------------------------------------------------------------------------------


class TestArguments:
    def test_negative_seed(self, tmp_path):
        with pytest.raises(ValueError) as err:
            depots.build(tmp_path / "x.sqlite", seed=-1)
        assert str(err.value) == "seed must be a non-negative integer, got -1"

    def test_text_seed(self, tmp_path):
        with pytest.raises(ValueError) as err:
            depots.build(tmp_path / "x.sqlite", seed="7")
        assert str(err.value) == "seed must be a non-negative integer, got '7'"

    def test_folder_as_output(self, tmp_path):
        with pytest.raises(ValueError) as err:
            depots.build(tmp_path, seed=1)
        assert str(err.value) == f"output must be a file path, not a folder: {tmp_path}"

    def test_command_line_bad_seed(self, tmp_path, capsys):
        code = depots.main(["--out", str(tmp_path / "x.sqlite"), "--seed", "-5"])
        assert code == 2
        assert capsys.readouterr().err == "Error: seed must be a non-negative integer, got -5\n"
        assert not (tmp_path / "x.sqlite").exists()

    def test_command_line_writes(self, tmp_path, capsys):
        out = tmp_path / "sub" / "d.sqlite"
        assert depots.main(["--out", str(out), "--seed", "3"]) == 0
        n = len(rows(out))
        assert capsys.readouterr().out == f"wrote {n} shipments to {out}\n"


# --- determinism and shape ------------------------------------------------------------------


def test_same_seed_same_rows(tmp_path, db):
    again = depots.build(tmp_path / "again.sqlite", seed=depots.DEFAULT_SEED)
    other = depots.build(tmp_path / "other.sqlite", seed=depots.DEFAULT_SEED + 1)
    assert rows(again) == rows(db)
    assert rows(other) != rows(db)


def test_rebuild_replaces_the_file(tmp_path):
    path = tmp_path / "d.sqlite"
    first = rows(depots.build(path, seed=11))
    second = rows(depots.build(path, seed=11))
    assert second == first  # not appended to
    assert sorted(p.name for p in tmp_path.iterdir()) == ["d.sqlite"]  # no partial or journal files left


def test_schema(db):
    with sqlite3.connect(db) as con:
        info = con.execute("PRAGMA table_info(shipments)").fetchall()
    con.close()
    assert [(c[1], c[2]) for c in info] == [
        ("id", "INTEGER"),
        ("shipped_at", "TEXT"),
        ("depot", "TEXT"),
        ("route", "TEXT"),
        ("dwell_hours", "REAL"),
        ("on_time", "REAL"),
        ("claim_cost", "REAL"),
        ("sort_minutes", "REAL"),
        ("counter_wait_min", "REAL"),
    ]


def test_size_and_range(frame):
    assert 20_000 <= len(frame) <= 30_000
    assert set(frame["iso_year"]) == {2026}
    assert frame["week"].min() == 1 and frame["week"].max() == 26
    assert frame["shipped_at"].min() >= "2025-12-29 00:00:00"
    assert frame["shipped_at"].max() < "2026-06-29 00:00:00"
    assert set(frame["depot"].dropna()) == set(depots.DEPOTS)
    assert len(depots.DEPOTS) == 8
    counts = frame.dropna(subset=["depot"]).groupby(["week", "depot"]).size()
    # 60-160 per depot-week; a NULL-depot row may take one away from its depot
    assert counts.min() >= depots.MIN_PER_WEEK - 1 and counts.max() <= depots.MAX_PER_WEEK
    assert counts.nunique() > 30  # unequal group sizes


def test_no_time_inside_the_spring_gap(frame):
    # reference: zoneinfo (IANA tz database) — a wall time that does not exist in Berlin
    # changes when converted to UTC and back.
    stamps = pd.to_datetime(frame["shipped_at"]).dt.to_pydatetime()
    for t in stamps:
        if t.month == 3 and t.day >= 25 and t.hour == 2:
            local = t.replace(tzinfo=BERLIN)
            assert local.astimezone(timezone.utc).astimezone(BERLIN).replace(tzinfo=None) == t


# --- the planted stories --------------------------------------------------------------------


def test_story_table_is_consistent():
    assert set(depots.STORIES) == {
        "drift", "spread_break", "opening", "missing_week", "midnight_edge",
        "null_burst", "bad_values", "steady_offset",
    }
    for story in depots.STORIES.values():
        assert set(story.depots) <= set(depots.DEPOTS), story.key
        assert story.metric is None or story.metric in depots.METRICS, story.key
        assert story.weeks and all(1 <= w <= 26 for w in story.weeks), story.key
        assert story.period_ids[0] == f"2026-W{story.weeks[0]:02d}"
    assert depots.STORIES["drift"].period_ids[0] == "2026-W12"


def test_opening(frame):
    story = depots.STORIES["opening"]
    (depot,), (week,) = story.depots, story.weeks
    assert (depot, week) == ("Northpoint", 9)
    mine = frame[frame["depot"] == depot]
    assert mine["shipped_at"].min() >= week_start(week).isoformat()
    assert (mine["week"] == week).sum() >= depots.MIN_PER_WEEK - 1
    assert (frame["week"] < week).sum() > 0  # the others did trade before


def test_missing_week(frame):
    story = depots.STORIES["missing_week"]
    (depot,), (week,) = story.depots, story.weeks
    assert (depot, week) == ("Fenwick", 18)
    mine = frame[frame["depot"] == depot]
    assert set(mine["week"]) == set(range(1, 27)) - {week}
    lo, hi = week_start(week).isoformat(), week_start(week + 1).isoformat()
    assert not ((mine["shipped_at"] >= lo) & (mine["shipped_at"] < hi)).any()


def test_midnight_edge(frame):
    story = depots.STORIES["midnight_edge"]
    (depot,), (week,) = story.depots, story.weeks
    monday = datetime.combine(week_start(week), datetime.min.time())
    mine = frame[frame["depot"] == depot]
    early = mine[(mine["shipped_at"] >= monday.isoformat(" ")) &
                 (mine["shipped_at"] < (monday + timedelta(hours=2)).isoformat(" "))]
    assert len(early) >= depots.MIDNIGHT_ROWS
    for text in early["shipped_at"]:
        # reference: zoneinfo (IANA tz database) — CEST is UTC+2 in May
        utc = datetime.fromisoformat(text).replace(tzinfo=BERLIN).astimezone(timezone.utc)
        assert utc.isocalendar()[:2] == (2026, week - 1)


def test_drift(frame):
    story = depots.STORIES["drift"]
    (depot,) = story.depots
    assert (depot, story.metric, story.weeks[0], story.flag_from) == ("Quarry", "dwell_hours", 12, 16)
    early = groups(frame, 4, "dwell_hours")
    assert len(early) == 7 and all(len(g) >= 60 for g in early.values())
    assert stats.f_oneway(*early.values()).pvalue > 1e-3  # reference: scipy.stats.f_oneway
    for week in (16, 20):
        late = groups(frame, week, "dwell_hours")
        assert len(late) == 8
        assert stats.f_oneway(*late.values()).pvalue < 1e-4  # reference: scipy.stats.f_oneway
    for week in range(1, 12):  # before the drift: a true null, nothing flagged
        assert stats.f_oneway(*groups(frame, week, "dwell_hours").values()).pvalue > 1e-3  # reference: scipy.stats.f_oneway
        means = {d: g.mean() for d, g in groups(frame, week, "dwell_hours").items()}
        others = [m for d, m in means.items() if d != depot]
        assert min(others) - 1.5 < means[depot] < max(others) + 1.5
    for week in range(16, 27):  # planted: by W16 the shift is >= 5 h, sd 6 h, n ~100 (se ~0.6 h)
        means = {d: g.mean() for d, g in groups(frame, week, "dwell_hours").items()}
        others = [m for d, m in means.items() if d != depot]
        assert means[depot] - max(others) > 2.0, week


def test_spread_break(frame):
    story = depots.STORIES["spread_break"]
    assert (story.depots, story.metric, story.weeks[0]) == (("Harbor", "Lakeside"), "counter_wait_min", 14)
    for week in range(1, 27):
        g = groups(frame, week, "counter_wait_min")
        # reference: scipy.stats.levene with center='median' (Brown-Forsythe test)
        p_spread = stats.levene(*g.values(), center="median").pvalue
        # reference: scipy.stats.alexandergovern (equal means, variances may differ)
        p_means = stats.alexandergovern(*g.values()).pvalue
        sd = {d: x.std(ddof=1) for d, x in g.items()}
        calm = np.median([s for d, s in sd.items() if d not in story.depots])
        assert p_means > 1e-3, week  # the mean never moves
        if week < 14:
            assert p_spread > 1e-3, week
            assert max(sd.values()) / min(sd.values()) < 1.6, week
        else:
            assert p_spread < 1e-6, week
            for d in story.depots:
                assert 2.3 < sd[d] / calm < 3.9, (week, d)  # planted factor 3
                assert abs(g[d].mean() - 12.0) < 1.5, (week, d)


def test_null_burst(frame):
    story = depots.STORIES["null_burst"]
    (depot,), (week,) = story.depots, story.weeks
    assert (depot, story.metric, week) == ("Eastgate", "sort_minutes", 7)
    in_week = frame[frame["week"] == week]
    missing = in_week[story.metric].isna() & (in_week["depot"] == depot)
    # threshold 5% (common practice for a data-quality alarm; the demo's stated threshold)
    assert missing.sum() / len(in_week) > 0.05
    assert missing.sum() / (in_week["depot"] == depot).sum() > 0.05
    share = frame.dropna(subset=["depot"]).groupby(["week", "depot"])[story.metric].apply(lambda s: s.isna().mean())
    assert share.idxmax() == (week, depot)
    assert share.drop((week, depot)).max() <= 0.05  # the burst is the only one


def test_bad_values(db, frame):
    with sqlite3.connect(db) as con:
        q = lambda sql: con.execute(sql).fetchall()  # noqa: E731
        null_depot = q("SELECT COUNT(*) FROM shipments WHERE depot IS NULL")[0][0]
        texts = q(
            "SELECT value FROM ("
            + " UNION ALL ".join(
                f"SELECT {c} AS value FROM shipments WHERE typeof({c}) = 'text'" for c in depots.METRICS
            )
            + ")"
        )
        all_null = q("SELECT COUNT(*) FROM shipments WHERE "
                     + " AND ".join(f"{c} IS NULL" for c in depots.METRICS))[0][0]
        null_per_metric = {c: q(f"SELECT COUNT(*) FROM shipments WHERE {c} IS NULL")[0][0] for c in depots.METRICS}
        text_columns = {c for c in depots.METRICS
                        if q(f"SELECT COUNT(*) FROM shipments WHERE typeof({c}) = 'text'")[0][0]}
    con.close()
    assert null_depot == 3
    assert texts == [("n/a",)] * 4
    assert text_columns == {"dwell_hours", "claim_cost", "counter_wait_min"}
    assert all_null == 1
    assert all(n >= 1 for n in null_per_metric.values())
    assert null_per_metric["dwell_hours"] == 3  # two single NULLs plus the all-NULL row
    weeks_with_nulls = set(frame.loc[frame["depot"].isna(), "week"])
    assert weeks_with_nulls <= set(depots.STORIES["bad_values"].weeks)


def test_steady_offset(frame):
    story = depots.STORIES["steady_offset"]
    (depot,) = story.depots
    assert (depot, story.metric) == ("Millbrook", "sort_minutes")
    known = frame.dropna(subset=["depot", "sort_minutes"])
    gap = known.loc[known["depot"] == depot, "sort_minutes"].mean() - known.loc[
        known["depot"] != depot, "sort_minutes"].mean()
    assert 0.9 < gap < 1.5  # planted 1.2 min; se of the gap over 26 weeks ~0.04 min
    # reference: scipy.stats.ttest_ind (Welch) on the whole half-year
    assert stats.ttest_ind(known.loc[known["depot"] == depot, "sort_minutes"],
                           known.loc[known["depot"] != depot, "sort_minutes"], equal_var=False).pvalue < 1e-12


@pytest.mark.parametrize("column", ["on_time", "claim_cost"])
def test_no_true_difference(frame, column):
    for week in range(1, 27):
        g = groups(frame, week, column)
        if column == "on_time":
            table = np.array([[x.sum(), len(x) - x.sum()] for x in g.values()])
            p = stats.chi2_contingency(table).pvalue  # reference: scipy.stats.chi2_contingency
        else:
            p = stats.kruskal(*g.values()).pvalue  # reference: scipy.stats.kruskal
        assert p > 1e-3, week


# --- configs/demo.yaml ----------------------------------------------------------------------


def test_demo_config_has_the_contract_keys(db):
    config = yaml.safe_load(CONFIG.read_text(encoding="utf-8"))
    assert set(config) == {"job", "source", "period", "timezone", "metrics", "fdr", "history", "alerts", "schedule"}
    assert config["job"] == "depot-weekly"
    assert config["source"] == {
        "url": "sqlite:///../sample_db/depots.sqlite",
        "table": "shipments",
        "time_column": "shipped_at",
        "segment_column": "depot",
    }
    # relative to the config file's folder, the URL names the generator's default output
    db_path = (CONFIG.parent / config["source"]["url"].removeprefix("sqlite:///")).resolve()
    assert db_path == depots.DEFAULT_OUT
    assert (config["period"], config["timezone"]) == ("week", "Europe/Berlin")
    ZoneInfo(config["timezone"])  # reference: IANA tz database via zoneinfo
    assert [m["column"] for m in config["metrics"]] == list(depots.METRICS)
    assert {m["column"]: m["test"] for m in config["metrics"]} == {
        "dwell_hours": "auto", "on_time": "auto", "claim_cost": "kruskal",
        "sort_minutes": "auto", "counter_wait_min": "auto",
    }
    assert all(set(m) == {"column", "test"} for m in config["metrics"])
    assert config["fdr"] == {"method": "bh", "level": 0.05}
    assert config["history"] == {"url": "sqlite:///../.segwatch/demo-history.sqlite"}
    assert config["alerts"] == [{"type": "log", "path": "../logs/demo-alerts.jsonl"}]
    assert config["schedule"] == "0 6 * * mon"
    with sqlite3.connect(db) as con:
        columns = {c[1] for c in con.execute("PRAGMA table_info(shipments)")}
    con.close()
    assert {m["column"] for m in config["metrics"]} | {"shipped_at", "depot"} <= columns
