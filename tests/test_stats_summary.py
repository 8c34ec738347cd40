"""Per-segment summaries (Moments) against numpy/scipy and exact arithmetic."""

from __future__ import annotations

import math
import warnings
from decimal import Decimal
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.stats.summary import Moments
from monitor.stats.warnings import InaccurateResultWarning, StatsWarning


def scales(values) -> tuple[float, float, float]:
    """Natural error scale of m2, m3, m4: sums of |deviation|^p."""
    x = np.asarray(values, dtype=float)
    d = np.abs(x - x.mean())
    return float(np.sum(d**2)), float(np.sum(d**3)), float(np.sum(d**4))


def assert_moments_close(a: Moments, b: Moments, values, rtol: float) -> None:
    assert a.n == b.n
    s2, s3, s4 = scales(values)
    spread = max(abs(float(np.max(values))), abs(float(np.min(values))), 1e-300)
    assert math.isclose(a.mean, b.mean, rel_tol=rtol, abs_tol=rtol * spread)
    assert math.isclose(a.m2, b.m2, rel_tol=rtol, abs_tol=rtol * s2)
    assert math.isclose(a.m3, b.m3, rel_tol=rtol, abs_tol=rtol * s3)
    assert math.isclose(a.m4, b.m4, rel_tol=rtol, abs_tol=rtol * s4)
    assert (a.min, a.max) == (b.min, b.max)


# --------------------------------------------------------------------- from_values
@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("dist", ["normal", "lognormal", "integers", "offset"])
def test_from_values_matches_numpy_and_scipy(seed, dist):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(3, 400))
    x = {
        "normal": lambda: rng.normal(3.0, 2.0, n),
        "lognormal": lambda: rng.lognormal(0.0, 1.2, n),
        "integers": lambda: rng.integers(0, 5, n).astype(float),
        "offset": lambda: 1e8 + rng.normal(0.0, 1.0, n),
    }[dist]()
    m = Moments.from_values(x)
    assert m.n == n
    np.testing.assert_allclose(m.mean, np.mean(x), rtol=1e-12)  # reference: numpy.mean
    np.testing.assert_allclose(m.var, np.var(x, ddof=1), rtol=1e-9)  # reference: numpy.var(ddof=1)
    np.testing.assert_allclose(m.sd, np.std(x, ddof=1), rtol=1e-9)  # reference: numpy.std(ddof=1)
    # scipy centres on the rounded mean, so on the offset data (1e8 + N(0, 1)) its odd
    # moments keep only ~5 digits; the exact reference below holds us to 1e-10 there
    loose = 1e-4 if dist == "offset" else 1e-9
    # reference: scipy.stats.moment (central moments; our m_p are n times those)
    np.testing.assert_allclose(m.m3, n * stats.moment(x, 3), rtol=loose, atol=loose * scales(x)[1])
    np.testing.assert_allclose(m.m4, n * stats.moment(x, 4), rtol=1e-9)
    # reference: scipy.stats.skew / kurtosis with bias=True are g1 and g2 (Joanes & Gill 1998)
    np.testing.assert_allclose(m.skewness, stats.skew(x, bias=True), rtol=loose, atol=loose)
    np.testing.assert_allclose(m.excess_kurtosis, stats.kurtosis(x, fisher=True, bias=True), rtol=1e-9, atol=loose)
    assert (m.min, m.max) == (x.min(), x.max())
    # exact reference: the definitions evaluated in rational arithmetic on the same doubles
    fr = [Fraction(v) for v in x]
    mean = sum(fr) / n
    exact = [float(sum((v - mean) ** p for v in fr)) for p in (2, 3, 4)]
    np.testing.assert_allclose([m.m2, m.m4], [exact[0], exact[2]], rtol=1e-12)
    np.testing.assert_allclose(m.m3, exact[1], rtol=1e-10, atol=1e-12 * scales(x)[1])
    np.testing.assert_allclose(m.skewness, math.sqrt(n) * exact[1] / exact[0] ** 1.5, rtol=1e-9, atol=1e-12)


def test_accepts_lists_and_integer_arrays():
    # reference: numpy.mean / numpy.var(ddof=1)
    for values in ([1, 2, 4], np.array([1, 2, 4]), (1.0, 2.0, 4.0)):
        m = Moments.from_values(values)
        assert m.n == 3 and m.mean == pytest.approx(7 / 3) and m.var == pytest.approx(np.var([1, 2, 4], ddof=1))


def test_non_numbers_are_refused():
    with pytest.raises(TypeError) as err:
        Moments.from_values([1.0, None])
    assert str(err.value) == "values must be numbers (float, int or decimal.Decimal); got NoneType"
    with pytest.raises(TypeError) as err:
        Moments.from_values(["1.5", "2"])
    assert str(err.value) == "values must be numbers (float, int or decimal.Decimal); got dtype <U3"


def test_accepts_generators_and_pandas():
    pd = pytest.importorskip("pandas")
    # reference: numpy.var(ddof=1)
    assert Moments.from_values(v for v in (1.0, 2.0, 4.0)).var == pytest.approx(np.var([1, 2, 4], ddof=1))
    assert Moments.from_values(pd.Series([1.0, 2.0, 4.0])).var == pytest.approx(np.var([1, 2, 4], ddof=1))


def test_empty_and_single_value():
    for m in (Moments.from_values([]), Moments.empty(), Moments.from_values(np.array([]))):
        assert m.n == 0
        assert all(math.isnan(v) for v in (m.mean, m.m2, m.m3, m.m4, m.min, m.max, m.var, m.sd))
    one = Moments.from_values([4.5])
    assert (one.n, one.mean, one.m2, one.min, one.max) == (1, 4.5, 0.0, 4.5, 4.5)
    # definitions: sample variance needs n >= 2; g1, g2 need a positive m2
    assert math.isnan(one.var) and math.isnan(one.sd)
    assert math.isnan(one.skewness) and math.isnan(one.excess_kurtosis)
    assert math.isnan(Moments.from_values([2.0, 2.0]).skewness)


def test_non_finite_values_make_the_summary_nan():
    m = Moments.from_values([1.0, np.nan, 3.0])
    assert m.n == 3 and math.isnan(m.mean) and math.isnan(m.m2)
    d = Moments.from_values([Decimal("1"), Decimal("Infinity")])
    assert d.n == 2 and math.isnan(d.mean)


def test_large_mean_keeps_its_rounding_error():
    # exact reference: the mean of the doubles computed in rational arithmetic (fractions)
    x = np.array([1000000000000.4, 1000000000000.3, 1000000000000.5, 1000000000000.3, 1000000000000.5])
    exact = sum(Fraction(v) for v in x) / len(x)
    m = Moments.from_values(x)
    assert abs(Fraction(m.mean_decimal) - exact) < abs(Fraction(m.mean) - exact) or Fraction(m.mean) == exact
    assert abs(float(Fraction(m.mean_decimal) - exact)) < 1e-15


# --------------------------------------------------------------------- exact path
class TestDecimal:
    def test_exact_values(self):
        # hand arithmetic: 0.1, 0.2, 0.6 -> mean 0.3, deviations -0.2, -0.1, 0.3
        m = Moments.from_values([Decimal("0.1"), Decimal("0.2"), Decimal("0.6")])
        assert m.is_exact
        assert m.mean == Decimal("0.3")
        assert m.m2 == Decimal("0.14")  # 0.04 + 0.01 + 0.09
        assert m.m3 == Decimal("0.018")  # -0.008 - 0.001 + 0.027
        assert m.m4 == Decimal("0.0098")  # 0.0016 + 0.0001 + 0.0081
        assert m.var == Decimal("0.07")
        assert (m.min, m.max) == (Decimal("0.1"), Decimal("0.6"))

    def test_derived_values_match_scipy(self):
        vals = [Decimal("1.5"), Decimal("2.25"), Decimal("7"), Decimal("3.125"), 4]
        m = Moments.from_values(vals)
        x = np.array([float(v) for v in vals])
        # reference: scipy.stats.skew / kurtosis (bias=True) on the same values
        assert float(m.skewness) == pytest.approx(stats.skew(x, bias=True), rel=1e-12)
        assert float(m.excess_kurtosis) == pytest.approx(stats.kurtosis(x, bias=True), rel=1e-12)
        assert float(m.sd) == pytest.approx(np.std(x, ddof=1), rel=1e-12)  # reference: numpy.std

    def test_as_float(self):
        m = Moments.from_values([Decimal("1000000000000.4"), Decimal("1000000000000.3")])
        f = m.as_float()
        assert not f.is_exact and f.n == 2
        assert f.mean == 1000000000000.35 and f.m2 == pytest.approx(0.005)
        # the float mean plus its residual is the exact mean to well below 1e-12
        assert abs(f.mean_decimal - Decimal("1000000000000.35")) < Decimal("1e-15")

    def test_mixing_types_is_refused(self):
        with pytest.raises(TypeError) as err:
            Moments.from_values([Decimal("1"), 2.0])
        assert str(err.value) == "values mix decimal.Decimal with float; pass all Decimal (exact) or all float"
        exact = Moments.from_values([Decimal("1"), Decimal("2")])
        with pytest.raises(TypeError, match=r"call \.as_float\(\) on the exact one first"):
            exact.merge(Moments.from_values([1.0, 2.0]))


# --------------------------------------------------------------------- merge
finite = st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)


@settings(max_examples=80, deadline=None)
@given(values=st.lists(finite, min_size=2, max_size=60), data=st.data())
def test_merge_of_two_halves_equals_whole(values, data):
    # Chan, Golub & LeVeque (1979) / Pebay (2008): merging is exact in exact arithmetic
    cut = data.draw(st.integers(0, len(values)))
    whole = Moments.from_values(np.array(values))
    merged = Moments.from_values(np.array(values[:cut])).merge(Moments.from_values(np.array(values[cut:])))
    assert_moments_close(merged, whole, values, rtol=1e-9)


@settings(max_examples=30, deadline=None)
@given(values=st.lists(st.decimals(-1000, 1000, places=3), min_size=2, max_size=30), data=st.data())
def test_exact_merge_is_exact(values, data):
    # exact reference: rational arithmetic (fractions) of the same decimal values
    cut = data.draw(st.integers(0, len(values)))
    merged = Moments.from_values(values[:cut]).merge(Moments.from_values(values[cut:])) if 0 < cut < len(values) else Moments.from_values(values)
    fr = [Fraction(v) for v in values]
    mean = sum(fr) / len(fr)
    for p, got in ((2, merged.m2), (3, merged.m3), (4, merged.m4)):
        expected = sum((v - mean) ** p for v in fr)
        assert abs(Fraction(got) - expected) <= Fraction(1, 10**40) * max(1, abs(expected))
    assert abs(Fraction(merged.mean) - mean) <= Fraction(1, 10**45)


def test_merge_with_empty_returns_the_other():
    a = Moments.from_values([1.0, 5.0])
    assert a.merge(Moments.empty()) is a
    assert Moments.empty().merge(a) is a


def test_merge_of_many_parts_matches_numpy():
    rng = np.random.default_rng(7)
    x = 1e9 + rng.normal(0.0, 3.0, 1000)
    total = Moments.empty()
    for part in np.array_split(x, 17):
        total = total.merge(Moments.from_values(part))
    np.testing.assert_allclose(total.var, np.var(x, ddof=1), rtol=1e-9)  # reference: numpy.var
    np.testing.assert_allclose(total.m4, 1000 * stats.moment(x, 4), rtol=1e-8)  # reference: scipy.stats.moment


# --------------------------------------------------------------------- shifted sums
@settings(max_examples=80, deadline=None)
@given(values=st.lists(st.integers(-10**6, 10**6).map(lambda i: i / 1000), min_size=1, max_size=60), data=st.data())
def test_shifted_sums_equal_from_values(values, data):
    x = np.array(values)
    shift = float(x[data.draw(st.integers(0, len(values) - 1))])  # a pilot value from the data
    sums = [float(np.sum((x - shift) ** p)) for p in (1, 2, 3, 4)]
    got = Moments.from_shifted_sums(len(x), shift, *sums, x.min(), x.max())
    assert_moments_close(got, Moments.from_values(x), values, rtol=1e-9)


def test_shifted_sums_exact_with_decimals():
    # exact reference: hand arithmetic; values 10.1, 10.2, 10.6 shifted by 10
    y = [Decimal("0.1"), Decimal("0.2"), Decimal("0.6")]
    sums = [sum(v**p for v in y) for p in (1, 2, 3, 4)]
    m = Moments.from_shifted_sums(3, Decimal(10), *sums, Decimal("10.1"), Decimal("10.6"))
    assert m.is_exact
    assert (m.mean, m.m2, m.m3, m.m4) == (Decimal("10.3"), Decimal("0.14"), Decimal("0.018"), Decimal("0.0098"))


def test_shifted_sums_edge_cases():
    assert Moments.from_shifted_sums(0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0).n == 0
    with pytest.raises(ValueError, match="n must be a non-negative whole number; got -1"):
        Moments.from_shifted_sums(-1, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0)
    with pytest.warns(InaccurateResultWarning, match="shifted sums are inconsistent"):
        m = Moments.from_shifted_sums(2, 0.0, 2.0, 1.0, 1.0, 1.0, 1.0, 1.0)  # s2 < s1^2/n
    assert m.m2 == 0.0
    assert issubclass(InaccurateResultWarning, StatsWarning)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert math.isnan(Moments.from_shifted_sums(2, 0.0, float("nan"), 1.0, 1.0, 1.0, 1.0, 1.0).mean)
