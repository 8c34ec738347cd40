"""The proportions method (monitor.methods.proportions) against outside references, and
its wiring: the config, ``auto`` recognising 0/1 data from summaries, the analysis, the
stored JSON, the report and the command line, and a whole run on SQLite.

Sources: scipy.stats (chi2_contingency with correction=False, fisher_exact,
contingency.association, ncx2), statsmodels (proportions_ztest, proportions_chisquare,
confint_proportions_2indep with method="newcomb", multipletests) and R 4.2.2
(prop.test, chisq.test, pairwise.prop.test, fisher.test, p.adjust; frozen in
tests/reference/r_proportions/values.json by make_values.R beside it, on the
published data named there). The random 0/1 values below are only inputs.
"""

from __future__ import annotations

import itertools
import json
import math
import re
import sqlite3
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sps
from scipy.stats.contingency import association
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import confint_proportions_2indep, proportions_chisquare, proportions_ztest

from monitor import methods
from monitor.analysis import MetricInput, SegmentInput, analyse_period
from monitor.config import parse_config
from monitor.errors import ConfigError
from monitor.methods import Segments
from monitor.model import MetricResult
from monitor.stats.summary import Moments

ROOT = Path(__file__).resolve().parent.parent
R = json.loads((ROOT / "tests" / "reference" / "r_proportions" / "values.json").read_text())
METHOD = methods.get("proportions")


def _segs(x, n, labels=None, values=False):
    """Segments of 0/1 values with ``x[i]`` ones of ``n[i]`` (summaries; values too if asked)."""
    labels = labels or [f"s{i}" for i in range(len(x))]
    arrays = [np.r_[np.ones(a), np.zeros(b - a)] for a, b in zip(x, n)]
    return Segments.of(labels, [Moments.from_values(v) for v in arrays], arrays if values else None)


def _job(test="auto", **metric):
    return parse_config({
        "job": "props", "period": "week", "timezone": "UTC",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
        "metrics": [{"column": "on_time", "test": test, **metric}],
    }, Path("props.yaml").absolute(), environ={})


def _analyse(job, arrays, labels, with_values=True):
    m = job.metrics[0]
    segs = tuple(SegmentInput(s, Moments.from_values(v), v if with_values else None)
                 for s, v in zip(labels, arrays))
    (r,) = analyse_period([MetricInput(m, segs)], job)
    return r


# ---------------------------------------------------------------- the method against references


class TestOmnibus:
    def test_smokers_against_r_prop_test_and_scipy(self):
        x, n = R["smokers"], R["patients"]
        res = METHOD.omnibus(_segs(x, n))
        # reference: R prop.test(smokers, patients, correct = FALSE) and chisq.test(correct = FALSE)
        assert res.statistic == pytest.approx(R["smokers_prop_test_statistic"], rel=1e-12)
        assert res.statistic == pytest.approx(R["smokers_chisq_test_statistic"], rel=1e-12)
        assert res.p_value == pytest.approx(R["smokers_prop_test_p"], rel=1e-9)
        assert res.df == (R["smokers_prop_test_df"],)
        table = np.array([x, np.subtract(n, x)]).T
        chi2, p, dof, _ = sps.chi2_contingency(table, correction=False)  # reference: scipy
        assert (res.statistic, res.p_value, res.df[0]) == pytest.approx((chi2, p, dof), rel=1e-10)
        assert res.p_method == "chi-square"

    def test_ucb_admissions_against_r_and_statsmodels(self):
        x, n = R["ucb_admitted"], R["ucb_applied"]
        res = METHOD.omnibus(_segs(x, n))
        # reference: R prop.test on datasets::UCBAdmissions summed over sex
        assert res.statistic == pytest.approx(R["ucb_prop_test_statistic"], rel=1e-11)
        assert res.p_value == pytest.approx(R["ucb_prop_test_p"], rel=1e-6)
        chi2, p, _ = proportions_chisquare(np.array(x), np.array(n))  # reference: statsmodels
        assert res.statistic == pytest.approx(chi2, rel=1e-11)

    def test_small_expected_counts_give_the_monte_carlo_p_and_say_so(self):
        # four segments of 10 with 0-2 ones: expected counts of the 1s cells below 5
        x, n = [0, 1, 2, 0], [10, 10, 10, 10]
        res = METHOD.omnibus(_segs(x, n))
        assert res.p_method == "monte-carlo"
        assert res.note.startswith("small expected counts (smallest 0.75; Cochran's rule): p-value from the Monte Carlo")
        # reference: scipy.stats.chi2_contingency for the statistic itself
        chi2 = sps.chi2_contingency(np.array([x, np.subtract(n, x)]).T, correction=False)[0]
        assert res.statistic == pytest.approx(chi2, rel=1e-12)

    def test_monte_carlo_p_within_its_error_of_r_simulate(self):
        # reference: R chisq.test(simulate.p.value = TRUE, B = 20000) on the smokers table
        from monitor.stats.proportions import homogeneity

        res = homogeneity(R["smokers"], R["patients"], exact="always")
        p_r, b = R["smokers_monte_carlo_p"], R["smokers_monte_carlo_B"]
        se = math.sqrt(2 * p_r * (1 - p_r) / b)  # two independent Monte Carlo estimates
        assert res.p_method == "monte-carlo" and abs(res.p_value - p_r) < 4 * se

    def test_not_all_zero_one_is_refused_with_the_segment_named(self):
        groups = [Moments.from_values([0.0, 1.0, 1.0]), Moments.from_values([0.0, 2.0, 1.0])]
        res = METHOD.omnibus(Segments.of(["Harbor", "Quarry"], groups))
        assert math.isnan(res.statistic) and math.isnan(res.p_value)
        assert res.note == ("the proportions test needs values that are all 0 or 1, and some segments have others: "
                            "Quarry (values 0 to 2); use test: auto or a test of means for this column")


class TestEffectSize:
    def test_cohens_w_is_cramers_v_of_the_table(self):
        x, n = R["ucb_admitted"], R["ucb_applied"]
        res = METHOD.omnibus(_segs(x, n))
        eff = METHOD.effect_size(res, 0.95)
        table = np.array([x, np.subtract(n, x)]).T
        # reference: scipy.stats.contingency.association (Cramér's V equals Cohen's w for k x 2)
        assert eff.name == "cohens_w"
        assert eff.value == pytest.approx(association(table, method="cramer", correction=False), rel=1e-10)

    def test_interval_inverts_the_noncentral_chi_square(self):
        x, n = R["smokers"], R["patients"]
        res = METHOD.omnibus(_segs(x, n))
        eff = METHOD.effect_size(res, 0.90)
        big_n = sum(n)
        assert eff.ci_low < eff.value < eff.ci_high
        # reference: scipy.stats.ncx2 -- the limits leave 5% above and below the observed X^2
        assert sps.ncx2.cdf(res.statistic, 3, big_n * eff.ci_low ** 2) == pytest.approx(0.95, abs=1e-7)
        assert sps.ncx2.cdf(res.statistic, 3, big_n * eff.ci_high ** 2) == pytest.approx(0.05, abs=1e-7)

    def test_undefined_statistic_gives_nan_with_the_note(self):
        res = METHOD.omnibus(_segs([0, 0], [5, 7]))
        eff = METHOD.effect_size(res, 0.95)
        assert math.isnan(eff.value) and eff.note.startswith("every value is 0 in every segment")


class TestPairs:
    def test_all_pairs_against_r_pairwise_prop_test_and_statsmodels(self):
        x, n = R["ucb_admitted"], R["ucb_applied"]
        labels = list("ABCDEF")
        ph = METHOD.pairs(_segs(x, n, labels), confidence=0.95, adjust="holm")
        assert [(p.a, p.b) for p in ph.pairs] == [(labels[i], labels[j]) for i, j in R["ucb_pairs"]]
        # reference: R pairwise.prop.test(correct = FALSE), Holm within the family
        assert [p.p_raw for p in ph.pairs] == pytest.approx(R["ucb_pairs_raw"], rel=1e-6)
        assert [p.p_adj for p in ph.pairs] == pytest.approx(R["ucb_pairs_holm"], rel=1e-6)
        z_ref = []
        for p, (i, j) in zip(ph.pairs, itertools.combinations(range(6), 2)):
            z, pz = proportions_ztest([x[i], x[j]], [n[i], n[j]])  # reference: statsmodels, pooled z
            z_ref.append(pz)
            assert p.statistic == pytest.approx(z, rel=1e-10)
            assert p.diff == pytest.approx(x[i] / n[i] - x[j] / n[j], rel=1e-12)
            # reference: statsmodels Newcombe interval at the Bonferroni level of 15 pairs
            lo, hi = confint_proportions_2indep(x[i], n[i], x[j], n[j], method="newcomb", compare="diff",
                                                alpha=0.05 / 15)
            assert (p.ci_low, p.ci_high) == pytest.approx((lo, hi), rel=1e-9, abs=1e-12)
        # reference: statsmodels multipletests(method="holm")
        assert [p.p_adj for p in ph.pairs] == pytest.approx(list(multipletests(z_ref, method="holm")[1]), rel=1e-9)

    def test_small_counts_use_fisher_exact_against_r(self):
        x, n = R["smokers"], R["patients"]
        ph = METHOD.pairs(_segs(x, n), confidence=0.95, adjust="holm")
        raw = []
        for p, (i, j), r_fisher in zip(ph.pairs, itertools.combinations(range(4), 2), R["smokers_fisher_pairs_raw"]):
            expected = min(n[i], n[j]) * (n[i] + n[j] - x[i] - x[j]) / (n[i] + n[j])
            if expected < 5:  # a pair with a small expected count: Fisher's exact test
                assert p.test == "fisher-exact"
                assert p.p_raw == pytest.approx(r_fisher, rel=1e-9)  # reference: R fisher.test
                raw.append(r_fisher)
            else:
                assert p.test == "z"
                raw.append(proportions_ztest([x[i], x[j]], [n[i], n[j]])[1])  # reference: statsmodels
        assert [p.test for p in ph.pairs] == ["fisher-exact", "fisher-exact", "z", "fisher-exact", "z", "z"]
        # reference: statsmodels multipletests(method="holm") over the family's raw p-values
        assert [p.p_adj for p in ph.pairs] == pytest.approx(list(multipletests(raw, method="holm")[1]), rel=1e-9)

    def test_each_segment_against_the_reference(self):
        x, n = R["ucb_admitted"], R["ucb_applied"]
        labels = list("ABCDEF")
        ph = METHOD.pairs_to_reference(_segs(x, n, labels), "A", confidence=0.95, adjust="holm")
        assert [(p.a, p.b) for p in ph.pairs] == [(s, "A") for s in "BCDEF"] and ph.reference == "A"
        # reference: R prop.test(correct = FALSE) of each department with A, p.adjust(method = "holm")
        assert [p.p_raw for p in ph.pairs] == pytest.approx(R["ucb_vs_A_raw"], rel=1e-6)
        assert [p.p_adj for p in ph.pairs] == pytest.approx(R["ucb_vs_A_holm"], rel=1e-6)
        for p, i in zip(ph.pairs, range(1, 6)):
            # reference: statsmodels Newcombe interval at the Bonferroni level of the 5 comparisons
            lo, hi = confint_proportions_2indep(x[i], n[i], x[0], n[0], method="newcomb", compare="diff",
                                                alpha=0.05 / 5)
            assert (p.ci_low, p.ci_high) == pytest.approx((lo, hi), rel=1e-9, abs=1e-12)

    def test_versus_rest_steps_down(self):
        # one segment far below 40 equal ones: only it is flagged (no invented "high" for the others)
        x = [45] * 40 + [20]
        n = [50] * 41
        contrasts = METHOD.versus_rest(_segs(x, n), alpha=0.05)
        flagged = {c.segment: c.direction for c in contrasts if c.direction}
        assert flagged == {"s40": "low"}
        low = contrasts[-1]
        # reference: statsmodels proportions_ztest of s40 against the pooled 40 others (first step)
        z, p = proportions_ztest([20, 45 * 40], [50, 50 * 40])
        assert low.statistic == pytest.approx(z, rel=1e-10) and low.p_adj == pytest.approx(min(1, 41 * p), rel=1e-9)


class TestDescribesItself:
    def test_names_and_families(self):
        assert METHOD.label == "test of homogeneity of proportions"
        assert METHOD.posthoc is METHOD.many_to_one and METHOD.posthoc.points and not METHOD.posthoc.ranks
        assert methods.family("newcombe") is METHOD.posthoc
        assert METHOD.statistic_text("12.6", ["3"]) == "χ²(3) = 12.6"
        assert METHOD.watched_checks([]) == () and METHOD.checks_apply is False

    def test_config_accepts_it_by_name_but_not_with_adjust_for_or_a_transform(self):
        assert _job("proportions").metrics[0].test == "proportions"
        with pytest.raises(ConfigError) as err:
            _job("proportions", reference="A", adjust_for=["region"])
        assert str(err.value).endswith(
            "props.yaml: metrics[0].test: cannot be adjusted for strata (no additive model is fitted for test of "
            "homogeneity of proportions) (given: 'proportions'; accepted: anova, welch or auto with adjust_for)")
        with pytest.raises(ConfigError) as err:
            _job("proportions", transform="log")
        assert str(err.value).endswith(
            "props.yaml: metrics[0].transform: cannot be used with test: proportions, which compares the values as "
            "they are (0 and 1) (given: 'log'; accepted: none (leave transform out))")
        assert _job("auto", transform="log").metrics[0].transform == "log"


# ---------------------------------------------------------------- auto and the analysis


def _zero_one(rng, sizes, p):
    return [(rng.random(n) < q).astype(float) for n, q in zip(sizes, p)]


class TestAuto:
    def test_recognised_from_summaries_alone(self):
        # pushed-down sums, no values: min, max and M2 = n p (1 - p) say 0/1
        choice = methods.choose("auto", _segs([70, 80, 65], [75, 90, 70]), {})
        assert choice.method.name == "proportions"
        assert choice.reason.startswith("test of homogeneity of proportions: every value is 0 or 1 (215 ones in "
                                        "235 records)")
        assert choice.result is not None and math.isfinite(choice.result.statistic)

    @pytest.mark.parametrize("values", [[0.0, 1.0, 0.5], [0.0, 1.0, 2.0], [1.0, 2.0, 1.0], [-1.0, 0.0, 1.0]])
    def test_not_recognised_with_any_other_value(self, values):
        groups = [Moments.from_values([0.0, 1.0, 1.0, 0.0]), Moments.from_values(values)]
        assert methods.choose("auto", Segments.of(["a", "b"], groups), {}).method.name != "proportions"

    def test_a_depot_without_a_late_parcel_gives_an_answer(self):
        # the case of the issue: 0/1 on-time values, one depot with every parcel on time
        rng = np.random.default_rng(20261203)
        arrays = _zero_one(rng, [80, 120, 60, 100], [0.93, 0.93, 1.0, 0.80])
        arrays[2] = np.ones(60)
        labels = ["Harbor", "Quarry", "Ridge", "Lakeside"]
        r = _analyse(_job(), arrays, labels)
        assert r.method == "proportions" and r.posthoc == "newcombe"
        x = [int(a.sum()) for a in arrays]
        n = [len(a) for a in arrays]
        chi2, p, _, _ = sps.chi2_contingency(np.array([x, np.subtract(n, x)]).T, correction=False)  # reference
        assert r.statistic == pytest.approx(chi2, rel=1e-10) and r.p_value == pytest.approx(p, rel=1e-8)
        # Welch's ANOVA on the same values cannot be computed (Ridge has no spread)
        welch = methods.get("welch").omnibus(Segments.of(labels, [Moments.from_values(a) for a in arrays]))
        assert math.isnan(welch.p_value)

    def test_no_assumption_check_is_watched(self):
        from monitor import events

        rng = np.random.default_rng(5)
        arrays = _zero_one(rng, [60, 150, 90], [0.9, 0.6, 0.95])  # spreads p(1-p) differ a lot
        labels = ["a", "b", "c"]
        # reference: scipy.stats.levene(center="median") (Brown-Forsythe) would call the spreads unequal
        assert sps.levene(*arrays, center="median").pvalue < 0.001
        r = _analyse(_job(), arrays, labels)
        assert r.method == "proportions" and r.relevant_checks == () and r.assumptions == {}
        evs = events.derive_events(_job(), [r], labels, 0, sum(map(len, arrays)), events.Baseline.empty())
        assert [e.kind for e in evs if e.kind.startswith("assumption")] == []
        assert "emerged" in [e.kind for e in evs]

    def test_pairs_flags_and_json_round_trip(self):
        rng = np.random.default_rng(11)
        arrays = _zero_one(rng, [200, 200, 200], [0.95, 0.93, 0.70])
        r = _analyse(_job(), arrays, ["a", "b", "c"])
        assert r.significant and {s.segment: s.flag for s in r.segments}["c"] == "low"
        assert [(p.a, p.b, p.significant) for p in r.pairs] == [("a", "b", False), ("a", "c", True), ("b", "c", True)]
        back = MetricResult.from_json(r.to_json())
        assert back.method == "proportions" and back.posthoc == "newcombe" and back.pairs == r.pairs
        assert back.effect_size == r.effect_size

    def test_reference_job_uses_the_many_to_one_family(self):
        rng = np.random.default_rng(12)
        arrays = _zero_one(rng, [200, 200, 200], [0.95, 0.93, 0.70])
        r = _analyse(_job(reference="a"), arrays, ["a", "b", "c"])
        assert [(p.a, p.b) for p in r.pairs] == [("b", "a"), ("c", "a")]
        x = [int(a.sum()) for a in arrays]
        ref = [proportions_ztest([x[i], x[0]], [200, 200])[1] for i in (1, 2)]  # reference: statsmodels
        assert [p.p_adj for p in r.pairs] == pytest.approx(list(multipletests(ref, method="holm")[1]), rel=1e-9)
        assert {s.segment: s.flag for s in r.segments}["c"] == "low"

    def test_events_speak_in_percentage_points(self):
        from monitor import events

        rng = np.random.default_rng(11)
        arrays = _zero_one(rng, [200, 200, 200], [0.95, 0.93, 0.70])
        labels = ["a", "b", "c"]
        r = _analyse(_job(), arrays, labels)
        evs = events.derive_events(_job(), [r], labels, 0, 600, events.Baseline.empty())
        (msg,) = [e.message for e in evs if e.kind == "emerged" and e.segment == "c"]
        share = arrays[2].mean()
        rest = np.concatenate(arrays[:2]).mean()  # reference: numpy, the other segments' records pooled
        assert f"(share {100 * share:.1f}%, {100 * (share - rest):+.1f} pp against the rest, significantly below 2 of 2" in msg

        ref = _analyse(_job(reference="a"), arrays, labels)
        evs = events.derive_events(_job(reference="a"), [ref], labels, 0, 600, events.Baseline.empty())
        (msg,) = [e.message for e in evs if e.kind == "emerged" and e.segment == "c"]
        pair = next(p for p in ref.pairs if p.a == "c")
        assert (f"is now {100 * pair.diff:+.1f} pp [{100 * pair.ci_low:+.1f}, {100 * pair.ci_high:+.1f}] "
                "(difference of shares; newcombe, adjusted p = ") in msg

    def test_report_gives_reference_gaps_in_percentage_points(self):
        from monitor.present import report

        rng = np.random.default_rng(12)
        arrays = _zero_one(rng, [200, 200, 200], [0.95, 0.93, 0.70])
        r = _analyse(_job(reference="a"), arrays, ["a", "b", "c"])
        html = report._reference_table(r, None, 0.05, "depot")
        pair = next(p for p in r.pairs if p.a == "c")
        assert "gap in share to a (interval)" in html
        assert f"{100 * pair.diff:+.1f} pp ({100 * pair.ci_low:+.1f} to {100 * pair.ci_high:+.1f})" in html

    def test_report_and_command_line_name_it(self):
        from monitor import cli
        from monitor.present import report

        rng = np.random.default_rng(13)
        r = _analyse(_job(), _zero_one(rng, [100, 100], [0.9, 0.7]), ["a", "b"])
        assert report._method_label("proportions") == "test of homogeneity of proportions"
        assert report._stat_text(r.to_json()).startswith("χ²(1) = ")
        row = cli._metric_row(r.to_json())
        assert row[1] == "proportions" and row[2].startswith("χ²(1) = ") and row[-1] == "-"


# ---------------------------------------------------------------- a whole run on SQLite


def test_zero_one_metric_with_a_segment_without_late_parcels_on_sqlite(tmp_path: Path, capsys):
    """0/1 on_time, one hub with every parcel on time, ``test: auto``, through the command line:
    a finite answer (today's rule sent this to Welch's ANOVA, which gave p = null)."""
    from monitor.cli import main

    rng = np.random.default_rng(31)
    db = tmp_path / "src.sqlite"
    con = sqlite3.connect(db)
    con.execute("CREATE TABLE parcels (id INTEGER PRIMARY KEY, ts TEXT, hub TEXT, on_time REAL)")
    monday = datetime(2026, 3, 2)
    rows, counts = [], {}
    for hub, n, p in (("A", 90, 0.93), ("B", 140, 0.90), ("C", 60, 1.0), ("D", 110, 0.75)):
        v = (rng.random(n) < p).astype(float)
        counts[hub] = (int(v.sum()), n)
        for x in v:
            ts = monday + timedelta(hours=float(rng.uniform(0, 7 * 24 - 0.01)))
            rows.append((ts.strftime("%Y-%m-%d %H:%M:%S"), hub, float(x)))
    con.executemany("INSERT INTO parcels (ts, hub, on_time) VALUES (?, ?, ?)", rows)
    con.commit()
    con.close()
    cfg = tmp_path / "job.yaml"
    cfg.write_text("job: hubs\nsource:\n  url: sqlite:///src.sqlite\n  table: parcels\n  time_column: ts\n"
                   "  segment_column: hub\nperiod: week\ntimezone: UTC\nmetrics:\n  - column: on_time\n"
                   "    test: auto\nhistory: {url: 'sqlite:///history.sqlite'}\n")
    assert main(["run", str(cfg), "--period", "2026-W10", "--json"]) == 0
    (m,) = json.loads(capsys.readouterr().out)["metrics"]
    assert m["method"] == "proportions" and m["posthoc"] == "newcombe"
    x = [counts[h][0] for h in "ABCD"]
    n = [counts[h][1] for h in "ABCD"]
    chi2, p, dof, _ = sps.chi2_contingency(np.array([x, np.subtract(n, x)]).T, correction=False)  # reference
    assert m["statistic"] == pytest.approx(chi2, rel=1e-9) and m["p_value"] == pytest.approx(p, rel=1e-7)
    assert m["df"] == [dof]
    assert m["significant"] is True
    assert {s["segment"]: s["flag"] for s in m["segments"]}["D"] == "low"
    # the history keeps it and reads it back the same way; the report names the method and effect
    assert main(["history", str(cfg), "--json"]) == 0
    assert "proportions" in capsys.readouterr().out
    out = tmp_path / "report.html"
    assert main(["report", str(cfg), "--period", "2026-W10", "--out", str(out)]) == 0
    html = out.read_text()
    assert "test of homogeneity of proportions" in html
    assert re.search(r"Cohen(&#x27;|&#39;|')s w 0\.\d\d", html)
    assert "χ²(3) = " in html


# ---------------------------------------------------------------- pushed down on every engine


@pytest.mark.parametrize("engine", ["sqlite", "duckdb", "postgresql", "mariadb"])
def test_zero_one_columns_recognised_from_pushed_down_sums_on_every_engine(engine, tmp_path):
    """A 0/1 column stored as a float, a NUMERIC and an INTEGER: the database's sums alone make it
    a proportions metric, with the chi-square of the counts (reference: scipy chi2_contingency)."""
    import uuid

    import sqlalchemy as sa

    from monitor.periods import parse_period
    from monitor.source import Source
    from tests.test_engines import bulk_insert, make_target

    target = make_target(engine, tmp_path)
    try:
        name = f"ontime_{uuid.uuid4().hex[:8]}"
        md = sa.MetaData(schema=target.schema)
        table = sa.Table(name, md, sa.Column("id", sa.Integer, primary_key=True, autoincrement=False),
                         sa.Column("ts", sa.DateTime), sa.Column("seg", sa.String(20)),
                         sa.Column("ok", sa.Double), sa.Column("okn", sa.Numeric(1, 0)), sa.Column("oki", sa.Integer))
        if hasattr(target, "made"):
            target.made.append(name)
        rng = np.random.default_rng(41)
        rows, counts = [], {}
        for seg, n, p in (("A", 70, 0.93), ("B", 120, 0.9), ("C", 45, 1.0), ("D", 90, 0.78)):
            v = (rng.random(n) < p).astype(int)
            counts[seg] = (int(v.sum()), n)
            for x in v:
                ts = datetime(2026, 3, 2) + timedelta(minutes=int(rng.integers(0, 7 * 24 * 60)))
                rows.append({"id": len(rows) + 1, "ts": ts, "seg": seg, "ok": float(x), "okn": int(x), "oki": int(x)})
        with target.admin.begin() as conn:
            md.create_all(conn)
            if engine == "sqlite":
                conn.execute(table.insert(), rows)
            else:
                bulk_insert(conn, table, rows)
        if engine == "duckdb":
            target.admin.dispose()
        cfg = parse_config({
            "job": "ontime", "period": "week", "timezone": "UTC",
            "source": {"url": target.url, "table": target.qualified(name), "time_column": "ts",
                       "segment_column": "seg", "naive_time": "utc"},
            "metrics": [{"column": "ok"}, {"column": "okn"}, {"column": "oki"}],
            "sampling": {"mode": "sample", "cap": 20},  # the values travel as a sample only
            "history": {"url": f"sqlite:///{tmp_path / 'h.sqlite'}"},
        }, tmp_path / "ontime.yaml", environ={})
        src = Source(cfg)
        try:
            data = src.fetch(parse_period("week", "2026-W10", "UTC"))
        finally:
            src.dispose()
        assert data.compute == "pushdown"
        results = analyse_period(data.metrics, cfg)
    finally:
        target.close()
    x = [counts[s][0] for s in "ABCD"]
    n = [counts[s][1] for s in "ABCD"]
    chi2, p, _, _ = sps.chi2_contingency(np.array([x, np.subtract(n, x)]).T, correction=False)
    for r in results:
        assert r.method == "proportions", r.metric
        assert r.statistic == pytest.approx(chi2, rel=1e-9) and r.p_value == pytest.approx(p, rel=1e-7)
        assert [s.n for s in r.segments] == n
