"""monitor.stats.studentized held against references outside this project.

Sources, named again beside each check:

* ``scipy.stats.studentized_range`` (the reference library) on a grid of
  k x df x tail level where its own integration is reliable;
* exact values for ``k = 2``: ``Q = sqrt(2) |T|`` with ``T`` Student's t, via
  ``scipy.special.stdtr`` / ``stdtrit``;
* a second, independent integration for the far tail, where scipy is not
  reliable: nested ``scipy.integrate.quad`` in double precision over the range
  *density* and the chi-square *cdf* (all terms positive), code below in
  ``_nested_quad_sf``; its values for 135 grid points are stored in
  ``TAIL_REFERENCE`` and two of them are recomputed live;
* control-chart constants d2, d3 (mean and standard deviation of the range of k
  normal values; Montgomery, Introduction to Statistical Quality Control,
  Appendix VI; values from memory, 3 decimals);
* the handbook upper points in tests/reference/published_examples.json
  (Harter 1960, from memory, 3 decimals).

The interpolated fast path (``tests.support.srange_table.srange_sf_fast``) is
held against the same references (scipy on its grid, the exact k = 2 law, the
nested quadrature, including live points beyond the table) and, densely, against
the exact routine of this module for every k from 2 to 50: the requirement is
1e-9 absolute and 1e-6 relative for tails of at least 1e-10.

Which reference to trust where: scipy's ``studentized_range`` is accurate to
~1e-13 in absolute terms for moderate q, so its *relative* accuracy fails below
~1e-7 (e.g. 1.000162e-09 for an exact 1e-09 at k = 2, df = 1000), and for
df <= 3 with q above ~1000 it returns ~1e-16 where the tail is ~1e-7 (for
k = 8, df = 2, q = 7483.3 scipy gives 2.6e-12; the nested quadrature, the
df = 2 asymptote E[R^2] / q^2 = (d2^2 + d3^2) / q^2 and this module all give
1.5676e-07). So scipy is used for absolute agreement and for relative agreement
above 1e-5, the nested quadrature and the exact k = 2 law below. (From
df = 1e5 on scipy also switches to the df = inf law: at k = 2, df = 1e6 the
exact tail 0.00467783 is not its 0.00467773; see the k = 2 checks.)
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, special, stats

from tests.support.srange_table import srange_sf_fast
from monitor.stats.studentized import srange_cdf, srange_ppf, srange_sf

pytestmark = pytest.mark.filterwarnings("error")

REFERENCE = Path(__file__).resolve().parent / "reference"
INF = math.inf
KS = (2, 3, 5, 10, 20, 50)
DFS = (2, 3, 5, 10, 20.5, 57.3, 120, 1000, INF)


def _published() -> dict:
    with open(REFERENCE / "published_examples.json", encoding="utf-8") as fh:
        return json.load(fh)


def _bonferroni_q(level: float, k: int, df: float) -> float:
    """A q whose tail is a little below ``level`` (Bonferroni over the pairs).

    Used only to place grid points at known depths of the tail, independently
    of the code under test.
    """
    return float(math.sqrt(2.0) * special.stdtrit(df, 1.0 - level / (k * (k - 1))))


# ---------------------------------------------------------------------------
# the second reference: nested quadrature, positive integrands only
# ---------------------------------------------------------------------------
def _range_density(w: float, k: int) -> float:
    # f_R(w) = k (k-1) int phi(z) phi(z-w) (Phi(z) - Phi(z-w))^(k-2) dz
    def f(z: float) -> float:
        d = special.ndtr(w - z) - special.ndtr(-z) if z > 0 else special.ndtr(z) - special.ndtr(z - w)
        return math.exp(-0.5 * z * z - 0.5 * (z - w) ** 2) / (2 * math.pi) * d ** (k - 2)

    c = w / 2
    edges = [-math.inf, c - 6, c - 2, c, c + 2, c + 6, math.inf]
    return k * (k - 1) * sum(integrate.quad(f, lo, hi, epsabs=0, epsrel=1e-13, limit=200)[0]
                             for lo, hi in itertools.pairwise(edges))


def _nested_quad_sf(q: float, k: int, df: float) -> float:
    """P(Q > q) = int_0^inf f_R(w) P(S <= w / q) dw, P(S <= s) = gammainc(df/2, df s^2 / 2).

    The producing code of ``TAIL_REFERENCE`` (run with warnings recorded; for
    k = 50 quad reports that roundoff keeps the inner integral from its 1e-13
    target). df = inf: int_q^inf f_R(w) dw.
    """
    if math.isinf(df):
        edges = [q, q + 1, q + 3, q + 8, math.inf]
        return sum(integrate.quad(_range_density, lo, hi, args=(k,), epsabs=0, epsrel=1e-12, limit=200)[0]
                   for lo, hi in itertools.pairwise(edges))
    a = df / 2

    def g(w: float) -> float:
        return _range_density(w, k) * special.gammainc(a, a * (w / q) ** 2)

    width = 6 / math.sqrt(2 * df)
    points = {0.5, 1, 2, 3, 4, 5, 6, 8, 10, 13, 17}
    near_q = (q * (1 - width), q * (1 - width / 3), q, q * (1 + width / 3), q * (1 + width))
    points |= {x for x in near_q if x > 0}
    edges = [0.0] + sorted(p for p in points if p < 40) + [40.0, math.inf]
    return sum(integrate.quad(g, lo, hi, epsabs=0, epsrel=1e-12, limit=200)[0]
               for lo, hi in itertools.pairwise(edges))


#: (k, df, q, P(Q > q)) from ``_nested_quad_sf``; q = _bonferroni_q(level, k, df)
#: for level in (1e-6, 1e-9, 1e-12).
TAIL_REFERENCE = [
    (3, 2, 2449.4891302395076, 6.089977122132342e-07),
    (3, 2, 77459.66370026284, 6.089978313640154e-10),
    (3, 2, 2449652.826526782, 6.089166966298474e-13),
    (3, 3, 265.4794299786819, 6.8748922615645e-07),
    (3, 3, 2654.8837230897425, 6.874999491469461e-10),
    (3, 3, 26550.025290690177, 6.874084624073433e-13),
    (3, 5, 50.218460267692485, 7.924096052660409e-07),
    (3, 5, 200.24127414979478, 7.929335912662722e-10),
    (3, 5, 797.275940502484, 7.928609490793897e-13),
    (3, 10, 16.733993774130933, 9.103029758271462e-07),
    (3, 10, 34.19487066940919, 9.162456927117221e-10),
    (3, 10, 68.62770253677378, 9.17543515596714e-13),
    (3, 20.5, 10.4503411904772, 9.696656289754078e-07),
    (3, 20.5, 15.860462489635513, 9.794278290554375e-10),
    (3, 20.5, 23.044395994914357, 9.829035254855494e-13),
    (3, 57.3, 8.163500582125886, 9.918887157317768e-07),
    (3, 57.3, 10.719569908654146, 9.975500703109763e-10),
    (3, 57.3, 13.287935016055007, 9.98874963321716e-13),
    (3, 120, 7.644838593805401, 9.954429399020666e-07),
    (3, 120, 9.690887250420484, 9.991736165341022e-10),
    (3, 120, 11.573223668995825, 9.996772713871732e-13),
    (3, 1000, 7.266604821775271, 9.97410925906041e-07),
    (3, 1000, 8.975362684693271, 9.997435321011698e-10),
    (3, 1000, 10.436386686658361, 9.998396926549974e-13),
    (3, INF, 7.217515287187917, 9.97623692155377e-07),
    (3, INF, 8.884689803453643, 9.997873415811314e-10),
    (3, INF, 10.295778576810374, 9.998472802826317e-13),
    (5, 2, 4472.135618283809, 3.078291272108176e-07),
    (5, 2, 141421.35037607554, 3.0782917888020107e-10),
    (5, 2, 4473924.266666332, 3.075831124166471e-13),
    (5, 3, 396.58104484279767, 4.008633414443314e-07),
    (5, 3, 3965.8702512950626, 4.008704403450551e-10),
    (5, 3, 39669.28134078011, 4.00550070948041e-13),
    (5, 5, 63.932389596751925, 5.561631209103318e-07),
    (5, 5, 254.76929745244556, 5.56743326852811e-10),
    (5, 5, 1014.4798231478129, 5.563348394954545e-13),
    (5, 10, 19.006198379534577, 7.836359143899877e-07),
    (5, 10, 38.63451090033539, 7.9403448634029e-10),
    (5, 10, 77.44566763180823, 7.959228144124623e-13),
    (5, 20.5, 11.297676499366291, 9.248750407594909e-07),
    (5, 20.5, 16.963504055161618, 9.459890994916825e-10),
    (5, 20.5, 24.53859321154784, 9.534505811951923e-13),
    (5, 57.3, 8.615036162313327, 9.815709449923661e-07),
    (5, 57.3, 11.162623600569349, 9.939982590227272e-10),
    (5, 57.3, 13.745611861561692, 9.966480076275652e-13),
    (5, 120, 8.019532024498096, 9.903212475009895e-07),
    (5, 120, 10.027489550639464, 9.981360841227876e-10),
    (5, 120, 11.891927509130342, 9.98754857945424e-13),
    (5, 1000, 7.5887980373446124, 9.949304113083281e-07),
    (5, 1000, 9.244460654389476, 9.994847902205088e-10),
    (5, 1000, 10.673261598449784, 9.991454479146519e-13),
    (5, INF, 7.533125162991631, 9.954098233263713e-07),
    (5, INF, 9.145649917089852, 9.995816255582802e-10),
    (5, INF, 10.523174099696687, 9.991619879498448e-13),
    (10, 2, 9486.83280908923, 1.122925476460709e-07),
    (10, 2, 299999.98758394516, 1.1229256087318947e-10),
    (10, 2, 9490626.562424997, 1.122027986385296e-13),
    (10, 3, 654.7472042500216, 1.7337237759676014e-07),
    (10, 3, 6547.508156717079, 1.733746402623044e-10),
    (10, 3, 65492.540564832765, 1.732360738914233e-13),
    (10, 5, 86.41102657357398, 3.082412824042585e-07),
    (10, 5, 344.1934135392755, 3.0860052350702865e-10),
    (10, 5, 1370.5242810754057, 3.08376486055437e-13),
    (10, 10, 22.235721017311313, 5.974550118075651e-07),
    (10, 10, 44.97672999172209, 6.097670110034416e-10),
    (10, 10, 90.05144930276579, 6.123139165311172e-13),
    (10, 20.5, 12.406900051300264, 8.484483436632567e-07),
    (10, 20.5, 18.422837335786532, 8.83672695466575e-10),
    (10, 20.5, 26.52336040344364, 8.975258472153611e-13),
    (10, 57.3, 9.17373347159239, 9.65431718287707e-07),
    (10, 57.3, 11.717928549898136, 9.876425706864979e-10),
    (10, 57.3, 14.32280228089429, 9.9360577122409e-13),
    (10, 120, 8.475175698577237, 9.83224138947611e-07),
    (10, 120, 10.442189893004782, 9.965120467864587e-10),
    (10, 120, 12.287111997511044, 9.983197887847086e-13),
    (10, 1000, 7.9750579117701665, 9.920752854425932e-07),
    (10, 1000, 9.571291488637957, 9.991671423767513e-10),
    (10, 1000, 10.962820187358414, 9.991097297424496e-13),
    (10, INF, 7.910751198264883, 9.92951822055063e-07),
    (10, INF, 9.461970014760055, 9.993418787152916e-10),
    (10, INF, 10.800592369551692, 9.991392330669144e-13),
    (20, 2, 19493.588585336485, 3.810746321691407e-08),
    (20, 2, 616443.4279644816, 3.810721295393163e-11),
    (20, 2, 19372660.347704917, 3.858469859963972e-14),
    (20, 3, 1058.251393507937, 6.787442272788758e-08),
    (20, 3, 10582.55960325739, 6.787451184293426e-11),
    (20, 3, 105387.25451319413, 6.87249889388289e-14),
    (20, 5, 115.28863753441314, 1.5188836934409811e-07),
    (20, 5, 459.11156395661277, 1.520486972163674e-10),
    (20, 5, 1823.2445196965018, 1.539641813634681e-13),
    (20, 10, 25.799206360927577, 4.1666612601313977e-07),
    (20, 10, 52.00366914223843, 4.275027100311364e-10),
    (20, 10, 103.89422984711138, 4.355943515713888e-13),
    (20, 20.5, 13.528084862496925, 7.523713035513493e-07),
    (20, 20.5, 19.912127613777876, 7.991448266615028e-10),
    (20, 20.5, 28.538084414275147, 8.297705183421181e-13),
    (20, 57.3, 9.705172344115248, 9.451533345879899e-07),
    (20, 57.3, 12.252578209344545, 9.785714108811603e-10),
    (20, 57.3, 14.876998833649747, 1.0020716540293665e-12),
    (20, 120, 8.900494606517878, 9.751181198175735e-07),
    (20, 120, 10.834098036115673, 9.944119321164539e-10),
    (20, 120, 12.659692915662758, 1.011011972680968e-12),
    (20, 1000, 8.33005509303152, 9.893465448018366e-07),
    (20, 1000, 9.875394884467775, 9.98833740092573e-10),
    (20, 1000, 11.231635106967166, 1.0123920062189186e-12),
    (20, INF, 8.257070752789327, 9.906919317297646e-07),
    (20, INF, 9.755659045134635, 9.991015218627067e-10),
    (20, INF, 11.057581773777803, 1.012437722989197e-12),
    (50, 2, 49497.4737040988, 8.432089567275899e-09),
    (50, 2, 1565334.4154145007, 8.431153820052329e-12),
    (50, 2, 47453132.81212575, 9.174269662764527e-15),
    (50, 3, 1969.6255464171163, 1.7520756514565356e-08),
    (50, 3, 19696.996198025685, 1.75188740834725e-11),
    (50, 3, 191501.35042681592, 1.9062975737670497e-14),
    (50, 5, 167.39272164526434, 5.1216458675552914e-08),
    (50, 5, 666.5127088477736, 5.125186406474294e-11),
    (50, 5, 2609.0082559504776, 5.577198165473844e-14),
    (50, 10, 31.21723168740861, 2.241571467850447e-07),
    (50, 10, 62.72405685174789, 2.3088006901989125e-10),
    (50, 10, 124.31329859581919, 2.530684841537346e-13),
    (50, 20.5, 15.074820953701431, 6.005104090827699e-07),
    (50, 20.5, 21.985024579356356, 6.55623647345839e-10),
    (50, 20.5, 31.264333851223093, 7.409545244475433e-13),
    (50, 57.3, 10.390389647448625, 9.095620853080084e-07),
    (50, 57.3, 12.950025448714555, 9.6036464252283e-10),
    (50, 57.3, 15.582762778846773, 1.0654754535736971e-12),
    (50, 120, 9.437438805817752, 9.618194767369932e-07),
    (50, 120, 11.334804019558051, 9.904042800779728e-10),
    (50, 120, 13.12479321528725, 1.085010287611861e-12),
    (50, 1000, 8.770485758222303, 9.855394817556587e-07),
    (50, 1000, 10.25721073085984, 9.982328259748425e-10),
    (50, 1000, 11.561570390576664, 1.0878064470770113e-12),
    (50, INF, 8.685703738061294, 9.87659318821532e-07),
    (50, INF, 10.123507552120602, 9.986602692346854e-10),
    (50, INF, 11.372256882620784, 1.0878864767627818e-12),
]


# ---------------------------------------------------------------------------
class TestInputValidation:
    def test_not_a_number(self):
        with pytest.raises(ValueError) as err:
            srange_sf("3.5", 3, 10)
        assert str(err.value) == "q must be a real number or an array of real numbers; got str"
        with pytest.raises(ValueError) as err:
            srange_cdf(3.5, np.array(["three"]), 10)
        assert str(err.value) == (
            "k must be a real number or an array of real numbers; got ndarray of dtype <U5"
        )
        with pytest.raises(ValueError) as err:
            srange_sf(3.5 + 1j, 3, 10)
        assert str(err.value) == "q must be a real number or an array of real numbers; got complex"

    def test_not_a_number_in_ppf(self):
        with pytest.raises(ValueError) as err:
            srange_ppf(0.95, 3, {"df": 10})
        assert str(err.value) == "df must be a real number or an array of real numbers; got dict"

    def test_shapes_must_broadcast(self):
        with pytest.raises(ValueError) as err:
            srange_sf([1.0, 2.0, 3.0], [3, 4], 10)
        assert str(err.value) == "q, k and df must broadcast to one shape; got shapes (3,), (2,) and ()"

    def test_degenerate_arguments_give_numbers_without_warnings(self):
        # the module's documented policy (no outside reference): q <= 0 -> 1,
        # q = inf -> 0, anything invalid -> NaN, and a lower quantile below
        # p = 1e-9 (not resolved) -> NaN; no exception, no warning
        with np.errstate(all="raise"):
            sf = srange_sf([0.0, -2.0, INF, -INF, np.nan, 3.0, 3.0, 3.0, 3.0, 3.0, 3.0, 3.0],
                           [3, 3, 3, 3, 3, 1, 2.5, 1001, np.nan, 3, 3, 3],
                           [10, 10, 10, 10, 10, 10, 10, 10, 10, 0.0, -1.0, np.nan])
            cdf = srange_cdf([0.0, INF, np.nan], 3, 10)
            ppf = srange_ppf([0.0, 1.0, -0.1, 1.5, np.nan, 0.5, 0.5, 1e-10], [3, 3, 3, 3, 3, 1, 3, 3],
                             [10, 10, 10, 10, 10, 10, 0, 10])
        assert sf[:4].tolist() == [1.0, 1.0, 0.0, 1.0]
        assert np.isnan(sf[4:]).all()
        assert cdf[:2].tolist() == [0.0, 1.0] and np.isnan(cdf[2])
        assert ppf[:2].tolist() == [0.0, INF]
        assert np.isnan(ppf[2:]).all()

    def test_shapes(self):
        # numpy conventions: a scalar for scalar arguments, else the broadcast shape
        assert isinstance(srange_sf(3.0, 3, 10), np.float64)
        assert isinstance(srange_ppf(0.95, 3, 10), np.float64)
        assert srange_sf([[1.0], [2.0]], [3, 4, 5], 10).shape == (2, 3)
        assert srange_ppf(0.95, [[3], [4]], [10.0, 20.5]).shape == (2, 2)


# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def scipy_grid():
    """Points where scipy's own integration is reliable, with its values (computed once)."""
    rows = []
    for k in KS:
        for df in DFS:
            for level in (0.9, 0.5, 0.05, 1e-3, 1e-6):
                q = _bonferroni_q(level, k, df)
                if q > 100.0:  # scipy loses the tail there (see the module docstring)
                    continue
                rows.append((q, k, df, float(stats.studentized_range.sf(q, k, df))))
    return np.array(rows)


class TestUpperTail:
    def test_against_scipy(self, scipy_grid):
        q, k, df, ref = scipy_grid.T
        got = srange_sf(q, k, df)
        assert len(ref) > 200 and ref.min() < 1e-6 and ref.max() > 0.8
        # reference: scipy.stats.studentized_range.sf
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
        big = ref >= 1e-5
        np.testing.assert_allclose(got[big], ref[big], rtol=1e-6)

    @pytest.mark.parametrize("df", (1, 2, 3, 5, 10, 20.5, 57.3, 120, 1000, 1e6, INF))
    def test_two_means_is_students_t(self, df):
        levels = np.array([0.9, 0.5, 0.1, 1e-2, 1e-4, 1e-6, 1e-8, 1e-10, 1e-12])
        q = math.sqrt(2.0) * special.stdtrit(df, 1.0 - levels / 2.0)
        # reference: exact, P(Q > q) = P(|T_df| > q / sqrt(2)) (scipy.special.stdtr)
        exact = 2.0 * special.stdtr(df, -q / math.sqrt(2.0))
        np.testing.assert_allclose(srange_sf(q, 2, df), exact, rtol=1e-10)

    def test_far_tail_against_nested_quadrature(self):
        k, df, q, ref = np.array(TAIL_REFERENCE).T
        assert ref.min() < 1e-14 and ref.max() > 1e-7
        # reference: _nested_quad_sf (scipy.integrate.quad), table above
        np.testing.assert_allclose(srange_sf(q, k, df), ref, rtol=1e-9, atol=0)

    def test_tail_reference_is_reproducible(self):
        # the stored table comes from the code above: recompute two entries
        for k, df, q, stored in (TAIL_REFERENCE[20], TAIL_REFERENCE[26]):
            assert _nested_quad_sf(q, k, df) == pytest.approx(stored, rel=1e-11)

    @pytest.mark.parametrize("k", range(2, 11))
    def test_range_moments_are_control_chart_constants(self, k):
        d2 = {2: 1.128, 3: 1.693, 4: 2.059, 5: 2.326, 6: 2.534, 7: 2.704, 8: 2.847, 9: 2.970, 10: 3.078}
        d3 = {2: 0.853, 3: 0.888, 4: 0.880, 5: 0.864, 6: 0.848, 7: 0.833, 8: 0.820, 9: 0.808, 10: 0.797}
        # df = inf is the range itself: E[R] = int P(R > w) dw, E[R^2] = int 2w P(R > w) dw
        x, wx = np.polynomial.legendre.leggauss(200)
        w, weight = 10.0 * (x + 1.0), 10.0 * wx
        tail = srange_sf(w, k, INF)
        mean = float(np.sum(weight * tail))
        sd = math.sqrt(float(np.sum(weight * 2.0 * w * tail)) - mean**2)
        # reference: control-chart constants d2 (mean range) and d3 (its sd), from memory, 3 decimals
        assert abs(mean - d2[k]) <= 6e-4
        assert abs(sd - d3[k]) <= 6e-4

    @pytest.mark.parametrize("k", (2, 5, 8, 10))
    def test_two_df_far_tail_asymptote(self, k):
        d2 = {2: 1.128, 5: 2.326, 8: 2.847, 10: 3.078}
        d3 = {2: 0.853, 5: 0.864, 8: 0.820, 10: 0.797}
        # with df = 2, S^2 is exponential: P(S < s) = 1 - exp(-s^2), so
        # P(Q > q) = E[1 - exp(-(R/q)^2)] = E[R^2] / q^2 (1 + O(q^-2)); scipy returns ~1e-16 here
        q = 1e4
        # reference: E[R^2] = d2^2 + d3^2 (control-chart constants, from memory, 3 decimals)
        assert srange_sf(q, k, 2) * q * q == pytest.approx(d2[k] ** 2 + d3[k] ** 2, rel=1.5e-3)

    @pytest.mark.parametrize("k, df", [(2, 3), (5, 20.5), (20, 57.3), (50, INF), (10, 1e6)])
    def test_decreasing_in_q(self, k, df):
        q = np.linspace(0.0, 40.0, 4001)
        sf = srange_sf(q, k, df)
        # reference: a tail probability (no outside value needed): in [0, 1], non-increasing,
        # strictly decreasing wherever it is neither ~1 nor ~0
        assert sf[0] == 1.0 and ((sf >= 0) & (sf <= 1)).all()
        assert (np.diff(sf) <= 0).all()
        inside = (sf[1:] > 1e-12) & (sf[:-1] < 1 - 1e-12)
        assert (np.diff(sf)[inside] < 0).all()

    def test_vector_equals_one_at_a_time(self):
        rng = np.random.default_rng(3)
        q = rng.uniform(0.5, 9.0, 25)
        k = rng.integers(2, 30, 25)
        df = np.where(rng.random(25) < 0.2, INF, rng.uniform(2.0, 400.0, 25))
        one_by_one = [float(srange_sf(a, b, c)) for a, b, c in zip(q, k, df)]
        # reference: scipy.stats.studentized_range.sf on the same mixed vector
        ref = stats.studentized_range.sf(q, k, df)
        np.testing.assert_allclose(srange_sf(q, k, df), ref, rtol=1e-7, atol=1e-12)
        np.testing.assert_allclose(srange_sf(q, k, df), one_by_one, rtol=1e-11)

    def test_cdf_is_the_complement(self):
        q = np.array([0.5, 2.0, 3.5, 6.0])
        # reference: scipy.stats.studentized_range.cdf
        ref = stats.studentized_range.cdf(q, 4, 12.5)
        np.testing.assert_allclose(srange_cdf(q, 4, 12.5), ref, rtol=1e-8, atol=1e-12)


# ---------------------------------------------------------------------------
class TestQuantile:
    @pytest.mark.parametrize("point", _published()["studentized_range_upper_points"]["values"])
    def test_handbook_upper_points(self, point):
        alpha, k, df, q = point["alpha"], point["k"], point["df"], point["q"]
        # reference: Harter (1960) studentized range table, via published_examples.json (from memory)
        assert round(float(srange_ppf(1 - alpha, k, df)), 3) == q

    @pytest.mark.parametrize("p, k, df", [(0.95, 3, 10), (0.99, 5, 20.5), (0.95, 20, 57.3), (0.99, 50, INF)])
    def test_against_scipy(self, p, k, df):
        # reference: scipy.stats.studentized_range.ppf
        assert srange_ppf(p, k, df) == pytest.approx(stats.studentized_range.ppf(p, k, df), rel=1e-8)

    @pytest.mark.parametrize("df", (1, 2, 5, 20.5, 1000, INF))
    def test_two_means_is_students_t(self, df):
        p = np.array([0.01, 0.05, 0.5, 0.95, 0.99, 0.999999])
        # reference: exact, q_p = sqrt(2) t_{(1+p)/2, df} (scipy.special.stdtrit)
        exact = math.sqrt(2.0) * special.stdtrit(df, 0.5 + 0.5 * p)
        np.testing.assert_allclose(srange_ppf(p, 2, df), exact, rtol=1e-9)
        # far in the lower tail the cdf (1 - sf: ~1e-13 absolute for df >= 2, ~1e-11
        # at df = 1) limits the quantile
        tiny = math.sqrt(2.0) * special.stdtrit(df, 0.5 + 0.5e-6)
        assert srange_ppf(1e-6, 2, df) == pytest.approx(tiny, rel=1e-6 if df >= 2 else 1e-4)

    def test_round_trip(self):
        rng = np.random.default_rng(5)
        k = rng.integers(2, 51, 60)
        df = np.where(rng.random(60) < 0.2, INF, rng.uniform(2.0, 300.0, 60))
        p = np.concatenate([rng.uniform(0.01, 0.99, 40), 1 - 10.0 ** -rng.uniform(2, 10, 20)])
        q = srange_ppf(p, k, df)
        # reference: the definition of a quantile (P(Q <= q_p) = p) ...
        np.testing.assert_allclose(srange_cdf(q, k, df), p, rtol=0, atol=1e-13)
        np.testing.assert_allclose(srange_sf(q, k, df), 1 - p, rtol=1e-10)
        # ... and the quantile of the cdf gives back q
        np.testing.assert_allclose(srange_ppf(srange_cdf(q, k, df), k, df), q, rtol=1e-9)

    def test_quantile_increases_with_confidence(self):
        p = np.array([0.5, 0.9, 0.95, 0.99, 0.999])
        q = srange_ppf(p, 6, 24.7)
        # reference: a quantile function is increasing; Harter's table orders q_0.95 < q_0.99
        assert (np.diff(q) > 0).all()


# ---------------------------------------------------------------------------
def _dense_sample(k: int, size: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(q, df) spread over the whole plane, placed without the code under test.

    df: log-uniform in [2, 1e5] (not whole), some whole numbers, some near the
    table's edge at 8, some very large, some inf. q: uniform over the bulk
    [0, 7], and Bonferroni-placed (``_bonferroni_q``) at tail levels
    log-uniform in [1e-22, 1].
    """
    df = np.exp(rng.uniform(math.log(2.0), math.log(1e5), size))
    kind = rng.random(size)
    df[kind < 0.1] = rng.integers(2, 60, int(np.count_nonzero(kind < 0.1)))
    near = (kind >= 0.1) & (kind < 0.15)
    df[near] = 8.0 + rng.uniform(-0.5, 0.5, int(np.count_nonzero(near)))
    big = (kind >= 0.15) & (kind < 0.2)
    df[big] = 10.0 ** rng.uniform(5, 8, int(np.count_nonzero(big)))
    df[kind >= 0.92] = INF
    level = 10.0 ** rng.uniform(-22, 0, size)
    tail_q = math.sqrt(2.0) * special.stdtrit(df, 1.0 - level / (k * (k - 1)))
    q = np.where(rng.random(size) < 0.4, rng.uniform(0.0, 7.0, size), tail_q)
    return q, df


class TestFastTable:
    """``srange_sf_fast``: per-k interpolation tables with exact fallbacks."""

    def test_dense_against_exact_for_every_k(self):
        rng = np.random.default_rng(2024)
        worst_abs = worst_rel = 0.0
        for k in range(2, 51):
            q, df = _dense_sample(k, 240, rng)
            fast = srange_sf_fast(q, k, df)
            # reference: the exact quadrature of this module (itself held against scipy,
            # Student's t and the nested quadrature above)
            exact = srange_sf(q, k, df)
            big = exact >= 1e-10
            assert big.sum() > 100 and (exact < 1e-10).sum() > 20
            err = np.abs(fast - exact)
            rel = err[big] / exact[big]
            # the requirement: 1e-9 absolute, 1e-6 relative for tails >= 1e-10
            assert err.max() <= 1e-9, (k, q[err.argmax()], df[err.argmax()])
            assert rel.max() <= 1e-6, (k, q[big][rel.argmax()], df[big][rel.argmax()])
            worst_abs, worst_rel = max(worst_abs, err.max()), max(worst_rel, rel.max())
        # what the module docstring claims in practice (~1e-10 absolute, ~1e-8 relative)
        assert worst_abs < 2e-10 and worst_rel < 2e-8

    def test_against_scipy(self, scipy_grid):
        q, k, df, ref = scipy_grid.T
        got = srange_sf_fast(q, k, df)
        # reference: scipy.stats.studentized_range.sf (as for the exact routine above)
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9)
        big = ref >= 1e-5
        np.testing.assert_allclose(got[big], ref[big], rtol=1e-6)

    @pytest.mark.parametrize("df", (8, 9.5, 20.5, 57.3, 120, 1000, 1e6, INF))
    def test_two_means_is_students_t_deep_into_the_tail(self, df):
        levels = 10.0 ** -np.arange(0.0, 86.0, 2.5)
        q = math.sqrt(2.0) * special.stdtrit(df, 1.0 - levels / 2.0)
        q = np.concatenate([q, q[-1] * np.array([1.05, 1.2, 1.5])])  # beyond the table too
        # reference: exact, P(Q > q) = P(|T_df| > q / sqrt(2)) (scipy.special.stdtr)
        exact = 2.0 * special.stdtr(df, -q / math.sqrt(2.0))
        assert exact.min() < 1e-86
        np.testing.assert_allclose(srange_sf_fast(q, 2, df), exact, rtol=1e-8, atol=0)

    def test_far_tail_against_nested_quadrature(self):
        k, df, q, ref = np.array(TAIL_REFERENCE).T
        # reference: _nested_quad_sf (scipy.integrate.quad), stored table above
        np.testing.assert_allclose(srange_sf_fast(q, k, df), ref, rtol=1e-7, atol=0)

    @pytest.mark.parametrize("k, df, q", [(20, 2000.0, 30.0), (20, 20.0, 1.4e5)])
    def test_beyond_the_table_against_nested_quadrature(self, k, df, q):
        # Bonferroni's value (k=20, df=2000) and the wide-window quadrature (df=20) past
        # the table's edge at tails ~1e-87, where the public srange_sf returns 0
        ref = _nested_quad_sf(q, k, df)
        assert 1e-90 < ref < 1e-84
        # reference: _nested_quad_sf (scipy.integrate.quad), computed live
        assert srange_sf_fast(q, k, df) == pytest.approx(ref, rel=1e-8)

    def test_outside_the_table_is_the_exact_routine(self):
        rng = np.random.default_rng(8)
        q = rng.uniform(0.1, 12.0, 40)
        df = rng.uniform(1.0, 7.9, 40)  # below the table's df >= 8
        # reference: srange_sf itself (documented delegation for df < 8 and k > 50)
        np.testing.assert_allclose(srange_sf_fast(q, 6, df), srange_sf(q, 6, df), rtol=1e-11, atol=0)
        np.testing.assert_allclose(srange_sf_fast(q, 80, 30.0), srange_sf(q, 80, 30.0), rtol=1e-11, atol=0)

    @pytest.mark.parametrize("k, df", [(2, 9.0), (5, 20.5), (20, 57.3), (50, INF), (10, 1e6), (20, 2150.0)])
    def test_decreasing_in_q(self, k, df):
        q = np.linspace(0.0, 40.0, 40001)
        sf = srange_sf_fast(q, k, df)
        # reference: a tail probability: in [0, 1], starting at 1, non-increasing up to
        # the interpolation error (near q = 0 the tail is 1 - 1e-11 and may wobble by
        # ~1e-12; the requirement is 1e-9), strictly decreasing wherever it is neither ~1 nor ~0
        assert sf[0] == 1.0 and ((sf >= 0) & (sf <= 1)).all()
        assert np.diff(sf).max() <= 1e-11
        inside = (sf[1:] > 1e-12) & (sf[:-1] < 1 - 1e-9)
        assert (np.diff(sf)[inside] < 0).all()

    def test_degenerate_arguments_and_shapes_follow_srange_sf(self):
        # the documented policy is that of srange_sf: q <= 0 -> 1, q = inf -> 0, NaN for
        # anything invalid; no exception, no warning
        q = [0.0, -2.0, INF, -INF, np.nan, 3.0, 3.0, 3.0, 3.0, 3.0, 3.0, 3.0, 3.0]
        k = [3, 3, 3, 3, 3, 1, 2.5, 1001, np.nan, 3, 3, 3, 3]
        df = [10, 10, 10, 10, 10, 10, 10, 10, 10, 0.0, -1.0, np.nan, 10]
        with np.errstate(all="raise"):
            got = srange_sf_fast(q, k, df)
        assert got[:4].tolist() == [1.0, 1.0, 0.0, 1.0]
        assert np.isnan(got[4:12]).all()
        # reference: srange_sf on the one valid entry
        assert got[12] == pytest.approx(float(srange_sf(3.0, 3, 10)), rel=1e-9)
        assert isinstance(srange_sf_fast(3.0, 3, 10), np.float64)
        assert srange_sf_fast([[1.0], [2.0]], [3, 4, 5], 10).shape == (2, 3)

    def test_bad_arguments_are_refused_in_the_same_words(self):
        with pytest.raises(ValueError) as err:
            srange_sf_fast("3.5", 3, 10)
        assert str(err.value) == "q must be a real number or an array of real numbers; got str"
        with pytest.raises(ValueError) as err:
            srange_sf_fast([1.0, 2.0, 3.0], [3, 4], 10)
        assert str(err.value) == "q, k and df must broadcast to one shape; got shapes (3,), (2,) and ()"
