"""The additive model y ~ segment + strata (monitor.stats.adjusted) held against outside references.

Sources, named again beside each check:

* statsmodels: ``ols("y ~ C(segment) + C(a) + ...")`` and ``anova_lm(typ=2)`` (also with
  ``robust="hc3"``), the OLS coefficients and standard errors (``cov_type="HC3"`` for HC3), and
  ``anova_lm`` of two nested fits for a design whose segments are not all connected.
* R: ``lm``, ``car::Anova(type = 2)`` (``white.adjust = "hc3"``) and
  ``multcomp::glht(mcp(segment = "Dunnett"))`` (with ``sandwich::vcovHC(type = "HC3")``), frozen in
  ``tests/reference/r_adjusted/values.json`` by ``Rscript make_values.R`` in that folder (the script
  names the versions). The data are published data sets shipped with R: ``carData::Moore``
  (unbalanced 3 x 2), ``datasets::warpbreaks`` (balanced 3 x 2, analysed on the log scale),
  ``carData::Salaries`` (two adjustment columns, unbalanced, log scale) and ``carData::Ornstein``
  (4 nations x 10 sectors with 11 empty cells; sector BNK is seen in one nation only).
* With one stratum the model is the one-way ANOVA: ``scipy.stats.f_oneway``, the NIST StRD one-way
  certified F statistics (tests/reference/nist_strd_anova), and Dunnett's many-to-one procedure
  (``scipy.stats.dunnett``).
* The multivariate t probability of a correlation without Dunnett's one-factor form: a seeded Monte
  Carlo estimate (numpy), and the exact one-factor integral where both apply.

Random data below are only inputs for the reference libraries; no expected number is produced by
this project.

Tolerances. Fits, sums of squares, F, p and standard errors involve no integration and agree to
1e-9 relative. multcomp's single-step p-values and intervals come from mvtnorm's randomised
quasi-Monte Carlo, run with ``abseps = 1e-8`` (see make_values.R); ours from the one-factor
integral or a fixed-seed lattice rule; they agree to 2e-5 in p and 2e-5 relative in the
critical value found by ``uniroot`` on ``pmvt``. multcomp's own ``confint`` critical value is
found by ``qmvt`` only to about 1e-4 (checked: ours solves ``pmvt(c) = 0.95`` to 3e-12 on the
Moore case, multcomp's misses by 1e-5), so the intervals are also held to it at 2e-4.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.anova import anova_lm

from monitor.stats import adjusted as adj
from monitor.stats.adjusted import Cell, adjusted_comparison
from monitor.stats.posthoc import _DunnettRule, many_to_one
from monitor.stats.summary import Moments

REFERENCE = Path(__file__).resolve().parent / "reference"
R_DIR = REFERENCE / "r_adjusted"
R_VALUES = json.loads((R_DIR / "values.json").read_text(encoding="utf-8"))
NIST_DIR = REFERENCE / "nist_strd_anova"
NIST = json.loads((NIST_DIR / "certified.json").read_text(encoding="utf-8"))["datasets"]

REL = 1e-9
P_ABS_R = 2e-5
CRIT_REL_R = 2e-5


def _cells(frame: pd.DataFrame, segment: str, strata: list[str], y: str = "y") -> list[Cell]:
    """Per-(segment, stratum) count, mean and sum of squared deviations: what SQL's GROUP BY gives."""
    out = []
    for key, g in frame.groupby([segment, *strata], sort=False, observed=True):
        values = g[y].to_numpy(dtype=float)
        m = Moments.from_values(values)
        out.append(Cell.from_moments(str(key[0]), tuple(str(k) for k in key[1:]), m))
    return out


def _formula(segment: str, reference: str, strata: list[str], y: str = "y") -> str:
    return f"{y} ~ C({segment}, Treatment({reference!r})) + " + " + ".join(f"C({s})" for s in strata)


def _r_frame(case: dict) -> pd.DataFrame:
    frame = pd.read_csv(R_DIR / case["file"])
    for col in [case["segment"], *case["strata"]]:
        frame[col] = frame[col].astype(str)
    values = frame[case["response"]].astype(float)
    frame["y"] = np.log(values) if case["log_scale"] else values
    return frame


def _close(a: float, b: float, rel: float = REL, abs_: float = 0.0) -> bool:
    return math.isclose(a, b, rel_tol=rel, abs_tol=abs_)


# ---------------------------------------------------------------------------
# input validation
# ---------------------------------------------------------------------------
class TestValidation:
    cells = [Cell("A", ("x",), 3, 1.0, 2.0), Cell("B", ("x",), 3, 2.0, 2.0)]

    @pytest.mark.parametrize(
        "kwargs, message",
        [
            ({"columns": "size"}, "not the string"),
            ({"columns": []}, "at least one"),
            ({"columns": ["a", "a"]}, "distinct"),
            ({"covariance": "hc1"}, "covariance must be one of"),
            ({"confidence": 1.0}, "strictly between 0 and 1"),
            ({"reference": 3}, "reference must be"),
            ({"segments": ["A"]}, "not in segments"),
        ],
    )
    def test_bad_arguments(self, kwargs, message):
        args = {"cells": self.cells, "reference": "A", "columns": ["size"], **kwargs}
        with pytest.raises(ValueError, match=message):
            adjusted_comparison(**args)

    def test_bad_cells(self):
        with pytest.raises(ValueError, match="more than once"):
            adjusted_comparison(self.cells + [Cell("A", ("x",), 1, 0.0, 0.0)], "A", ["size"])
        with pytest.raises(ValueError, match="2 levels for 1 columns"):
            adjusted_comparison([Cell("A", ("x", "y"), 2, 0.0, 1.0)], "A", ["size"])
        with pytest.raises(ValueError, match="m2 >= 0"):
            adjusted_comparison([Cell("A", ("x",), 2, 0.0, -1.0)], "A", ["size"])
        with pytest.raises(ValueError, match="non-negative whole number"):
            adjusted_comparison([Cell("A", ("x",), 2.5, 0.0, 1.0)], "A", ["size"])
        with pytest.raises(ValueError, match="Cell summaries"):
            adjusted_comparison([("A", ("x",), 2, 0.0, 1.0)], "A", ["size"])


# ---------------------------------------------------------------------------
# statsmodels: OLS + anova_lm(typ=2)
# ---------------------------------------------------------------------------
def _random_frame(seed: int, sizes: dict[str, int], strata: dict[str, list[str]], drop=(), spread=None):
    rng = np.random.default_rng(seed)
    rows = []
    for seg, n in sizes.items():
        for _ in range(n):
            levels = {col: str(rng.choice(levels)) for col, levels in strata.items()}
            if any(all(levels[c] == v for c, v in d.items()) and seg == s for s, d in drop):
                continue
            rows.append({"segment": seg, **levels})
    frame = pd.DataFrame(rows)
    effect = frame["segment"].map({s: 0.3 * i for i, s in enumerate(sizes)})
    for j, col in enumerate(strata):
        effect = effect + frame[col].map({lv: (j + 1) * 0.7 * i for i, lv in enumerate(strata[col])})
    scale = 1.0 if spread is None else frame[list(strata)[0]].map(spread)
    frame["y"] = 50.0 + effect + scale * rng.normal(0.0, 1.0, len(frame))
    return frame


RANDOM_CASES = {
    # balanced: every segment sees every stratum level equally often
    "balanced": lambda: pd.DataFrame(
        [{"segment": s, "a": a, "y": 0.0} for s in ("R", "A", "B") for a in ("x", "y", "z") for _ in range(6)]
    ).assign(y=lambda f: 10 + (f.segment == "A") * 0.8 + (f.a == "y") * 1.5
             + np.random.default_rng(3).normal(0, 1, len(f))),
    "unbalanced": lambda: _random_frame(11, {"R": 120, "A": 60, "B": 35, "C": 15}, {"a": ["1", "2", "3", "4"]}),
    "two-strata": lambda: _random_frame(12, {"R": 150, "A": 90, "B": 40}, {"a": ["1", "2", "3"], "b": ["n", "s", "e"]}),
    "empty-cells": lambda: _random_frame(
        13, {"R": 100, "A": 80, "B": 50}, {"a": ["1", "2", "3", "4"]},
        drop=(("A", {"a": "4"}), ("B", {"a": "1"}), ("B", {"a": "2"})),
    ),
    "unequal-spreads": lambda: _random_frame(
        14, {"R": 120, "A": 70, "B": 45}, {"a": ["1", "2", "3"]}, spread={"1": 0.5, "2": 1.0, "3": 3.0}
    ),
}


class TestAgainstStatsmodels:
    @pytest.mark.parametrize("case", sorted(RANDOM_CASES))
    @pytest.mark.parametrize("covariance", ["classic", "hc3"])
    def test_type2_table_and_coefficients(self, case, covariance):
        frame = RANDOM_CASES[case]()
        strata = [c for c in frame.columns if c not in ("segment", "y")]
        res = adjusted_comparison(_cells(frame, "segment", strata), "R", strata, covariance=covariance)
        formula = _formula("segment", "R", strata)
        # statsmodels OLS + anova_lm(typ=2) (robust="hc3" for the HC3 variant)
        model = smf.ols(formula, frame).fit()
        table = anova_lm(model, typ=2, robust=None if covariance == "classic" else "hc3")
        seg_row = table.loc["C(segment, Treatment('R'))"]
        assert res.segment_test.df == int(seg_row["df"])
        assert _close(res.segment_test.statistic, seg_row["F"])
        assert _close(res.segment_test.p_value, seg_row["PR(>F)"], abs_=1e-15)
        if covariance == "classic":
            assert _close(res.segment_test.ss, seg_row["sum_sq"])
            assert _close(res.mse * res.df_resid, table.loc["Residual", "sum_sq"])
        for test in res.strata_tests:
            row = table.loc[f"C({test.term})"]
            assert test.df == int(row["df"]) and _close(test.statistic, row["F"])
            assert _close(test.p_value, row["PR(>F)"], abs_=1e-15)
        assert res.df_resid == model.df_resid
        # statsmodels coefficients and their standard errors (cov_type="HC3" for HC3)
        fit = model if covariance == "classic" else smf.ols(formula, frame).fit(cov_type="HC3", use_t=True)
        for gap in res.gaps:
            name = f"C(segment, Treatment('R'))[T.{gap.segment}]"
            assert _close(gap.adjusted, fit.params[name], rel=1e-9)
            assert _close(gap.se, fit.bse[name], rel=1e-9)
            low, high = fit.conf_int(alpha=0.05).loc[name]  # one-at-a-time t interval
            # the simultaneous interval uses the multivariate t quantile instead of t's
            t_single = stats.t.ppf(0.975, model.df_resid)
            assert _close(gap.ci_high - gap.adjusted, (high - low) / 2 * res.critical_value / t_single, rel=1e-9)
            assert res.critical_value > t_single
            # raw gap: difference of the plain segment means (pandas)
            means = frame.groupby("segment")["y"].mean()
            assert _close(gap.raw, means[gap.segment] - means["R"], rel=1e-9)

    def test_additivity_is_the_lack_of_fit_test_against_the_cell_means_model(self):
        frame = RANDOM_CASES["two-strata"]()
        res = adjusted_comparison(_cells(frame, "segment", ["a", "b"]), "R", ["a", "b"])
        # statsmodels: anova_lm of the additive fit against the full cell-means fit
        small = smf.ols("y ~ C(segment) + C(a) + C(b)", frame).fit()
        full = smf.ols("y ~ C(segment):C(a):C(b) - 1", frame).fit()
        table = anova_lm(small, full)
        assert res.additivity.df == int(table["df_diff"][1])
        assert _close(res.additivity.statistic, table["F"][1])
        assert _close(res.additivity.p_value, table["Pr(>F)"][1], abs_=1e-15)

    @pytest.mark.filterwarnings("ignore:The design matrix is rank-deficient")
    def test_segment_without_overlap_gets_nan_and_drops_out_of_the_test(self):
        # segment "D" lives only in stratum level "9", which no other segment has
        frame = RANDOM_CASES["unbalanced"]()
        rng = np.random.default_rng(5)
        extra = pd.DataFrame({"segment": "D", "a": "9", "y": rng.normal(55.0, 1.0, 12)})
        frame = pd.concat([frame, extra], ignore_index=True)
        res = adjusted_comparison(_cells(frame, "segment", ["a"]), "R", ["a"])
        gap = res.gap("D")
        assert math.isnan(gap.adjusted) and math.isnan(gap.ci_low) and "not estimable" in gap.note
        assert gap.n == 12 and not math.isnan(gap.raw)
        assert "segment 'd' shares no stratum" in res.note.lower()
        # statsmodels: nested fits with the pseudo-inverse; the segment term's df is the rank change
        full = smf.ols("y ~ C(segment) + C(a)", frame).fit()
        reduced = smf.ols("y ~ C(a)", frame).fit()
        table = anova_lm(reduced, full)
        assert res.segment_test.df == int(table["df_diff"][1]) == 3
        assert _close(res.segment_test.statistic, table["F"][1])
        assert res.df_resid == full.df_resid
        # the other gaps are those of the fit without D (its records only fix its own level)
        without = adjusted_comparison(_cells(frame[frame.segment != "D"], "segment", ["a"]), "R", ["a"])
        for seg in ("A", "B", "C"):
            assert _close(res.gap(seg).adjusted, without.gap(seg).adjusted, rel=1e-9)

    def test_level_seen_in_one_segment_only_leaves_the_gaps_unchanged(self):
        # statsmodels fit with and without an extra level that only the reference has
        frame = RANDOM_CASES["unbalanced"]()
        extra = pd.DataFrame({"segment": "R", "a": "only-R", "y": np.random.default_rng(6).normal(70, 1, 9)})
        both = pd.concat([frame, extra], ignore_index=True)
        res = adjusted_comparison(_cells(both, "segment", ["a"]), "R", ["a"])
        fit = smf.ols(_formula("segment", "R", ["a"]), both).fit()
        base = smf.ols(_formula("segment", "R", ["a"]), frame).fit()
        for gap in res.gaps:
            name = f"C(segment, Treatment('R'))[T.{gap.segment}]"
            assert _close(gap.adjusted, fit.params[name]) and _close(gap.se, fit.bse[name])
            assert _close(fit.params[name], base.params[name], rel=1e-9)


# ---------------------------------------------------------------------------
# R: lm + car::Anova(type = 2) + multcomp::glht (frozen)
# ---------------------------------------------------------------------------
R_CASES = [pytest.param(c, id=f"{c['name']}-{c['covariance']}") for c in R_VALUES["cases"]]


@pytest.mark.parametrize("case", R_CASES)
def test_against_r(case):
    frame = _r_frame(case)
    strata = list(case["strata"])
    res = adjusted_comparison(_cells(frame, case["segment"], strata), case["reference"], strata,
                              covariance=case["covariance"], log_scale=case["log_scale"])
    assert res.df_resid == case["df_resid"]  # R lm df.residual
    tests = {"segment": res.segment_test, **{t.term: t for t in res.strata_tests}}
    for term in case["terms"]:  # R car::Anova(type = 2)
        ours = tests[term["term"]]
        assert ours.df == term["df"]
        assert _close(ours.statistic, term["F"], rel=1e-9)
        assert _close(ours.p_value, term["p"], rel=1e-8, abs_=1e-15)
        if term["ss"] is not None:
            assert _close(ours.ss, term["ss"], rel=1e-9)
    # R: uniroot on mvtnorm::pmvt (abseps 1e-8); multcomp's own confint calpha stops at ~1e-4
    assert _close(res.critical_value, case["critical_value_precise"], rel=CRIT_REL_R)
    assert _close(res.critical_value, case["critical_value"], rel=2e-4)
    for expected in case["gaps"]:  # multcomp glht(mcp(segment = "Dunnett"))
        gap = res.gap(expected["segment"])
        assert _close(gap.adjusted, expected["estimate"], rel=1e-9, abs_=1e-12)
        assert _close(gap.se, expected["se"], rel=1e-9)
        assert _close(gap.statistic, expected["t"], rel=1e-9, abs_=1e-12)
        assert abs(gap.p_adj - expected["p_adj"]) <= P_ABS_R
        assert _close(gap.ci_low, expected["low_precise"], rel=CRIT_REL_R, abs_=CRIT_REL_R * gap.se)
        assert _close(gap.ci_high, expected["high_precise"], rel=CRIT_REL_R, abs_=CRIT_REL_R * gap.se)
        assert _close(gap.ci_low, expected["low"], rel=2e-4, abs_=2e-4 * gap.se)  # multcomp confint
        if case["log_scale"]:
            assert _close(gap.ratio, math.exp(expected["estimate"]), rel=1e-9)
            assert _close(gap.percent_low, 100 * (math.exp(expected["low"]) - 1), rel=1e-4, abs_=1e-4)


def test_r_cases_cover_the_layouts():
    """The frozen R cases include balanced, unbalanced, empty-cell, two-column and HC3 fits."""
    names = {(c["name"], c["covariance"]) for c in R_VALUES["cases"]}
    assert {("moore", "classic"), ("moore", "hc3"), ("warpbreaks", "classic"), ("salaries", "classic"),
            ("salaries", "hc3"), ("ornstein", "classic"), ("ornstein", "hc3")} <= names
    orn = pd.read_csv(R_DIR / "ornstein.csv")
    assert pd.crosstab(orn.nation, orn.sector).eq(0).sum().sum() == 11  # empty cells in carData::Ornstein


# ---------------------------------------------------------------------------
# one stratum: the one-way ANOVA and Dunnett
# ---------------------------------------------------------------------------
class TestOneStratum:
    def _samples(self):
        rng = np.random.default_rng(20261202)
        sizes, means = (25, 14, 31, 9), (10.0, 10.6, 9.7, 11.0)
        return ["R", "A", "B", "C"], [rng.normal(m, 1.3, n) for n, m in zip(sizes, means)]

    def test_reduces_to_f_oneway_and_dunnett(self):
        labels, samples = self._samples()
        cells = [Cell.from_moments(s, ("all",), Moments.from_values(v)) for s, v in zip(labels, samples)]
        res = adjusted_comparison(cells, "R", ["stratum"])
        one_way = stats.f_oneway(*samples)  # scipy.stats.f_oneway
        assert _close(res.segment_test.statistic, one_way.statistic, rel=1e-10)
        assert _close(res.segment_test.p_value, one_way.pvalue, rel=1e-9)
        assert res.segment_test.df == 3 and res.df_resid == sum(map(len, samples)) - 4
        assert math.isnan(res.strata_tests[0].statistic) and res.strata_tests[0].df == 0
        # scipy.stats.dunnett (randomised QMC, seeded): statistics exact, p to its noise
        dunnett = stats.dunnett(*samples[1:], control=samples[0], rng=np.random.default_rng(7))
        ci = dunnett.confidence_interval(0.95)
        for j, gap in enumerate(res.gaps):
            assert _close(gap.statistic, dunnett.statistic[j], rel=1e-10)
            assert abs(gap.p_adj - dunnett.pvalue[j]) < 3e-4
            assert _close(gap.ci_low, ci.low[j], rel=2e-3, abs_=2e-3 * gap.se)
            assert _close(gap.raw, gap.adjusted, rel=1e-10)  # nothing to adjust for
        # and to the project's own Dunnett (one-factor integral): same digits
        ref = many_to_one(labels, [Moments.from_values(v) for v in samples], "R", "dunnett")
        for gap, pair in zip(res.gaps, ref.pairs):
            assert _close(gap.p_adj, pair.p_adj, rel=1e-9, abs_=1e-12) and _close(gap.ci_low, pair.ci_low, rel=1e-9)

    def test_stratum_shared_evenly_changes_nothing(self):
        # the same samples split over two strata with identical shares: gaps and F as one-way
        labels, samples = self._samples()
        frame = pd.concat([pd.DataFrame({"segment": s, "y": v, "a": np.where(np.arange(len(v)) % 2, "p", "q")})
                           for s, v in zip(labels, samples)], ignore_index=True)
        res = adjusted_comparison(_cells(frame, "segment", ["a"]), "R", ["a"])
        fit = smf.ols(_formula("segment", "R", ["a"]), frame).fit()  # statsmodels OLS
        for gap in res.gaps:
            assert _close(gap.adjusted, fit.params[f"C(segment, Treatment('R'))[T.{gap.segment}]"])

    @pytest.mark.parametrize("name", ["SiRstv", "SmLs01", "SmLs04", "AtmWtAg", "SmLs07"])
    def test_nist_one_way(self, name):
        # NIST StRD certified F (one-way ANOVA) with every record in one stratum
        data = pd.read_csv(NIST_DIR / f"{name}.csv")
        cells = [Cell.from_moments(str(t), ("one",), Moments.from_values(g["response"].to_numpy(float)))
                 for t, g in data.groupby("treatment")]
        res = adjusted_comparison(cells, cells[0].segment, ["stratum"])
        cert = NIST[name]
        assert res.segment_test.df == cert["between_df"] and res.df_resid == cert["within_df"]
        lre = -math.log10(max(abs(res.segment_test.statistic - cert["f_statistic"]) / cert["f_statistic"], 1e-15))
        scipy_f = stats.f_oneway(*[g["response"].to_numpy(float) for _, g in data.groupby("treatment")]).statistic
        scipy_lre = -math.log10(max(abs(scipy_f - cert["f_statistic"]) / cert["f_statistic"], 1e-15))
        # at least 9 digits, or no worse than scipy's f_oneway less one digit where the doubles lose digits
        assert lre >= min(9.0, scipy_lre - 1.0), (lre, scipy_lre)


# ---------------------------------------------------------------------------
# the multivariate t step
# ---------------------------------------------------------------------------
class TestSimultaneous:
    def test_general_correlation_against_monte_carlo(self):
        corr = np.array([[1.0, 0.6, 0.1], [0.6, 1.0, -0.3], [0.1, -0.3, 1.0]])
        assert adj._one_factor(corr) is None  # not Dunnett's one-factor form
        df = 40.0
        t = np.array([2.1, -1.4, 2.6])
        p, crit = adj._simultaneous(t, corr, df, 0.95)
        # numpy Monte Carlo, seeded: T = Z / sqrt(chi2/df), Z ~ N(0, corr)
        rng = np.random.default_rng(99)
        n = 400_000
        z = rng.multivariate_normal(np.zeros(3), corr, size=n)
        s = np.sqrt(rng.chisquare(df, size=n) / df)
        max_t = np.max(np.abs(z) / s[:, None], axis=1)
        for ti, pi in zip(t, p):
            mc = float(np.mean(max_t >= abs(ti)))
            assert abs(pi - mc) < 4 * math.sqrt(mc * (1 - mc) / n)
        coverage = float(np.mean(max_t <= crit))
        assert abs(coverage - 0.95) < 4 * math.sqrt(0.95 * 0.05 / n)

    def test_lattice_rule_matches_the_one_factor_integral(self):
        lam = np.array([0.5, 0.62, 0.71, 0.4])
        corr = np.outer(lam, lam)
        np.fill_diagonal(corr, 1.0)
        rule = _DunnettRule(lam, 30.0)  # Dunnett (1955) one-factor integral
        dist = stats.multivariate_t(loc=np.zeros(4), shape=corr, df=30.0)
        for c in (1.8, 2.5, 3.1):
            qmc = dist.cdf(np.full(4, c), lower_limit=np.full(4, -c), maxpts=adj._QMC_POINTS * 4,
                           random_state=np.random.default_rng(adj._QMC_SEED))
            assert abs(qmc - rule.cdf(np.array([c]))[0]) < 2e-6

    def test_one_factor_detection(self):
        lam = np.array([0.3, -0.5, 0.8])
        corr = np.outer(lam, lam)
        np.fill_diagonal(corr, 1.0)
        found = adj._one_factor(corr)
        assert found is not None and np.allclose(np.outer(found, found), np.outer(lam, lam))


# ---------------------------------------------------------------------------
# composition, log scale, degenerate data
# ---------------------------------------------------------------------------
class TestComposition:
    def test_pure_composition_gap_is_explained(self):
        # within every household size the two tiers have the same mean; only the mix differs
        rng = np.random.default_rng(21)
        rows = []
        for tier, mix, n in (("Basic", [0.3, 0.4, 0.3], 600), ("Saver", [0.75, 0.15, 0.10], 600)):
            size = rng.choice([1, 2, 3], p=mix, size=n)
            y = np.log(np.array([26_000, 42_000, 50_000])[size - 1]) + rng.normal(0, 0.5, n)
            rows.append(pd.DataFrame({"tier": tier, "size": size.astype(str), "y": y}))
        frame = pd.concat(rows, ignore_index=True)
        res = adjusted_comparison(_cells(frame, "tier", ["size"]), "Basic", ["size"], log_scale=True)
        gap = res.gap("Saver")
        fit = smf.ols("y ~ C(tier, Treatment('Basic')) + C(size)", frame).fit()  # statsmodels OLS
        assert _close(gap.adjusted, fit.params["C(tier, Treatment('Basic'))[T.Saver]"])
        assert gap.raw_percent < -15  # the plain gap, from the mix alone
        assert gap.percent_low < 0 < gap.percent_high  # adjusted: no gap
        assert gap.p_adj > 0.05 and gap.explained > 0.8

    def test_log_fields_absent_without_log_scale(self):
        res = adjusted_comparison(TestValidation.cells, "A", ["size"])
        assert math.isnan(res.gaps[0].ratio) and math.isnan(res.gaps[0].percent)


class TestDegenerate:
    def test_reference_without_records(self):
        cells = [Cell("A", ("x",), 4, 1.0, 2.0), Cell("B", ("x",), 5, 2.0, 2.0), Cell("R", ("x",), 0, 0.0, 0.0)]
        res = adjusted_comparison(cells, "R", ["size"])
        assert all(math.isnan(g.adjusted) for g in res.gaps)
        assert "reference segment 'r' has no records" in res.note.lower()
        # the segment test does not need the reference: scipy.stats.f_oneway from the summaries' data
        a = [1.0 - 0.5, 1.0, 1.0, 1.0 + 0.5]  # mean 1, m2 0.5
        b = [2.0 - 0.5, 2.0, 2.0, 2.0, 2.0 + 0.5]  # mean 2, m2 0.5
        cells = [Cell("A", ("x",), 4, 1.0, 0.5), Cell("B", ("x",), 5, 2.0, 0.5), Cell("R", ("x",), 0, 0.0, 0.0)]
        res = adjusted_comparison(cells, "R", ["size"])
        assert _close(res.segment_test.statistic, stats.f_oneway(a, b).statistic)

    def test_one_segment(self):
        res = adjusted_comparison([Cell("R", ("x",), 4, 1.0, 2.0)], "R", ["size"])
        assert res.gaps == () and "fewer than two segments" in res.note.lower()

    def test_listed_segment_without_records(self):
        res = adjusted_comparison(TestValidation.cells, "A", ["size"], segments=["A", "B", "Z"])
        assert res.gap("Z").note == "it has no records" and math.isnan(res.gap("Z").adjusted)
        assert not math.isnan(res.gap("B").adjusted)

    def test_no_residual_variation(self):
        cells = [Cell("A", ("x",), 3, 1.0, 0.0), Cell("B", ("x",), 3, 2.0, 0.0)]
        res = adjusted_comparison(cells, "A", ["size"])
        assert math.isnan(res.segment_test.statistic) and "residual sum of squares 0" in res.note
        assert res.gaps[0].adjusted == pytest.approx(1.0, rel=1e-12) and math.isnan(res.gaps[0].ci_low)

    def test_segments_confounded_with_strata(self):
        cells = [Cell("A", ("x",), 5, 1.0, 4.0), Cell("B", ("y",), 5, 2.0, 4.0)]
        res = adjusted_comparison(cells, "A", ["size"])
        assert res.segment_test.df == 0 and math.isnan(res.segment_test.statistic)
        assert "not estimable" in res.gaps[0].note

    def test_hc3_single_record_pinning_a_level(self):
        frame = RANDOM_CASES["unbalanced"]()
        extra = pd.DataFrame({"segment": ["R"], "a": ["lonely"], "y": [99.0]})
        both = pd.concat([frame, extra], ignore_index=True)
        res = adjusted_comparison(_cells(both, "segment", ["a"]), "R", ["a"], covariance="hc3")
        assert "leverage 1" in res.note
        # statsmodels HC3 without that record (its weight is 0 here, 0/0 there)
        fit = smf.ols(_formula("segment", "R", ["a"]), frame).fit(cov_type="HC3")
        for gap in res.gaps:
            assert _close(gap.se, fit.bse[f"C(segment, Treatment('R'))[T.{gap.segment}]"], rel=1e-8)

    def test_zero_count_cells_are_ignored(self):
        frame = RANDOM_CASES["unbalanced"]()
        cells = _cells(frame, "segment", ["a"])
        res = adjusted_comparison(cells, "R", ["a"])
        padded = adjusted_comparison(cells + [Cell("A", ("new",), 0, float("nan"), float("nan"))], "R", ["a"])
        assert padded.gaps == res.gaps and padded.segment_test == res.segment_test

    def test_str_mentions_every_gap(self):
        frame = RANDOM_CASES["two-strata"]()
        text = str(adjusted_comparison(_cells(frame, "segment", ["a", "b"]), "R", ["a", "b"]))
        assert "adjusted for a, b" in text and "A: adjusted" in text and "B: adjusted" in text
