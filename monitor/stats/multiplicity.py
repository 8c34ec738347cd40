"""Multiple-testing adjustment across metrics, and within metrics after selection.

:func:`adjust` turns a family of p-values into adjusted p-values (q-values for the
FDR methods); a hypothesis is rejected at level ``q`` when its adjusted value is
``<= q``. The methods and what each controls:

``"bh"``
    Benjamini and Hochberg (1995) step-up: the false discovery rate (expected share
    of false rejections among the rejections) at ``q``, for independent or
    positively dependent (PRDS) p-values. segwatch's default.
``"by"``
    Benjamini and Yekutieli (2001): the FDR under *any* dependence, at the price of
    dividing the level by ``sum_{i<=m} 1/i`` (about ``ln m + 0.58``).
``"holm"``
    Holm (1979) step-down: the family-wise error rate (probability of any false
    rejection), under any dependence; uniformly more powerful than Bonferroni.
``"bonferroni"``
    The family-wise error rate under any dependence, by multiplying by ``m``.
``"none"``
    No adjustment: each test at level ``q`` on its own (per-comparison error rate).

NaN p-values (tests that could not be computed) pass through as NaN and do not
count in the family size ``m``.

:func:`two_level` implements Benjamini and Bogomolov's (2014) selective inference:
metrics are selected by BH on their omnibus p-values, then the pairs inside each
selected metric are tested at the reduced level ``R q / m``, which keeps the
*average over selected metrics* of the within-metric error rate at ``q``.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["METHODS", "adjust", "two_level", "TwoLevelResult"]

logger = logging.getLogger(__name__)

#: Accepted values of ``method`` in :func:`adjust`.
METHODS = ("bh", "by", "holm", "bonferroni", "none")


def _check_p_values(p_values, name: str = "p_values") -> np.ndarray:
    """Validate one family of p-values (the edge of this module)."""
    p = np.array(p_values, dtype=np.float64, copy=True)
    if p.ndim != 1:
        p = p.ravel()
    finite = ~np.isnan(p)
    if np.any(np.isinf(p)) or np.any((p[finite] < 0) | (p[finite] > 1)):
        bad = float(p[~np.isnan(p) & ((p < 0) | (p > 1) | np.isinf(p))][0])
        raise ValueError(f"{name} must lie between 0 and 1 (or be NaN); got {bad!r}")
    return p


def _check_method(method: str) -> str:
    if method not in METHODS:
        valid = ", ".join(METHODS[:-1]) + " and " + METHODS[-1]
        raise ValueError(f"unknown adjustment method {method!r}; valid methods are {valid}")
    return method


def adjust(p_values: Sequence[float], method: str) -> np.ndarray:
    """Adjust a family of p-values for multiple testing.

    Parameters
    ----------
    p_values : sequence of float
        One p-value per hypothesis, each in [0, 1] or NaN (not tested).
    method : {"bh", "by", "holm", "bonferroni", "none"}
        See the module docstring for what each controls.

    Returns
    -------
    numpy.ndarray
        Adjusted p-values in the input order, capped at 1; NaN where the input is
        NaN. Reject at level ``q`` where the adjusted value is ``<= q``.

    Raises
    ------
    ValueError
        For an unknown method or a p-value outside [0, 1].

    Notes
    -----
    With the ``m`` non-NaN p-values sorted, ``p_(1) <= ... <= p_(m)``:

    * BH [1]_: ``q_(i) = min_{j >= i} m p_(j) / j``.
    * BY [2]_: the BH value times ``c(m) = sum_{i=1}^m 1/i``.
    * Holm [3]_: ``max_{j <= i} (m - j + 1) p_(j)``.
    * Bonferroni: ``m p_i``.

    The p-values are assumed valid (uniform or stochastically larger under their
    null hypothesis); BH additionally assumes independence or positive dependence.

    References
    ----------
    .. [1] Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery
       rate: a practical and powerful approach to multiple testing. Journal of the
       Royal Statistical Society B 57(1), 289-300.
    .. [2] Benjamini, Y. and Yekutieli, D. (2001). The control of the false
       discovery rate in multiple testing under dependency. Annals of Statistics
       29(4), 1165-1188.
    .. [3] Holm, S. (1979). A simple sequentially rejective multiple test
       procedure. Scandinavian Journal of Statistics 6(2), 65-70.
    """
    _check_method(method)
    p = _check_p_values(p_values)
    out = np.full(p.shape, np.nan)
    tested = np.flatnonzero(~np.isnan(p))
    m = tested.size
    if m == 0:
        return out
    pt = p[tested]
    if method == "none":
        adj = pt.copy()
    elif method == "bonferroni":
        adj = np.minimum(1.0, m * pt)
    else:
        order = np.argsort(pt, kind="stable")
        ps = pt[order]
        ranks = np.arange(1, m + 1, dtype=np.float64)
        if method == "holm":
            sorted_adj = np.maximum.accumulate(np.minimum(1.0, (m - ranks + 1) * ps))
        else:  # bh, by
            scale = 1.0 if method == "bh" else float(np.sum(1.0 / ranks))
            stepped = scale * m * ps / ranks
            sorted_adj = np.minimum(1.0, np.minimum.accumulate(stepped[::-1])[::-1])
        adj = np.empty(m)
        adj[order] = sorted_adj
    out[tested] = adj
    return out


@dataclass(frozen=True)
class TwoLevelResult:
    """Outcome of :func:`two_level`.

    Attributes
    ----------
    level : float
        The target level ``q``.
    metric_q : numpy.ndarray
        BH-adjusted omnibus p-values (q-values), one per metric; NaN passes through.
    metric_selected : numpy.ndarray of bool
        ``metric_q <= level``.
    n_selected : int
        ``R``, the number of metrics selected.
    n_tested : int
        ``m``, the number of metrics with a (non-NaN) p-value.
    pair_level : float
        ``R q / m``: the level used inside each selected metric (0 if none).
    pair_p_adj : tuple of numpy.ndarray
        Per metric, the pair p-values adjusted *within* that metric by
        ``pair_method`` (computed for every metric, selected or not).
    pair_rejected : tuple of numpy.ndarray of bool
        Per metric, ``pair_p_adj <= pair_level`` for selected metrics; all False
        for metrics that were not selected.
    pair_method : str
        The within-metric adjustment used.
    """

    level: float
    metric_q: np.ndarray
    metric_selected: np.ndarray
    n_selected: int
    n_tested: int
    pair_level: float
    pair_p_adj: tuple[np.ndarray, ...]
    pair_rejected: tuple[np.ndarray, ...]
    pair_method: str


def two_level(
    metric_p: Sequence[float],
    pair_p_by_metric: Sequence[Sequence[float]],
    level: float,
    pair_method: str = "holm",
) -> TwoLevelResult:
    """Select metrics by BH, then test pairs within the selected metrics.

    Parameters
    ----------
    metric_p : sequence of float
        Omnibus p-value of each metric (NaN: not tested, never selected).
    pair_p_by_metric : sequence of sequences of float
        For each metric, in the same order, the unadjusted p-values of its pairs
        (may be empty).
    level : float
        Target level ``q`` in (0, 1).
    pair_method : str, optional
        Within-metric adjustment, one of :data:`METHODS`: ``"holm"`` (default)
        controls the within-metric family-wise error rate on average over the
        selected metrics, ``"bh"`` the within-metric FDR.

    Returns
    -------
    TwoLevelResult

    Raises
    ------
    ValueError
        If the lengths differ, the level is outside (0, 1), a p-value is outside
        [0, 1] or a method is unknown.

    Notes
    -----
    Benjamini and Bogomolov [1]_, with BH as the selection rule:
    BH at level ``q`` across the ``m`` metrics selects ``R`` of them; inside each
    selected metric, the pairs are tested at level ``R q / m`` with an error-rate
    controlling procedure. This controls the expected average, over the selected
    metrics, of the within-metric error rate (FWER for Holm, FDR for BH) at ``q``,
    when the metrics' p-values are independent (or PRDS) across metrics; the
    omnibus p-value must be a valid p-value for "no pair differs" in that metric.

    References
    ----------
    .. [1] Benjamini, Y. and Bogomolov, M. (2014). Selective inference on multiple
       families of hypotheses. Journal of the Royal Statistical Society B 76(1),
       297-318.
    """
    if not (0.0 < level < 1.0) or math.isnan(level):
        raise ValueError(f"level must be a number strictly between 0 and 1; got {float(level)!r}")
    _check_method(pair_method)
    if len(pair_p_by_metric) != len(metric_p):
        raise ValueError(
            f"pair_p_by_metric has {len(pair_p_by_metric)} entries but metric_p has "
            f"{len(metric_p)}; give one (possibly empty) list of pair p-values per metric"
        )
    metric_q = adjust(metric_p, "bh")
    selected = np.nan_to_num(metric_q, nan=np.inf) <= level
    n_selected = int(selected.sum())
    n_tested = int(np.sum(~np.isnan(metric_q)))
    pair_level = n_selected * level / n_tested if n_tested else 0.0
    pair_adj: list[np.ndarray] = []
    pair_rej: list[np.ndarray] = []
    for i, pairs in enumerate(pair_p_by_metric):
        adj = adjust(_check_p_values(pairs, f"pair_p_by_metric[{i}]"), pair_method)
        pair_adj.append(adj)
        if selected[i]:
            pair_rej.append(np.nan_to_num(adj, nan=np.inf) <= pair_level)
        else:
            pair_rej.append(np.zeros(adj.shape, dtype=bool))
    logger.debug("two-level: %s of %s metrics selected, pair level %s", n_selected, n_tested, pair_level)
    return TwoLevelResult(
        level=level,
        metric_q=metric_q,
        metric_selected=selected,
        n_selected=n_selected,
        n_tested=n_tested,
        pair_level=pair_level,
        pair_p_adj=tuple(pair_adj),
        pair_rejected=tuple(pair_rej),
        pair_method=pair_method,
    )
