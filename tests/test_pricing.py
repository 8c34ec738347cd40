"""The pricing use (issue 8): gaps to a reference segment on skewed money data.

What is checked here, and against what:

* the plan-tiers sample (``sample_db/plans.py``): arguments, determinism, how money is stored
  (SQLite's own ``typeof``), and each planted story on the raw rows with ``scipy.stats``;
* its job (``configs/pricing.yaml``), backfilled for all 24 months through the command line: the
  stories are found when and where they were planted, the log-scale gaps equal ratios of geometric
  means computed with numpy/scipy on the logged values, their intervals those of
  ``scipy.stats.dunnett``, and the non-positive incomes are counted exactly as a direct SQL count;
* ``transform: log`` end to end on a small database built here, with ``compute: local`` and with
  the default compute mode: Dunnett and Games-Howell ratio intervals against ``scipy.stats.dunnett``,
  ``scipy.stats.studentized_range``, ``pingouin.pairwise_gameshowell`` and Student/Welch t-tests;
  non-positive values counted, a segment with none usable left out, a missing reference reported;
* the walk-through ``docs/pricing.md``: its cautions, its snippets and its claims about the sample.

Tolerances for ``scipy.stats.dunnett`` (randomised quasi-Monte Carlo, fixed seed) are explained in
``tests/test_many_to_one.py``: p-values to 3e-4 absolute, interval half-widths to 2e-3 relative.

Tests marked ``xfail(strict=True)`` describe defects in files owned elsewhere (monitor/analysis.py,
monitor/events.py); each reason names the change. They fail today; when the change lands they pass,
strict mode turns that into a failure, and the marker is removed.
"""

from __future__ import annotations

import contextlib
import importlib.util
import io
import json
import math
import re
import sqlite3
import subprocess
import sys
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pingouin
import pytest
import yaml
from scipy import stats

from monitor.cli import main
from monitor.config import parse_config

ROOT = Path(__file__).resolve().parents[1]
GENERATOR = ROOT / "sample_db" / "plans.py"
CONFIG = ROOT / "configs" / "pricing.yaml"
DOCS = ROOT / "docs" / "pricing.md"
SAMPLE_README = ROOT / "sample_db" / "README.md"

P_ABS = 3e-4  # scipy.stats.dunnett p-value noise (tests/test_many_to_one.py)
HALF_REL = 2e-3  # scipy.stats.dunnett interval half-width noise (tests/test_many_to_one.py)


def _load_generator():
    spec = importlib.util.spec_from_file_location("segwatch_sample_plans", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up here
    spec.loader.exec_module(module)
    return module


plans = _load_generator()


def months() -> list[str]:
    # reference: the Gregorian calendar via datetime.date; ISO 8601 month identifiers YYYY-MM
    return [date(2025 + i // 12, i % 12 + 1, 1).strftime("%Y-%m") for i in range(24)]


def _cli(argv: list[str]) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(argv)
    return code, out.getvalue()


def _sql(db: Path, query: str, *args) -> list[tuple]:
    con = sqlite3.connect(db)
    try:
        return con.execute(query, args).fetchall()
    finally:
        con.close()


def _job_copy(tmp: Path, db: Path, name: str = "pricing.yaml", **overrides) -> Path:
    """configs/pricing.yaml with its paths moved into ``tmp`` (and top-level keys replaced)."""
    config = yaml.safe_load(CONFIG.read_text(encoding="utf-8"))
    config.update(overrides)
    config["source"] = {**config["source"], "url": f"sqlite:///{db}"}
    config["history"] = {"url": f"sqlite:///{tmp / (Path(name).stem + '-history.sqlite')}"}
    config["alerts"] = [{"type": "log", "path": str(tmp / (Path(name).stem + "-alerts.jsonl"))}]
    path = tmp / name
    path.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
    return path


# ---------------------------------------------------------------------------
# the sample
# ---------------------------------------------------------------------------


@pytest.fixture(scope="module")
def db(tmp_path_factory) -> Path:
    return plans.build(tmp_path_factory.mktemp("plans") / "plans.sqlite", seed=plans.DEFAULT_SEED)


@pytest.fixture(scope="module")
def frame(db) -> pd.DataFrame:
    con = sqlite3.connect(db)
    df = pd.read_sql("SELECT * FROM household_months", con)
    con.close()
    df["month"] = df["bill_date"].str[:7]
    return df


def positive_logs(df: pd.DataFrame, month: str, tier: str) -> np.ndarray:
    x = df.loc[(df["month"] == month) & (df["tier"] == tier), "household_income"].dropna().to_numpy(float)
    return np.log(x[x > 0])


class TestArguments:
    def test_negative_seed(self, tmp_path):
        with pytest.raises(ValueError) as err:
            plans.build(tmp_path / "x.sqlite", seed=-1)
        assert str(err.value) == "seed must be a non-negative integer, got -1"

    def test_folder_as_output(self, tmp_path):
        with pytest.raises(ValueError) as err:
            plans.build(tmp_path, seed=1)
        assert str(err.value) == f"output must be a file path, not a folder: {tmp_path}"

    def test_command_line_bad_seed(self, tmp_path, capsys):
        assert plans.main(["--out", str(tmp_path / "x.sqlite"), "--seed", "-5"]) == 2
        assert capsys.readouterr().err == "Error: seed must be a non-negative integer, got -5\n"
        assert not (tmp_path / "x.sqlite").exists()

    def test_command_line_writes(self, tmp_path, capsys):
        out = tmp_path / "sub" / "p.sqlite"
        assert plans.main(["--out", str(out), "--seed", "3"]) == 0
        (n,) = _sql(out, "SELECT COUNT(*) FROM household_months")[0]
        assert capsys.readouterr().out == f"wrote {n} household-months to {out}\n"


def test_same_seed_same_rows(tmp_path, db):
    again = plans.build(tmp_path / "again.sqlite", seed=plans.DEFAULT_SEED)
    other = plans.build(tmp_path / "other.sqlite", seed=plans.DEFAULT_SEED + 1)
    query = "SELECT * FROM household_months ORDER BY id"
    assert _sql(again, query) == _sql(db, query)
    assert _sql(other, query) != _sql(db, query)
    plans.build(again, seed=plans.DEFAULT_SEED)  # rebuilt, not appended to
    assert _sql(again, query) == _sql(db, query)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["again.sqlite", "other.sqlite"]


def test_money_is_stored_with_numeric_affinity(db):
    # reference: SQLite's PRAGMA table_info (declared types) and typeof() (storage classes)
    declared = {c[1]: c[2] for c in _sql(db, "PRAGMA table_info(household_months)")}
    assert declared == {"id": "INTEGER", "bill_date": "TEXT", "tier": "TEXT", "region": "TEXT",
                        "household_size": "INTEGER", "household_income": "NUMERIC(12, 2)",
                        "monthly_spend": "NUMERIC(10, 2)"}
    classes = dict(_sql(db, "SELECT typeof(household_income) || '/' || typeof(monthly_spend), COUNT(*) "
                            "FROM household_months GROUP BY 1"))
    stored = {k.split("/")[0] for k in classes} | {k.split("/")[1] for k in classes}
    assert stored <= {"integer", "real", "null"}  # never text
    # cents: no amount has more than two decimals
    assert _sql(db, "SELECT COUNT(*) FROM household_months WHERE monthly_spend IS NOT NULL "
                    "AND abs(monthly_spend * 100 - round(monthly_spend * 100)) > 1e-6")[0][0] == 0


def test_reflected_as_decimal(db):
    import decimal

    import sqlalchemy as sa

    # reference: SQLAlchemy reflection, as the source reads the table
    engine = sa.create_engine(f"sqlite:///{db}")
    table = sa.Table("household_months", sa.MetaData(), autoload_with=engine)
    assert isinstance(table.c.household_income.type, sa.Numeric)
    with engine.connect() as conn:
        value = conn.execute(sa.select(table.c.monthly_spend).where(table.c.monthly_spend.isnot(None))
                             .limit(1)).scalar_one()
    engine.dispose()
    assert isinstance(value, decimal.Decimal)


def test_size_and_range(frame):
    assert 18_000 <= len(frame) <= 27_000
    assert sorted(frame["month"].unique()) == months()
    assert set(frame["tier"]) == set(plans.TIERS) and 4 <= len(plans.TIERS) <= 6
    counts = frame.groupby(["month", "tier"]).size()
    assert counts.min() >= plans.MIN_PER_MONTH and counts.max() <= plans.MAX_PER_MONTH
    assert counts.nunique() > 30  # unequal sizes


def test_income_is_heavily_skewed(frame):
    income = frame["household_income"].to_numpy(float)
    # reference: scipy.stats.skew (Fisher-Pearson); |skew| > 1 is "highly skewed" (common practice)
    assert stats.skew(income) > 3.0
    assert abs(stats.skew(np.log(income[income > 0]))) < 0.5  # near-symmetric on the log scale
    assert stats.skew(frame["monthly_spend"].dropna().to_numpy(float)) < 1.5


def test_story_table_is_consistent():
    assert set(plans.STORIES) == {"composition_gap", "price_rise", "steady_premium", "launch",
                                  "zero_burst", "stray_values"}
    for story in plans.STORIES.values():
        assert set(story.tiers) <= set(plans.TIERS), story.key
        assert story.metric is None or story.metric in plans.METRICS, story.key
        assert story.months and all(1 <= m <= 24 for m in story.months), story.key
    assert plans.STORIES["composition_gap"].period_ids[0] == "2026-01"
    assert plans.STORIES["price_rise"].period_ids[0] == "2025-10"
    assert plans.month_id(1) == "2025-01" and plans.month_id(24) == "2026-12"


def test_composition_gap_in_the_rows(frame):
    story = plans.STORIES["composition_gap"]
    assert (story.tiers, story.metric) == (("Saver",), "household_income")
    pre = [m for m in months() if m < "2026-01"]
    post = [m for m in months() if m >= "2026-01"]
    pool = lambda ms, tier: np.concatenate([positive_logs(frame, m, tier) for m in ms])  # noqa: E731
    # reference: scipy.stats.ttest_ind (Welch) on log incomes, pooled over the months
    before = stats.ttest_ind(pool(pre, "Saver"), pool(pre, "Basic"), equal_var=False)
    after = stats.ttest_ind(pool(post, "Saver"), pool(post, "Basic"), equal_var=False)
    assert before.pvalue > 0.01
    assert after.pvalue < 1e-20
    gap = math.exp(pool(post, "Saver").mean() - pool(post, "Basic").mean()) - 1
    assert -0.32 < gap < -0.20  # planted: about -25% (geometric means)
    # within each household size the gap is absent: the gap is composition
    sub = frame[(frame["month"] >= "2026-01") & (frame["household_income"] > 0)]
    for size in range(1, 6):
        a = np.log(sub.loc[(sub["tier"] == "Saver") & (sub["household_size"] == size), "household_income"])
        b = np.log(sub.loc[(sub["tier"] == "Basic") & (sub["household_size"] == size), "household_income"])
        assert stats.ttest_ind(a, b, equal_var=False).pvalue > 0.01, size  # reference: scipy.stats.ttest_ind
    share_single = sub.groupby("tier")["household_size"].apply(lambda s: (s == 1).mean())
    assert share_single["Saver"] > 0.6 and share_single["Basic"] < 0.35


def test_price_rise_in_the_rows(frame):
    story = plans.STORIES["price_rise"]
    assert (story.tiers, story.metric) == (("Standard",), "monthly_spend")
    spend = lambda ms, tier: frame.loc[frame["month"].isin(ms) & (frame["tier"] == tier),  # noqa: E731
                                       "monthly_spend"].dropna().to_numpy(float)
    pre = [m for m in months() if m < "2025-10"]
    post = [m for m in months() if m >= "2025-10"]
    # reference: scipy.stats.ttest_ind (Welch)
    assert stats.ttest_ind(spend(pre, "Standard"), spend(pre, "Basic"), equal_var=False).pvalue > 0.01
    ratio = spend(post, "Standard").mean() / spend(post, "Basic").mean()
    assert 1.10 < ratio < 1.20  # planted +15%


def test_zero_burst_and_stray_values(frame):
    income = frame["household_income"]
    bad = frame.assign(bad=income <= 0).groupby("month")["bad"].mean()
    assert bad.idxmax() == "2025-05" and bad["2025-05"] > 0.05
    assert bad.drop("2025-05").max() < 0.03  # stray values only: under the 5% threshold
    assert (income < 0).sum() > 0 and (income == 0).sum() > 0
    assert frame["monthly_spend"].isna().sum() > 0


def test_launch_in_the_rows(frame):
    first = frame.loc[frame["tier"] == "Green", "month"].min()
    assert first == "2025-07" == plans.STORIES["launch"].period_ids[0]


# ---------------------------------------------------------------------------
# the job, backfilled through the command line
# ---------------------------------------------------------------------------


def test_config_matches_the_sample(db):
    config = yaml.safe_load(CONFIG.read_text(encoding="utf-8"))
    db_path = (CONFIG.parent / config["source"]["url"].removeprefix("sqlite:///")).resolve()
    assert db_path == plans.DEFAULT_OUT
    assert config["source"]["table"] == "household_months"
    assert (config["source"]["time_column"], config["source"]["segment_column"]) == ("bill_date", "tier")
    assert (config["period"], config["job"]) == ("month", "plan-tiers-monthly")
    assert {m["column"]: (m["test"], m["reference"], m.get("transform", "none")) for m in config["metrics"]} == {
        "household_income": ("anova", "Basic", "log"), "monthly_spend": ("welch", "Basic", "none")}
    assert plans.REFERENCE_TIER == "Basic"
    parsed = parse_config(config, CONFIG)  # reference: the config rules of CONTRACT.md
    assert [m.unit for m in parsed.metrics] == ["EUR", "EUR"]


@pytest.fixture(scope="module")
def backfill(db, tmp_path_factory) -> dict[str, dict]:
    """All 24 months of configs/pricing.yaml (its own compute mode), as ``backfill --json`` prints them."""
    tmp = tmp_path_factory.mktemp("pricing-job")
    code, out = _cli(["backfill", str(_job_copy(tmp, db)), "--from", "2025-01", "--to", "2026-12", "--json"])
    assert code == 0
    docs = [json.loads(line) for line in out.splitlines() if line.strip()]
    return {d["period"]: d for d in docs}


def _metric(doc: dict, name: str) -> dict:
    return next(m for m in doc["metrics"] if m["metric"] == name)


def _flag(doc: dict, metric: str, tier: str) -> str | None:
    return next((s["flag"] for s in _metric(doc, metric)["segments"] if s["segment"] == tier), None)


def _events(doc: dict, kind: str, metric: str | None, segment: str | None) -> list[dict]:
    return [e for e in doc["events"] if (e["kind"], e["metric"], e["segment"]) == (kind, metric, segment)]


def test_backfill_covers_every_month(backfill):
    assert list(backfill) == months()
    for doc in backfill.values():
        for name in ("household_income", "monthly_spend"):
            m = _metric(doc, name)
            assert m["reference"] == "Basic"
            assert {p["b"] for p in m["pairs"]} == {"Basic"}
            assert {p["a"] for p in m["pairs"]} == {s["segment"] for s in m["segments"]} - {"Basic"}
        assert _metric(doc, "household_income")["posthoc"] == "dunnett"
        assert _metric(doc, "monthly_spend")["posthoc"] == "games-howell"


def test_composition_gap_emerges(backfill):
    emerged = [p for p, d in backfill.items() if _events(d, "emerged", "household_income", "Saver")]
    # planted from 2026-01; found within a couple of months
    assert emerged and "2026-01" <= emerged[0] <= "2026-03"
    assert _flag(backfill[emerged[0]], "household_income", "Saver") == "low"
    before = [p for p, d in backfill.items() if p < "2026-01" and _flag(d, "household_income", "Saver")]
    assert len(before) <= 1  # chance only: Dunnett's family-wise rate is 5% a month
    after = [p for p, d in backfill.items() if p >= emerged[0] and _flag(d, "household_income", "Saver") == "low"]
    assert len(after) >= len([p for p in backfill if p >= emerged[0]]) - 1  # and it stays
    pair = next(p for p in _metric(backfill["2026-06"], "household_income")["pairs"] if p["a"] == "Saver")
    assert pair["ratio_high"] < 1.0 and pair["significant"] is True


def test_price_rise_emerges(backfill):
    emerged = [p for p, d in backfill.items() if _events(d, "emerged", "monthly_spend", "Standard")]
    assert emerged and "2025-10" <= emerged[0] <= "2025-12"
    assert _flag(backfill[emerged[0]], "monthly_spend", "Standard") == "high"
    assert len([p for p, d in backfill.items() if p < "2025-10" and _flag(d, "monthly_spend", "Standard")]) <= 1
    pair = next(p for p in _metric(backfill["2026-06"], "monthly_spend")["pairs"] if p["a"] == "Standard")
    assert "ratio" not in pair  # no transform: the gap is in EUR
    assert pair["ci_low"] > 0


def test_steady_premium_and_first_month(backfill):
    high = [p for p, d in backfill.items() if _flag(d, "household_income", "Premium") == "high"]
    assert len(high) >= 22
    first = backfill["2025-01"]
    # the first month is compared with an empty baseline: what stands is announced
    assert _events(first, "emerged", "household_income", "Premium")
    assert _events(first, "emerged", "monthly_spend", "Premium")
    assert _events(first, "emerged", "monthly_spend", "Saver")


def test_launch_is_segment_new(backfill):
    new = [(p, e["segment"]) for p, d in backfill.items() for e in d["events"] if e["kind"] == "segment_new"]
    assert new == [("2025-07", "Green")]
    assert not [e for d in backfill.values() for e in d["events"] if e["kind"] == "segment_missing"]


def test_chance_flags_are_rare_and_brief(backfill):
    # Comparisons with no planted gap: Standard and Green on income, Saver on income before the
    # change; Green on spend, Standard on spend before the price rise.
    null = [("household_income", "Standard", "9999"), ("household_income", "Green", "9999"),
            ("household_income", "Saver", "2026-01"), ("monthly_spend", "Green", "9999"),
            ("monthly_spend", "Standard", "2025-10")]
    hits = [(metric, tier, p) for metric, tier, until in null
            for p, d in backfill.items() if p < until and _flag(d, metric, tier)]
    # reference: Dunnett / Games-Howell control the family-wise error at 5% a month, so over 24
    # months and two metrics about 2 chance flags are expected at most; P(more than 4) < 3%
    # (scipy.stats.binom.sf(4, 48, 0.05))
    assert len(hits) <= 4, hits
    for metric, tier, p in hits:  # brief: none lasts three months
        i = months().index(p)
        assert not all(_flag(backfill[q], metric, tier) for q in months()[i:i + 3]), (metric, tier, p)


def test_non_positive_incomes_counted(backfill, db):
    for period, doc in backfill.items():
        quality = _metric(doc, "household_income")["data_quality"]
        # reference: a direct SQL count of incomes the log cannot take
        (expected,) = _sql(db, "SELECT COUNT(*) FROM household_months WHERE substr(bill_date, 1, 7) = ? "
                               "AND household_income <= 0", period)[0]
        assert quality["out_of_domain"] == expected, period
        assert _metric(doc, "monthly_spend")["data_quality"]["out_of_domain"] == 0
    flagged = [p for p, d in backfill.items() if _events(d, "data_quality", "household_income", None)]
    assert flagged == ["2025-05"]
    (event,) = _events(backfill["2025-05"], "data_quality", "household_income", None)
    (rows,) = _sql(db, "SELECT COUNT(*) FROM household_months WHERE substr(bill_date, 1, 7) = '2025-05'")[0]
    (bad,) = _sql(db, "SELECT COUNT(*) FROM household_months WHERE substr(bill_date, 1, 7) = '2025-05' "
                      "AND household_income <= 0")[0]
    assert event["message"] == (f"household_income: {bad / rows:.1%} of {rows} values are unusable "
                                f"({bad} outside the transform's domain), above the 5% threshold.")


@pytest.mark.parametrize("period", ["2025-05", "2026-03"])
def test_ratios_against_scipy(backfill, frame, period):
    m = _metric(backfill[period], "household_income")
    tiers = [s["segment"] for s in m["segments"]]
    logs = {t: positive_logs(frame, period, t) for t in tiers}
    others = [t for t in tiers if t != "Basic"]
    # reference: scipy.stats.dunnett on the logged values, control Basic, fixed seed
    ref = stats.dunnett(*[logs[t] for t in others], control=logs["Basic"], rng=np.random.default_rng(8))
    ci = ref.confidence_interval(confidence_level=0.95)
    for j, tier in enumerate(others):
        pair = next(p for p in m["pairs"] if p["a"] == tier)
        # reference: scipy.stats.gmean, the ratio of geometric means of the positive incomes
        geo = stats.gmean(np.exp(logs[tier])) / stats.gmean(np.exp(logs["Basic"]))
        assert pair["ratio"] == pytest.approx(geo, rel=1e-9)
        assert pair["p_adj"] == pytest.approx(ref.pvalue[j], abs=P_ABS)
        half = (ci.high[j] - ci.low[j]) / 2
        assert math.log(pair["ratio_low"]) == pytest.approx(ci.low[j], abs=HALF_REL * half)
        assert math.log(pair["ratio_high"]) == pytest.approx(ci.high[j], abs=HALF_REL * half)


def test_spend_gaps_against_pingouin(backfill, frame):
    m = _metric(backfill["2026-03"], "monthly_spend")
    part = frame[(frame["month"] == "2026-03") & frame["monthly_spend"].notna()]
    # reference: pingouin.pairwise_gameshowell on the bills (converted from DECIMAL by sqlite3 as floats)
    ref = pingouin.pairwise_gameshowell(data=part, dv="monthly_spend", between="tier")
    for pair in m["pairs"]:
        row = ref[((ref.A == pair["a"]) & (ref.B == "Basic")) | ((ref.A == "Basic") & (ref.B == pair["a"]))].iloc[0]
        sign = 1.0 if row.A == pair["a"] else -1.0
        assert pair["diff"] == pytest.approx(sign * row["diff"], rel=1e-9)
        assert pair["p_adj"] == pytest.approx(row["pval"], rel=1e-5, abs=1e-12)


# ---------------------------------------------------------------------------
# transform: log end to end on a small database
# ---------------------------------------------------------------------------

TOY_TIERS = {"Basic": (60, 1.0), "Plus": (45, 1.25), "Max": (35, 0.85)}


@pytest.fixture(scope="module")
def toy_db(tmp_path_factory) -> Path:
    """Three tiers over three months of 2026. January: clean but for one zero and one loss;
    February: every Max income is 0; March: no Basic rows at all."""
    rng = np.random.default_rng(4242)
    path = tmp_path_factory.mktemp("toy") / "toy.sqlite"
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE bills (id INTEGER PRIMARY KEY, billed_on TEXT, tier TEXT, income NUMERIC(12, 2))")
    rows = []
    for month in (1, 2, 3):
        for tier, (n, factor) in TOY_TIERS.items():
            if month == 3 and tier == "Basic":
                continue
            income = np.round(40_000 * factor * rng.lognormal(0.0, 0.5, n), 2)
            if month == 1 and tier == "Plus":
                income[0] = 0.0
            if month == 1 and tier == "Max":
                income[0] = -1250.0
            if month == 2 and tier == "Max":
                income[:] = 0.0
            days = rng.integers(1, 29, n)
            rows += [(f"2026-{month:02d}-{int(d):02d}", tier, float(x)) for d, x in zip(days, income)]
    con.executemany("INSERT INTO bills (billed_on, tier, income) VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    return path


def _toy_job(folder: Path, db: Path, compute: str | None, extra_metrics: str = "") -> Path:
    text = (
        "job: toy-pricing\n"
        f"source:\n  url: sqlite:///{db}\n  table: bills\n  time_column: billed_on\n  segment_column: tier\n"
        "period: month\ntimezone: UTC\n"
        + (f"compute: {compute}\n" if compute else "")
        + "metrics:\n"
        "  - {column: income, test: anova, reference: Basic, transform: log, unit: EUR, decimals: 0}\n"
        "  - {name: income_gh, column: income, test: welch, reference: Basic, transform: log, unit: EUR}\n"
        + extra_metrics
        + f"history: {{url: 'sqlite:///{folder / 'history.sqlite'}'}}\n"
    )
    path = folder / "toy.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def _toy_logs(db: Path, month: str) -> dict[str, np.ndarray]:
    out = {}
    for tier in TOY_TIERS:
        vals = np.array([r[0] for r in _sql(db, "SELECT income FROM bills WHERE tier = ? AND "
                                                "substr(billed_on, 1, 7) = ? AND income > 0", tier, month)])
        if vals.size:
            out[tier] = np.log(vals)
    return out


COMPUTE_MODES = [
    pytest.param("local", id="compute-local"),
    pytest.param(None, id="compute-default"),
]


@pytest.fixture(scope="module", params=COMPUTE_MODES)
def toy_runs(request, toy_db, tmp_path_factory) -> dict[str, dict]:
    folder = tmp_path_factory.mktemp(f"toy-{request.param or 'default'}")
    cfg = _toy_job(folder, toy_db, request.param)
    out = {}
    for month in ("2026-01", "2026-02", "2026-03"):
        code, text = _cli(["run", str(cfg), "--period", month, "--json"])
        assert code == 0
        out[month] = json.loads(text)
    return out


def test_dunnett_ratios_end_to_end(toy_runs, toy_db):
    m = _metric(toy_runs["2026-01"], "income")
    logs = _toy_logs(toy_db, "2026-01")
    assert m["method"] == "anova" and m["posthoc"] == "dunnett"
    # reference: scipy.stats.dunnett on the logged values, control Basic, fixed seed
    ref = stats.dunnett(logs["Max"], logs["Plus"], control=logs["Basic"], rng=np.random.default_rng(3))
    ci = ref.confidence_interval(confidence_level=0.95)
    for j, tier in enumerate(("Max", "Plus")):
        pair = next(p for p in m["pairs"] if p["a"] == tier)
        assert pair["b"] == "Basic"
        # reference: numpy, exp of the difference of mean logs = ratio of geometric means
        assert pair["ratio"] == pytest.approx(math.exp(logs[tier].mean() - logs["Basic"].mean()), rel=1e-9)
        assert pair["diff"] == pytest.approx(logs[tier].mean() - logs["Basic"].mean(), rel=1e-9)
        assert pair["p_adj"] == pytest.approx(ref.pvalue[j], abs=P_ABS)
        half = (ci.high[j] - ci.low[j]) / 2
        assert math.log(pair["ratio_low"]) == pytest.approx(ci.low[j], abs=HALF_REL * half)
        assert math.log(pair["ratio_high"]) == pytest.approx(ci.high[j], abs=HALF_REL * half)
        assert pair["ratio_low"] == pytest.approx(math.exp(pair["ci_low"]), rel=1e-12)


def test_games_howell_ratios_end_to_end(toy_runs, toy_db):
    m = _metric(toy_runs["2026-01"], "income_gh")
    logs = _toy_logs(toy_db, "2026-01")
    assert m["method"] == "welch" and m["posthoc"] == "games-howell"
    frame = pd.DataFrame({"y": np.concatenate(list(logs.values())),
                          "g": np.repeat(list(logs), [len(v) for v in logs.values()])})
    ref = pingouin.pairwise_gameshowell(data=frame, dv="y", between="g")  # reference: pingouin
    for tier in ("Max", "Plus"):
        pair = next(p for p in m["pairs"] if p["a"] == tier)
        a, b = logs[tier], logs["Basic"]
        # reference: Games and Howell (1976) computed here with numpy and
        # scipy.stats.studentized_range: Welch se and df, q over the k = 3 tiers
        va, vb = a.var(ddof=1) / a.size, b.var(ddof=1) / b.size
        df = (va + vb) ** 2 / (va**2 / (a.size - 1) + vb**2 / (b.size - 1))
        half = stats.studentized_range.ppf(0.95, 3, df) * math.sqrt(va + vb) / math.sqrt(2)
        diff = a.mean() - b.mean()
        assert pair["ratio"] == pytest.approx(math.exp(diff), rel=1e-9)
        assert pair["ratio_low"] == pytest.approx(math.exp(diff - half), rel=1e-7)
        assert pair["ratio_high"] == pytest.approx(math.exp(diff + half), rel=1e-7)
        row = ref[((ref.A == tier) & (ref.B == "Basic")) | ((ref.A == "Basic") & (ref.B == tier))].iloc[0]
        assert pair["p_adj"] == pytest.approx(row["pval"], rel=1e-5, abs=1e-12)


def test_non_positive_values_counted_not_used(toy_runs, toy_db):
    jan = toy_runs["2026-01"]
    for name in ("income", "income_gh"):
        quality = _metric(jan, name)["data_quality"]
        assert (quality["out_of_domain"], quality["rows"]) == (2, 140)  # one 0 (Plus), one loss (Max)
        assert {s["segment"]: s["n"] for s in _metric(jan, name)["segments"]} == {"Basic": 60, "Max": 34,
                                                                                  "Plus": 44}
    assert not [e for e in jan["events"] if e["kind"] == "data_quality"]  # 1.4%: under 5%


def test_segment_without_usable_values(toy_runs, toy_db):
    feb = toy_runs["2026-02"]
    m = _metric(feb, "income")
    assert m["data_quality"]["out_of_domain"] == 35
    assert {s["segment"]: s["excluded"] for s in m["segments"]}["Max"] is True
    messages = {e["message"] for e in feb["events"] if e["kind"] == "data_quality" and e["metric"] == "income"}
    assert messages == {
        "income: 25.0% of 140 values are unusable (35 outside the transform's domain), above the 5% threshold.",
        "income: tier Max has 0 usable values, too few to compare (at least 2 needed).",
    }
    # With Max left out, one gap remains: Dunnett with one comparison is Student's t-test
    # (reference: scipy.stats.ttest_ind on the logged values; exact, not simulated)
    logs = _toy_logs(toy_db, "2026-02")
    (pair,) = m["pairs"]
    t = stats.ttest_ind(logs["Plus"], logs["Basic"], equal_var=True)
    ci = t.confidence_interval(0.95)
    assert pair["a"] == "Plus"
    assert pair["p_adj"] == pytest.approx(t.pvalue, rel=1e-7)
    assert (pair["ratio_low"], pair["ratio_high"]) == pytest.approx((math.exp(ci.low), math.exp(ci.high)), rel=1e-7)
    # ... and Games-Howell with two tiers is Welch's t-test (reference: scipy.stats.ttest_ind, equal_var=False)
    (gh,) = _metric(feb, "income_gh")["pairs"]
    w = stats.ttest_ind(logs["Plus"], logs["Basic"], equal_var=False).confidence_interval(0.95)
    assert (gh["ratio_low"], gh["ratio_high"]) == pytest.approx((math.exp(w.low), math.exp(w.high)), rel=1e-6)


def test_missing_reference_is_reported(toy_runs):
    mar = toy_runs["2026-03"]
    for name in ("income", "income_gh"):
        m = _metric(mar, name)
        assert m["pairs"] == []
        assert all(s["flag"] is None for s in m["segments"])
        assert "reference segment 'Basic' has no usable values this period; no comparisons with it were made" \
            in m["note"]
    messages = [e["message"] for e in mar["events"]
                if e["kind"] == "data_quality" and e["detail"].get("problem") == "reference_missing"]
    assert sorted(messages) == [
        "income: the reference tier Basic has no usable values this period, so no gaps to it were computed.",
        "income_gh: the reference tier Basic has no usable values this period, so no gaps to it were computed.",
    ]


def test_unknown_transform_is_a_config_error(tmp_path, toy_db, capsys):
    cfg = _toy_job(tmp_path, toy_db, "local")
    cfg.write_text(cfg.read_text().replace("transform: log, unit: EUR, decimals: 0", "transform: sqrt"))
    assert main(["run", str(cfg), "--period", "2026-01"]) == 2
    assert capsys.readouterr().err == (
        f"Error: {cfg}: metrics[0].transform: unknown transform (given: 'sqrt'; accepted: none, log, log1p)\n")


# ---------------------------------------------------------------------------
# the walk-through
# ---------------------------------------------------------------------------


def _blocks(text: str, lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", text, flags=re.S)


def test_docs_carry_the_cautions():
    text = " ".join(DOCS.read_text(encoding="utf-8").split()).lower()
    for phrase in ("observational", "composition", "associations, not causes", "qualified people",
                   "local law on discrimination and on data protection", "age, region, household size"):
        assert phrase in text, phrase


def test_docs_paths_and_commands_exist():
    text = DOCS.read_text(encoding="utf-8")
    for path in set(re.findall(r"\b((?:configs|sample_db|docs)/[\w./-]+\.(?:yaml|py|md))", text)):
        assert (ROOT / path).exists(), path
    for command in re.findall(r"^ {4}(segwatch \w+ [^\n]+)$", text, flags=re.M):
        assert "configs/pricing.yaml" in command, command
    for block in _blocks(text, "sh"):  # commands in fenced blocks
        for command in re.findall(r"^(segwatch \w+ [^\n]+)$", block, flags=re.M):
            assert re.search(r"configs/pricing(-within-size)?\.yaml", command), command
    assert "## Second sample" not in text  # the sample's table lives in sample_db/README.md
    readme = SAMPLE_README.read_text(encoding="utf-8")
    assert "# Second sample: households on a utility's plan tiers" in readme
    for key in plans.STORIES:
        assert f"`{key}`" in readme, key


def test_docs_yaml_matches_the_job():
    metrics_block, within_block, stratum_block = _blocks(DOCS.read_text(encoding="utf-8"), "yaml")
    config = yaml.safe_load(CONFIG.read_text(encoding="utf-8"))
    assert yaml.safe_load(metrics_block)["metrics"] == config["metrics"]
    within = yaml.safe_load((ROOT / "configs" / "pricing-within-size.yaml").read_text(encoding="utf-8"))
    assert yaml.safe_load(within_block)["metrics"] == within["metrics"]
    stratum = yaml.safe_load(stratum_block)
    merged = {**config, **stratum}
    parse_config(merged, CONFIG)  # reference: the config rules of CONTRACT.md (raises when invalid)
    assert stratum["source"]["query"] == "SELECT * FROM household_months WHERE household_size = 1"


def test_docs_gap_printer(backfill):
    text = DOCS.read_text(encoding="utf-8")
    code = _blocks(text, "python")[0]  # the second one reads adjusted gaps (tests/test_adjust_for.py)
    result = subprocess.run([sys.executable, "-c", code], input=json.dumps(backfill["2026-03"]),
                            capture_output=True, text=True, timeout=60, check=True)
    (quoted,) = re.findall(r"`(2026-03 household_income: Saver vs Basic (?!raw )[^`]+)`", text)
    assert quoted in result.stdout.splitlines()
    # reference: numpy on the JSON's ratio fields, formatted independently of the snippet
    pair = next(p for p in _metric(backfill["2026-03"], "household_income")["pairs"] if p["a"] == "Saver")
    lo, mid, hi = (100 * (pair[k] - 1) for k in ("ratio_low", "ratio", "ratio_high"))
    assert quoted == f"2026-03 household_income: Saver vs Basic {mid:+.1f}% [{lo:+.1f}%, {hi:+.1f}%] *"
    assert "A ratio of 0.75 with interval [0.65, 0.86] is a gap of -25.0% [-34.6%, -14.0%]" in " ".join(text.split())
    assert (round(pair["ratio"], 2), round(pair["ratio_low"], 2), round(pair["ratio_high"], 2)) == (0.75, 0.65, 0.86)


def test_docs_composition_check(db, tmp_path):
    """The walk-through's claim: within single-person households Saver's income gap is gone."""
    stratum_block = _blocks(DOCS.read_text(encoding="utf-8"), "yaml")[-1]
    stratum = yaml.safe_load(stratum_block)
    cfg = _job_copy(tmp_path, db, "single.yaml", job=stratum["job"],
                    source={**stratum["source"]})
    code, out = _cli(["backfill", str(cfg), "--from", "2026-01", "--to", "2026-04", "--json"])
    assert code == 0
    docs = [json.loads(line) for line in out.splitlines() if line.strip()]
    assert [d["period"] for d in docs] == ["2026-01", "2026-02", "2026-03", "2026-04"]
    for doc in docs:
        m = _metric(doc, "household_income")
        assert {s["segment"]: s["n"] for s in m["segments"]}["Saver"] > 150  # single-person Saver households
        assert _flag(doc, "household_income", "Saver") is None
        pair = next(p for p in m["pairs"] if p["a"] == "Saver")
        assert pair["ratio_low"] < 1.0 < pair["ratio_high"]


# ---------------------------------------------------------------------------
# defects in files owned elsewhere (see the module notes)
# ---------------------------------------------------------------------------


def test_log_scale_message_shows_money_amounts(backfill):
    (event,) = _events(backfill["2025-01"], "emerged", "household_income", "Premium")
    amounts = [float(x.replace(",", "")) for x in re.findall(r"([-+]?[\d,]+(?:\.\d+)?) EUR", event["message"])]
    # any EUR amount in a household-income message is an income (thousands), not a log
    assert amounts and all(abs(x) >= 1000 for x in amounts), event["message"]


def test_reference_gap_message_gives_percentage(backfill):
    period = next(p for p, d in backfill.items() if _events(d, "emerged", "household_income", "Saver"))
    (event,) = _events(backfill[period], "emerged", "household_income", "Saver")
    pair = next(p for p in _metric(backfill[period], "household_income")["pairs"] if p["a"] == "Saver")
    lo, mid, hi = (100 * (pair[k] - 1) for k in ("ratio_low", "ratio", "ratio_high"))
    message = event["message"]
    assert "gap" in message and "reference" in message and "Basic" in message
    assert f"{mid:+.1f}% [{lo:+.1f}%, {hi:+.1f}%]" in message, message


def test_reference_gap_cleared_message(tmp_path, capsys):
    rng = np.random.default_rng(5)
    db = tmp_path / "two.sqlite"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE bills (billed_on TEXT, tier TEXT, income REAL)")
    for month, shift in ((1, 0.8), (2, 1.0)):
        for tier, n in (("Basic", 50), ("Plus", 50), ("Max", 50)):
            factor = shift if tier == "Plus" else 1.0
            con.executemany("INSERT INTO bills VALUES (?, ?, ?)",
                            [(f"2026-0{month}-10", tier, float(x)) for x in 30_000 * factor * rng.lognormal(0, 0.2, n)])
    con.commit()
    con.close()
    cfg = _toy_job(tmp_path, db, "local")
    # the per-period rule clears in the first quiet month (the two-period rule waits for a second one)
    cfg.write_text(cfg.read_text(encoding="utf-8") + "decision: {rule: per_period}\n", encoding="utf-8")
    assert main(["run", str(cfg), "--period", "2026-01", "--json"]) == 0
    first = json.loads(capsys.readouterr().out)
    assert _flag(first, "income", "Plus") == "low"  # the setup works: a gap in January ...
    assert main(["run", str(cfg), "--period", "2026-02", "--json"]) == 0
    second = json.loads(capsys.readouterr().out)
    (event,) = _events(second, "cleared", "income", "Plus")  # ... that is gone in February
    assert "reference" in event["message"] and "Basic" in event["message"], event["message"]


def test_rank_gaps_carry_no_ratio(tmp_path, toy_db, capsys):
    cfg = _toy_job(tmp_path, toy_db, "local",
                   "  - {name: income_ranks, column: income, test: kruskal, reference: Basic, transform: log}\n")
    assert main(["run", str(cfg), "--period", "2026-01", "--json"]) == 0
    m = _metric(json.loads(capsys.readouterr().out), "income_ranks")
    assert m["posthoc"] == "dunn" and m["pairs"]
    for pair in m["pairs"]:
        assert pair.get("ratio") is None and pair.get("ratio_low") is None, pair
