"""Test methods (monitor.methods): the registry, each method held against outside references,
the ``auto`` wiring, and a method added from outside the package.

Sources: scipy.stats (f_oneway, kruskal, tukey_hsd, dunnett, median_test,
contingency.association), statsmodels (anova_oneway with use_var="unequal"),
pingouin (pairwise_gameshowell, anova), scikit_posthocs (posthoc_dunn). The random
data below are only inputs for the reference libraries; every expected number comes
from outside this project.
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pingouin
import pytest
import scikit_posthocs
from scipy import stats as sps
from scipy.stats.contingency import association
from statsmodels.stats.oneway import anova_oneway

from monitor import methods
from monitor.analysis import MetricInput, SegmentInput, analyse_period
from monitor.config import parse_config
from monitor.errors import ConfigError
from monitor.methods import Family, Segments, TestMethod, base
from monitor.stats.effects import EffectSize
from monitor.stats.omnibus import OmnibusResult
from monitor.stats.summary import Moments

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def data():
    """Three segments of unequal size and spread (inputs for the reference libraries)."""
    rng = np.random.default_rng(20261202)
    spec = [(24.0, 5.0, 14), (26.5, 7.0, 21), (23.0, 3.0, 17)]
    samples = [rng.normal(m, s, n) for m, s, n in spec]
    labels = ["Harbor", "Quarry", "Ridge"]
    return labels, samples, Segments.of(labels, [Moments.from_values(s) for s in samples], samples)


def _frame(labels, samples):
    return pd.DataFrame({"segment": np.repeat(labels, [len(s) for s in samples]),
                         "value": np.concatenate(samples)})


# ---------------------------------------------------------------- the registry


class TestRegistry:
    def test_names_in_config_order(self):
        assert methods.names() == ("anova", "welch", "kruskal", "proportions")

    def test_unknown_name_says_what_is_registered(self):
        with pytest.raises(LookupError, match=r"unknown test method 'anvoa'; registered: anova, welch, kruskal, proportions"):
            methods.get("anvoa")
        assert methods.find("anvoa") is None and methods.find(None) is None

    def test_families_found_by_stored_name(self):
        # the contract's posthoc values (CONTRACT.md, metrics[].posthoc)
        assert {n: methods.family(n).label for n in ("tukey-kramer", "games-howell", "dunn", "dunnett")} == {
            "tukey-kramer": "Tukey-Kramer", "games-howell": "Games-Howell", "dunn": "Dunn", "dunnett": "Dunnett"}
        assert methods.family("dunn").ranks and not methods.family("dunnett").ranks
        assert methods.family("scheffe") is None and methods.family(None) is None

    @pytest.mark.parametrize("name, message", [
        ("auto", "test method name 'auto' is reserved for the config"),
        ("welch", "test method name 'welch' is taken by WelchAnova"),
    ])
    def test_register_refuses_taken_and_reserved_names(self, monkeypatch, name, message):
        monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))
        with pytest.raises(ValueError, match=re.escape(message)):
            methods.register(type("Twin", (_MedianTest,), {"name": name}))

    def test_register_refuses_an_incomplete_method(self, monkeypatch):
        monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))

        class Bare(TestMethod):
            name = "bare"

        with pytest.raises(ValueError, match="test method Bare does not set label, statistic, df_count, "
                                             "posthoc, many_to_one"):
            methods.register(Bare)
        needy = type("Needy", (_MedianTest,), {"name": "needy", "instead_without_values": None})
        with pytest.raises(ValueError, match="'needy' needs values but names no method to use without them"):
            methods.register(needy)
        assert "bare" not in methods.names() and "needy" not in methods.names()

    def test_importing_methods_loads_no_scipy(self):
        # names, labels, families and the config check must not pull in scipy (about a second
        # of start-up); computing must still work in the same process.
        code = (
            "import sys\n"
            "from monitor import methods\n"
            "import monitor.config\n"
            "m = methods.get('kruskal')\n"
            "print(monitor.config.tests(), m.label, m.posthoc.label, methods.family('dunnett').label,\n"
            "      m.statistic_text('1.5', ['2']))\n"
            "print('scipy' in sys.modules)\n"
            "from monitor.stats.summary import Moments\n"
            "g = [Moments.from_values([1.0, 2.0, 3.0]), Moments.from_values([2.0, 3.0, 5.0])]\n"
            "print(methods.get('anova').omnibus(methods.Segments.of(['a', 'b'], g)).df, 'scipy' in sys.modules)\n"
        )
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                             env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"}, check=True).stdout
        assert out.splitlines() == [
            "('auto', 'anova', 'welch', 'kruskal', 'proportions') Kruskal-Wallis Dunn Dunnett H(2) = 1.5",
            "False",
            "(1.0, 4.0) True",
        ]


def test_no_method_name_is_switched_on_outside_the_method_modules():
    """Adding a method stays one module: no other module of the package names a method."""
    pattern = re.compile(r"""["'](anova|welch|kruskal|proportions|tukey-kramer|games-howell|dunn|dunnett|newcombe)["']""")
    found = []
    for path in sorted((ROOT / "monitor").rglob("*.py")):
        rel = path.relative_to(ROOT / "monitor").as_posix()
        if rel.startswith(("methods/", "stats/")):  # the method modules, and the statistics they call
            continue
        for no, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if pattern.search(line):
                found.append(f"monitor/{rel}:{no}: {line.strip()}")
    assert found == []


# ---------------------------------------------------------------- each method against outside references


class TestFisher:
    method = methods.get("anova")

    def test_omnibus_and_effect_sizes(self, data):
        labels, samples, segs = data
        res = self.method.omnibus(segs)
        ref = sps.f_oneway(*samples)  # reference: scipy.stats.f_oneway
        assert res.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert res.p_value == pytest.approx(ref.pvalue, rel=1e-8)
        n = sum(len(s) for s in samples)
        assert res.df == (2, n - 3)
        aov = pingouin.anova(data=_frame(labels, samples), dv="value", between="segment", detailed=True)
        ss_b, ss_w = aov["SS"].iloc[0], aov["SS"].iloc[1]  # reference: pingouin.anova(detailed=True)
        ms_w = ss_w / (n - 3)
        omega = self.method.effect_size(res, 0.95)
        assert omega.name == "omega_squared"
        assert omega.value == pytest.approx((ss_b - 2 * ms_w) / (ss_b + ss_w + ms_w), rel=1e-9)  # Hays (1963)
        eta, f = self.method.other_effect_sizes(res)
        assert (eta.name, f.name) == ("eta_squared", "cohens_f")
        assert eta.value == pytest.approx(ss_b / (ss_b + ss_w), rel=1e-9)

    def test_pairs_are_tukey_kramer_and_dunnett(self, data):
        labels, samples, segs = data
        ph = self.method.pairs(segs, confidence=0.95, adjust="holm")
        ref = sps.tukey_hsd(*samples)  # reference: scipy.stats.tukey_hsd
        for p in ph.pairs:
            i, j = labels.index(p.a), labels.index(p.b)
            assert p.p_adj == pytest.approx(ref.pvalue[i, j], abs=1e-6)
        ph = self.method.pairs_to_reference(segs, "Ridge", confidence=0.95, adjust="holm")
        # reference: scipy.stats.dunnett (randomised quasi-Monte Carlo: p to about 3e-4)
        dun = sps.dunnett(samples[0], samples[1], control=samples[2], rng=np.random.default_rng(5))
        assert [p.a for p in ph.pairs] == ["Harbor", "Quarry"]
        assert [p.p_adj for p in ph.pairs] == pytest.approx(list(dun.pvalue), abs=3e-4)

    def test_versus_rest_uses_the_pooled_variance(self, data):
        labels, samples, segs = data
        n = sum(len(s) for s in samples)
        # Scheffe (1959): a contrast in the one-way model has the error df, N - k
        assert {c.df for c in self.method.versus_rest(segs, alpha=0.05)} == {n - 3}

    def test_describes_itself(self):
        m = self.method
        assert (m.label, m.statistic, m.needs_values, m.posthoc.name, m.many_to_one.name) == (
            "Fisher's ANOVA", "F", False, "tukey-kramer", "dunnett")
        assert m.statistic_text("3.2", ["2", "49"]) == "F(2, 49) = 3.2"
        assert len(m.nan_df) == 2 and all(math.isnan(d) for d in m.nan_df)


class TestWelch:
    method = methods.get("welch")

    def test_omnibus(self, data):
        labels, samples, segs = data
        res = self.method.omnibus(segs)
        ref = anova_oneway(samples, use_var="unequal")  # reference: statsmodels Welch ANOVA
        assert res.statistic == pytest.approx(ref.statistic, rel=1e-8)
        assert res.p_value == pytest.approx(ref.pvalue, rel=1e-6)
        assert res.df[1] == pytest.approx(ref.df_denom, rel=1e-8)
        assert self.method.effect_size(res, 0.95).name == "omega_squared"

    @pytest.mark.parametrize("reference", [None, "Quarry"])
    def test_pairs_are_games_howell(self, data, reference):
        labels, samples, segs = data
        ph = (self.method.pairs(segs, confidence=0.95, adjust="holm") if reference is None
              else self.method.pairs_to_reference(segs, reference, confidence=0.95, adjust="holm"))
        ref = pingouin.pairwise_gameshowell(data=_frame(labels, samples), dv="value", between="segment")
        want = {frozenset((r.A, r.B)): r.pval for r in ref.itertuples()}  # reference: pingouin
        assert len(ph.pairs) == (3 if reference is None else 2)
        for p in ph.pairs:
            assert p.p_adj == pytest.approx(want[frozenset((p.a, p.b))], abs=1e-4)

    def test_versus_rest_has_fractional_df(self, data):
        # Satterthwaite (1946): each segment keeps its own variance, so the df are fractional
        dfs = [c.df for c in self.method.versus_rest(data[2], alpha=0.05)]
        assert all(d != int(d) for d in dfs)

    def test_describes_itself(self):
        m = self.method
        assert (m.label, m.statistic, m.needs_values, m.posthoc.name, m.many_to_one.name) == (
            "Welch's ANOVA", "F", False, "games-howell", "games-howell")


class TestKruskal:
    method = methods.get("kruskal")

    def test_omnibus_and_effect_size(self, data):
        labels, samples, segs = data
        res = self.method.omnibus(segs)
        ref = sps.kruskal(*samples)  # reference: scipy.stats.kruskal (tie-corrected)
        assert res.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert res.p_value == pytest.approx(ref.pvalue, rel=1e-8)
        assert res.df == (2,)
        n = sum(len(s) for s in samples)
        eps = self.method.effect_size(res, 0.95)  # Tomczak & Tomczak (2014): H / ((n^2 - 1) / (n + 1))
        assert (eps.name, eps.value) == ("epsilon_squared", pytest.approx(ref.statistic / (n - 1), rel=1e-10))
        assert self.method.other_effect_sizes(res) == ()

    @pytest.mark.parametrize("adjust", ["holm", "bonferroni"])
    def test_pairs_are_dunn(self, data, adjust):
        labels, samples, segs = data
        ph = self.method.pairs(segs, confidence=0.95, adjust=adjust)
        # reference: scikit_posthocs.posthoc_dunn with the same adjustment
        ref = scikit_posthocs.posthoc_dunn(_frame(labels, samples), val_col="value", group_col="segment",
                                           p_adjust=adjust)
        for p in ph.pairs:
            assert p.p_adj == pytest.approx(ref.loc[p.a, p.b], rel=1e-8)

    def test_versus_rest_is_a_z_test_on_ranks(self, data):
        assert {c.df for c in self.method.versus_rest(data[2], alpha=0.05)} == {math.inf}

    def test_refuses_to_rank_without_values(self, data):
        with pytest.raises(ValueError, match="Kruskal-Wallis ranks the values, and none were given"):
            self.method.omnibus(Segments.of(data[0], data[2].groups))

    def test_describes_itself(self):
        m = self.method
        assert (m.label, m.statistic, m.needs_values, m.instead_without_values, m.posthoc.name) == (
            "Kruskal-Wallis", "H", True, "welch", "dunn")
        assert m.statistic_text("7.1", ["2"]) == "H(2) = 7.1"


# ---------------------------------------------------------------- test: auto, and the checks that are watched


class TestChoice:
    def test_named_method_and_its_reason(self, data):
        choice = methods.choose("welch", data[2], {})
        assert (choice.method.name, choice.reason) == ("welch", "set in the config (test: welch)")

    def test_rank_test_without_values_gives_way(self, data):
        choice = methods.choose("kruskal", Segments.of(data[0], data[2].groups), {})
        assert choice.method.name == "welch"
        assert choice.reason == ("set in the config (test: kruskal); values were not available for ranks, "
                                 "so Welch's ANOVA was used")

    def test_auto_follows_the_rule_in_the_statistics(self, data):
        from monitor.stats import diagnostics

        labels, samples, segs = data
        checks = diagnostics.run_checks(labels, segs.groups, samples)
        rule = diagnostics.choose_method(segs.groups, samples, checks, labels=labels)
        choice = methods.choose("auto", segs, checks)
        assert (choice.method.name, choice.reason) == (rule.method, rule.reason)
        assert choice.reason.startswith(choice.method.label + ": ")

    def test_not_computed_names_auto_s_first_choice(self):
        assert methods.named("auto").name == "anova" and methods.named("kruskal").name == "kruskal"

    @pytest.mark.parametrize("requested, method, small, large", [
        ("auto", "welch", ("brown_forsythe", "normality"), ("brown_forsythe",)),
        ("anova", "anova", ("brown_forsythe", "normality"), ("brown_forsythe",)),
        ("welch", "welch", ("normality",), ()),
        ("kruskal", "kruskal", (), ()),
        ("kruskal", "welch", ("normality",), ()),  # the rank test gave way: Welch's own checks
    ])
    def test_watched_checks(self, requested, method, small, large):
        # the size bound is the auto rule's (common practice: 30, the central limit theorem)
        from monitor.stats.diagnostics import SMALL_SEGMENT_N

        assert base.SMALL_SEGMENT_N == SMALL_SEGMENT_N
        few = [Moments.from_values(np.arange(float(n))) for n in (SMALL_SEGMENT_N - 1, 40)]
        many = [Moments.from_values(np.arange(float(n))) for n in (SMALL_SEGMENT_N, 40)]
        m = methods.get(method)
        assert methods.watched_checks(requested, m, few) == small
        assert methods.watched_checks(requested, m, many) == large


# ---------------------------------------------------------------- a method added from outside


class _MedianTest(TestMethod):
    """Mood's median test (Mood 1950), as a new method would be written: one class."""

    name = "median"
    label = "Mood's median test"
    statistic = "χ²"
    df_count = 1
    needs_values = True
    instead_without_values = "welch"
    without_values_reason = "values were not available for the median test"
    posthoc = Family("dunn", "Dunn", ranks=True)
    many_to_one = posthoc

    def omnibus(self, segs):
        stat, p, _, table = sps.median_test(*segs.samples)
        n = sum(len(s) for s in segs.samples)
        return OmnibusResult("median", float(stat), (float(len(segs.labels) - 1),), float(p),
                             n_total=n, k=len(segs.labels), ss_within=float(np.sum(table)))

    def effect_size(self, res, confidence):  # Cramer's V of the 2 x k table: sqrt(chi2 / N)
        return EffectSize("cramers_v", math.sqrt(res.statistic / res.n_total))

    def pairs(self, segs, *, confidence, adjust):
        return methods.get("kruskal").pairs(segs, confidence=confidence, adjust=adjust)

    def pairs_to_reference(self, segs, reference, *, confidence, adjust):
        return methods.get("kruskal").pairs_to_reference(segs, reference, confidence=confidence, adjust=adjust)

    def versus_rest(self, segs, *, alpha):
        return methods.get("kruskal").versus_rest(segs, alpha=alpha)

    def watched_checks(self, groups):
        return ()


def _job(test):
    return parse_config({
        "job": "added",
        "source": {"url": "sqlite:///x.sqlite", "table": "t", "time_column": "ts", "segment_column": "depot"},
        "period": "week",
        "timezone": "UTC",
        "metrics": [{"column": "wait", "test": test}],
    }, Path("added.yaml").absolute(), environ={})


class TestAddedMethod:
    """What one new method class buys: the config accepts it, the analysis runs it, and the
    command line and the report name it, with no other file changed."""

    @pytest.fixture
    def registered(self, monkeypatch):
        monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))
        methods.register(_MedianTest)

    def test_config_knows_only_registered_names(self):
        with pytest.raises(ConfigError, match=re.escape(
                "metrics[0].test: unknown test (given: 'median'; accepted: auto, anova, welch, kruskal, proportions)")):
            _job("median")

    def test_runs_end_to_end(self, registered, data):
        from monitor import cli
        from monitor.present import report

        labels, samples, segs = data
        job = _job("median")
        inputs = [MetricInput(job.metrics[0], tuple(SegmentInput(s, g, v)
                                                    for s, g, v in zip(labels, segs.groups, samples)))]
        (r,) = analyse_period(inputs, job)
        stat, p, _, table = sps.median_test(*samples)  # reference: scipy.stats.median_test
        assert (r.method, r.posthoc, r.relevant_checks) == ("median", "dunn", ())
        assert r.p_value == pytest.approx(p, rel=1e-12)
        assert r.effect_size.value == pytest.approx(association(table, method="cramer"), rel=1e-10)
        assert len(r.pairs) == 3
        row = cli._metric_row(r.to_json())
        assert row[1:3] == ["median", f"χ²(2) = {stat:.4g}"]
        assert report._method_label("median") == "Mood's median test"
        assert report._stat_text(r.to_json()).startswith("χ²(2) = ")

    def test_gives_way_without_values(self, registered, data):
        labels, _, segs = data
        job = _job("median")
        inputs = [MetricInput(job.metrics[0], tuple(SegmentInput(s, g) for s, g in zip(labels, segs.groups)))]
        (r,) = analyse_period(inputs, job)
        assert r.method == "welch" and r.posthoc == "games-howell"
        assert r.method_reason.endswith("values were not available for the median test, so Welch's ANOVA was used")
