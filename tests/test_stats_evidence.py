"""The cross-period decision rule: combination, budget, validity and hysteresis.

References: scipy.stats.combine_pvalues (Stouffer's method), the uniform law of
p-values under the null (Monte Carlo with a fixed seed and a bound with its standard
error), and hand-worked sequences for the state machine.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from monitor.stats.evidence import (
    Budget,
    Hysteresis,
    OnePeriodRule,
    State,
    Track,
    TwoPeriodRule,
    decide,
    periods_per_year,
    state_from_json,
    step,
    stouffer,
)

RULE = TwoPeriodRule()
HYST = Hysteresis()


class TestValidation:
    def test_budget_positive(self):
        with pytest.raises(ValueError, match="alarms_per_year must be a positive number"):
            Budget(0, "week")

    def test_budget_period(self):
        with pytest.raises(ValueError, match="unknown period kind 'fortnight'"):
            Budget(1, "fortnight")

    def test_weight(self):
        with pytest.raises(ValueError, match="weight_now"):
            TwoPeriodRule(weight_now=1.0)

    def test_hysteresis(self):
        with pytest.raises(ValueError, match="clear_above"):
            Hysteresis(clear_above=0)
        with pytest.raises(ValueError, match="quiet_periods"):
            Hysteresis(quiet_periods=0)

    def test_p_range(self):
        with pytest.raises(ValueError, match="p_now must lie between 0 and 1"):
            RULE.evidence(1.5, 0.2)

    def test_level(self):
        with pytest.raises(ValueError, match="level"):
            step(RULE, HYST, None, 0.1, 0.1, 0.0)


class TestCombination:
    @pytest.mark.parametrize("pair", [(0.01, 0.02), (0.3, 0.001), (0.9, 0.04), (1e-12, 0.5), (0.5, 0.5)])
    def test_stouffer_matches_scipy(self, pair):
        ref = stats.combine_pvalues(pair, method="stouffer").pvalue
        assert stouffer(*pair) == pytest.approx(ref, rel=1e-10)

    def test_extreme_values_stay_numbers(self):
        assert 0 < stouffer(1e-300, 0.5) < 1e-100
        assert math.isfinite(stouffer(0.0, 1.0)) and stouffer(1.0, 1.0) == pytest.approx(1.0)

    def test_rule_formula(self):
        ev = RULE.evidence(0.004, 0.01)
        ps = stats.combine_pvalues([0.004, 0.01], method="stouffer").pvalue
        assert ev.p_combined == pytest.approx(ps, rel=1e-10)
        assert ev.p_star == pytest.approx(min(1, 0.004 / 0.2, ps / 0.8), rel=1e-10)

    def test_without_previous_the_whole_level_goes_to_this_period(self):
        assert RULE.evidence(0.003, None).p_star == 0.003
        assert RULE.evidence(0.003, float("nan")).p_star == 0.003

    def test_not_computed(self):
        assert math.isnan(RULE.evidence(None, 0.2).p_star)

    def test_one_period_rule(self):
        assert OnePeriodRule().evidence(0.02, 1e-9).p_star == 0.02

    def test_valid_under_the_null(self):
        # P(p* <= a) <= a for independent uniform p-values (weighted Bonferroni);
        # Monte Carlo with 400,000 pairs, bound plus 4 standard errors.
        rng = np.random.default_rng(20261202)
        p = rng.uniform(size=(400_000, 2))
        star = np.array([RULE.evidence(a, b).p_star for a, b in p[:40_000]])
        z = stats.norm.isf(p)
        ps = stats.norm.sf(z.sum(axis=1) / math.sqrt(2))
        star_all = np.minimum(1, np.minimum(p[:, 0] / 0.2, ps / 0.8))
        assert star == pytest.approx(star_all[:40_000], rel=1e-9)
        for a in (0.05, 0.01, 0.002):
            rate = float(np.mean(star_all <= a))
            assert rate <= a + 4 * math.sqrt(a / star_all.size)
            assert rate >= 0.7 * a  # and not wildly conservative


class TestBudget:
    def test_weekly_twenty_metrics(self):
        # one false alarm a year: 1 / (52.1775 weeks x 20 metrics)
        assert Budget(1, "week").level(20) == pytest.approx(1 / (365.2425 / 7 * 20), rel=1e-12)

    def test_periods(self):
        assert periods_per_year("day") == 365.2425
        assert periods_per_year("month") == 12

    def test_capped(self):
        assert Budget(50, "month").level(1) == 1.0

    def test_decide_counts_only_computed_tests(self):
        tracks = {"a": Track(0.5), "b": Track(float("nan")), "c": Track(1e-5)}
        out = decide(RULE, HYST, Budget(1, "week"), tracks)
        assert out.tests == 2 and out.level == pytest.approx(1 / (365.2425 / 7 * 2))
        assert out.decisions["c"].change == "on" and out.decisions["b"].change is None


def run(ps, level=0.001, hyst=HYST, important=None):
    """The states and changes of one test over a sequence of p-values."""
    state, before, out = None, None, []
    for i, p in enumerate(ps):
        d = step(RULE, hyst, state, p, before, level, important=True if important is None else important[i])
        out.append(d)
        state = d.state
        before = p if p is not None and math.isfinite(p) else None
    return out


class TestHysteresis:
    def test_standing_difference_does_not_flicker(self):
        # A difference that stands every period with p-values around the level: the
        # per-period rule (p <= 0.001) would clear in periods 2, 4 and 6 and re-raise in
        # 3, 5 and 7; the announced state stays on.
        ps = [1e-5, 0.004, 0.0008, 0.02, 0.0005, 0.03, 0.0009, 0.006]
        per_period = [p <= 0.001 for p in ps]
        assert per_period.count(False) == 4
        out = run(ps)
        assert [d.change for d in out] == ["on"] + [None] * 7
        assert all(d.state.on for d in out)

    def test_false_alarm_clears_after_two_quiet_periods(self):
        out = run([1e-6, 0.5, 0.6, 0.7, 0.4])
        # period 1 still carries period 0's evidence in p_S (not quiet); 2 and 3 are quiet
        assert [d.quiet for d in out] == [False, False, True, True, True]
        assert [d.change for d in out] == ["on", None, None, "off", None]

    def test_an_alarm_is_never_taken_back_within_two_periods(self):
        # the period after an alarm still has the alarm's period in its window: never quiet
        rng = np.random.default_rng(7)
        for _ in range(2000):
            out = run([1e-7] + list(rng.uniform(size=5)))
            assert out[0].change == "on"
            assert out[1].state.on and out[2].state.on

    def test_weak_evidence_in_the_window_is_not_quiet(self):
        # p_t and p_{t-1} each above 0.10, but their combination is not (0.12, 0.12 -> 0.048)
        out = run([1e-7, 0.5, 0.12, 0.12, 0.6, 0.7])
        assert [d.quiet for d in out] == [False, False, True, False, True, True]
        assert [d.change for d in out][-1] == "off"

    def test_a_strong_period_resets_the_quiet_count(self):
        out = run([1e-6, 0.5, 0.6, 0.01, 0.5, 0.6, 0.7])
        assert [d.change for d in out] == ["on", None, None, None, None, None, "off"]

    def test_no_verdict_carries_the_state(self):
        out = run([1e-6, None, 0.9, 0.8])
        assert out[1].state == State(True, 0) and out[1].change is None
        # without a previous p the window is p_t alone: 0.9 is quiet, 0.8 completes the pair
        assert [d.change for d in out] == ["on", None, None, "off"]

    def test_one_quiet_period_setting(self):
        out = run([1e-6, 0.5, 0.6], hyst=Hysteresis(quiet_periods=1))
        assert [d.change for d in out] == ["on", None, "off"]

    def test_below_practical_threshold(self):
        out = run([1e-6, 1e-6, 1e-6], important=[False, True, False])
        assert [d.change for d in out] == [None, "on", None]
        assert out[2].quiet and out[2].state.quiet == 1

    def test_json_round_trip(self):
        d = run([1e-6, 0.5, 0.6])[-1]
        assert state_from_json(d.to_json()) == d.state
        assert state_from_json(None) is None and state_from_json({}) is None
