"""Which segment stands apart: each segment against all the others pooled.

The omnibus test says *whether* the segments differ; the pairwise tests say
*which pairs* differ. A monitor also wants one word per segment: is it above the
rest, below the rest, or neither? :func:`segment_vs_rest` answers with one
two-sided test per segment (the segment against the pooled records of every
other segment) and a Holm adjustment over the ``k`` segments, so the chance of
flagging any segment wrongly stays at or below ``alpha``.

The contrast follows the omnibus method, so a flag agrees in spirit with the
test that raised the metric:

* ``'anova'``: a linear contrast in the one-way model, pooled MSE, ``N - k`` df;
* ``'welch'``: the same contrast with each segment's own variance and a
  Welch-Satterthwaite df;
* ``'kruskal'``: mean rank of the segment against the mean rank of the rest,
  with Dunn's tie-corrected variance.

Example
-------
>>> import numpy as np
>>> from monitor.stats.summary import Moments
>>> values = [np.array([5.0, 5.2, 4.9, 5.1]), np.array([5.0, 5.1, 4.8, 5.2]),
...           np.array([7.9, 8.1, 8.0, 8.2])]
>>> flags = segment_vs_rest(["North", "South", "Port"],
...                         [Moments.from_values(v) for v in values], None, "anova")
>>> [f.direction for f in flags]
['low', 'low', 'high']
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import special, stats

from monitor.stats.posthoc import (
    _as_float_groups,
    _check_adjust,
    _check_groups,
    _check_labels,
    _check_samples,
    _clip_p,
    _name_list,
    _Summary,
    adjust_family,
    pooled_ranks,
)

if TYPE_CHECKING:  # pragma: no cover - typing only
    from monitor.stats.summary import Moments

__all__ = ["METHODS", "SegmentContrast", "segment_vs_rest"]

logger = logging.getLogger(__name__)

_NAN = float("nan")

#: Contrast methods, named after the omnibus test they follow.
METHODS = ("anova", "welch", "kruskal")


@dataclass(frozen=True)
class SegmentContrast:
    """One segment against the pooled records of all other segments.

    Attributes
    ----------
    segment : str
        The segment's label.
    diff : float
        Segment minus the rest: difference of means (``'anova'``, ``'welch'``)
        or of mean ranks (``'kruskal'``).
    se : float
        Standard error of ``diff``.
    statistic : float
        ``diff / se`` (t, or z for ``'kruskal'``).
    df : float
        Degrees of freedom of the t reference; ``inf`` for ``'kruskal'``.
    p_adj : float
        Two-sided p-value adjusted over the segments (Holm by default).
    direction : {'high', 'low'} or None
        ``'high'``/``'low'`` when ``p_adj <= alpha``, else None.
    note : str or None
        Why the numbers are NaN, when they are.
    """

    segment: str
    diff: float
    se: float
    statistic: float
    df: float
    p_adj: float
    direction: str | None
    note: str | None = None


def segment_vs_rest(
    labels: Sequence[str],
    groups: Sequence[Moments] | None,
    samples: Sequence[np.ndarray] | None,
    method: str,
    alpha: float = 0.05,
    adjust: str = "holm",
) -> tuple[SegmentContrast, ...]:
    """Test each segment against the rest and flag those that stand apart.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique.
    groups : sequence of Moments or None
        Per-segment summaries; needed for ``'anova'`` and ``'welch'`` (built from
        ``samples`` with ``Moments.from_values`` when None).
    samples : sequence of 1-D arrays or None
        Per-segment raw finite values; needed for ``'kruskal'``.
    method : {'anova', 'welch', 'kruskal'}
        The contrast to use, after the omnibus test of the same name.
    alpha : float, optional
        Family-wise error rate for the flags (default 0.05).
    adjust : {'holm', 'bonferroni', 'bh', 'by', 'none'}, optional
        Adjustment over the segments (default Holm).

    Returns
    -------
    tuple of SegmentContrast
        One per segment, in label order.

    Notes
    -----
    For segment ``i`` with ``n_i`` records and the rest with
    ``N_r = N - n_i`` records and pooled mean
    ``mean_r = sum_{j != i} n_j mean_j / N_r``, the estimate is
    ``diff = mean_i - mean_r``: the linear contrast with coefficients
    ``c_i = 1``, ``c_j = -n_j / N_r`` (Scheffé [1]_, ch. 3; the coefficients sum to
    zero, so it is a contrast). Its variance is ``sum_l c_l^2 sigma_l^2 / n_l``.

    * ``'anova'``: one common variance estimated by the pooled ``MSE`` on
      ``N - k`` df, so ``se = sqrt(MSE (1/n_i + 1/N_r))`` and
      ``t = diff / se`` follows Student's t with ``N - k`` df. Assumes normal
      errors and equal variances.
    * ``'welch'``: ``se^2 = s_i^2/n_i + sum_{j != i} (n_j/N_r)^2 s_j^2/n_j`` and
      the Welch-Satterthwaite df [2]_, [3]_
      ``df = se^4 / sum_l (c_l^2 s_l^2/n_l)^2 / (n_l - 1)``. With two segments
      this is Welch's t-test. Every segment needs at least two records.
    * ``'kruskal'``: mean ranks in the joint ranking,
      ``z = (R_i - R_r) / sqrt((N(N+1)/12 - sum(t^3-t)/(12(N-1))) (1/n_i + 1/N_r))``,
      Dunn's [4]_ statistic with the rest taken as one group; ``z^2`` equals the
      Kruskal-Wallis H of the two-group split ``{i, rest}``.

    p-values are two-sided and adjusted over the segments that could be
    tested (Holm [5]_ by default, which controls the family-wise error rate
    under any dependence; the ``k`` contrasts are correlated). A segment is
    ``'high'`` or ``'low'`` by the sign of ``diff`` when ``p_adj <= alpha``.
    A significant omnibus test does not guarantee a flag, nor the reverse.
    Because the rest includes every other segment, one segment far above all
    the others pulls the rest's mean up, and the others may then be flagged
    ``'low'`` too (each is truly below the pooled rest); read the flags with
    the pairwise comparisons.

    Degenerate data (fewer than two segments with records, no variance, all
    values tied, a segment without records or, for Welch, with one record)
    gives NaN and ``direction=None`` with the reason in ``note``.

    References
    ----------
    .. [1] Scheffé, H. (1959). The Analysis of Variance. New York: Wiley.
    .. [2] Welch, B. L. (1947). The generalization of "Student's" problem when
       several different population variances are involved. Biometrika 34,
       28-35.
    .. [3] Satterthwaite, F. E. (1946). An approximate distribution of estimates
       of variance components. Biometrics Bulletin 2(6), 110-114.
    .. [4] Dunn, O. J. (1964). Multiple comparisons using rank sums.
       Technometrics 6(3), 241-252.
    .. [5] Holm, S. (1979). A simple sequentially rejective multiple test
       procedure. Scandinavian Journal of Statistics 6(2), 65-70.
    """
    labels, groups, samples = _validate(labels, groups, samples, method, alpha, adjust)
    if method == "kruskal":
        raw, notes = _kruskal_contrasts(labels, samples)
    else:
        summaries = _as_float_groups(groups)
        if method == "anova":
            raw, notes = _anova_contrasts(labels, summaries)
        else:
            raw, notes = _welch_contrasts(labels, summaries)
    p_adj = adjust_family([r[4] for r in raw], adjust)
    out = []
    for label, (diff, se, stat, df, _), pa, note in zip(labels, raw, p_adj, notes):
        pa = float(pa)
        direction = None
        if not math.isnan(pa) and pa <= alpha and diff != 0.0:
            direction = "high" if diff > 0 else "low"
        out.append(SegmentContrast(label, diff, se, stat, df, pa, direction, note))
    flagged = [c.segment for c in out if c.direction]
    logger.debug("segment_vs_rest(%s): flagged %s", method, flagged)
    return tuple(out)


# ---------------------------------------------------------------------------
# validation (the edge)
# ---------------------------------------------------------------------------
def _validate(labels, groups, samples, method, alpha, adjust):
    if method not in METHODS:
        allowed = ", ".join(repr(m) for m in METHODS)
        raise ValueError(f"method must be one of {allowed}; got {method!r}")
    if isinstance(alpha, bool) or not isinstance(alpha, (int, float)) or not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be a number strictly between 0 and 1; got {alpha!r}")
    _check_adjust(adjust)
    if method == "kruskal":
        if samples is None:
            raise ValueError("method 'kruskal' ranks the raw values, so samples must be given")
        labels = _check_labels(labels, samples, "samples")
        return labels, None, _check_samples(labels, samples)
    if groups is None:
        if samples is None:
            raise ValueError(f"method {method!r} needs groups (summaries) or samples; both are None")
        from monitor.stats.summary import Moments

        labels = _check_labels(labels, samples, "samples")
        arrays = _check_samples(labels, samples)
        return labels, [Moments.from_values(a) for a in arrays], None
    labels = _check_labels(labels, groups, "groups")
    return labels, _check_groups(groups), None


# ---------------------------------------------------------------------------
# the three contrasts; each returns (diff, se, statistic, df, p_raw) per segment
# plus one note (or None) per segment
# ---------------------------------------------------------------------------
_Raw = tuple[float, float, float, float, float]


def _nan_raw(diff: float = _NAN, df: float = _NAN) -> _Raw:
    return (diff, _NAN, _NAN, df, _NAN)


def _common_degenerate(labels: tuple[str, ...], sizes: Sequence[int]) -> tuple[list[str | None], bool]:
    """Notes for empty segments, and whether fewer than two segments have records."""
    notes: list[str | None] = [
        "This segment has no records, so it cannot be compared." if n == 0 else None for n in sizes
    ]
    present = sum(1 for n in sizes if n > 0)
    if present < 2:
        reason = "Fewer than two segments have records, so there is no rest to compare with."
        return [reason for _ in sizes], True
    return notes, False


def _rest_totals(summaries: list[_Summary]) -> tuple[np.ndarray, np.ndarray]:
    """Per segment: the size and mean of the pooled records of all *other* segments.

    Computed from the totals (one pass, so k segments cost O(k), not O(k^2)); the
    rest's mean is the n-weighted mean of the other segments' means.
    """
    n = np.array([s.n for s in summaries], dtype=float)
    mean = np.array([s.mean if s.n > 0 else 0.0 for s in summaries], dtype=float)
    weighted = n * mean
    n_rest = n.sum() - n
    with np.errstate(all="ignore"):
        mean_rest = (math.fsum(weighted) - weighted) / n_rest
    return n_rest, mean_rest


def _anova_contrasts(labels, summaries):
    sizes = [s.n for s in summaries]
    notes, too_few = _common_degenerate(labels, sizes)
    present = [s for s in summaries if s.n > 0]
    big_n, k = sum(sizes), len(present)
    df = big_n - k
    if too_few:
        return [_nan_raw() for _ in summaries], notes
    n_rest, mean_rest = _rest_totals(summaries)
    diffs = [s.mean - mean_rest[i] if s.n > 0 else _NAN for i, s in enumerate(summaries)]
    reason = None
    if df < 1:
        reason = "Every segment has a single record, so the within-segment variance is undefined."
    elif all(s.flat for s in present):
        reason = "No segment varies within itself (zero variance), so the contrast is undefined."
    if reason:
        df_out = float(df) if df >= 1 else _NAN
        return ([_nan_raw(d, df_out) for d in diffs],
                [notes[i] or reason for i in range(len(summaries))])
    mse = sum(s.m2 for s in present) / df
    n = np.array(sizes, dtype=float)
    with np.errstate(all="ignore"):
        se = np.sqrt(mse * (1.0 / n + 1.0 / n_rest))
        t = np.asarray(diffs) / se
        p = 2.0 * stats.t.sf(np.abs(t), df)
    raw = []
    for i, s in enumerate(summaries):
        if s.n == 0:
            raw.append(_nan_raw())
            continue
        raw.append((diffs[i], float(se[i]), float(t[i]), float(df), _clip_p(float(p[i]))))
    return raw, notes


def _welch_contrasts(labels, summaries):
    """Welch-type contrast of each segment with the rest.

    The contrast's variance has terms c_l^2 s_l^2 / n_l with c_i = 1 and
    c_j = -n_j / N_rest; with u_j = n_j s_j^2 (so that (n_j/N_r)^2 s_j^2/n_j =
    u_j / N_r^2) the sums over j != i are the totals less segment i's own term,
    which keeps the whole computation O(k). Satterthwaite's df uses the same
    terms.
    """
    sizes = [s.n for s in summaries]
    notes, too_few = _common_degenerate(labels, sizes)
    if too_few:
        return [_nan_raw() for _ in summaries], notes
    n_rest, mean_rest = _rest_totals(summaries)
    single = [labels[j] for j, s in enumerate(summaries) if s.n == 1]
    present = [s for s in summaries if s.n > 0]
    u = np.array([s.n * s.var if s.n > 1 else 0.0 for s in summaries])
    w = np.array([(s.n * s.var) ** 2 / (s.n - 1) if s.n > 1 else 0.0 for s in summaries])
    u_total, w_total = math.fsum(u), math.fsum(w)
    raw = []
    for i, s in enumerate(summaries):
        if s.n == 0:
            raw.append(_nan_raw())
            continue
        diff = s.mean - float(mean_rest[i])
        if single:
            one = len(single) == 1
            who = _name_list(single)
            notes[i] = notes[i] or (
                f"{who[0].upper()}{who[1:]} "
                f"{'has' if one else 'have'} a single record, so the "
                f"{'variance' if one else 'variances'} Welch's contrast needs "
                f"{'is' if one else 'are'} undefined."
            )
            raw.append(_nan_raw(diff))
            continue
        nr = float(n_rest[i])
        own = s.var / s.n
        rest_var = max(u_total - u[i], 0.0) / (nr * nr)
        var = own + rest_var
        if not var > 0.0 or all(g.flat for g in present):
            notes[i] = notes[i] or "No segment varies within itself (zero variance), so the contrast is undefined."
            raw.append(_nan_raw(diff))
            continue
        denom = own * own / (s.n - 1) + max(w_total - w[i], 0.0) / nr ** 4
        df = var * var / denom
        se = math.sqrt(var)
        t = diff / se
        p = _clip_p(2.0 * float(stats.t.sf(abs(t), df)))
        raw.append((diff, se, t, df, p))
    return raw, notes


def _kruskal_contrasts(labels, samples):
    ranks = pooled_ranks(samples)
    sizes = list(ranks.n)
    notes, too_few = _common_degenerate(labels, sizes)
    if too_few:
        return [_nan_raw() for _ in sizes], notes
    big_n = ranks.total
    rank_sum = big_n * (big_n + 1) / 2.0
    variance = ranks.rank_variance
    raw = []
    for i, n_i in enumerate(sizes):
        if n_i == 0:
            raw.append(_nan_raw())
            continue
        n_rest = big_n - n_i
        mean_rest = (rank_sum - n_i * ranks.mean_rank[i]) / n_rest
        diff = ranks.mean_rank[i] - mean_rest
        if not variance > 0.0:
            notes[i] = "Every value is tied, so the ranks carry no information."
            raw.append(_nan_raw(diff))
            continue
        se = math.sqrt(variance * (1.0 / n_i + 1.0 / n_rest))
        z = diff / se
        p = _clip_p(2.0 * float(special.ndtr(-abs(z))))
        raw.append((diff, se, z, math.inf, p))
    return raw, notes


@dataclass(frozen=True)
class PairVerdict:
    """How one segment fares in the post-hoc pairs of its metric.

    Attributes
    ----------
    segment : str
    above, below : int
        Number of other segments it is significantly above / below.
    others : int
        Number of other segments it was compared with.
    direction : {'high', 'low'} or None
        ``'high'`` when it is significantly above more than half of the others
        and below none; ``'low'`` for the mirror case; otherwise None.
    """

    segment: str
    above: int
    below: int
    others: int
    direction: str | None


def majority_of_pairs(
    labels: Sequence[str], pairs: Sequence[tuple[str, str, float, float]], alpha: float = 0.05
) -> tuple[PairVerdict, ...]:
    """Which segments stand apart, read off an already-adjusted family of pairs.

    Parameters
    ----------
    labels : sequence of str
        The compared segments.
    pairs : sequence of (a, b, diff, p_adj)
        Post-hoc pairs with ``diff = a - b`` and ``p_adj`` adjusted over the
        whole family (Tukey-Kramer, Games-Howell or Dunn with its adjustment).
    alpha : float
        Level at which a pair counts as significant.

    Returns
    -------
    tuple of PairVerdict, in ``labels`` order.

    Notes
    -----
    A segment is flagged ``'high'`` when it is significantly above more than
    half of the other ``k - 1`` segments (``floor((k - 1) / 2) + 1`` of them) and
    significantly below none (``'low'`` mirrored). A strict majority: when ``h``
    segments move up and the others stay, an unmoved segment is below ``h`` of
    its ``k - 1`` others, so it can be flagged ``low`` only if more than half of
    the segments moved (with "at least half", three segments of which one moved
    gave two invented ``low`` flags). Every flag therefore rests on pairwise
    decisions of a family whose familywise error rate the post-hoc method
    already controls at ``alpha`` [1]_ [2]_, so under the complete null the
    chance of flagging any segment is at most ``alpha``; and since it asks for a
    majority, one segment far from all others does not make the others look
    "low" merely because it pulls the pooled mean of the rest (the weakness of
    a segment-versus-rest contrast, :func:`segment_vs_rest`, which is kept as
    the descriptive difference). Pairs with NaN p-values count as not
    significant. The rule is our own decision rule on top of standard
    procedures; it is not a separate test.

    References
    ----------
    .. [1] Tukey, J. W. (1953). The problem of multiple comparisons.
       Unpublished manuscript, Princeton University.
    .. [2] Hochberg, Y. and Tamhane, A. C. (1987). Multiple Comparison
       Procedures. New York: Wiley, ch. 1 (familywise error and directional
       decisions).
    """
    labels = list(labels)
    above = dict.fromkeys(labels, 0)
    below = dict.fromkeys(labels, 0)
    for a, b, diff, p in pairs:
        if not (math.isfinite(p) and p <= alpha and math.isfinite(diff)) or diff == 0:
            continue
        hi, lo = (a, b) if diff > 0 else (b, a)
        if hi in above:
            above[hi] += 1
        if lo in below:
            below[lo] += 1
    k = len(labels)
    need = max(1, (k - 1) // 2 + 1)
    out = []
    for s in labels:
        direction = None
        if k >= 2 and above[s] >= need and below[s] == 0:
            direction = "high"
        elif k >= 2 and below[s] >= need and above[s] == 0:
            direction = "low"
        out.append(PairVerdict(s, above[s], below[s], k - 1, direction))
    return tuple(out)
