"""Comparisons against a reference segment (monitor.stats.posthoc.many_to_one), held against outside references.

Sources, named again beside each check:

* Dunnett after ANOVA: ``scipy.stats.dunnett`` (and its ``confidence_interval``), Student's t-test
  (``scipy.stats.ttest_ind``) for a single comparison, and the pooled residual mean square of an
  ordinary least squares fit (``statsmodels`` OLS).
* Games-Howell rows: ``pingouin.pairwise_gameshowell`` and the project's all-pairs Games-Howell
  (itself checked against pingouin in test_stats_posthoc.py).
* Dunn rows: ``scikit_posthocs.posthoc_dunn`` unadjusted p-values, adjusted over the k - 1
  comparisons with the reference by ``statsmodels.stats.multitest.multipletests``; normal
  quantiles from ``scipy.stats.norm``.

The random data are only inputs for the reference libraries; every expected number comes from
outside this project.

Tolerances. ``scipy.stats.dunnett`` integrates the multivariate t distribution by randomised
quasi-Monte Carlo, so it is run with a fixed seed (its ``rng`` argument, the newer name of
``random_state``) and agreement is to its noise, not to machine precision: the t statistics involve
no integration and must agree to 1e-10 relative; p-values to 3e-4 absolute; interval half-widths to
2e-3 relative (scipy finds its critical value to a tolerance of 1e-3 in the confidence level, and
over eight seeds its half-widths spread by up to 8e-4 relative around ours). With one comparison
scipy's quasi-Monte Carlo error is larger still (about 1e-4 in p, 0.5% in the interval), so that
case is checked against the exact t-test instead.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pingouin
import pytest
import scikit_posthocs
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.multitest import multipletests

from monitor.stats.posthoc import dunn, games_howell, many_to_one
from monitor.stats.summary import Moments

REFERENCE = Path(__file__).resolve().parent / "reference"

P_ABS = 3e-4  # scipy.stats.dunnett p-value noise (see the module notes)
HALF_REL = 2e-3  # scipy.stats.dunnett interval half-width noise (see the module notes)

# Shapes: (segment sizes, means, sds, index of the reference). Unequal sizes throughout.
SHAPES = {
    "three-unequal": ((12, 20, 7), (10.0, 11.0, 10.3), (2.0, 2.0, 2.0), 0),
    "five-ref-last": ((30, 15, 22, 9, 40), (10.0, 10.5, 9.2, 10.0, 11.2), (2.0, 2.0, 2.0, 2.0, 2.0), 4),
    "six-ref-middle": ((50, 8, 13, 27, 19, 33), (10.0, 10.2, 10.4, 9.7, 10.9, 10.0), (1.5,) * 6, 2),
    "small-reference": ((6, 25, 4, 18), (10.0, 11.5, 13.0, 10.0), (2.0, 2.0, 2.0, 2.0), 0),
    "large-gap": ((40, 35, 45), (10.0, 14.0, 10.5), (2.0, 2.0, 2.0), 0),
}


def _samples(shape: str, seed: int = 20251201) -> tuple[list[str], list[np.ndarray], str]:
    sizes, means, sds, ref = SHAPES[shape]
    rng = np.random.default_rng(seed)
    samples = [rng.normal(m, s, n) for n, m, s in zip(sizes, means, sds)]
    labels = [f"tier{i}" for i in range(len(sizes))]
    return labels, samples, labels[ref]


def _moments(samples):
    return [Moments.from_values(np.asarray(s, dtype=float)) for s in samples]


def _scipy_dunnett(labels, samples, reference, confidence=0.95, seed=2025):
    """scipy.stats.dunnett with the reference as control; results keyed by segment label."""
    ref = labels.index(reference)
    others = [i for i in range(len(labels)) if i != ref]
    res = stats.dunnett(*[samples[i] for i in others], control=samples[ref], rng=np.random.default_rng(seed))
    ci = res.confidence_interval(confidence_level=confidence)
    return {labels[i]: (res.statistic[j], res.pvalue[j], ci.low[j], ci.high[j]) for j, i in enumerate(others)}


def _assert_interval(pair, low, high):
    half_ref = (high - low) / 2.0
    assert (pair.ci_high - pair.ci_low) / 2.0 == pytest.approx(half_ref, rel=HALF_REL)
    assert pair.ci_low == pytest.approx(low, abs=HALF_REL * half_ref)
    assert pair.ci_high == pytest.approx(high, abs=HALF_REL * half_ref)


# ---------------------------------------------------------------------------
class TestDunnett:
    @pytest.mark.parametrize("shape", list(SHAPES))
    def test_against_scipy(self, shape):
        labels, samples, reference = _samples(shape)
        result = many_to_one(labels, _moments(samples), reference, "dunnett")
        # reference: scipy.stats.dunnett (two-sided), fixed seed; tolerances in the module notes
        expected = _scipy_dunnett(labels, samples, reference)
        assert result.method == "dunnett" and result.reference == reference and result.note is None
        assert [(p.a, p.b) for p in result.pairs] == [(x, reference) for x in labels if x != reference]
        for pair in result.pairs:
            t, p, low, high = expected[pair.a]
            assert pair.statistic == pytest.approx(t, rel=1e-10)
            assert pair.p_adj == pytest.approx(p, abs=P_ABS)
            _assert_interval(pair, low, high)
            # reference: numpy, difference of the two sample means
            assert pair.diff == pytest.approx(
                samples[labels.index(pair.a)].mean() - samples[labels.index(reference)].mean(), rel=1e-12)

    def test_plant_growth_against_scipy(self):
        # Data: Dobson (1983) Table 7.1 / R PlantGrowth (published_examples.json), control 'ctrl';
        # reference: scipy.stats.dunnett on those data
        import json

        groups = json.loads((REFERENCE / "published_examples.json").read_text(encoding="utf-8"))["plant_growth"]["groups"]
        labels = list(groups)
        samples = [np.array(groups[g], dtype=float) for g in labels]
        result = many_to_one(labels, samples, "ctrl", "dunnett")
        expected = _scipy_dunnett(labels, samples, "ctrl")
        for pair in result.pairs:
            t, p, low, high = expected[pair.a]
            assert pair.statistic == pytest.approx(t, rel=1e-10)
            assert pair.p_adj == pytest.approx(p, abs=P_ABS)
            _assert_interval(pair, low, high)
        # equal sizes: df = N - k = 27 (Dobson's ANOVA table)
        assert {p.df for p in result.pairs} == {27.0}

    @pytest.mark.parametrize("confidence", [0.90, 0.99])
    def test_other_confidence_levels(self, confidence):
        labels, samples, reference = _samples("five-ref-last")
        result = many_to_one(labels, samples, reference, "dunnett", confidence=confidence)
        # reference: scipy.stats.dunnett(...).confidence_interval(confidence_level=...)
        expected = _scipy_dunnett(labels, samples, reference, confidence=confidence)
        assert result.confidence == confidence
        for pair in result.pairs:
            _assert_interval(pair, *expected[pair.a][2:])

    @pytest.mark.parametrize("reference_first", [True, False])
    def test_one_comparison_is_student_t(self, reference_first):
        labels, samples, _ = _samples("three-unequal")
        labels, samples = labels[:2], samples[:2]
        reference = labels[0] if reference_first else labels[1]
        other = labels[1] if reference_first else labels[0]
        (pair,) = many_to_one(labels, samples, reference, "dunnett", confidence=0.99).pairs
        # reference: scipy.stats.ttest_ind(equal_var=True), exact: one comparison with the
        # reference is Student's two-sample t-test, so the quadrature is checked to ~1e-8
        ref = stats.ttest_ind(samples[labels.index(other)], samples[labels.index(reference)], equal_var=True)
        ci = ref.confidence_interval(0.99)
        assert (pair.a, pair.b) == (other, reference)
        assert pair.statistic == pytest.approx(ref.statistic, rel=1e-12)
        assert pair.p_adj == pytest.approx(ref.pvalue, rel=1e-8)
        assert (pair.ci_low, pair.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-8)

    def test_standard_error_uses_pooled_mean_square(self):
        labels, samples, reference = _samples("six-ref-middle")
        frame = pd.DataFrame({"y": np.concatenate(samples),
                              "g": np.repeat(labels, [len(s) for s in samples])})
        # reference: statsmodels OLS y ~ C(g): residual mean square and its df (N - k)
        fit = smf.ols("y ~ C(g)", data=frame).fit()
        n = {lab: len(s) for lab, s in zip(labels, samples)}
        for pair in many_to_one(labels, samples, reference, "dunnett").pairs:
            assert pair.df == fit.df_resid
            assert pair.se == pytest.approx(math.sqrt(fit.mse_resid * (1 / n[pair.a] + 1 / n[reference])), rel=1e-10)

    def test_summaries_and_values_agree(self):
        labels, samples, reference = _samples("five-ref-last")
        from_values = many_to_one(labels, samples, reference, "dunnett")
        from_moments = many_to_one(labels, _moments(samples), reference, "dunnett")
        assert from_values == from_moments

    def test_interval_and_p_value_agree(self):
        # The interval at level 1 - p_adj has a bound on zero (duality of the simultaneous
        # intervals and the single-step adjusted p-values; Hochberg and Tamhane 1987, ch. 3).
        labels, samples, reference = _samples("large-gap")
        for pair in many_to_one(labels, samples, reference, "dunnett").pairs:
            if not 1e-6 < pair.p_adj < 1 - 1e-6:
                continue
            at = many_to_one(labels, samples, reference, "dunnett", confidence=1 - pair.p_adj)
            same = next(p for p in at.pairs if p.a == pair.a)
            bound = same.ci_high if pair.diff < 0 else same.ci_low
            assert bound == pytest.approx(0.0, abs=1e-6 * same.se)


# ---------------------------------------------------------------------------
class TestGamesHowellRows:
    @pytest.mark.parametrize("shape", ["three-unequal", "small-reference", "five-ref-last"])
    def test_against_pingouin(self, shape):
        labels, samples, reference = _samples(shape)
        # give the segments unequal spreads, the case Games-Howell is for
        samples = [s * (1.0 + 0.4 * i) for i, s in enumerate(samples)]
        family = many_to_one(labels, _moments(samples), reference, "games-howell")
        frame = pd.DataFrame({"y": np.concatenate(samples),
                              "g": np.repeat(labels, [len(s) for s in samples])})
        # reference: pingouin.pairwise_gameshowell (all pairs; the studentized range over all k
        # segments, as the restricted family keeps it)
        ref = pingouin.pairwise_gameshowell(data=frame, dv="y", between="g")
        assert family.method == "games-howell" and family.reference == reference
        assert len(family.pairs) == len(labels) - 1
        for pair in family.pairs:
            row = ref[((ref.A == pair.a) & (ref.B == reference)) | ((ref.A == reference) & (ref.B == pair.a))]
            assert len(row) == 1
            row = row.iloc[0]
            sign = 1.0 if row.A == pair.a else -1.0
            assert pair.b == reference
            assert pair.diff == pytest.approx(sign * row["diff"], rel=1e-10)
            assert pair.se == pytest.approx(row["se"], rel=1e-10)
            assert pair.statistic == pytest.approx(sign * row["T"], rel=1e-10)
            assert pair.df == pytest.approx(row["df"], rel=1e-10)
            assert pair.p_adj == pytest.approx(row["pval"], rel=1e-6, abs=1e-12)

    def test_rows_of_the_full_family(self):
        labels, samples, _ = _samples("six-ref-middle")
        labels, samples, reference = labels[:4], samples[:4], labels[2]  # the reference mid-list
        groups = _moments([s * (1.0 + 0.3 * i) for i, s in enumerate(samples)])
        family = many_to_one(labels, groups, reference, "games-howell")
        # reference: the all-pairs Games-Howell family (pingouin-checked in test_stats_posthoc.py):
        # the restricted family is its rows with the reference, oriented other - reference
        full = {(p.a, p.b): p for p in games_howell(labels, groups).pairs}
        for pair in family.pairs:
            if (pair.a, reference) in full:
                other = full[(pair.a, reference)]
                assert (pair.diff, pair.ci_low, pair.ci_high) == pytest.approx(
                    (other.diff, other.ci_low, other.ci_high), rel=1e-12)
            else:
                other = full[(reference, pair.a)]
                assert (pair.diff, pair.ci_low, pair.ci_high) == pytest.approx(
                    (-other.diff, -other.ci_high, -other.ci_low), rel=1e-12)
            assert pair.p_adj == pytest.approx(other.p_adj, rel=1e-12)
            assert pair.df == pytest.approx(other.df, rel=1e-12)

    def test_interval_uses_the_studentized_range(self):
        labels, samples, reference = _samples("three-unequal")
        family = many_to_one(labels, samples, reference, "games-howell", confidence=0.9)
        # reference: scipy.stats.studentized_range.ppf(0.9, k, df) x se / sqrt(2), Games and
        # Howell (1976), with se and df from pingouin.pairwise_gameshowell
        frame = pd.DataFrame({"y": np.concatenate(samples), "g": np.repeat(labels, [len(s) for s in samples])})
        ref = pingouin.pairwise_gameshowell(data=frame, dv="y", between="g")
        for pair in family.pairs:
            row = ref[(ref.A == reference) & (ref.B == pair.a)].iloc[0]
            half = stats.studentized_range.ppf(0.9, len(labels), row["df"]) * row["se"] / math.sqrt(2)
            assert (pair.ci_high - pair.ci_low) / 2 == pytest.approx(half, rel=1e-8)


# ---------------------------------------------------------------------------
ADJUST_IN_STATSMODELS = {"holm": "holm", "bonferroni": "bonferroni", "bh": "fdr_bh", "by": "fdr_by"}


class TestDunnRows:
    @pytest.fixture(scope="class")
    def skewed(self):
        """Five segments of skewed values with ties (rounded), unequal sizes."""
        rng = np.random.default_rng(99)
        spec = [(30, 0.0), (22, 0.5), (41, 0.1), (15, -0.4), (27, 0.0)]
        samples = [np.round(rng.lognormal(3.0 + shift, 0.8, n), 0) for n, shift in spec]
        return ["Basic", "Saver", "Standard", "Premium", "Green"], samples

    @pytest.mark.parametrize("adjust", ["holm", "bonferroni", "bh", "by", "none"])
    @pytest.mark.parametrize("reference", ["Basic", "Premium"])
    def test_adjusted_over_the_reference_family(self, skewed, adjust, reference):
        labels, samples = skewed
        family = many_to_one(labels, samples, reference, "dunn", adjust=adjust)
        # reference: scikit_posthocs.posthoc_dunn, unadjusted (tie-corrected z, pooled ranks of
        # all five segments), then statsmodels multipletests over the k - 1 = 4 comparisons with
        # the reference only
        raw = scikit_posthocs.posthoc_dunn([list(s) for s in samples], p_adjust=None)
        ref_pos = labels.index(reference) + 1  # posthoc_dunn labels groups 1..k
        others = [i + 1 for i, lab in enumerate(labels) if lab != reference]
        p_raw = [raw.loc[j, ref_pos] for j in others]
        expected = p_raw if adjust == "none" else multipletests(p_raw, method=ADJUST_IN_STATSMODELS[adjust])[1]
        assert [p.a for p in family.pairs] == [lab for lab in labels if lab != reference]
        assert [p.p_adj for p in family.pairs] == pytest.approx(list(expected), rel=1e-9)

    def test_mean_ranks_and_bonferroni_intervals(self, skewed):
        labels, samples = skewed
        family = many_to_one(labels, samples, "Basic", "dunn", adjust="holm", confidence=0.95)
        # reference: scipy.stats.rankdata (mid-ranks) over all records pooled
        ranks = stats.rankdata(np.concatenate(samples))
        bounds = np.cumsum([0] + [len(s) for s in samples])
        mean_rank = {lab: ranks[bounds[i]:bounds[i + 1]].mean() for i, lab in enumerate(labels)}
        raw = scikit_posthocs.posthoc_dunn([list(s) for s in samples], p_adjust=None)
        # reference: scipy.stats.norm; Bonferroni critical value over the k - 1 = 4 comparisons
        z_crit = stats.norm.ppf(1 - 0.05 / (2 * 4))
        for pair in family.pairs:
            assert pair.diff == pytest.approx(mean_rank[pair.a] - mean_rank["Basic"], rel=1e-12)
            # |z| from scikit-posthocs' unadjusted p gives the standard error
            z = stats.norm.isf(raw.loc[labels.index(pair.a) + 1, 1] / 2)
            assert abs(pair.statistic) == pytest.approx(z, rel=1e-6)
            assert (pair.ci_high - pair.ci_low) / 2 == pytest.approx(z_crit * abs(pair.diff) / z, rel=1e-6)

    def test_smaller_family_adjusts_less(self, skewed):
        labels, samples = skewed
        # Bonferroni over 4 instead of 10 comparisons: each restricted p is the full-family p
        # times 4/10 (reference: the Bonferroni rule, p_adj = min(1, m p))
        restricted = many_to_one(labels, samples, "Basic", "dunn", adjust="bonferroni")
        full = {(p.a, p.b): p for p in dunn(labels, samples, adjust="bonferroni").pairs}
        for pair in restricted.pairs:
            other = full.get(("Basic", pair.a)) or full[(pair.a, "Basic")]
            if other.p_adj < 1.0:
                assert pair.p_adj == pytest.approx(other.p_adj * 4 / 10, rel=1e-12)


# ---------------------------------------------------------------------------
class TestDegenerateAndBadInput:
    def test_empty_reference_segment(self):
        groups = _moments([[], [1.0, 2.0, 3.0], [2.0, 4.0, 3.5]])
        result = many_to_one(["Basic", "Saver", "Plus"], groups, "Basic", "dunnett")
        assert result.note == ("Segment 'Basic' has no records, so its pairs are NaN; the reference segment "
                               "'Basic' has no records, so nothing can be compared with it.")
        assert [p.a for p in result.pairs] == ["Saver", "Plus"]
        assert all(math.isnan(p.p_adj) and math.isnan(p.ci_low) and math.isnan(p.diff) for p in result.pairs)

    def test_empty_reference_games_howell(self):
        groups = _moments([[], [1.0, 2.0, 3.0], [2.0, 4.0, 3.5]])
        result = many_to_one(["Basic", "Saver", "Plus"], groups, "Basic", "games-howell")
        assert result.note == "Segment 'Basic' has no records, so its pairs are NaN."
        assert all(math.isnan(p.p_adj) for p in result.pairs)

    def test_only_the_reference_has_records(self):
        result = many_to_one(["Basic", "Saver"], _moments([[1.0, 2.0, 4.0], []]), "Basic", "dunnett")
        assert result.note == ("Segment 'Saver' has no records, so its pairs are NaN; fewer than two segments "
                               "have records, so there is nothing to compare.")
        (pair,) = result.pairs
        assert math.isnan(pair.p_adj)

    def test_unknown_reference(self):
        with pytest.raises(ValueError) as err:
            many_to_one(["Basic", "Saver"], _moments([[1.0, 2.0], [3.0, 4.0]]), "Gold", "dunnett")
        assert str(err.value) == "reference 'Gold' is not one of the labels ('Basic', 'Saver')"

    def test_dunn_needs_values(self):
        with pytest.raises(ValueError) as err:
            many_to_one(["Basic", "Saver"], _moments([[1.0, 2.0], [3.0, 4.0]]), "Basic", "dunn")
        assert str(err.value) == ("this test ranks the raw values, so samples must be arrays of values, not "
                                  "summaries; segment 'Basic' was given a summary")

    def test_bad_adjustment(self):
        with pytest.raises(ValueError) as err:
            many_to_one(["Basic", "Saver"], [[1.0, 2.0], [3.0, 4.0]], "Basic", "dunn", adjust="fdr")
        assert str(err.value) == "adjust must be one of 'holm', 'bonferroni', 'bh', 'by', 'none'; got 'fdr'"

    def test_non_finite_values(self):
        with pytest.raises(ValueError) as err:
            many_to_one(["Basic", "Saver"], [[1.0, float("inf")], [3.0, 4.0]], "Basic", "dunnett")
        assert str(err.value) == ("samples must hold finite numbers only; segment 'Basic' has 1 non-finite "
                                  "value (remove them first)")

    def test_printed_table_names_the_reference(self):
        labels, samples, reference = _samples("three-unequal")
        text = str(many_to_one(labels, samples, reference, "dunnett"))
        assert text.splitlines()[0] == "Dunnett comparisons, reference tier0; 95% simultaneous intervals"
        assert text.splitlines()[2].startswith("tier1 - tier0")
