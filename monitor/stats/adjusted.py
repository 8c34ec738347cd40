"""Segments compared within strata: the additive model ``y ~ segment + strata``.

A raw gap between two segments mixes two things: how the segments differ *within* like
records, and how differently their records are spread over other variables (household size,
region, ...). :func:`adjusted_comparison` fits the additive linear model

    y = mu + alpha_segment + beta_1[level of column 1] + ... + beta_p[level of column p] + error

(in formula notation ``y ~ C(segment) + C(a) + C(b)``) by least squares and reports

* the segment test from Type II sums of squares (the segment term after the strata), with its
  F statistic, degrees of freedom and p-value;
* Type II tests of each stratum column, and a lack-of-fit test of additivity;
* for every segment, its **adjusted gap** to a reference segment (``alpha_segment -
  alpha_reference``: the gap within a stratum, the same in every stratum under the model) with
  simultaneous Dunnett-type intervals and p-values from the multivariate t distribution with
  the model's correlation, the **raw gap** (difference of the segments' plain means) beside it,
  and the share of the raw gap that composition explains;
* under a log scale, the same gaps as ratios and per cent.

Everything is computed from per-(segment, stratum cell) sufficient statistics -- count, mean and
sum of squared deviations (:class:`Cell`) -- which is what SQL returns for ``GROUP BY segment,
a, b``. All records of one cell share one row of the design matrix, so the normal equations need
only the cell counts and sums, and the residual sum of squares is the within-cell sum of squares
plus the weighted squared deviations of the cell means from the fit.

Choices, and why
----------------
* **Strata enter as additive main effects**, not as their cross-classification. With two or
  more columns the cross-classification quickly has cells seen by a single segment, which then
  carry nothing for the segment comparison; main effects use every record and match
  ``y ~ C(segment) + C(a) + C(b)``, the model analysts write. The price is the assumption that
  the columns' effects add up (no ``a x b`` interaction) and, as in any additive model, that the
  segment gap is the same in every stratum. :attr:`AdjustedResult.additivity` tests both at
  once (lack of fit against the model with one mean per cell). To adjust for the crossing of two
  columns instead, combine them into one column in the source query.
* **Empty cells are simply absent**: least squares uses the cells that have records. A stratum
  level seen in one segment only determines its own level effect and adds nothing to any
  segment contrast (its records still count for the residual variance, as in any least-squares
  fit). A segment whose gap to the reference is not estimable -- it shares no stratum with the
  reference, directly or through other segments -- gets NaN with a reason, and its degrees of
  freedom drop out of the segment test (which then tests the contrasts that are estimable).
* **Thin cells are not pooled or dropped**: each record weighs the same; a one-record cell adds
  to the means but not to the within-cell spread. The interval of a segment with little
  overlap with the reference is wide, as it should be.
* **Unequal spreads** (``covariance="hc3"``): the heteroscedasticity-consistent covariance
  HC3 of MacKinnon and White [3]_ replaces ``sigma^2 (X'X)^-1``; the segment and stratum tests
  become Wald F tests on ``(q, N - rank)`` degrees of freedom and the gaps' simultaneous
  intervals use the HC3 correlation (as ``multcomp::glht`` with a ``sandwich::vcovHC`` matrix
  does). The per-record residuals and leverages that HC3 needs are again functions of the cell
  sums. This is Welch-like in spirit, not Welch's ANOVA: its reference distribution is only
  approximate, best with a few dozen records per segment and stratum level. A record that
  alone determines a parameter (leverage 1) has residual 0 and is given weight 0 rather than
  0/0. ``"classic"`` (the default) assumes one error variance in every cell.

Degenerate data policy (as in the rest of :mod:`monitor.stats`): nothing here raises on data;
a number that cannot be computed is NaN and the result's ``note`` (or the gap's ``note``) says
why in one sentence. :class:`ValueError` is raised only for malformed arguments.

Example
-------
>>> cells = [Cell("Basic", ("1",), 40, 10.0, 39.0), Cell("Basic", ("2",), 60, 11.0, 59.0),
...          Cell("Saver", ("1",), 75, 10.1, 74.0), Cell("Saver", ("2",), 25, 11.1, 24.0)]
>>> result = adjusted_comparison(cells, reference="Basic", columns=["household_size"])
>>> gap = result.gaps[0]
>>> round(gap.raw, 3), round(gap.adjusted, 3)
(-0.25, 0.1)

References
----------
.. [1] Searle, S. R. (1987). Linear Models for Unbalanced Data. New York: Wiley (Type II sums
   of squares, estimability and connectedness of two-way layouts).
.. [2] Hothorn, T., Bretz, F. and Westfall, P. (2008). Simultaneous inference in general
   parametric models. Biometrical Journal 50(3), 346-363.
.. [3] MacKinnon, J. G. and White, H. (1985). Some heteroskedasticity-consistent covariance
   matrix estimators with improved finite sample properties. Journal of Econometrics 29(3),
   305-325.
.. [4] Dunnett, C. W. (1955). A multiple comparison procedure for comparing several treatments
   with a control. JASA 50(272), 1096-1121.
.. [5] Genz, A. and Bretz, F. (2002). Comparison of methods for the computation of multivariate
   t probabilities. Journal of Computational and Graphical Statistics 11(4), 950-971.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

from monitor.stats.cells import Cell
from monitor.stats.posthoc import _DunnettRule

__all__ = ["COVARIANCES", "AdjustedResult", "Cell", "Gap", "TermTest", "adjusted_comparison"]

logger = logging.getLogger(__name__)

_NAN = float("nan")

#: Covariance estimators accepted by :func:`adjusted_comparison`.
COVARIANCES: tuple[str, ...] = ("classic", "hc3")

#: Quasi-Monte Carlo points per evaluation of a general multivariate t probability and the
#: fixed seed that makes a rerun give the same digits (a few 1e-6 absolute against the exact
#: one-factor integral in the module's tests).
_QMC_POINTS = 25_000
_QMC_SEED = 20261202


# ---------------------------------------------------------------------------
# input and result types
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class TermTest:
    """The test of one model term.

    Attributes
    ----------
    term : str
        ``'segment'``, a stratum column's name, or ``'additivity'``.
    ss : float
        Type II sum of squares of the term (the lack-of-fit sum of squares for
        ``'additivity'``); NaN under ``covariance='hc3'``, whose tests are Wald tests.
    df : int
        Numerator degrees of freedom (the number of estimable contrasts the term adds).
    df_resid : float
        Denominator degrees of freedom.
    statistic : float
        F statistic.
    p_value : float
        Upper tail of F(df, df_resid).
    """

    term: str
    ss: float
    df: int
    df_resid: float
    statistic: float
    p_value: float


@dataclass(frozen=True)
class Gap:
    """One segment's gap to the reference, adjusted and raw.

    Attributes
    ----------
    segment, reference : str
        ``adjusted`` and ``raw`` are ``segment`` minus ``reference``.
    n : int
        The segment's number of records.
    adjusted : float
        Gap within strata: the difference of the segment effects in the additive model.
    se : float
        Standard error of ``adjusted`` (classic or HC3).
    statistic : float
        ``adjusted / se``.
    df : float
        Degrees of freedom of the t (and multivariate t) reference distribution.
    p_adj : float
        Two-sided p-value adjusted for the family of gaps to the reference (single-step,
        multivariate t).
    ci_low, ci_high : float
        Simultaneous confidence interval for ``adjusted`` at the result's ``confidence``.
    raw : float
        Difference of the two segments' plain means over the records in the model (composition not
        accounted for).
    explained : float
        ``(raw - adjusted) / raw``: the share of the raw gap that the strata account for (1 =
        all of it, 0 = none, negative = adjustment widens the gap); NaN if ``raw == 0``. It is
        unstable when the raw gap is small compared with its standard error.
    log_scale : bool
        True if the values are logarithms; then the ``ratio*`` and ``percent*`` properties
        read the gaps as ratios of geometric means.
    note : str or None
        Why the adjusted numbers are NaN, if they are.
    """

    segment: str
    reference: str
    n: int
    adjusted: float
    se: float
    statistic: float
    df: float
    p_adj: float
    ci_low: float
    ci_high: float
    raw: float
    explained: float
    log_scale: bool = False
    note: str | None = None

    def _ratio(self, value: float) -> float:
        return math.exp(value) if self.log_scale and math.isfinite(value) else _NAN

    @property
    def ratio(self) -> float:
        """Adjusted ratio of geometric means, ``exp(adjusted)`` (NaN unless ``log_scale``)."""
        return self._ratio(self.adjusted)

    @property
    def ratio_low(self) -> float:
        """Lower end of the simultaneous interval of :attr:`ratio`."""
        return self._ratio(self.ci_low)

    @property
    def ratio_high(self) -> float:
        """Upper end of the simultaneous interval of :attr:`ratio`."""
        return self._ratio(self.ci_high)

    @property
    def raw_ratio(self) -> float:
        """Raw ratio of geometric means, ``exp(raw)`` (NaN unless ``log_scale``)."""
        return self._ratio(self.raw)

    @property
    def percent(self) -> float:
        """Adjusted gap in per cent of the reference, ``100 (ratio - 1)``."""
        return 100.0 * (self.ratio - 1.0)

    @property
    def percent_low(self) -> float:
        return 100.0 * (self.ratio_low - 1.0)

    @property
    def percent_high(self) -> float:
        return 100.0 * (self.ratio_high - 1.0)

    @property
    def raw_percent(self) -> float:
        """Raw gap in per cent of the reference."""
        return 100.0 * (self.raw_ratio - 1.0)


@dataclass(frozen=True)
class AdjustedResult:
    """The additive model's answer.

    Attributes
    ----------
    columns : tuple of str
        The adjustment columns.
    reference : str
        The reference segment.
    covariance : str
        ``'classic'`` or ``'hc3'``.
    confidence : float
        Level of the simultaneous intervals.
    segment_test : TermTest
        The segment term after the strata (Type II).
    strata_tests : tuple of TermTest
        Each column after the segment and the other columns (Type II).
    additivity : TermTest
        Lack of fit of the additive model against one mean per cell (classic F test); a small
        p-value means the gaps differ between strata or the columns interact.
    gaps : tuple of Gap
        One per segment other than the reference, in segment order.
    critical_value : float
        The multivariate t quantile used for the intervals.
    n : int
        Records used.
    cells : int
        Non-empty (segment, stratum) cells.
    df_resid : float
        Residual degrees of freedom ``N - rank``.
    mse : float
        Residual mean square (the classic error variance estimate).
    note : str or None
        Why some or all numbers are NaN; None when everything was computed.
    """

    columns: tuple[str, ...]
    reference: str
    covariance: str
    confidence: float
    segment_test: TermTest
    strata_tests: tuple[TermTest, ...]
    additivity: TermTest
    gaps: tuple[Gap, ...]
    critical_value: float
    n: int
    cells: int
    df_resid: float
    mse: float
    note: str | None = None

    def gap(self, segment: str) -> Gap:
        """The gap of ``segment`` to the reference (KeyError if there is none)."""
        for g in self.gaps:
            if g.segment == segment:
                return g
        raise KeyError(segment)

    def __str__(self) -> str:
        t = self.segment_test
        lines = [
            (f"segment adjusted for {', '.join(self.columns)} ({self.covariance} covariance): "
             f"F = {_fmt(t.statistic)} on ({t.df}, {_fmt(t.df_resid)}) df, p = {_fmt(t.p_value)}"),
            f"gaps to {self.reference}, {100 * self.confidence:g}% simultaneous intervals:",
        ]
        for g in self.gaps:
            lines.append(
                f"  {g.segment}: adjusted {_fmt(g.adjusted)} [{_fmt(g.ci_low)}, {_fmt(g.ci_high)}]"
                f" p_adj {_fmt(g.p_adj)}; raw {_fmt(g.raw)}; explained {_fmt(g.explained)}"
            )
        if self.note:
            lines.append(f"note: {self.note}")
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# the model
# ---------------------------------------------------------------------------
def adjusted_comparison(
    cells: Sequence[Cell],
    reference: str,
    columns: Sequence[str],
    *,
    segments: Sequence[str] | None = None,
    covariance: str = "classic",
    confidence: float = 0.95,
    log_scale: bool = False,
) -> AdjustedResult:
    """Compare segments with a reference within strata (additive model, Type II tests).

    Parameters
    ----------
    cells : sequence of Cell
        One summary per (segment, stratum cell); each (segment, levels) at most once.
    reference : str
        The reference segment.
    columns : sequence of str
        Names of the adjustment columns (``len(cell.levels)`` for every cell).
    segments : sequence of str, optional
        Segment order of the result (default: order of first appearance in ``cells``). Segments
        listed without records get a NaN gap with a note.
    covariance : {'classic', 'hc3'}, optional
        One error variance (default) or the heteroscedasticity-consistent HC3 estimator.
    confidence : float, optional
        Level of the simultaneous intervals (default 0.95).
    log_scale : bool, optional
        The values are logarithms: the gaps also read as ratios and per cent.

    Returns
    -------
    AdjustedResult

    Raises
    ------
    ValueError
        For malformed arguments (see the module notes for what is *not* an error).

    Notes
    -----
    With cells ``c`` (design row ``x_c``, count ``n_c``, mean ``ybar_c``, within sum of squares
    ``m2_c``) the least-squares fit minimises ``sum_c n_c (ybar_c - x_c b)^2``; it is computed by
    the singular value decomposition of the weighted design ``diag(sqrt(n_c)) X`` with one cell's
    mean subtracted first (for accuracy when the mean is large against the spread).
    The residual sum of squares is ``RSS = sum_c m2_c + sum_c n_c (ybar_c - x_c b)^2`` on
    ``N - rank(X)`` df. The Type II sum of squares of a term is the rise in RSS when the term
    alone is dropped, its df the drop in rank [1]_; ``F = (SS / df) / (RSS / (N - rank))``.

    Gaps are the treatment contrasts ``alpha_i - alpha_ref``. A gap is estimable when its
    contrast vector lies in the row space of the design (checked numerically from the SVD).
    Their covariance is ``sigma^2 C (X'WX)^+ C'`` (classic) or ``C G M G C'`` with
    ``G = (X'WX)^+`` and ``M = sum_c x_c x_c' (m2_c + n_c r_c^2) / (1 - h_c)^2`` (HC3 [3]_,
    ``r_c`` the cell's mean residual, ``h_c = x_c' G x_c`` a record's leverage). Simultaneous
    p-values and intervals are single-step, from the multivariate t distribution with the
    gaps' correlation and ``N - rank`` df, as in Hothorn, Bretz and Westfall [2]_. When the
    correlation has Dunnett's one-factor form ``rho_ij = lambda_i lambda_j`` (always so for the
    plain one-way layout [4]_) the probability is the deterministic two-dimensional integral of
    :func:`monitor.stats.posthoc.many_to_one`; otherwise it is integrated by the randomised
    lattice rule of Genz and Bretz [5]_ (``scipy.stats.multivariate_t``) with a fixed seed, so
    a rerun gives the same digits. p-values are kept inside the Sidak-type lower and the
    Bonferroni upper bound; below about 1e-6 they are only as good as those bounds.

    Assumptions: independent records; normal errors (the tests are robust to moderate
    non-normality with enough records); the segment gap the same in every stratum and the
    strata effects additive (see ``additivity``); with ``'classic'`` one error variance.
    Adjusting explains an association by the adjustment columns; it does not make a gap causal.
    """
    columns, reference, covariance, confidence, cell_list, order = _check_args(
        cells, reference, columns, segments, covariance, confidence
    )
    return _Fit(cell_list, order, reference, columns, covariance, confidence, bool(log_scale)).result()


def _check_args(cells, reference, columns, segments, covariance, confidence):
    if isinstance(columns, str):
        raise ValueError(f"columns must be a sequence of column names, not the string {columns!r}")
    columns = tuple(columns)
    if not columns:
        raise ValueError("columns must name at least one adjustment column")
    for c in columns:
        if not isinstance(c, str) or not c:
            raise ValueError(f"column names must be non-empty strings; got {c!r}")
    if len(set(columns)) != len(columns):
        raise ValueError(f"columns must be distinct; got {list(columns)}")
    if not isinstance(reference, str):
        raise ValueError(f"reference must be a segment label (str); got {reference!r}")
    if covariance not in COVARIANCES:
        raise ValueError(f"covariance must be one of {', '.join(map(repr, COVARIANCES))}; got {covariance!r}")
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) or not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be a number strictly between 0 and 1; got {confidence!r}")
    cell_list = []
    seen = set()
    order: list[str] = []
    for position, cell in enumerate(cells):
        if not isinstance(cell, Cell):
            raise ValueError(f"cells must be Cell summaries; got {type(cell).__name__} at position {position}")
        if not isinstance(cell.segment, str):
            raise ValueError(f"cell {position}: segment must be a str; got {cell.segment!r}")
        if len(cell.levels) != len(columns):
            raise ValueError(
                f"cell {position} ({cell.segment!r}) has {len(cell.levels)} levels for {len(columns)} columns"
            )
        key = (cell.segment, tuple(cell.levels))
        if key in seen:
            raise ValueError(f"cell {key!r} is given more than once; merge its summaries first")
        seen.add(key)
        if isinstance(cell.n, bool) or int(cell.n) != cell.n or cell.n < 0:
            raise ValueError(f"cell {key!r}: n must be a non-negative whole number; got {cell.n!r}")
        if cell.segment not in order:
            order.append(cell.segment)
        if cell.n == 0:
            continue
        if not (math.isfinite(cell.mean) and math.isfinite(cell.m2)) or cell.m2 < 0:
            raise ValueError(
                f"cell {key!r}: mean and m2 must be finite and m2 >= 0; got mean={cell.mean!r}, m2={cell.m2!r}"
            )
        cell_list.append(cell)
    if segments is not None:
        listed = tuple(segments)
        if len(set(listed)) != len(listed):
            raise ValueError("segments must be unique")
        missing = [s for s in order if s not in listed]
        if missing:
            raise ValueError(f"cells name segments that are not in segments: {missing}")
        order = list(listed)
    return columns, reference, covariance, float(confidence), cell_list, order


class _Fit:
    """One fit of the additive model and its derived quantities (internal)."""

    def __init__(self, cells, order, reference, columns, covariance, confidence, log_scale):
        self.cells = cells
        self.order = order
        self.reference = reference
        self.columns = columns
        self.covariance = covariance
        self.confidence = confidence
        self.log_scale = log_scale
        self.notes: list[str] = []

    # ----------------------------------------------------------------- result
    def result(self) -> AdjustedResult:
        cells = self.cells
        counts = {}
        sums = {}
        for c in cells:
            counts[c.segment] = counts.get(c.segment, 0) + c.n
            sums[c.segment] = sums.get(c.segment, 0.0) + c.n * ((c.mean - cells[0].mean) + c.mean_residual)
        self.seg_n = {s: counts.get(s, 0) for s in self.order}
        self.raw_mean = {s: sums[s] / counts[s] for s in counts}  # relative to the first cell's mean
        big_n = sum(counts.values())
        present = [s for s in self.order if self.seg_n[s] > 0]
        ref_ok = self.reference in present
        others = [s for s in self.order if s != self.reference]
        empty_test = TermTest("segment", _NAN, 0, _NAN, _NAN, _NAN)

        if self.reference not in self.order or not ref_ok:
            self.notes.append(f"the reference segment {self.reference!r} has no records, so no gaps to it "
                              "were computed (the segment test does not need it)")
        if len(present) < 2:
            self.notes.append("fewer than two segments have records, so there is nothing to compare")
        self.ref_ok = ref_ok
        if len(present) < 2 or big_n < 2:
            gaps = tuple(self._nan_gap(s, None) for s in others)
            nan_strata = tuple(TermTest(c, _NAN, 0, _NAN, _NAN, _NAN) for c in self.columns)
            return self._assemble(empty_test, nan_strata, TermTest("additivity", _NAN, 0, _NAN, _NAN, _NAN),
                                  gaps, _NAN, big_n, _NAN, _NAN)

        self._design(present)
        full = self._lstsq(self.x)
        rank, rss = full.rank, full.rss
        df_resid = big_n - rank
        mse = rss / df_resid if df_resid > 0 else _NAN
        usable = True
        if df_resid < 1:
            self.notes.append("the model has no residual degrees of freedom (as many parameters as records), "
                              "so its error variance is undefined")
            usable = False
        elif not rss > 0.0:
            self.notes.append("no variation is left around the fitted model (residual sum of squares 0), "
                              "so the tests and intervals are undefined")
            usable = False

        cov = self._covariance(full, mse) if usable else None
        seg_test = self._term_test("segment", self.seg_cols, full, mse, df_resid, cov)
        strata = tuple(self._term_test(name, cols, full, mse, df_resid, cov)
                       for name, cols in zip(self.columns, self.col_cols))
        additivity = self._additivity(rss, rank, big_n)
        if usable and seg_test.df == 0:
            self.notes.append("the segments cannot be told apart from the strata (each segment lives in its "
                              "own strata), so no segment contrast is estimable")
        gaps, crit = self._gaps(full, cov, df_resid, usable)
        return self._assemble(seg_test, strata, additivity, gaps, crit, big_n, float(df_resid), mse)

    def _assemble(self, seg_test, strata, additivity, gaps, crit, big_n, df_resid, mse) -> AdjustedResult:
        note = None
        if self.notes:
            text = "; ".join(dict.fromkeys(self.notes))
            note = text[0].upper() + text[1:] + "."
        return AdjustedResult(self.columns, self.reference, self.covariance, self.confidence, seg_test,
                              strata, additivity, tuple(gaps), crit, int(big_n), len(self.cells), df_resid,
                              mse, note)

    # ----------------------------------------------------------------- design
    def _design(self, present: list[str]) -> None:
        cells = self.cells
        n = np.array([c.n for c in cells], dtype=float)
        # deviations from one cell's mean: exact for nearby means (Sterbenz), then the residuals
        center = cells[0].mean
        ybar = np.array([(c.mean - center) + c.mean_residual for c in cells], dtype=float)
        m2 = np.array([c.m2 for c in cells], dtype=float)
        # the baseline of the segment coding: the reference, or any segment when it has no records
        # (the segment test and the sums of squares do not depend on the baseline)
        base = self.reference if self.reference in present else present[0]
        seg_levels = [s for s in present if s != base]
        blocks = [np.ones((len(cells), 1))]
        seg_index = {s: i for i, s in enumerate(seg_levels)}
        seg_block = np.zeros((len(cells), len(seg_levels)))
        for row, c in enumerate(cells):
            if c.segment in seg_index:
                seg_block[row, seg_index[c.segment]] = 1.0
        blocks.append(seg_block)
        self.seg_levels = seg_levels
        self.seg_cols = list(range(1, 1 + len(seg_levels)))
        self.col_cols = []
        start = 1 + len(seg_levels)
        for j in range(len(self.columns)):
            levels = list(dict.fromkeys(c.levels[j] for c in cells))[1:]  # first level is the baseline
            index = {lv: i for i, lv in enumerate(levels)}
            block = np.zeros((len(cells), len(levels)))
            for row, c in enumerate(cells):
                if c.levels[j] in index:
                    block[row, index[c.levels[j]]] = 1.0
            blocks.append(block)
            self.col_cols.append(list(range(start, start + len(levels))))
            start += len(levels)
        self.x = np.hstack(blocks)
        self.n, self.ybar, self.m2 = n, ybar, m2
        self.w = np.sqrt(n)
        self.within = float(np.sum(m2))

    def _lstsq(self, x: np.ndarray) -> _Solve:
        a = x * self.w[:, None]
        b = self.ybar * self.w
        u, s, vt = np.linalg.svd(a, full_matrices=False)
        tol = (s[0] if s.size else 0.0) * max(a.shape) * np.finfo(float).eps * 8
        r = int(np.count_nonzero(s > tol))
        coef = vt[:r].T @ ((u[:, :r].T @ b) / s[:r])
        resid = b - a @ coef
        lack = float(resid @ resid)
        if lack <= (1e3 * np.finfo(float).eps) ** 2 * float(b @ b):  # rounding noise of an exact fit
            lack = 0.0
        return _Solve(coef, self.within + lack, r, vt[:r], s[:r])

    def _reduced(self, drop: list[int]) -> _Solve:
        keep = [j for j in range(self.x.shape[1]) if j not in set(drop)]
        return self._lstsq(self.x[:, keep])

    # ------------------------------------------------------------- covariance
    def _covariance(self, full: _Solve, mse: float) -> np.ndarray:
        ginv = (full.vt.T / full.s**2) @ full.vt  # (X'WX)^+
        if self.covariance == "classic":
            return mse * ginv
        x = self.x
        fitted = x @ full.coef
        r = self.ybar - fitted
        h = np.einsum("ij,jk,ik->i", x, ginv, x)
        numerator = self.m2 + self.n * r**2
        with np.errstate(divide="ignore", invalid="ignore"):
            weight = numerator / (1.0 - h) ** 2
        pinned = 1.0 - h < 1e-10
        if np.any(pinned):
            weight[pinned] = 0.0
            self.notes.append(f"{int(np.sum(pinned))} cell(s) hold a single record that alone fixes a parameter "
                              "(leverage 1); HC3 gives them weight 0")
        meat = (x * weight[:, None]).T @ x
        return ginv @ meat @ ginv

    # ------------------------------------------------------------------ tests
    def _estimable_space(self, full: _Solve, cols: list[int]) -> np.ndarray:
        """Orthonormal basis (as rows, in full coordinates) of estimable contrasts on ``cols``."""
        p = self.x.shape[1]
        if not cols:
            return np.zeros((0, p))
        proj = np.eye(p) - full.vt.T @ full.vt
        sub = proj[:, cols]
        _, s, vt = np.linalg.svd(sub, full_matrices=True)
        tol = 1e-8
        null = vt[int(np.count_nonzero(s > tol)):]
        basis = np.zeros((null.shape[0], p))
        basis[:, cols] = null
        return basis

    def _term_test(self, term, cols, full, mse, df_resid, cov) -> TermTest:
        reduced = self._reduced(cols)
        df = full.rank - reduced.rank
        if cov is None or df == 0 or df_resid < 1:
            return TermTest(term, _NAN if cov is None else max(reduced.rss - full.rss, 0.0), int(df),
                            float(df_resid), _NAN, _NAN)
        if self.covariance == "classic":
            ss = max(reduced.rss - full.rss, 0.0)
            f = (ss / df) / mse
            ss_out = ss
        else:
            basis = self._estimable_space(full, cols)
            est = basis @ full.coef
            v = basis @ cov @ basis.T
            f = float(est @ np.linalg.pinv(v, rcond=1e-12, hermitian=True) @ est) / basis.shape[0]
            df = basis.shape[0]
            ss_out = _NAN
        p = float(stats.f.sf(f, df, df_resid))
        return TermTest(term, float(ss_out), int(df), float(df_resid), float(f), p)

    def _additivity(self, rss: float, rank: int, big_n: int) -> TermTest:
        df_lof = len(self.cells) - rank
        df_pure = big_n - len(self.cells)
        lof = max(rss - self.within, 0.0)
        if df_lof < 1 or df_pure < 1 or not self.within > 0.0:
            return TermTest("additivity", lof, int(df_lof), float(df_pure), _NAN, _NAN)
        f = (lof / df_lof) / (self.within / df_pure)
        return TermTest("additivity", lof, int(df_lof), float(df_pure), f, float(stats.f.sf(f, df_lof, df_pure)))

    # ------------------------------------------------------------------- gaps
    def _gaps(self, full: _Solve, cov, df_resid: float, usable: bool) -> tuple[list[Gap], float]:
        if not self.ref_ok:
            return [self._nan_gap(s, None) for s in self.order if s != self.reference], _NAN
        estimable = {}
        for s, col in zip(self.seg_levels, self.seg_cols):
            loading = float(np.sum(full.vt[:, col] ** 2))
            if 1.0 - loading < 1e-8:
                estimable[s] = col
        compare = list(estimable)
        crit = _NAN
        stats_by_segment = {}
        if usable and compare:
            cols = [estimable[s] for s in compare]
            est = full.coef[cols]
            v = cov[np.ix_(cols, cols)]
            se = np.sqrt(np.clip(np.diag(v), 0.0, None))
            if np.all(se > 0):
                t = est / se
                corr = v / np.outer(se, se)
                p_adj, crit = _simultaneous(t, corr, float(df_resid), self.confidence)
                for j, s in enumerate(compare):
                    stats_by_segment[s] = (float(est[j]), float(se[j]), float(t[j]), float(p_adj[j]))
            else:
                self.notes.append("a gap has standard error 0, so the intervals are undefined")
        gaps = []
        for s in self.order:
            if s == self.reference:
                continue
            if s in stats_by_segment:
                est, se, t, p = stats_by_segment[s]
                raw = self.raw_mean[s] - self.raw_mean[self.reference]
                gaps.append(Gap(s, self.reference, self.seg_n[s], est, se, t, float(df_resid), p,
                                est - crit * se, est + crit * se, raw, _explained(raw, est), self.log_scale))
            elif s in estimable:
                raw = self.raw_mean[s] - self.raw_mean[self.reference]
                est = float(full.coef[estimable[s]])
                gaps.append(Gap(s, self.reference, self.seg_n[s], est, _NAN, _NAN, float(df_resid), _NAN,
                                _NAN, _NAN, raw, _explained(raw, est), self.log_scale,
                                "the model's error variance is undefined, so there is no interval"))
            else:
                reason = None
                if self.seg_n.get(s, 0) > 0:
                    reason = (f"its gap to {self.reference!r} is not estimable: it shares no stratum with "
                              f"{self.reference!r}, directly or through other segments")
                    self.notes.append(f"segment {s!r} shares no stratum with the reference, so its adjusted gap is NaN")
                gaps.append(self._nan_gap(s, reason))
        return gaps, crit

    def _nan_gap(self, s: str, reason: str | None) -> Gap:
        n = self.seg_n.get(s, 0) if hasattr(self, "seg_n") else 0
        raw = _NAN
        if n and self.reference in getattr(self, "raw_mean", {}):
            raw = self.raw_mean[s] - self.raw_mean[self.reference]
        if reason is None:
            reason = "it has no records" if not n else "nothing can be compared (see the result's note)"
        return Gap(s, self.reference, n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, raw, _NAN,
                   self.log_scale, reason)


@dataclass(frozen=True)
class _Solve:
    coef: np.ndarray
    rss: float
    rank: int
    vt: np.ndarray
    s: np.ndarray


def _explained(raw: float, adjusted: float) -> float:
    if raw == 0.0 or not math.isfinite(raw):
        return _NAN
    return (raw - adjusted) / raw


# ---------------------------------------------------------------------------
# simultaneous inference: max |T| of a multivariate t
# ---------------------------------------------------------------------------
def _simultaneous(t: np.ndarray, corr: np.ndarray, df: float, confidence: float) -> tuple[np.ndarray, float]:
    """Single-step adjusted p-values ``P(max_j |T_j| >= |t_i|)`` and the critical value.

    ``T`` is multivariate t with correlation ``corr`` and ``df`` degrees of freedom.
    """
    m = t.size
    t_abs = np.abs(t)
    p_single = 2.0 * stats.t.sf(t_abs, df)
    if m == 1:
        return np.clip(p_single, 0.0, 1.0), float(stats.t.ppf(0.5 + confidence / 2.0, df))
    lam = _one_factor(corr)
    if lam is not None:
        rule = _DunnettRule(lam, df)
        p = 1.0 - rule.cdf(t_abs)
        crit = rule.quantile(confidence)
    else:
        dist = stats.multivariate_t(loc=np.zeros(m), shape=corr, df=df, allow_singular=True)

        def cdf(c: float) -> float:
            return float(dist.cdf(np.full(m, c), lower_limit=np.full(m, -c), maxpts=_QMC_POINTS * m,
                                  random_state=np.random.default_rng(_QMC_SEED)))

        # tiny p-values are settled by the bounds below; the rest need the integral
        p = np.array([1.0 - cdf(c) if m * ps > 1e-8 else ps for c, ps in zip(t_abs, p_single)])
        crit = _critical_value(cdf, corr, df, confidence)
    # P(max |T| >= t_i) lies between P(|T_i| >= t_i) and the Bonferroni bound
    p = np.clip(p, p_single, np.minimum(1.0, m * p_single))
    return p, crit


def _critical_value(cdf, corr: np.ndarray, df: float, confidence: float) -> float:
    """Solve ``cdf(c) = confidence``, bracketing near the equicorrelated one-factor answer."""
    m = corr.shape[0]
    rho = float(np.mean(corr[~np.eye(m, dtype=bool)]))
    guess = _DunnettRule(np.full(m, math.sqrt(min(max(rho, 0.0), 0.98))), df).quantile(confidence)
    low = float(stats.t.ppf(0.5 + confidence / 2.0, df)) - 1e-6
    high = float(stats.t.ppf(1.0 - (1.0 - confidence) / (2.0 * m), df)) + 1e-6
    a, b = max(low, guess - 0.05), min(high, guess + 0.05)
    if not (cdf(a) < confidence < cdf(b)):
        a, b = max(low, 0.0), high
    return float(optimize.brentq(lambda c: cdf(c) - confidence, a, b, xtol=1e-7))


def _one_factor(corr: np.ndarray) -> np.ndarray | None:
    """``lambda`` with ``corr_ij = lambda_i lambda_j`` (i != j) if the matrix has that form, else None."""
    m = corr.shape[0]
    off = ~np.eye(m, dtype=bool)
    if np.any(np.abs(corr[off]) < 1e-12) or np.any(np.abs(corr[off]) >= 1.0 - 1e-12):
        return None
    if m == 2:
        r = corr[0, 1]
        lam = np.array([math.sqrt(abs(r)), math.copysign(math.sqrt(abs(r)), r)])
    else:
        lam2 = np.empty(m)
        for i in range(m):
            j, k = [x for x in range(m) if x != i][:2]
            lam2[i] = corr[i, j] * corr[i, k] / corr[j, k]
        if np.any(lam2 <= 0.0) or np.any(lam2 >= 1.0):
            return None
        lam = np.sqrt(lam2)
        lam[1:] *= np.sign(corr[0, 1:])
    if np.max(np.abs(np.outer(lam, lam)[off] - corr[off])) > 1e-9:
        return None
    return lam


def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.4g}"
