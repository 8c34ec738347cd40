"""The HTML report (``segwatch report``) and the terminal history tables.

Two histories are built here:

* a toy one (module fixture): three hubs over four ISO weeks in a small SQLite
  source, every metric compared by Kruskal-Wallis so the run takes well under a
  second a week; hub C's dwell is shifted up in the last two weeks, the ``cost``
  metric is compared with hub A as reference on the log scale, hub D appears with
  a single record in the last week (left out of the comparison);
* the depot demo (session fixture, ``sample_db/depots.py``), week 2026-W20 only
  (a full backfill takes minutes), for the planted stories.

Numbers on the page are checked against outside references (scipy's t interval,
Python's ``statistics.quantiles``); the structure (every metric and event, no
external references, pictures with text alternatives) is checked by parsing the
HTML; a real headless browser (Debian's chromium) renders the page to a PNG, which
must not be blank, with no console errors.
"""

from __future__ import annotations

import html
import json
import math
import re
import shutil
import sqlite3
import statistics
import subprocess
import sys
from dataclasses import replace
from datetime import datetime, timedelta
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from monitor.analysis import QUANTILE_KEYS, QUANTILE_LEVELS, SegmentRow, segment_quantiles
from monitor.cli import main
from monitor.config import load_config
from monitor.errors import PeriodError, UsageError
from monitor.present.report import collect, render_html, render_report, t_interval, write_report
from monitor.runner import Job

ROOT = Path(__file__).resolve().parents[1]
WEEKS = ("2026-W10", "2026-W11", "2026-W12", "2026-W13")
MONDAYS = (datetime(2026, 3, 2), datetime(2026, 3, 9), datetime(2026, 3, 16), datetime(2026, 3, 23))
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


# ------------------------------------------------------------------ fixtures


def _toy_rows(rng: np.random.Generator) -> list[tuple]:
    rows = []
    for w, monday in enumerate(MONDAYS):
        for hub, n in (("A", 40), ("B", 45), ("C", 35)):
            for _ in range(n):
                ts = monday + timedelta(hours=float(rng.uniform(1, 6 * 24)))
                shift = 8.0 if hub == "C" and w >= 2 else 0.0
                dwell = float(rng.normal(20 + shift, 3))
                cost = float(rng.lognormal(1.0 + (0.6 if hub == "B" else 0.0), 0.4))
                wait = float(rng.normal(12, 5 if hub == "B" else 2))
                rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, dwell, cost, wait))
    rows.append(((MONDAYS[3] + timedelta(hours=30)).strftime("%Y-%m-%d %H:%M:%S"), "D", 21.0, 2.0, 12.0))
    return rows


@pytest.fixture(scope="module")
def toy(tmp_path_factory) -> Path:
    """A toy job with four stored weeks; returns its config path."""
    root = tmp_path_factory.mktemp("toy")
    con = sqlite3.connect(root / "src.sqlite")
    con.execute("CREATE TABLE parcels (id INTEGER PRIMARY KEY, ts TEXT, hub TEXT, dwell REAL, cost REAL, wait REAL)")
    con.executemany("INSERT INTO parcels (ts, hub, dwell, cost, wait) VALUES (?, ?, ?, ?, ?)",
                    _toy_rows(np.random.default_rng(11)))
    con.commit()
    con.close()
    cfg = root / "job.yaml"
    cfg.write_text(
        "job: hubs\n"
        "source:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n  segment_column: hub\n"
        "period: week\ntimezone: Europe/Berlin\n"
        "metrics:\n"
        "  - column: dwell\n    test: kruskal\n    unit: h\n"
        "  - column: cost\n    test: kruskal\n    reference: A\n    transform: log\n    unit: EUR\n"
        "  - column: wait\n    test: kruskal\n"
        "fdr: {method: bh, level: 0.05}\n"
        "history: {url: 'sqlite:///state/history.sqlite'}\n"
        "alerts:\n  - type: log\n    path: logs/alerts.jsonl\n"
    )
    with Job(load_config(cfg)) as job:
        for w in WEEKS:
            job.run(w)
    return cfg


@pytest.fixture(scope="module")
def toy_html(toy: Path) -> str:
    with Job(load_config(toy)) as job:
        return render_report(job, "2026-W13")


@pytest.fixture(scope="session")
def demo(tmp_path_factory) -> Path:
    """The depot sample with week 2026-W20 stored; returns the config path."""
    root = tmp_path_factory.mktemp("demo")
    subprocess.run([sys.executable, str(ROOT / "sample_db" / "depots.py"), "--out", str(root / "depots.sqlite")],
                   check=True, capture_output=True)
    text = (ROOT / "configs" / "demo.yaml").read_text(encoding="utf-8")
    text = (text.replace("sqlite:///../sample_db/depots.sqlite", "sqlite:///depots.sqlite")
                .replace("sqlite:///../.segwatch/demo-history.sqlite", "sqlite:///history.sqlite")
                .replace("../logs/demo-alerts.jsonl", "alerts.jsonl"))
    assert "sqlite:///depots.sqlite" in text and "sqlite:///history.sqlite" in text
    cfg = root / "demo.yaml"
    cfg.write_text(text, encoding="utf-8")
    with Job(load_config(cfg)) as job:
        job.run("2026-W20")
    return cfg


class Page(HTMLParser):
    """The parts of an HTML page the structure tests look at."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str]]] = []
        self.text: list[str] = []
        self.svg_titles = 0
        self._in_svg_title = False
        self._stack: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, {k: v or "" for k, v in attrs}))
        if tag == "title" and "svg" in self._stack:
            self.svg_titles += 1
        self._stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, {k: v or "" for k, v in attrs}))

    def handle_endtag(self, tag):
        while self._stack and self._stack.pop() != tag:
            pass

    def handle_data(self, data):
        self.text.append(data)

    def all(self, tag: str) -> list[dict[str, str]]:
        return [a for t, a in self.tags if t == tag]

    @property
    def plain(self) -> str:
        return " ".join(" ".join(self.text).split())


# ------------------------------------------------------------------ numbers against references


def test_t_interval_matches_scipy_and_statsmodels():
    rng = np.random.default_rng(3)
    x = rng.normal(10, 2, size=17)
    lo, hi = t_interval(len(x), x.mean(), x.std(ddof=1))
    ref = stats.t.interval(0.95, len(x) - 1, loc=x.mean(), scale=stats.sem(x))  # reference: scipy.stats.t.interval
    assert (lo, hi) == pytest.approx(ref, rel=1e-12)
    from statsmodels.stats.weightstats import DescrStatsW

    assert (lo, hi) == pytest.approx(DescrStatsW(x).tconfint_mean(0.05), rel=1e-10)  # reference: statsmodels
    # handbook value: t(0.975, 9) = 2.262 (Student's t table, e.g. NIST/SEMATECH e-Handbook 1.3.6.7.2)
    lo, hi = t_interval(10, 0.0, math.sqrt(10))
    assert hi == pytest.approx(2.262, abs=5e-4)
    # degenerate: no interval from fewer than two values, or a missing sd
    assert all(math.isnan(v) for v in t_interval(1, 5.0, 0.0))
    assert all(math.isnan(v) for v in t_interval(10, 5.0, None))


def test_segment_quantiles_match_python_statistics():
    rng = np.random.default_rng(5)
    x = rng.gamma(2.0, 3.0, size=53)
    got = segment_quantiles(x)
    # reference: Python's statistics.quantiles(method="inclusive") is Hyndman-Fan definition 7
    cuts = statistics.quantiles(x.tolist(), n=20, method="inclusive")
    assert got == pytest.approx([cuts[0], cuts[4], cuts[9], cuts[14], cuts[18]], rel=1e-12)
    assert QUANTILE_LEVELS == (0.05, 0.25, 0.50, 0.75, 0.95)
    assert segment_quantiles(None) == () and segment_quantiles(np.empty(0)) == ()
    row = SegmentRow("A", 53, float(x.mean()), float(x.std(ddof=1)), quantiles=got)
    assert list(row.to_json()["quantiles"]) == list(QUANTILE_KEYS)
    assert row.to_json()["quantiles"]["q50"] == pytest.approx(statistics.median(x.tolist()), rel=1e-12)
    assert SegmentRow("A", 0, math.nan, math.nan).to_json()["quantiles"] is None


def test_stored_quantiles_are_those_of_the_period_values(toy: Path):
    con = sqlite3.connect(toy.parent / "src.sqlite")
    vals = [v for (v,) in con.execute(
        "SELECT dwell FROM parcels WHERE hub = 'C' AND ts >= '2026-03-23' AND ts < '2026-03-30'")]
    con.close()
    with Job(load_config(toy)) as job:
        entry = next(e for e in job.history.metric_history("dwell") if e["period"] == "2026-W13")
    seg = next(s for s in entry["segments"] if s["segment"] == "C")
    cuts = statistics.quantiles(vals, n=20, method="inclusive")  # reference: Python statistics (type 7)
    assert [seg["quantiles"][k] for k in QUANTILE_KEYS] == pytest.approx(
        [cuts[0], cuts[4], cuts[9], cuts[14], cuts[18]], rel=1e-12)


# ------------------------------------------------------------------ structure


def test_every_metric_and_event_appears(toy: Path, toy_html: str):
    page = Page(toy_html)
    with Job(load_config(toy)) as job:
        events = job.history.events("2026-W13")
        entries = [e for e in job.history.metric_history() if e["period"] == "2026-W13"]
    assert {e["metric"] for e in entries} == {"dwell", "cost", "wait"}
    assert events, "the toy history should have events in 2026-W13"
    for e in events:
        assert html.escape(e["message"], quote=True) in toy_html
    plain = page.plain
    for name in ("dwell", "cost", "wait"):
        assert f'id="metric-{name}"' in toy_html
    # the front table lists metrics by q-value, smallest first
    nav = re.search(r'<nav class="contents".*?</nav>', toy_html, re.S).group(0)
    by_q = [e["metric"] for e in sorted(entries, key=lambda e: e["q_value"])]
    assert re.findall(r'href="#metric-([^"]+)"', nav) == by_q
    table = re.search(r'<table class="overview">.*?</table>', toy_html, re.S).group(0)
    assert re.findall(r'href="#metric-([^"]+)"', table) == by_q
    assert "Week 2026-W13" in plain
    assert "Mon 23 Mar 2026 00:00 to Mon 30 Mar 2026 00:00, Europe/Berlin" in plain
    # the planted shift: C stands above on dwell; D was left out for too few values
    assert "▲ C above" in plain
    assert "Left out of the test for too few values: D." in plain
    # the caution block
    assert "Reading these results with care" in plain
    assert "must follow local law" in plain


def test_no_scripts_and_no_external_references(toy_html: str):
    page = Page(toy_html)
    for tag, attrs in page.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "img"), tag
        for key in ("src", "href", "xlink:href", "action", "srcset"):
            if key in attrs:
                assert attrs[key].startswith("#"), (tag, key, attrs[key])
        assert not any(k.startswith("on") for k in attrs), (tag, attrs)
    assert not re.search(r"https?://|//[a-z0-9.-]+\.[a-z]{2,}/|@import|url\((?!#)", toy_html, re.I)
    csp = [a for a in page.all("meta") if a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]["content"]


def test_pictures_have_text_alternatives_and_unique_ids(toy_html: str):
    page = Page(toy_html)
    svgs = page.all("svg")
    assert len(svgs) == 3 * 3  # box, trend and q-value picture for each of the three metrics
    for a in svgs:
        assert a.get("role") == "img" and len(a.get("aria-label", "")) > 20
    assert page.svg_titles == len(svgs)
    figures = re.findall(r"<figure class=\"chart[^\"]*\".*?</figure>", toy_html, re.S)
    assert len(figures) == len(svgs)
    for f in figures:
        cap = re.search(r"<figcaption[^>]*>(.*?)</figcaption>", f, re.S)
        assert cap and len(re.sub(r"<[^>]+>", "", cap.group(1)).split()) >= 12
    ids = [a["id"] for _, a in page.tags if "id" in a]
    assert len(ids) == len(set(ids)), "element ids must be unique across the inline pictures"
    # text is drawn as outlines: no font is needed, none is fetched
    assert not page.all("text") and "font-family" not in "".join(re.findall(r"<svg.*?</svg>", toy_html, re.S))


def test_front_table_numbers(toy: Path, toy_html: str):
    with Job(load_config(toy)) as job:
        entry = next(e for e in job.history.metric_history("dwell") if e["period"] == "2026-W13")
    plain = Page(toy_html).plain
    # Kruskal-Wallis statistic with its degrees of freedom, as stored
    assert f"H(2) = {entry['statistic']:.4g}" in plain or f"H(2) = {entry['statistic']:.2f}" in plain
    # the segment table's interval is mean ± t(0.975, n-1) sd / sqrt(n) (reference: scipy.stats.t.interval)
    c = next(s for s in entry["segments"] if s["segment"] == "C")
    lo, hi = stats.t.interval(0.95, c["n"] - 1, loc=c["mean"], scale=c["sd"] / math.sqrt(c["n"]))
    assert f"{lo:.1f} to {hi:.1f}" in plain


def test_reference_metric_against_the_reference(toy: Path, toy_html: str):
    section = toy_html[toy_html.index('id="metric-cost"'):]
    section = section[:section.index("</section>")]
    assert "Each hub against A" in section
    # after Kruskal-Wallis the Dunn gaps are in mean ranks: never shown as ratios
    assert "gap in mean rank to A" in section and "×" not in section
    # the logged metric is drawn in its own units on a log axis, centred on geometric means
    assert "cost (EUR, log scale)" in section and "geometric mean" in section
    with Job(load_config(toy)) as job:
        entry = next(e for e in job.history.metric_history("cost") if e["period"] == "2026-W13")
    b = next(s for s in entry["segments"] if s["segment"] == "B")
    gm = math.exp(b["mean"])  # the geometric mean is exp of the mean of the logs (definition)
    assert f"<td class=\"num\">{gm:.2f}</td>" in section

    # with Dunnett pairs under a log transform the page gives the ratios and their interval
    cfg = load_config(toy)

    class Dunnett:
        def __init__(self, real):
            self.real = real

        def runs(self):
            return self.real.runs()

        def events(self, period=None):
            return self.real.events(period)

        def results(self, metric=None):
            out = []
            for sr in self.real.results(metric):
                if sr.metric == "cost":  # ratios are read from the differences of logs
                    pairs = tuple(replace(p, diff=math.log(1.5), ci_low=math.log(1.2), ci_high=math.log(1.9),
                                          log_scale=True) for p in sr.result.pairs)
                    sr = replace(sr, result=replace(sr.result, posthoc="dunnett", pairs=pairs))
                out.append(sr)
            return out

    with Job(cfg) as job:
        text = render_html(collect(Dunnett(job.history), cfg, "2026-W13"))
    assert "ratio to A (interval)" in text and "× 1.50 (1.20 to 1.90)" in text


def test_missing_quantiles_fall_back_to_mean_and_sd(toy: Path):
    class NoQuantiles:
        """The history as an older segwatch stored it: no per-segment quantiles."""

        def __init__(self, real):
            self.real = real

        def runs(self):
            return self.real.runs()

        def events(self, period=None):
            return self.real.events(period)

        def results(self, metric=None):
            return [replace(sr, result=replace(sr.result, segments=tuple(
                replace(s, quantiles=()) for s in sr.result.segments))) for sr in self.real.results(metric)]

    cfg = load_config(toy)
    with Job(cfg) as job:
        text = render_html(collect(NoQuantiles(job.history), cfg, "2026-W13"))
    assert text.count("drawn as mean ± 1 standard deviation instead of a box") == 3


def test_a_metric_that_could_not_be_computed(toy: Path):
    class Degenerate:
        """The wait metric as stored when fewer than two segments had values."""

        def __init__(self, real):
            self.real = real

        def runs(self):
            return self.real.runs()

        def events(self, period=None):
            return self.real.events(period)

        def results(self, metric=None):
            nan = float("nan")
            return [replace(sr, result=replace(
                sr.result, statistic=nan, p_value=nan, q_value=nan, significant=False, effect_size=None,
                pairs=(), assumptions={}, relevant_checks=(),
                method_reason="not computed: fewer than two segments have enough values to compare",
                note="fewer than two segments have enough values to compare", df=(nan,)))
                if sr.metric == "wait" and sr.period == "2026-W13" else sr for sr in self.real.results(metric)]

    cfg = load_config(toy)
    with Job(cfg) as job:
        data = collect(Degenerate(job.history), cfg, "2026-W13")
        text = render_html(data)
    assert [r.metric for r in data.results][-1] == "wait"  # no q-value: listed last
    section = text[text.index('id="metric-wait"'):]
    plain = Page(section[:section.index("</section>")]).plain
    assert "not computed" in plain
    assert "Not computed this week: fewer than two segments have enough values to compare." in plain


def test_window_is_the_last_n_stored_periods(toy: Path):
    cfg = load_config(toy)
    with Job(cfg) as job:
        data = collect(job.history, cfg, "2026-W12", periods=2)
        latest = collect(job.history, cfg, None)
    assert data.window == ("2026-W11", "2026-W12")
    assert data.period == "2026-W12"
    assert latest.period == "2026-W13" and latest.window == WEEKS  # default report.periods = 12 covers all


# ------------------------------------------------------------------ bad inputs


def test_errors_name_the_fix(toy: Path, tmp_path: Path):
    cfg = load_config(toy)
    with Job(cfg) as job:
        with pytest.raises(UsageError) as err:
            collect(job.history, cfg, "2026-W30")
        assert str(err.value) == (
            f"period 2026-W30 is not stored for job hubs (stored: 2026-W10 to 2026-W13, 4 periods); "
            f"run `segwatch run {cfg.path} --period 2026-W30` first")
        with pytest.raises(PeriodError):
            collect(job.history, cfg, "2026-13")
        with pytest.raises(UsageError) as err:
            collect(job.history, cfg, None, periods=0)
        assert str(err.value) == "periods: give a whole number of at least 1, not 0"

    empty = tmp_path / "empty.yaml"
    empty.write_text(toy.read_text().replace("sqlite:///state/history.sqlite", "sqlite:///nothing.sqlite")
                     .replace("sqlite:///src.sqlite", f"sqlite:///{toy.parent / 'src.sqlite'}"))
    ecfg = load_config(empty)
    with Job(ecfg) as job, pytest.raises(UsageError) as err:
        write_report(job, None, tmp_path / "r.html")
    assert str(err.value) == (
        f"no stored periods for job hubs in the history at sqlite:///{tmp_path / 'nothing.sqlite'}; "
        f"run `segwatch run {ecfg.path}` (or `segwatch backfill`) first")
    assert not (tmp_path / "r.html").exists()


def test_cli_report(toy: Path, tmp_path: Path, capsys):
    out = tmp_path / "deep" / "week13.html"
    assert main(["report", str(toy), "--period", "2026-W13", "--periods", "3", "--out", str(out)]) == 0
    assert capsys.readouterr().out == f"wrote {out}\n"
    text = out.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>") and "2026-W13" in text
    assert "The last 3 stored weeks." in text

    assert main(["report", str(toy), "--period", "2026-W30", "--out", str(tmp_path / "x.html")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("Error: period 2026-W30 is not stored for job hubs") and err.count("\n") == 1
    assert main(["report", str(toy), "--periods", "0", "--out", str(tmp_path / "x.html")]) == 2
    assert capsys.readouterr().err == "Error: --periods: give a whole number of at least 1, not 0\n"
    assert not (tmp_path / "x.html").exists()


# ------------------------------------------------------------------ terminal history


def test_history_tables(toy: Path, capsys):
    assert main(["history", str(toy)]) == 0
    text = capsys.readouterr().out
    lines = text.splitlines()
    # the default two-period rule: each cell the stored evidence, judged at its stored level
    assert lines[0].startswith("hubs: evidence by period (this period with the one before); * differs (at or "
                               "below the stored level, ")
    header = lines[2].split()
    assert header == ["period", "cost", "dwell", "wait", "differ"]
    with Job(load_config(toy)) as job:
        entries = job.history.metric_history()
    for w in WEEKS:
        row = next(line for line in lines if line.startswith(w))
        sig = sorted(e["metric"] for e in entries if e["period"] == w and e["significant"])
        assert row.count("*") == len(sig)

    assert main(["history", str(toy), "--metric", "dwell"]) == 0
    text = capsys.readouterr().out
    lines = text.splitlines()
    assert lines[2].split() == ["period", "test", "q", "A", "B", "C", "D", "failing", "checks"]
    w13 = next(line for line in lines if line.startswith("2026-W13"))
    assert "▲" in w13 and "~" in w13  # C stands above; D left out
    w10 = next(line for line in lines if line.startswith("2026-W10"))
    assert w10.split()[-1] == "."  # D had no records in W10

    assert main(["history", str(toy), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["job"] == "hubs" and len(doc["metrics"]) == 3 * len(WEEKS)


# ------------------------------------------------------------------ the depot demo's stories


def test_demo_report_tells_the_planted_stories(demo: Path, tmp_path: Path):
    with Job(load_config(demo)) as job:
        out = write_report(job, "2026-W20", tmp_path / "w20.html")
        events = job.history.events("2026-W20")
    text = out.read_text(encoding="utf-8")
    plain = Page(text).plain
    # drift: Quarry stands above the rest on dwell_hours (sample_db/README.md, story `drift`)
    dwell = text[text.index('id="metric-dwell_hours"'):]
    dwell = dwell[:dwell.index("</section>")]
    assert "Quarry stands above the rest" in Page(dwell).plain
    # steady offset: Millbrook above on sort_minutes
    assert "▲ Millbrook above" in plain
    # spread break: counter_wait_min's watched equal-spread check fails, without a difference in means
    wait = text[text.index('id="metric-counter_wait_min"'):]
    wait = Page(wait[:wait.index("</section>")]).plain
    assert "equal spread: fails" in wait and "watched" in wait.lower()
    assert "No clear difference by depot this week" in wait
    assert "Spreads differ: the middle half of" in wait
    for e in events:
        assert html.escape(e["message"], quote=True) in text


# ------------------------------------------------------------------ a real browser


def _chromium(url: str, tmp: Path, *extra: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp / 'profile'}",
         "--enable-logging=stderr", "--v=0", *extra, url],
        check=False, capture_output=True, text=True, timeout=120)


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (CI installs it: apt-get install -y chromium)")
def test_headless_browser_renders_the_report(toy: Path, tmp_path: Path):
    from PIL import Image

    with Job(load_config(toy)) as job:
        page = write_report(job, "2026-W13", tmp_path / "report.html")
    png = tmp_path / "shot.png"
    shot = _chromium(page.as_uri(), tmp_path, f"--screenshot={png}", "--window-size=1200,2000")
    assert png.exists(), shot.stderr[-2000:]
    console = [line for line in shot.stderr.splitlines()
               if "CONSOLE" in line or "Uncaught" in line or "Refused to" in line]
    assert console == []
    img = np.asarray(Image.open(png).convert("RGB"))
    assert img.shape[:2] == (2000, 1200)
    colours = np.unique(img.reshape(-1, 3), axis=0)
    assert len(colours) > 50, "a rendered report has text, charts and tinted cells"
    assert (img.min(axis=2) < 200).mean() > 0.02, "the page is not blank"

    dom = _chromium(page.as_uri(), tmp_path, "--dump-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert dom.stdout.count("<svg") == 9 and "</html>" in dom.stdout
    assert "What changed this week" in dom.stdout
