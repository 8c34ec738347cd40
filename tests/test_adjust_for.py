"""``adjust_for`` end to end: config, per-(segment, stratum) sums in SQL, the adjusted verdict, check.

Outside references, named beside each check:

* pandas ``groupby`` counts, means and sums of squares for the cells read back from SQL;
* statsmodels ``ols`` + ``anova_lm(typ=2)`` (``robust="hc3"`` for ``test: welch``) and the OLS
  coefficients for the metric's adjusted statistic, df, p-value and gaps, on the rows read
  straight from the database with ``sqlite3``/pandas;
* the pricing demo (``sample_db/plans.py``), whose planted composition story says Saver's incomes
  equal Basic's within each household size from 2026-01 (``STORIES["composition_gap"]``).

Random data below are inputs for the reference libraries only.
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
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
import yaml
from statsmodels.stats.anova import anova_lm

from monitor.cli import main
from monitor.config import load_config
from monitor.errors import ConfigError
from monitor.model import Adjustment, MetricResult

ROOT = Path(__file__).resolve().parents[1]
GENERATOR = ROOT / "sample_db" / "plans.py"


def _cli(argv: list[str]) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(argv)
    return code, out.getvalue()


def _write_db(path: Path, seed: int = 7) -> pd.DataFrame:
    """A small SQLite table: three tiers, a size column whose mix differs by tier, a region, NULLs."""
    rng = np.random.default_rng(seed)
    rows = []
    mix = {"Basic": [0.3, 0.4, 0.3], "Saver": [0.7, 0.2, 0.1], "Plus": [0.2, 0.3, 0.5]}
    for tier, n in (("Basic", 160), ("Saver", 120), ("Plus", 90)):
        size = rng.choice([1, 2, 3], p=mix[tier], size=n)
        region = rng.choice(["N", "S"], size=n)
        spread = np.where(size == 3, 3.0, 1.0)
        value = 50 + 4 * size + (region == "S") * 1.5 + (tier == "Plus") * 1.0 + spread * rng.normal(0, 1, n)
        for i in range(n):
            rows.append((f"2026-03-{1 + i % 28:02d}", tier, int(size[i]), str(region[i]), float(value[i])))
    rows.append(("2026-03-05", "Basic", None, "N", 55.0))  # no household size: left out, counted
    rows.append(("2026-03-06", "Saver", 2, "N", None))  # no value
    if path.exists():
        path.unlink()
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE t (id INTEGER PRIMARY KEY, day TEXT, tier TEXT, size INTEGER, region TEXT, y REAL)")
    con.executemany("INSERT INTO t (day, tier, size, region, y) VALUES (?, ?, ?, ?, ?)", rows)
    con.commit()
    con.close()
    return pd.DataFrame(rows, columns=["day", "tier", "size", "region", "y"])


def _config(tmp_path: Path, metric: dict, compute: str = "pushdown") -> Path:
    cfg = {
        "job": "adj",
        "source": {"url": f"sqlite:///{tmp_path / 'src.sqlite'}", "table": "t", "time_column": "day",
                   "segment_column": "tier"},
        "period": "month",
        "timezone": "UTC",
        "metrics": [metric],
        "compute": compute,
        "history": {"url": f"sqlite:///{tmp_path / 'h.sqlite'}"},
    }
    path = tmp_path / f"job-{compute}.yaml"
    path.write_text(yaml.safe_dump(cfg), encoding="utf-8")
    return path


# ---------------------------------------------------------------------------
# config
# ---------------------------------------------------------------------------
class TestConfig:
    base = {"column": "y", "reference": "Basic"}

    def _parse(self, tmp_path, metric):
        _write_db(tmp_path / "src.sqlite")
        return load_config(_config(tmp_path, metric))

    def test_parsed(self, tmp_path):
        cfg = self._parse(tmp_path, {**self.base, "adjust_for": ["size", "region"]})
        assert cfg.metrics[0].adjust_for == ("size", "region")
        plain = self._parse(tmp_path, self.base)
        assert plain.metrics[0].adjust_for == ()

    @pytest.mark.parametrize("adjust_for, extra, key, words", [
        ("size", {}, "metrics[0].adjust_for", "must be a list"),
        (["tier"], {}, "metrics[0].adjust_for[0]", "is source.segment_column"),
        (["y"], {}, "metrics[0].adjust_for[0]", "is metrics[0].column"),
        (["size", "Size"], {}, "metrics[0].adjust_for[1]", "repeats metrics[0].adjust_for[0]"),
        ([""], {}, "metrics[0].adjust_for[0]", "must not be blank"),
        (["size"], {"reference": None}, "metrics[0].adjust_for", "needs a reference segment"),
        (["size"], {"test": "kruskal"}, "metrics[0].test", "cannot be adjusted"),
    ])
    def test_bad_values_one_line(self, tmp_path, adjust_for, extra, key, words):
        metric = {**self.base, "adjust_for": adjust_for, **extra}
        metric = {k: v for k, v in metric.items() if v is not None}
        with pytest.raises(ConfigError) as err:
            self._parse(tmp_path, metric)
        text = str(err.value)
        assert "\n" not in text and f": {key}: " in text and words in text


# ---------------------------------------------------------------------------
# SQL cells and the adjusted verdict
# ---------------------------------------------------------------------------
def _run_json(path: Path) -> dict:
    code, out = _cli(["run", str(path), "--period", "2026-03", "--json"])
    assert code == 0
    return json.loads(out)


@pytest.mark.parametrize("test, robust", [("anova", None), ("welch", "hc3")])
def test_adjusted_metric_against_statsmodels(tmp_path, test, robust):
    frame = _write_db(tmp_path / "src.sqlite")
    metric = {"column": "y", "test": test, "reference": "Basic", "adjust_for": ["size", "region"]}
    doc = _run_json(_config(tmp_path, metric))
    m = doc["metrics"][0]
    data = frame.dropna(subset=["size", "y"]).astype({"size": int})
    formula = "y ~ C(tier, Treatment('Basic')) + C(size) + C(region)"
    fit = smf.ols(formula, data).fit()
    table = anova_lm(fit, typ=2, robust=robust)  # statsmodels Type II (HC3 for welch)
    row = table.loc["C(tier, Treatment('Basic'))"]
    assert m["method"] == ("anova-adjusted" if test == "anova" else "hc3-adjusted")
    assert m["statistic"] == pytest.approx(row["F"], rel=1e-9)
    assert m["df"] == [pytest.approx(row["df"]), pytest.approx(fit.df_resid)]
    assert m["p_value"] == pytest.approx(row["PR(>F)"], rel=1e-8)
    adj = m["adjustment"]
    assert adj["columns"] == ["size", "region"] and adj["missing_strata"] == 1
    assert "NULL in size, region" in m["note"]
    robust_fit = fit if robust is None else smf.ols(formula, data).fit(cov_type="HC3", use_t=True)
    for pair, gap in zip(m["pairs"], adj["gaps"]):
        name = f"C(tier, Treatment('Basic'))[T.{pair['a']}]"
        assert pair["b"] == "Basic" and pair["diff"] == pytest.approx(fit.params[name], rel=1e-9)
        assert gap["gap"] == pytest.approx(fit.params[name], rel=1e-9)
        half = (gap["ci_high"] - gap["ci_low"]) / 2
        assert half / adj["critical_value"] == pytest.approx(robust_fit.bse[name], rel=1e-8)
        # raw gap: pandas means over the same records as the model (so the share explained compares
        # like with like; the record without a size is in neither)
        means = data.groupby("tier")["y"].mean()
        assert gap["raw_gap"] == pytest.approx(means[pair["a"]] - means["Basic"], rel=1e-9)
    # the raw comparison beside it: the plain one-way test on the same values
    assert adj["raw"]["method"] == test
    assert len(adj["raw"]["pairs"]) == 2


def test_pushdown_and_local_give_the_same_cells_and_verdict(tmp_path):
    _write_db(tmp_path / "src.sqlite")
    metric = {"column": "y", "test": "anova", "reference": "Basic", "adjust_for": ["size"]}
    pushed = _run_json(_config(tmp_path, metric, "pushdown"))["metrics"][0]
    local = _run_json(_config(tmp_path, metric, "local"))["metrics"][0]
    assert pushed["statistic"] == pytest.approx(local["statistic"], rel=1e-10)
    assert pushed["adjustment"]["cells"] == local["adjustment"]["cells"] == 9
    for a, b in zip(pushed["adjustment"]["gaps"], local["adjustment"]["gaps"]):
        assert a["gap"] == pytest.approx(b["gap"], rel=1e-10, abs=1e-12)
        assert a["ci_low"] == pytest.approx(b["ci_low"], rel=1e-8)


def test_cells_from_sql_equal_pandas_groupby(tmp_path):
    from monitor.config import load_config as parse
    from monitor.runner import Job

    frame = _write_db(tmp_path / "src.sqlite")
    cfg = parse(_config(tmp_path, {"column": "y", "reference": "Basic", "adjust_for": ["size", "region"]}))
    with Job(cfg) as job:
        period = job.period("2026-03")
        data = job.source.fetch(period)
    cells = {(c.segment, c.levels): c for c in data.metrics[0].cells.cells}
    usable = frame.dropna(subset=["y", "size"]).astype({"size": int})
    groups = usable.groupby(["tier", "size", "region"])["y"]  # pandas reference
    assert len(cells) == groups.ngroups
    for (tier, size, region), g in groups:
        c = cells[(tier, (str(size), region))]
        assert c.n == len(g)
        assert c.mean + c.mean_residual == pytest.approx(g.mean(), rel=1e-14)
        assert c.m2 == pytest.approx(((g - g.mean()) ** 2).sum(), rel=1e-10)
    assert data.metrics[0].cells.missing == 1


# ---------------------------------------------------------------------------
# check: adjust_for columns and the reference label
# ---------------------------------------------------------------------------
def test_check_names_the_reference_values(tmp_path, capsys):
    _write_db(tmp_path / "src.sqlite")
    path = _config(tmp_path, {"column": "y", "reference": "basic", "adjust_for": ["size"]})
    code, _ = _cli(["check", str(path)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "metrics[0].reference: no tier named 'basic'; tiers there: Basic, Plus, Saver; did you mean 'Basic'?" \
        in err[0]


def test_check_names_a_missing_adjust_for_column(tmp_path, capsys):
    _write_db(tmp_path / "src.sqlite")
    path = _config(tmp_path, {"column": "y", "reference": "Basic", "adjust_for": ["size", "age"]})
    code, _ = _cli(["check", str(path)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1
    assert "metrics[0].adjust_for[1]: no column 'age' in the source" in err[0]
    ok = _config(tmp_path, {"column": "y", "reference": "Basic", "adjust_for": ["size"]})
    code, out = _cli(["check", str(ok), "--period", "2026-03"])
    assert code == 0 and "reference segments present in tier" in out


# ---------------------------------------------------------------------------
# stored and read back
# ---------------------------------------------------------------------------
def test_adjustment_round_trips_through_json(tmp_path):
    _write_db(tmp_path / "src.sqlite")
    doc = _run_json(_config(tmp_path, {"column": "y", "reference": "Basic", "adjust_for": ["size"]}))
    entry = doc["metrics"][0]
    back = MetricResult.from_json(entry)
    assert isinstance(back.adjustment, Adjustment)
    assert back.to_json()["adjustment"] == entry["adjustment"]
    code, out = _cli(["history", str(_config(tmp_path, {"column": "y", "reference": "Basic",
                                                        "adjust_for": ["size"]})), "--json"])
    assert code == 0 and "adjustment" in out


# ---------------------------------------------------------------------------
# the pricing demo: a gap that is composition
# ---------------------------------------------------------------------------
def _plans():
    spec = importlib.util.spec_from_file_location("segwatch_sample_plans_adj", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def pricing(tmp_path_factory):
    folder = tmp_path_factory.mktemp("pricing")
    db = _plans().build(folder / "plans.sqlite")
    cfg = yaml.safe_load((ROOT / "configs" / "pricing-within-size.yaml").read_text(encoding="utf-8"))
    cfg["source"]["url"] = f"sqlite:///{db}"
    cfg["history"]["url"] = f"sqlite:///{folder / 'h.sqlite'}"
    cfg["alerts"] = [{"type": "log", "path": str(folder / "alerts.jsonl")}]
    path = folder / "within.yaml"
    path.write_text(yaml.safe_dump(cfg), encoding="utf-8")
    code, _ = _cli(["backfill", str(path), "--from", "2025-12", "--to", "2026-04"])
    assert code == 0
    for month in ("2026-08", "2026-12"):
        assert _cli(["run", str(path), "--period", month])[0] == 0
    return folder, path, db


def test_pricing_saver_gap_is_composition(pricing):
    folder, path, db = pricing
    doc = _run_json(path)
    m = doc["metrics"][0]
    saver = next(g for g in m["adjustment"]["gaps"] if g["segment"] == "Saver")
    # the planted story: -25% raw (sample_db/plans.py, composition_gap), none within sizes
    assert -30 < saver["raw_percent"] < -20
    assert saver["percent_low"] < 0 < saver["percent_high"] and not saver["significant"]
    assert abs(saver["percent"]) < 10
    # statsmodels on the rows themselves (incomes > 0, logged)
    with sqlite3.connect(db) as con:
        rows = pd.read_sql("SELECT tier, household_size, household_income FROM household_months "
                           "WHERE bill_date >= '2026-03-01' AND bill_date < '2026-04-01' AND household_income > 0",
                           con)
    rows["y"] = np.log(rows["household_income"].astype(float))
    fit = smf.ols("y ~ C(tier, Treatment('Basic')) + C(household_size)", rows).fit()
    assert saver["gap"] == pytest.approx(fit.params["C(tier, Treatment('Basic'))[T.Saver]"], rel=1e-8)
    assert m["statistic"] == pytest.approx(anova_lm(fit, typ=2).loc["C(tier, Treatment('Basic'))", "F"], rel=1e-8)
    # no alert ever says Saver's income is below Basic's once it is compared within sizes
    alerts = [json.loads(line) for line in (folder / "alerts.jsonl").read_text(encoding="utf-8").splitlines()]
    assert not [a for a in alerts if a["segment"] == "Saver"]
    premium = [a for a in alerts if a["segment"] == "Premium" and a["kind"] == "emerged"]
    assert premium and premium[0]["detail"]["adjusted_for"] == ["household_size"]
    assert math.isfinite(premium[0]["detail"]["percent"]) and "within household_size" in premium[0]["message"]


def _md_blocks(text: str, lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", text, flags=re.S)


def test_pricing_docs_table_and_printer(pricing):
    folder, path, db = pricing
    text = (ROOT / "docs" / "pricing.md").read_text(encoding="utf-8")
    code, out = _cli(["history", str(path), "--json"])
    assert code == 0
    stored = {e["period"]: e for e in json.loads(out)["metrics"]}
    pattern = r"^\| (20\d\d-\d\d) \| ([^|]+) \| ([^|]+) \| ([^|]+) \| none \|$"
    rows = re.findall(pattern, text, flags=re.M)
    readme_rows = re.findall(pattern, (ROOT / "README.md").read_text(encoding="utf-8"), flags=re.M)
    assert len(rows) == 7 and len(readme_rows) == 4 and set(readme_rows) <= set(rows)
    for month, raw, within, share in rows:
        gap = next(g for g in stored[month]["adjustment"]["gaps"] if g["segment"] == "Saver")
        assert raw.strip() == f"{gap['raw_percent']:+.1f}%"
        assert within.strip() == f"{gap['percent']:+.1f}% [{gap['percent_low']:+.1f}%, {gap['percent_high']:+.1f}%]"
        assert share.strip() == f"{100 * gap['explained']:.0f}%"
        assert gap["percent_low"] < 0 < gap["percent_high"] or month < "2026-01"
    # the second python block of the walk-through, on this job's 2026-03 document
    code_block = _md_blocks(text, "python")[1]
    doc = _run_json(path)
    result = subprocess.run([sys.executable, "-c", code_block], input=json.dumps(doc), capture_output=True,
                            text=True, timeout=60, check=True)
    (quoted,) = re.findall(r"`(2026-03 household_income: Saver vs Basic raw [^`]+)`", text)
    assert quoted in result.stdout.splitlines()


# ---------------------------------------------------------------------------
# every engine: the pushed-down cells equal the rows summarised here
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("engine", ["sqlite", "duckdb", "postgresql", "mariadb"])
def test_cells_pushed_down_equal_local_on_every_engine(engine, tmp_path):
    from dataclasses import replace as dc_replace

    from monitor.source import Source
    from tests.test_engines import PERIOD, create_table, job_config, make_target, parity_rows

    target = make_target(engine, tmp_path)
    try:
        table = create_table(target, "adj_cells", parity_rows(engine))
        metrics = [
            {"column": "x", "reference": "north", "adjust_for": ["cnt"]},
            {"name": "x_log", "column": "x", "transform": "log", "reference": "north", "adjust_for": ["cnt"]},
            {"column": "amount", "reference": "north", "adjust_for": ["cnt"]},  # exact decimals where possible
        ]
        cfg = job_config(target, table, tmp_path, metrics=metrics)
        push = Source(cfg).fetch(PERIOD)
        local = Source(dc_replace(cfg, compute="local")).fetch(PERIOD)  # pandas/numpy on the rows
        assert push.compute == "pushdown"
        for p, q in zip(push.metrics, local.metrics):
            pc = {(c.segment, c.levels): c for c in p.cells.cells}
            qc = {(c.segment, c.levels): c for c in q.cells.cells}
            assert pc.keys() == qc.keys() and len(pc) > 10
            for key, c in pc.items():
                d = qc[key]
                assert c.n == d.n
                assert c.mean + c.mean_residual == pytest.approx(d.mean + d.mean_residual, rel=1e-12, abs=1e-12)
                assert c.m2 == pytest.approx(d.m2, rel=1e-9, abs=1e-9)
            assert p.cells.missing == q.cells.missing >= 1  # the row whose cnt is NULL
            # the cells and the values left out add up to the per-segment query's counts
            assert sum(c.n for c in p.cells.cells) + p.cells.missing == sum(s.moments.n for s in p.segments)
    finally:
        target.close()


def test_run_text_shows_raw_and_adjusted_gaps(pricing):
    folder, path, db = pricing
    doc = _run_json(path)
    gap = next(g for g in doc["metrics"][0]["adjustment"]["gaps"] if g["segment"] == "Saver")
    code, out = _cli(["run", str(path), "--period", "2026-03"])
    assert code == 0 and "household_income within household_size (raw: anova" in out
    line = next(x for x in out.splitlines() if x.startswith("Saver vs Basic"))
    assert line.split()[3] == f"{gap['raw_percent']:+.1f}%"
    assert f"{gap['percent']:+.1f}% [{gap['percent_low']:+.1f}%, {gap['percent_high']:+.1f}%]" in line
