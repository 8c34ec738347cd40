"""The decision rule across periods (monitor/decisions.py) and the events it announces.

Outside references: Stouffer's combination is checked against
``scipy.stats.combine_pvalues(method='stouffer')``; the level against the budget's
formula B / (P m) with P = 365.2425 / 7 ISO weeks a year (the mean Gregorian year).
Each rule has a test that fails on the per-period rule of earlier releases
(``decision: {rule: per_period}``), which the same tests show.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sps

from monitor.config import parse_config
from monitor.decisions import Previous, decide_period, previous_state
from monitor.events import Baseline, derive_events
from monitor.model import Check, EffectSize, MetricResult, PairRow, QualityCounts, SegmentRow

SEGS = ("A", "B", "C", "D", "E")
WEEKS_A_YEAR = 365.2425 / 7


def make_job(tmp_path: Path, rule: str | None = None, metrics=("m1", "m2", "m3", "m4", "m5"), **decision):
    data = {
        "job": "t",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
        "period": "week", "timezone": "UTC",
        "metrics": list(metrics),
    }
    if rule or decision:
        data["decision"] = ({"rule": rule} if rule else {}) | decision
    return parse_config(data, tmp_path / "t.yaml", environ={})


def result(metric: str, p: float, *, flags: dict[str, str] | None = None, bf: float | None = None) -> MetricResult:
    """One metric's per-period analysis as monitor.analysis.finalise leaves it (q = p here)."""
    flags = flags or {}
    rows = tuple(SegmentRow(s, 50, 10.0, 1.0, direction=flags.get(s), flag=flags.get(s) if p <= 0.05 else None)
                 for s in SEGS)
    checks = {}
    relevant = ()
    if bf is not None:
        checks = {"brown_forsythe": Check("brown_forsythe", bf, 0.05, bf >= 0.05, f"Brown-Forsythe p {bf}")}
        relevant = ("brown_forsythe",)
    return MetricResult(metric, metric, "auto", "welch", "", 3.0, (4.0, 100.0), p,
                        EffectSize("omega_squared", 0.05), rows, (), "games-howell", checks,
                        QualityCounts(250), q_value=p, significant=p <= 0.05, relevant_checks=relevant)


@dataclass
class Stored:
    """A stored period as History.recent gives it."""

    period: str
    metrics: dict
    segments: tuple = SEGS


class Weeks:
    """Runs a job's decisions and events week after week over an in-memory history."""

    def __init__(self, job):
        self.job = job
        self.history: list[Stored] = []
        self.events: list[tuple[str, object]] = []

    def week(self, ident: str, results, previous_ident: str | None = None) -> tuple[MetricResult, ...]:
        stored = list(reversed(self.history))
        before = previous_ident or (self.history[-1].period if self.history else "none")
        decided = decide_period(results, self.job, previous_state(stored, before, self.job))
        base = Baseline.from_history(stored, self.job)
        self.events += [(ident, e) for e in derive_events(self.job, decided, SEGS, 0, 250, base)]
        self.history.append(Stored(ident, {r.metric: r.to_json(stored=True) for r in decided}))
        return decided

    def kinds(self, metric: str | None = None, segment: str | None = "any") -> list[tuple[str, str]]:
        return [(w, e.kind) for w, e in self.events if (metric is None or e.metric == metric)
                and (segment == "any" or e.segment == segment)]


def quiet(*names: str, p: float = 0.6):
    return [result(n, p) for n in names]


NAMES = ("m1", "m2", "m3", "m4", "m5")


# ---------------------------------------------------------------- the level and the evidence


def test_level_follows_the_yearly_budget(tmp_path):
    job = make_job(tmp_path)
    decided = decide_period([result(n, 0.5) for n in NAMES], job, Previous(None, False, job))
    assert decided[0].decision.level == pytest.approx(1.0 / (WEEKS_A_YEAR * 5), rel=1e-12)
    job2 = make_job(tmp_path, false_alarms_per_year=0.5)
    decided = decide_period([result(n, 0.5) for n in NAMES[:2]], job2, Previous(None, False, job2))
    assert decided[0].decision.level == pytest.approx(0.5 / (WEEKS_A_YEAR * 2), rel=1e-12)


def test_evidence_is_stouffers_combination_against_scipy(tmp_path):
    job = make_job(tmp_path)
    w = Weeks(job)
    w.week("2026-W01", [result(n, p) for n, p in zip(NAMES, (0.01, 0.2, 0.5, 0.7, 0.9))])
    second = w.week("2026-W02", [result(n, p) for n, p in zip(NAMES, (0.02, 0.03, 0.5, 0.7, 0.9))])
    for r, before in zip(second, (0.01, 0.2, 0.5, 0.7, 0.9)):
        ref = sps.combine_pvalues([r.p_value, before], method="stouffer").pvalue  # scipy, unweighted z-sum
        assert r.decision.combined == pytest.approx(ref, rel=1e-9)
        assert r.decision.evidence == pytest.approx(min(1.0, r.p_value / 0.2, ref / 0.8), rel=1e-9)
        assert r.decision.before == "2026-W01" and r.decision.p_before == before


def test_two_moderate_periods_alarm_where_one_alone_would_not(tmp_path):
    # p = 0.01 twice: each alone is far above the level (0.0038 for 5 weekly metrics), together
    # Stouffer's p_S = 5.0e-4 <= 0.8 x level. The per-period rule at BH 0.05 alarms in the first week instead.
    job = make_job(tmp_path)
    w = Weeks(job)
    w.week("2026-W01", [result("m1", 0.01)] + quiet(*NAMES[1:]))
    assert w.kinds("m1", None) == []
    w.week("2026-W02", [result("m1", 0.01)] + quiet(*NAMES[1:]))
    assert w.kinds("m1", None) == [("2026-W02", "emerged")]
    (event,) = [e for _, e in w.events]
    assert "over this period and 2026-W01" in event.message
    assert event.detail["evidence"] <= event.detail["level"] and event.detail["before"] == "2026-W01"

    old = Weeks(make_job(tmp_path, "per_period"))
    old.week("2026-W01", [result("m1", 0.01)] + quiet(*NAMES[1:]))
    assert old.kinds("m1", None) == [("2026-W01", "emerged")]


def test_a_one_period_blip_raises_nothing_and_cannot_flap(tmp_path):
    # p = 0.004 once among quiet weeks: an alarm under the per-period rule, cleared the week after (flapping)
    new, old = Weeks(make_job(tmp_path)), Weeks(make_job(tmp_path, "per_period"))
    for i, p in enumerate((0.6, 0.004, 0.6, 0.5, 0.7), start=1):
        for w in (new, old):
            w.week(f"2026-W0{i}", [result("m1", p)] + quiet(*NAMES[1:]))
    assert new.kinds() == []
    assert old.kinds("m1", None) == [("2026-W02", "emerged"), ("2026-W03", "cleared")]


def test_a_standing_difference_does_not_clear_when_one_period_falls_short(tmp_path):
    # a difference that stands every week; in W03 its test falls just short (p = 0.08)
    ps = (1e-6, 1e-5, 0.08, 1e-5, 1e-6)
    new, old = Weeks(make_job(tmp_path)), Weeks(make_job(tmp_path, "per_period"))
    for i, p in enumerate(ps, start=1):
        for w in (new, old):
            w.week(f"2026-W0{i}", [result("m1", p, flags={"A": "high"})] + quiet(*NAMES[1:]))
    assert new.kinds("m1") == [("2026-W01", "emerged"), ("2026-W01", "emerged")]  # the metric, then A
    assert [e.segment for _, e in new.events] == [None, "A"]
    assert ("2026-W03", "cleared") in old.kinds("m1")  # the per-period rule flickers
    assert ("2026-W04", "emerged") in old.kinds("m1")


def test_an_announcement_clears_after_two_quiet_periods(tmp_path):
    job = make_job(tmp_path)
    w = Weeks(job)
    ps = (1e-8, 1e-7, 0.5, 0.6, 0.7, 0.8)
    for i, p in enumerate(ps, start=1):
        w.week(f"2026-W0{i}", [result("m1", p, flags={"A": "high"})] + quiet(*NAMES[1:]))
    # W03's window reaches back to W02 (strong evidence), so it is not quiet; W04 and W05 are
    assert w.kinds("m1", None) == [("2026-W01", "emerged"), ("2026-W05", "cleared")]
    (cleared,) = [e for wk, e in w.events if e.kind == "cleared" and e.segment is None]
    assert "no evidence in 2 periods in a row" in cleared.message
    assert ("2026-W05", "cleared") in w.kinds("m1", "A")


def test_a_segment_flag_is_held_one_period_without_evidence(tmp_path):
    job = make_job(tmp_path)
    w = Weeks(job)
    flags = ({"A": "high"}, {"A": "high"}, {}, {"A": "high"}, {}, {}, {})
    for i, f in enumerate(flags, start=1):
        decided = w.week(f"2026-W0{i}", [result("m1", 1e-9, flags=f)] + quiet(*NAMES[1:]))
        if i == 3:
            assert decided[0].flagged == {"A": "high"} and decided[0].segments[0].held == 1
    assert w.kinds("m1", "A") == [("2026-W01", "emerged"), ("2026-W06", "cleared")]


def test_a_missing_previous_period_is_judged_alone_and_said(tmp_path):
    job = make_job(tmp_path)
    w = Weeks(job)
    w.week("2026-W01", [result("m1", 0.01)] + quiet(*NAMES[1:]))
    # W02 failed and was never stored: W03 must not combine with W01
    decided = w.week("2026-W03", [result("m1", 0.01)] + quiet(*NAMES[1:]), previous_ident="2026-W02")
    assert decided[0].decision.before is None and decided[0].decision.p_before is None
    assert decided[0].decision.evidence == pytest.approx(0.01)
    assert w.kinds() == []


def test_the_level_does_not_loosen_when_other_metrics_truly_differ(tmp_path):
    # four metrics differ strongly every week; under BH a fifth at p = 0.03 is rejected (q = 0.03),
    # under the budget's Bonferroni level it is not
    new, old = Weeks(make_job(tmp_path)), Weeks(make_job(tmp_path, "per_period"))
    for w in (new, old):
        w.week("2026-W01", [result(n, 1e-9) for n in NAMES[:4]] + [result("m5", 0.6)])
    for w in (new, old):
        w.week("2026-W02", [result(n, 1e-9) for n in NAMES[:4]] + [result("m5", 0.03)])
    assert ("2026-W02", "emerged") in old.kinds("m5", None)
    assert new.kinds("m5", None) == []


# ---------------------------------------------------------------- assumption checks


def test_a_check_that_passes_is_never_announced_as_failing(tmp_path):
    # a monthly job with one watched check: the budget's level (1/12) is above the check's own 0.05;
    # two periods at p = 0.08 and 0.07 give evidence 0.026 < 0.083, but the check passes
    job = make_job(tmp_path, metrics=("m1",))
    job = replace(job, period="month")
    w = Weeks(job)
    for i, bf in enumerate((0.08, 0.07, 0.5), start=1):
        w.week(f"2026-0{i}", [result("m1", 0.6, bf=bf)])
    assert w.kinds() == []


def test_assumption_breaks_need_the_evidence_of_the_budget(tmp_path):
    # Brown-Forsythe p = 0.03 in one week: a break at the check's 0.05 under the per-period rule
    new, old = Weeks(make_job(tmp_path)), Weeks(make_job(tmp_path, "per_period"))
    for i, bf in enumerate((0.5, 0.03, 0.6, 0.7), start=1):
        for w in (new, old):
            w.week(f"2026-W0{i}", [result("m1", 0.6, bf=bf)] + quiet(*NAMES[1:]))
    assert old.kinds("m1", None) == [("2026-W02", "assumption_broken"), ("2026-W03", "assumption_restored")]
    assert new.kinds() == []


def test_a_lasting_spread_change_is_announced_and_restored_with_hysteresis(tmp_path):
    job = make_job(tmp_path)
    w = Weeks(job)
    for i, bf in enumerate((0.5, 1e-9, 1e-6, 0.04, 1e-5, 0.5, 0.6, 0.7), start=1):
        w.week(f"2026-W0{i}", [result("m1", 0.6, bf=bf)] + quiet(*NAMES[1:]))
    # restored after two periods in a row in which the check passes (W06, W07); W04's p = 0.04 fails but
    # is no evidence of a change at the level, and does not take the announcement back either
    assert w.kinds("m1", None) == [("2026-W02", "assumption_broken"), ("2026-W07", "assumption_restored")]
    broken = next(e for _, e in w.events if e.kind == "assumption_broken")
    assert broken.detail["check"] == "brown_forsythe" and broken.detail["evidence"] <= broken.detail["level"]
    assert broken.detail["level"] == pytest.approx(1.0 / WEEKS_A_YEAR, rel=1e-12)  # one watched check


# ---------------------------------------------------------------- config


def test_confirm_belongs_to_the_per_period_rule(tmp_path):
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match=r"confirm: applies only to decision.rule: per_period"):
        parse_config({"source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts",
                                 "segment_column": "g"}, "period": "week", "timezone": "UTC",
                      "metrics": ["y"], "confirm": 2}, tmp_path / "j.yaml", environ={})


@pytest.mark.parametrize("decision, message", [
    ({"rule": "weekly"}, "decision.rule: "),
    ({"false_alarms_per_year": 0}, "decision.false_alarms_per_year: "),
    ({"weight_now": 1}, "decision.weight_now: "),
    ({"quiet_periods": 0}, "decision.quiet_periods: "),
    ({"budget": 1}, "decision.budget: unknown key"),
])
def test_bad_decision_settings_name_the_key(tmp_path, decision, message):
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match=message.replace(".", r"\.")):
        make_job(tmp_path, **decision)


# ---------------------------------------------------------------- practical thresholds


def _means_result(metric: str, p: float, means: dict[str, float], *, reference: str | None = None,
                  direction: dict[str, str] | None = None) -> MetricResult:
    """A metric whose segments have the given means (descriptive differences against the rest)."""
    direction = direction or {}
    total = sum(means.values())
    rows = tuple(SegmentRow(s, 50, m, 1.0, diff_vs_rest=m - (total - m) / (len(means) - 1),
                            direction=direction.get(s), flag=direction.get(s)) for s, m in means.items())
    pairs = ()
    if reference is not None:  # gaps to the reference, significant where a direction is given
        pairs = tuple(PairRow(s, reference, m - means[reference], 1e-9 if s in direction else 0.5)
                      for s, m in means.items() if s != reference)
    return replace(result(metric, p), segments=rows, reference=reference, pairs=pairs)


def _job_with(tmp_path, **spec):
    data = {"source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
            "period": "week", "timezone": "UTC", "metrics": [{"column": "m1", **spec}]}
    return parse_config(data, tmp_path / "t.yaml", environ={})


def test_min_difference_in_units_keeps_small_differences_quiet(tmp_path):
    # A is 1.5 h above the others: significant, but under "at least 2 h" nothing is announced
    means = {"A": 11.5, "B": 10.0, "C": 10.0, "D": 10.0, "E": 10.0}
    for threshold, expected in ((2, []), (1, ["emerged", "emerged"])):
        job = _job_with(tmp_path, min_difference=threshold, unit="h")
        w = Weeks(job)
        w.week("2026-W01", [_means_result("m1", 1e-12, means, direction={"A": "high"})])
        assert [k for _, k in w.kinds()] == expected, threshold
    job = _job_with(tmp_path, min_difference=1, unit="h")
    w = Weeks(job)
    w.week("2026-W01", [_means_result("m1", 1e-12, means, direction={"A": "high"})])
    (seg,) = [e for _, e in w.events if e.segment == "A"]
    assert seg.detail["unit"] == "h" and seg.detail["diff_vs_rest"] == pytest.approx(1.5)


def test_min_difference_in_percent_of_the_reference(tmp_path):
    # B is 4% above the reference A, C 8% above: "at least 5%" flags C only
    means = {"A": 100.0, "B": 104.0, "C": 108.0, "D": 100.0, "E": 100.0}
    job = _job_with(tmp_path, min_difference="5%", reference="A")
    decided = decide_period([_means_result("m1", 1e-12, means, reference="A",
                                           direction={"B": "high", "C": "high"})], job, Previous(None, False, job))
    assert decided[0].flagged == {"C": "high"}


@pytest.mark.parametrize("value, message", [
    ("5 percent", "is not a number or a percentage"),
    (0, "is out of range"),
    (True, "must be a number or a percentage"),
])
def test_bad_min_difference_names_the_key(tmp_path, value, message):
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match=r"metrics\[0\]\.min_difference: " + message):
        _job_with(tmp_path, min_difference=value)


def test_min_difference_under_log_must_be_a_percentage(tmp_path):
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match="must be a percentage under transform: log"):
        _job_with(tmp_path, min_difference=2, transform="log")
    assert _job_with(tmp_path, min_difference="5%", transform="log").metrics[0].min_difference_percent


# ---------------------------------------------------------------- digests


def test_digest_headline_names_the_change_with_units():
    from monitor.delivery import digest

    events = [
        {"kind": "data_quality", "metric": None, "segment": None, "detail": {"problem": "null_segment"}},
        {"kind": "emerged", "metric": "dwell_hours", "segment": None, "detail": {}},
        {"kind": "emerged", "metric": "dwell_hours", "segment": "Quarry",
         "detail": {"flag": "high", "diff_vs_rest": 2.79, "unit": "h"}},
        {"kind": "assumption_broken", "metric": "counter_wait_min", "segment": None,
         "detail": {"check": "brown_forsythe"}},
    ]
    assert digest.headline(events) == "dwell_hours now differs (+3 more)"
    assert digest.headline(events[2:3]) == "dwell_hours: Quarry above the others by 2.79 h"
    groups = digest.grouped(events)
    assert [m for m, _ in groups] == ["dwell_hours", "counter_wait_min", None]
    assert [e["segment"] for e in groups[0][1]] == [None, "Quarry"]
    gap = {"kind": "emerged", "metric": "income", "segment": "Saver",
           "detail": {"flag": "low", "reference": "Basic", "percent": -24.3}}
    assert digest.headline([gap]) == "income: Saver -24.3% against Basic"


# ---------------------------------------------------------------- a real job over a gap


def _weekly_db(path: Path, shift_from: int) -> None:
    """Three depots, 60 records a week each; from week ``shift_from`` depot A's dwell is
    2 sd higher (invented data for the test)."""
    import sqlite3
    from datetime import date, timedelta

    rng = np.random.default_rng(3)
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE shipments (shipped_at TEXT, depot TEXT, dwell REAL)")
    for week in range(1, 15):
        monday = date.fromisocalendar(2026, week, 1)
        for depot in "ABC":
            shift = 2.0 if depot == "A" and week >= shift_from else 0.0
            con.executemany("INSERT INTO shipments VALUES (?, ?, ?)",
                            [((monday + timedelta(days=int(d))).isoformat() + " 10:00:00", depot, float(v))
                             for d, v in zip(rng.integers(0, 7, 60), rng.normal(10 + shift, 1.0, 60))])
    con.commit()
    con.close()


def test_a_later_run_over_a_failed_period_computes_it_first_and_announces_once(tmp_path):
    # issue 18, item 4: W11 crashed, then `run --period 2026-W12` compared W12 with W10 and announced the
    # change, and the rerun of W11 announced it again
    from datetime import datetime, timezone

    from monitor.clock import FixedClock
    from monitor.runner import Job

    _weekly_db(tmp_path / "src.sqlite", shift_from=11)
    data = {"job": "gap", "source": {"url": f"sqlite:///{tmp_path / 'src.sqlite'}", "table": "shipments",
                                     "time_column": "shipped_at", "segment_column": "depot"},
            "period": "week", "timezone": "UTC", "metrics": ["dwell"],
            "history": {"url": f"sqlite:///{tmp_path / 'h.sqlite'}"},
            "alerts": [{"type": "log", "path": str(tmp_path / "alerts.jsonl")}]}
    job = Job(parse_config(data, tmp_path / "gap.yaml", environ={}),
              clock=FixedClock(datetime(2026, 5, 1, tzinfo=timezone.utc)))
    try:
        job.backfill("2026-W01", "2026-W10")
        claim = job.ledger.claim("2026-W11")
        job.ledger.start(claim)
        job.ledger.fail(claim, "killed")  # what a crash leaves once its lease is gone
        report = job.run("2026-W12")
        assert report.computed_first == ("2026-W11",)
        assert report.to_json()["computed_first"] == ["2026-W11"]
        w11 = job.history.recent(job.period("2026-W12"), 1)[0]
        assert w11.period == "2026-W11"
        assert report.metrics[0].decision.before == "2026-W11"
        job.run("2026-W11")  # run again by hand: nothing new
        job.run("2026-W12")
    finally:
        job.close()
    import json

    lines = [json.loads(x) for x in (tmp_path / "alerts.jsonl").read_text().splitlines()]
    emerged = [(x["period"], x["segment"]) for x in lines if x["kind"] == "emerged"]
    assert emerged == [("2026-W11", None), ("2026-W11", "A")]


def test_gaps_to_a_reference_are_announced_on_their_own_evidence(tmp_path):
    # a monthly reference job: the metric differs every month (a standing gap of B); C's gap has
    # p_adj = 0.019 in one month only, which the per-period rule announces (and takes back next month)
    def month(i, c_p, c_diff=-0.2):
        pairs = (PairRow("B", "A", 0.4, 1e-8), PairRow("C", "A", c_diff, c_p), PairRow("D", "A", 0.01, 0.9))
        seen = {"B": "high", "C": ("low" if c_diff < 0 else "high") if c_p <= 0.05 else None}
        rows = tuple(SegmentRow(s, 80, 10.0 + d, 1.0, direction=seen.get(s), flag=seen.get(s))  # as finalise leaves
                     for s, d in zip("ABCD", (0, 0.4, c_diff, 0.01)))
        return replace(result("m1", 1e-9), segments=rows, reference="A", pairs=pairs)

    def job(rule=None):
        j = make_job(tmp_path, rule, metrics=("m1",))
        return replace(j, period="month", metrics=(replace(j.metrics[0], reference="A"),))

    new, old = Weeks(job()), Weeks(job("per_period"))
    for i, c_p in enumerate((0.5, 0.019, 0.4, 0.6), start=1):
        for w in (new, old):
            w.week(f"2026-0{i}", [month(i, c_p)])
    assert [(p, e.segment) for p, e in new.events if e.kind == "emerged"] == [("2026-01", None), ("2026-01", "B")]
    assert ("2026-02", "emerged") in old.kinds("m1", "C") and ("2026-03", "cleared") in old.kinds("m1", "C")
    # a strong gap is announced in its first month, and a sign flip without evidence does not clear it at once
    w = Weeks(job())
    for i, (c_p, c_diff) in enumerate(((0.5, -0.2), (1e-7, -0.6), (0.5, 0.05), (0.6, 0.02), (0.7, 0.01)), start=1):
        w.week(f"2026-0{i}", [month(i, c_p, c_diff)])
    assert w.kinds("m1", "C") == [("2026-02", "emerged"), ("2026-05", "cleared")]


def test_the_report_states_the_level_a_stored_week_was_judged_at(tmp_path):
    # judged with a budget of 1 false alarm a year (level 1/52.18 for one metric); the config now says 10:
    # the report of the stored week still gives the stored level, never today's
    from datetime import datetime, timezone

    from monitor.clock import FixedClock
    from monitor.present.report import report_html
    from monitor.runner import Job

    _weekly_db(tmp_path / "src.sqlite", shift_from=3)
    data = {"job": "rep", "source": {"url": f"sqlite:///{tmp_path / 'src.sqlite'}", "table": "shipments",
                                     "time_column": "shipped_at", "segment_column": "depot"},
            "period": "week", "timezone": "UTC", "metrics": ["dwell"],
            "history": {"url": f"sqlite:///{tmp_path / 'h.sqlite'}"}}
    clock = FixedClock(datetime(2026, 5, 1, tzinfo=timezone.utc))
    with Job(parse_config(data, tmp_path / "rep.yaml", environ={}), clock=clock) as job:
        job.backfill("2026-W01", "2026-W04")
    later = parse_config(dict(data, decision={"false_alarms_per_year": 10}), tmp_path / "rep.yaml", environ={})
    with Job(later, clock=clock) as job:
        html = report_html(job.history, later, "2026-W04")
    stored = f"{1 / WEEKS_A_YEAR:.2g}"
    assert f"at or below the level {stored}" in html, stored
    assert f"level {10 / WEEKS_A_YEAR:.2g}" not in html
