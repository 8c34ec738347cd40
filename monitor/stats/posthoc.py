"""Post-hoc comparisons between segments, after an omnibus test has spoken.

Each omnibus test has its own follow-up family:

* Fisher's one-way ANOVA -> :func:`tukey_kramer` (all pairs, pooled variance);
* Welch's ANOVA -> :func:`games_howell` (all pairs, each pair's own variances);
* Kruskal-Wallis -> :func:`dunn` (all pairs of mean ranks, p-values adjusted);
* a reference segment -> :func:`many_to_one` (Dunnett after ANOVA, or the
  reference rows of Games-Howell / Dunn).

The parametric tests need only per-segment summaries
(:class:`~monitor.stats.summary.Moments`), so raw values never have to leave the
database; Dunn's test needs the raw values because it ranks them.

Degenerate data policy (the same in every function): a quantity that cannot be
computed (fewer than two segments, a segment without records, no variance, every
value tied) is NaN and the result's ``note`` says why, in one sentence. Nothing
here raises on data; :class:`ValueError` is raised only for wrong arguments
(mismatched lengths, an unknown method name, a confidence outside (0, 1)).

Example
-------
>>> from monitor.stats.summary import Moments
>>> groups = [Moments.from_values(v) for v in ([4.2, 5.1, 4.8], [6.0, 6.4, 5.9, 6.2])]
>>> result = tukey_kramer(["Harbor", "Ridge"], groups)
>>> result.pairs[0].a, result.pairs[0].b, round(result.pairs[0].diff, 3)
('Harbor', 'Ridge', -1.425)
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from scipy import integrate, optimize, special, stats

from monitor.stats import multiplicity
from monitor.stats.studentized import srange_ppf, srange_sf

if TYPE_CHECKING:  # pragma: no cover - typing only
    import pandas as pd
    from monitor.stats.summary import Moments

__all__ = [
    "ADJUST_METHODS",
    "Pair",
    "PostHocResult",
    "RankSummary",
    "adjust_family",
    "dunn",
    "games_howell",
    "many_to_one",
    "pooled_ranks",
    "tukey_kramer",
]

logger = logging.getLogger(__name__)

_NAN = float("nan")

#: Multiplicity adjustments accepted by :func:`dunn`, :func:`many_to_one` and
#: :func:`monitor.stats.flags.segment_vs_rest` (see :func:`adjust_family`).
ADJUST_METHODS: tuple[str, ...] = ("holm", "bonferroni", "bh", "by", "none")

_MANY_TO_ONE_METHODS = ("dunnett", "games-howell", "dunn")


# ---------------------------------------------------------------------------
# result types
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Pair:
    """One comparison of segment ``a`` with segment ``b``.

    Attributes
    ----------
    a, b : str
        Segment labels; ``diff`` is ``a`` minus ``b``.
    diff : float
        Difference of means (Tukey-Kramer, Games-Howell, Dunnett) or of mean
        ranks (Dunn).
    se : float
        Standard error of ``diff``.
    statistic : float
        ``diff / se``: a t-like statistic (Tukey-Kramer, Games-Howell, Dunnett)
        or a z statistic (Dunn). Multiply by ``sqrt(2)`` for the studentized
        range statistic q of Tukey-Kramer and Games-Howell.
    df : float
        Degrees of freedom of the reference distribution; ``inf`` for Dunn's
        normal approximation.
    p_adj : float
        p-value adjusted for the family of comparisons.
    ci_low, ci_high : float
        Confidence interval for ``diff`` at the result's ``confidence``
        (simultaneous for the family); NaN where undefined.
    """

    a: str
    b: str
    diff: float
    se: float
    statistic: float
    df: float
    p_adj: float
    ci_low: float
    ci_high: float


@dataclass(frozen=True)
class PostHocResult:
    """A family of pairwise comparisons.

    Attributes
    ----------
    method : str
        ``'tukey-kramer'``, ``'games-howell'``, ``'dunn'`` or ``'dunnett'``.
    pairs : tuple of Pair
        For all-pairs families: for ``i < j`` in the given label order,
        ``a = labels[i]``, ``b = labels[j]``. For many-to-one families: one
        pair per other segment, ``b`` = the reference.
    confidence : float
        Confidence level of the intervals.
    note : str or None
        Why some or all numbers are NaN; None when everything was computed.
    reference : str or None
        The reference segment of a many-to-one family, else None.
    """

    method: str
    pairs: tuple[Pair, ...]
    confidence: float
    note: str | None = None
    reference: str | None = None

    def matrix(self) -> pd.DataFrame:
        """Adjusted p-values as a symmetric segment-by-segment table.

        Returns
        -------
        pandas.DataFrame
            Rows and columns are the segments in the order they first appear in
            :attr:`pairs`; cells without a comparison (the diagonal, and pairs
            outside a many-to-one family) are NaN.
        """
        names: list[str] = []
        for pair in self.pairs:
            for name in (pair.a, pair.b):
                if name not in names:
                    names.append(name)
        import pandas as pd  # only here: a run does not need pandas (memory and start-up)

        table = pd.DataFrame(np.nan, index=names, columns=names, dtype=float)
        for pair in self.pairs:
            table.loc[pair.a, pair.b] = pair.p_adj
            table.loc[pair.b, pair.a] = pair.p_adj
        return table

    def __str__(self) -> str:
        title = {
            "tukey-kramer": "Tukey-Kramer",
            "games-howell": "Games-Howell",
            "dunn": "Dunn (mean ranks)",
            "dunnett": "Dunnett",
        }.get(self.method, self.method)
        level = f"{100 * self.confidence:g}%"
        family = f", reference {self.reference}" if self.reference is not None else ""
        kind = "intervals" if self.method == "dunn" else "simultaneous intervals"
        lines = [f"{title} comparisons{family}; {level} {kind}"]
        if self.pairs:
            width = max(len(f"{p.a} - {p.b}") for p in self.pairs)
            width = max(width, len("pair"))
            lines.append(
                f"{'pair':<{width}}  {'diff':>10}  {'se':>10}  {'p_adj':>8}  interval"
            )
            for p in self.pairs:
                name = f"{p.a} - {p.b}"
                lines.append(
                    f"{name:<{width}}  {_fmt(p.diff):>10}  {_fmt(p.se):>10}  "
                    f"{_fmt_p(p.p_adj):>8}  [{_fmt(p.ci_low)}, {_fmt(p.ci_high)}]"
                )
        else:
            lines.append("no pairs")
        if self.note:
            lines.append(f"note: {self.note}")
        return "\n".join(lines)


@dataclass(frozen=True)
class RankSummary:
    """Pooled mid-ranks of all records, summarised per segment.

    Attributes
    ----------
    n : tuple of int
        Records per segment.
    mean_rank : tuple of float
        Mean mid-rank of each segment in the pooled ranking (NaN if empty).
    total : int
        Number of records over all segments (N).
    tie_term : int
        ``sum(t**3 - t)`` over groups of tied values.
    """

    n: tuple[int, ...]
    mean_rank: tuple[float, ...]
    total: int
    tie_term: int

    @property
    def rank_variance(self) -> float:
        """Tie-corrected variance of one rank, ``N(N+1)/12 - T/(12(N-1))``.

        Computed as ``(N**3 - N - T) / (12 (N - 1))`` from exact integers, so all
        ties give exactly 0. NaN if ``N < 2``.
        """
        big_n = self.total
        if big_n < 2:
            return _NAN
        return (big_n**3 - big_n - self.tie_term) / (12.0 * (big_n - 1))


# ---------------------------------------------------------------------------
# shared helpers (also used by monitor.stats.flags and monitor.stats.diagnostics)
# ---------------------------------------------------------------------------
def pooled_ranks(samples: Sequence[np.ndarray]) -> RankSummary:
    """Rank all records together (mid-ranks for ties) and summarise per segment.

    Parameters
    ----------
    samples : sequence of 1-D arrays
        One array of finite values per segment (validated by the caller).

    Returns
    -------
    RankSummary

    Notes
    -----
    Mid-ranks and the tie term ``sum(t^3 - t)`` are those of Kruskal and Wallis
    [1]_; the tie term is kept as an exact integer.

    References
    ----------
    .. [1] Kruskal, W. H. and Wallis, W. A. (1952). Use of ranks in one-criterion
       variance analysis. JASA 47(260), 583-621.
    """
    arrays = [np.asarray(s, dtype=float).ravel() for s in samples]
    sizes = tuple(int(a.size) for a in arrays)
    total = sum(sizes)
    if total == 0:
        return RankSummary(sizes, tuple(_NAN for _ in sizes), 0, 0)
    pooled = np.concatenate(arrays)
    ranks = stats.rankdata(pooled)
    _, counts = np.unique(pooled, return_counts=True)
    tie_term = sum(int(t) ** 3 - int(t) for t in counts if t > 1)
    means = []
    start = 0
    for size in sizes:
        means.append(float(np.mean(ranks[start : start + size])) if size else _NAN)
        start += size
    return RankSummary(sizes, tuple(means), total, tie_term)


def adjust_family(p_values: Sequence[float], method: str) -> np.ndarray:
    """Adjust a family of p-values for multiplicity, leaving NaN entries out.

    Parameters
    ----------
    p_values : sequence of float
        Unadjusted p-values; NaN marks a comparison that could not be made and
        does not count towards the family size.
    method : {'holm', 'bonferroni', 'bh', 'by', 'none'}
        Holm [1]_, Bonferroni, Benjamini-Hochberg [2]_, Benjamini-Yekutieli [3]_,
        or no adjustment.

    Returns
    -------
    numpy.ndarray
        Adjusted p-values (NaN where the input was NaN).

    Notes
    -----
    Delegates to :func:`monitor.stats.multiplicity.adjust`, the project's one
    implementation (tested against ``statsmodels.stats.multitest.multipletests``).
    Holm and Bonferroni control the family-wise error rate under any
    dependence; BH controls the false discovery rate under independence or
    positive dependence, BY under any dependence.

    References
    ----------
    .. [1] Holm, S. (1979). A simple sequentially rejective multiple test
       procedure. Scandinavian Journal of Statistics 6(2), 65-70.
    .. [2] Benjamini, Y. and Hochberg, Y. (1995). Controlling the false discovery
       rate. JRSS B 57(1), 289-300.
    .. [3] Benjamini, Y. and Yekutieli, D. (2001). The control of the false
       discovery rate in multiple testing under dependency. Annals of
       Statistics 29(4), 1165-1188.
    """
    _check_adjust(method)
    p = np.clip(np.asarray(p_values, dtype=float), 0.0, 1.0)  # NaN stays NaN
    return multiplicity.adjust(p, method)


# ---------------------------------------------------------------------------
# input validation (the edge; the routines below trust their inputs)
# ---------------------------------------------------------------------------
def _check_labels(labels: Sequence[str], items: Sequence, what: str) -> tuple[str, ...]:
    labels = tuple(labels)
    if len(labels) != len(items):
        raise ValueError(
            f"labels and {what} must have the same length; "
            f"got {len(labels)} labels and {len(items)} {what}"
        )
    for position, label in enumerate(labels):
        if not isinstance(label, str):
            raise ValueError(
                f"labels must be strings; got {label!r} ({type(label).__name__}) "
                f"at position {position}"
            )
    seen: set[str] = set()
    for label in labels:
        if label in seen:
            raise ValueError(f"labels must be unique; {label!r} appears more than once")
        seen.add(label)
    return labels


def _check_confidence(confidence: float) -> float:
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) or not (
        0.0 < float(confidence) < 1.0
    ):
        raise ValueError(
            f"confidence must be a number strictly between 0 and 1; got {confidence!r}"
        )
    return float(confidence)


def _check_adjust(adjust: str) -> None:
    if adjust not in ADJUST_METHODS:
        allowed = ", ".join(repr(m) for m in ADJUST_METHODS)
        raise ValueError(f"adjust must be one of {allowed}; got {adjust!r}")


def _check_groups(groups: Sequence) -> list[Moments]:
    groups = list(groups)
    for position, g in enumerate(groups):
        if not all(hasattr(g, name) for name in ("n", "mean", "m2", "min", "max")):
            raise ValueError(
                "groups must be Moments summaries (monitor.stats.summary.Moments); "
                f"got {type(g).__name__} at position {position}"
            )
    return groups


def _check_samples(labels: Sequence[str], samples: Sequence) -> list[np.ndarray]:
    arrays = []
    for label, sample in zip(labels, samples):
        if hasattr(sample, "m2") and hasattr(sample, "n"):
            raise ValueError(
                "this test ranks the raw values, so samples must be arrays of "
                f"values, not summaries; segment {label!r} was given a summary"
            )
        try:
            arr = np.asarray(sample, dtype=float).ravel()
        except (TypeError, ValueError):
            raise ValueError(
                f"samples must hold numbers; segment {label!r} holds something else"
            ) from None
        # a finite sum proves every value finite (NaN and inf propagate); only a sum that is
        # not finite (a bad value, or an overflow of huge finite ones) needs the count
        with np.errstate(over="ignore", invalid="ignore"):
            total = arr.sum()
        bad = 0 if math.isfinite(total) else int(np.count_nonzero(~np.isfinite(arr)))
        if bad:
            raise ValueError(
                f"samples must hold finite numbers only; segment {label!r} has "
                f"{bad} non-finite value{'s' if bad != 1 else ''} (remove them first)"
            )
        arrays.append(arr)
    return arrays


def _as_float_groups(groups: Sequence[Moments]) -> list[_Summary]:
    out = []
    for g in groups:
        n = int(g.n)
        if n == 0:
            out.append(_Summary(0, _NAN, _NAN, True))
            continue
        mean = float(g.mean)
        m2 = float(g.m2)
        # Zero spread is read from min == max (exact), not from a tiny rounded m2.
        flat = bool(float(g.min) == float(g.max)) or m2 == 0.0
        out.append(_Summary(n, mean, 0.0 if flat else m2, flat))
    return out


@dataclass(frozen=True)
class _Summary:
    n: int
    mean: float
    m2: float
    flat: bool  # True when every value is the same (or n <= 1)

    @property
    def var(self) -> float:
        if self.n < 2:
            return _NAN
        return self.m2 / (self.n - 1)


# ---------------------------------------------------------------------------
# Tukey-Kramer
# ---------------------------------------------------------------------------
def tukey_kramer(
    labels: Sequence[str], groups: Sequence[Moments], confidence: float = 0.95
) -> PostHocResult:
    """All pairwise differences of means with the Tukey-Kramer procedure.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique.
    groups : sequence of Moments
        One summary per segment, in the order of ``labels``.
    confidence : float, optional
        Level of the simultaneous confidence intervals (default 0.95).

    Returns
    -------
    PostHocResult
        ``method='tukey-kramer'``; ``df`` is ``N - k``.

    Notes
    -----
    Tukey's honestly significant difference [1]_ with Kramer's extension to
    unequal sizes [2]_. With the pooled within-segment mean square
    ``MSE = sum_i m2_i / (N - k)`` each pair has

    ``se = sqrt(MSE / 2 * (1/n_i + 1/n_j))``, ``q = |diff| / se``,
    ``p = P(Q_{k, N-k} > q)``, interval ``diff -/+ q_{conf; k, N-k} * se``,

    with Q the studentized range distribution (:mod:`monitor.stats.studentized`).
    ``Pair.statistic`` is the t-like ``diff / sqrt(MSE (1/n_i + 1/n_j))``
    (``q / sqrt(2)``). Assumptions: independent records, normal errors and
    equal variances in every segment. The procedure is exact for equal sizes and
    conservative for unequal ones (Hayter 1984 [3]_). When variances differ use
    :func:`games_howell`; when the data are far from normal, :func:`dunn`.

    Segments without records are left out of the family (their pairs are NaN).
    No variance within any segment, or ``N - k < 1``, gives NaN everywhere but
    ``diff``, with a note.

    References
    ----------
    .. [1] Tukey, J. W. (1953). The problem of multiple comparisons. Unpublished
       manuscript, Princeton University.
    .. [2] Kramer, C. Y. (1956). Extension of multiple range tests to group means
       with unequal numbers of replications. Biometrics 12(3), 307-310.
    .. [3] Hayter, A. J. (1984). A proof of the conjecture that the Tukey-Kramer
       multiple comparisons procedure is conservative. Annals of Statistics
       12(1), 61-75.
    """
    labels = _check_labels(labels, groups, "groups")
    groups = _check_groups(groups)
    confidence = _check_confidence(confidence)
    summaries = _as_float_groups(groups)
    return _tukey_core(labels, summaries, confidence)


def _tukey_core(
    labels: tuple[str, ...], summaries: list[_Summary], confidence: float
) -> PostHocResult:
    present = [i for i, s in enumerate(summaries) if s.n > 0]
    k = len(present)
    big_n = sum(summaries[i].n for i in present)
    df = big_n - k
    notes = _empty_segment_notes(labels, summaries)
    mse = _NAN
    usable = True
    if k < 2:
        notes.append("fewer than two segments have records, so there is nothing to compare")
        usable = False
    elif df < 1:
        notes.append(
            "every segment has a single record, so the within-segment variance is undefined"
        )
        usable = False
    elif all(summaries[i].flat for i in present):
        notes.append(
            "no segment varies within itself (zero variance), so the comparisons are undefined"
        )
        usable = False
    else:
        mse = sum(summaries[i].m2 for i in present) / df
    q_crit = (
        float(srange_ppf(confidence, k, df)) if usable else _NAN
    )
    # all pairs at once (numpy does the same IEEE operations, element by element, as
    # scalar arithmetic would), then all their p-values in one vectorised call
    m = len(labels)
    first, second = np.triu_indices(m, 1)  # the order of _upper_pairs: i < j, row by row
    sizes = np.array([s.n for s in summaries], dtype=float)
    means = np.array([s.mean for s in summaries], dtype=float)
    both = (sizes[first] > 0) & (sizes[second] > 0)
    with np.errstate(all="ignore"):  # empty segments give inf/NaN here; those pairs are not read
        diff = means[first] - means[second]
        if usable:
            se_t = np.sqrt(mse * (1.0 / sizes[first] + 1.0 / sizes[second]))
            q = np.abs(diff) / (se_t / math.sqrt(2.0))
            half = q_crit * se_t / math.sqrt(2.0)
            stat = diff / se_t
            low, high = diff - half, diff + half
    names = [(labels[i], labels[j]) for i, j in zip(first.tolist(), second.tolist())]
    if not usable:
        pairs = [
            _nan_pair(a, b, diff=d, df=float(df) if df >= 1 else _NAN) if ok else _nan_pair(a, b)
            for (a, b), ok, d in zip(names, both.tolist(), diff.tolist())
        ]
        return PostHocResult("tukey-kramer", tuple(pairs), confidence, _join(notes))
    p_values = _clipped(srange_sf(q[both], k, df)) if both.any() else []
    df_f = float(df)
    if both.all():
        pairs = [
            Pair(a, b, d, se, t, df_f, p, lo, hi)
            for (a, b), d, se, t, p, lo, hi in zip(
                names, diff.tolist(), se_t.tolist(), stat.tolist(), p_values, low.tolist(), high.tolist()
            )
        ]
    else:
        p_iter = iter(p_values)
        pairs = [
            Pair(a, b, d, se, t, df_f, next(p_iter), lo, hi) if ok else _nan_pair(a, b)
            for (a, b), ok, d, se, t, lo, hi in zip(
                names, both.tolist(), diff.tolist(), se_t.tolist(), stat.tolist(), low.tolist(), high.tolist()
            )
        ]
    return PostHocResult("tukey-kramer", tuple(pairs), confidence, _join(notes))


# ---------------------------------------------------------------------------
# Games-Howell
# ---------------------------------------------------------------------------
def games_howell(
    labels: Sequence[str], groups: Sequence[Moments], confidence: float = 0.95
) -> PostHocResult:
    """All pairwise differences of means with the Games-Howell procedure.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique.
    groups : sequence of Moments
        One summary per segment, in the order of ``labels``.
    confidence : float, optional
        Level of the simultaneous confidence intervals (default 0.95).

    Returns
    -------
    PostHocResult
        ``method='games-howell'``; each pair has its own Welch-Satterthwaite df.

    Notes
    -----
    Games and Howell [1]_: each pair uses its own variances,
    ``se = sqrt(s_i^2/n_i + s_j^2/n_j)``, the Welch-Satterthwaite degrees of
    freedom [2]_, [3]_

    ``df = (v_i + v_j)^2 / (v_i^2/(n_i-1) + v_j^2/(n_j-1))``, ``v = s^2/n``,

    and the studentized range distribution for ``k`` means:
    ``p = P(Q_{k, df} > sqrt(2) |diff| / se)``, interval
    ``diff -/+ q_{conf; k, df} se / sqrt(2)``. ``Pair.statistic`` is the Welch t
    ``diff / se``. Assumptions: independent records, roughly normal segment
    means; variances may differ. Liberal when some segment has fewer than about
    6 records. ``k`` counts the segments that have records.

    A pair with a segment of fewer than two records, or with no variance in
    either segment, is NaN (except ``diff``), with a note.

    References
    ----------
    .. [1] Games, P. A. and Howell, J. F. (1976). Pairwise multiple comparison
       procedures with unequal n's and/or variances: a Monte Carlo study.
       Journal of Educational Statistics 1(2), 113-125.
    .. [2] Welch, B. L. (1947). The generalization of "Student's" problem when
       several different population variances are involved. Biometrika 34,
       28-35.
    .. [3] Satterthwaite, F. E. (1946). An approximate distribution of estimates
       of variance components. Biometrics Bulletin 2(6), 110-114.
    """
    labels = _check_labels(labels, groups, "groups")
    groups = _check_groups(groups)
    confidence = _check_confidence(confidence)
    summaries = _as_float_groups(groups)
    pairs, notes = _games_howell_pairs(labels, summaries, confidence, _upper_pairs(len(labels)))
    return PostHocResult("games-howell", tuple(pairs), confidence, _join(notes))


def _games_howell_pairs(
    labels: tuple[str, ...],
    summaries: list[_Summary],
    confidence: float,
    index_pairs: list[tuple[int, int]],
) -> tuple[list[Pair], list[str]]:
    k = sum(1 for s in summaries if s.n > 0)
    notes = _empty_segment_notes(labels, summaries)
    if k < 2:
        notes.append("fewer than two segments have records, so there is nothing to compare")
    small = [labels[i] for i, s in enumerate(summaries) if s.n == 1]
    if small:
        one = len(small) == 1
        notes.append(
            f"{_name_list(small)} {'has' if one else 'have'} a single record, so "
            f"{'its variance is' if one else 'their variances are'} undefined and "
            f"{'its' if one else 'their'} pairs are NaN"
        )
    flat_pair_seen = False
    # first the pairs' statistics, then all p-values and all critical values in
    # one vectorised call each (every pair has its own df)
    rows: list[tuple[float, float, float, float] | None] = []
    for i, j in index_pairs:
        si, sj = summaries[i], summaries[j]
        if si.n == 0 or sj.n == 0 or si.n < 2 or sj.n < 2 or k < 2:
            rows.append(None)
            continue
        if si.flat and sj.flat:
            flat_pair_seen = True
            rows.append(None)
            continue
        vi, vj = si.var / si.n, sj.var / sj.n
        se = math.sqrt(vi + vj)
        df = (vi + vj) ** 2 / (vi**2 / (si.n - 1) + vj**2 / (sj.n - 1))
        diff = si.mean - sj.mean
        rows.append((diff, se, df, diff / se))
    computed = [r for r in rows if r is not None]
    if computed:
        t_abs = np.array([abs(r[3]) for r in computed])
        dfs = np.array([r[2] for r in computed])
        p_iter = iter(_clipped(srange_sf(math.sqrt(2.0) * t_abs, k, dfs)))
        q_iter = iter(np.atleast_1d(srange_ppf(confidence, k, dfs)).tolist())
    pairs = []
    for (i, j), row in zip(index_pairs, rows):
        si, sj = summaries[i], summaries[j]
        if si.n == 0 or sj.n == 0:
            pairs.append(_nan_pair(labels[i], labels[j]))
            continue
        if row is None:
            pairs.append(_nan_pair(labels[i], labels[j], diff=si.mean - sj.mean))
            continue
        diff, se, df, t = row
        p = next(p_iter)
        half = next(q_iter) * se / math.sqrt(2.0)
        pairs.append(Pair(labels[i], labels[j], diff, se, t, df, p, diff - half, diff + half))
    if flat_pair_seen:
        notes.append(
            "some pairs join two segments without any variance, so those comparisons are undefined"
        )
    return pairs, notes


# ---------------------------------------------------------------------------
# Dunn
# ---------------------------------------------------------------------------
def dunn(
    labels: Sequence[str],
    samples: Sequence[np.ndarray],
    adjust: str = "holm",
    confidence: float = 0.95,
) -> PostHocResult:
    """All pairwise differences of mean ranks with Dunn's test.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique.
    samples : sequence of 1-D arrays
        The raw finite values of each segment, in the order of ``labels``.
    adjust : {'holm', 'bonferroni', 'bh', 'by', 'none'}, optional
        Multiplicity adjustment over all pairs (default Holm); see
        :func:`adjust_family`.
    confidence : float, optional
        Level of the intervals for the mean-rank differences (default 0.95).

    Returns
    -------
    PostHocResult
        ``method='dunn'``; ``diff`` is a difference of mean ranks, ``statistic``
        is z and ``df`` is ``inf`` (normal approximation).

    Notes
    -----
    Dunn [1]_: all records are ranked together (mid-ranks for ties) and for each
    pair

    ``z = (R_i - R_j) / sqrt((N(N+1)/12 - sum(t^3 - t)/(12(N-1))) (1/n_i + 1/n_j))``,

    with ``R`` the mean ranks and ``t`` the sizes of the groups of tied values;
    the two-sided normal p-values are then adjusted over all pairs. The
    intervals are ``diff -/+ z* se`` with the Bonferroni critical value
    ``z* = Phi^-1(1 - (1 - confidence) / (2 m))`` over the ``m`` pairs (the
    unadjusted ``Phi^-1(1 - (1 - confidence)/2)`` when ``adjust='none'``); they
    are conservative companions to Holm or BH p-values, which have no interval
    of their own. Assumptions: independent records; the normal approximation
    wants about 5 or more records per segment. Dunn's test compares mean ranks
    in the joint ranking, so it is not a test of medians unless the segments'
    distributions differ only by a shift.

    All values tied, or fewer than two records in total, gives NaN with a note.

    References
    ----------
    .. [1] Dunn, O. J. (1964). Multiple comparisons using rank sums.
       Technometrics 6(3), 241-252.
    """
    labels = _check_labels(labels, samples, "samples")
    _check_adjust(adjust)
    confidence = _check_confidence(confidence)
    arrays = _check_samples(labels, samples)
    ranks = pooled_ranks(arrays)
    pairs, notes = _dunn_pairs(labels, ranks, adjust, confidence, _upper_pairs(len(labels)))
    return PostHocResult("dunn", tuple(pairs), confidence, _join(notes))


def _dunn_pairs(
    labels: tuple[str, ...],
    ranks: RankSummary,
    adjust: str,
    confidence: float,
    index_pairs: list[tuple[int, int]],
) -> tuple[list[Pair], list[str]]:
    sizes = ranks.n
    notes = [
        f"segment {labels[i]!r} has no records, so its pairs are NaN"
        for i, n in enumerate(sizes)
        if n == 0
    ]
    present = sum(1 for n in sizes if n > 0)
    variance = ranks.rank_variance
    usable = True
    if present < 2:
        notes.append("fewer than two segments have records, so there is nothing to compare")
        usable = False
    elif not variance > 0.0:
        notes.append("every value is tied, so the ranks carry no information and the comparisons are undefined")
        usable = False
    raw = []
    pairs = []
    for i, j in index_pairs:
        if sizes[i] == 0 or sizes[j] == 0:
            raw.append(None)
            continue
        diff = ranks.mean_rank[i] - ranks.mean_rank[j]
        if not usable:
            raw.append((diff, _NAN, _NAN, _NAN))
            continue
        se = math.sqrt(variance * (1.0 / sizes[i] + 1.0 / sizes[j]))
        z = diff / se
        p = _clip_p(2.0 * float(special.ndtr(-abs(z))))
        raw.append((diff, se, z, p))
    p_raw = [r[3] if r is not None else _NAN for r in raw]
    p_adj = adjust_family(p_raw, adjust)
    m = int(np.count_nonzero(np.isfinite(p_raw)))
    if m:
        tail = (1.0 - confidence) / 2.0
        if adjust != "none":
            tail /= m
        z_crit = float(-special.ndtri(tail))
    else:
        z_crit = _NAN
    for (i, j), r, pa in zip(index_pairs, raw, p_adj):
        if r is None:
            pairs.append(_nan_pair(labels[i], labels[j]))
            continue
        diff, se, z, _ = r
        half = z_crit * se
        pairs.append(
            Pair(labels[i], labels[j], diff, se, z, math.inf if usable else _NAN, float(pa),
                 diff - half, diff + half)
        )
    return pairs, notes


# ---------------------------------------------------------------------------
# many-to-one (reference segment)
# ---------------------------------------------------------------------------
def many_to_one(
    labels: Sequence[str],
    groups_or_samples: Sequence,
    reference: str,
    method: str,
    confidence: float = 0.95,
    adjust: str = "holm",
) -> PostHocResult:
    """Compare every other segment with one reference segment.

    Parameters
    ----------
    labels : sequence of str
        Segment names, unique; ``reference`` must be one of them.
    groups_or_samples : sequence of Moments or of 1-D arrays
        Summaries or raw values per segment. ``'dunn'`` needs raw values;
        ``'dunnett'`` and ``'games-howell'`` take either (raw values are
        summarised with ``Moments.from_values``).
    reference : str
        The reference segment (``b`` in every pair).
    method : {'dunnett', 'games-howell', 'dunn'}
        Dunnett after Fisher's ANOVA, Games-Howell after Welch's ANOVA, Dunn
        after Kruskal-Wallis.
    confidence : float, optional
        Level of the simultaneous intervals (default 0.95).
    adjust : {'holm', 'bonferroni', 'bh', 'by', 'none'}, optional
        Only for ``'dunn'``: adjustment over the ``k - 1`` comparisons.

    Returns
    -------
    PostHocResult
        One pair per other segment in label order, ``a`` = that segment,
        ``b`` = ``reference``; ``reference`` is set.

    Notes
    -----
    ``'dunnett'`` is Dunnett's two-sided many-to-one procedure [1]_: with the
    pooled ``MSE`` on ``N - k`` df, ``t_i = (mean_i - mean_0) /
    sqrt(MSE (1/n_i + 1/n_0))`` and ``p_i = 1 - P(max_j |T_j| <= |t_i|)``,
    where ``T`` is multivariate t with correlations
    ``rho_ij = lambda_i lambda_j``, ``lambda_i = sqrt(n_i / (n_i + n_0))``. The
    one-factor form of these correlations turns the probability into a
    two-dimensional integral ([1]_ section 2; Hochberg and Tamhane [2]_, ch. 3),

    ``P = int ds f(s) int dz phi(z) prod_j [Phi((lambda_j z + c s)/sqrt(1-lambda_j^2))
    - Phi((lambda_j z - c s)/sqrt(1-lambda_j^2))]``,

    evaluated here deterministically (Gauss-Legendre over ``log s``, adaptive
    quadrature over ``z``), so a rerun gives the same digits (scipy's
    ``scipy.stats.dunnett`` uses randomised quasi-Monte Carlo instead). The
    simultaneous intervals use the critical value ``c`` with ``P = confidence``.
    Assumptions as for Fisher's ANOVA: normal errors, equal variances.

    ``'games-howell'`` takes the Games-Howell pairs with the reference
    (studentized range over all ``k`` segments); this controls the error rate
    of all pairs, so it is conservative for the smaller many-to-one family.
    ``'dunn'`` takes Dunn's z for the pairs with the reference and adjusts over
    those ``k - 1`` comparisons only.

    References
    ----------
    .. [1] Dunnett, C. W. (1955). A multiple comparison procedure for comparing
       several treatments with a control. JASA 50(272), 1096-1121.
    .. [2] Hochberg, Y. and Tamhane, A. C. (1987). Multiple Comparison
       Procedures. New York: Wiley.
    """
    if method not in _MANY_TO_ONE_METHODS:
        allowed = ", ".join(repr(m) for m in _MANY_TO_ONE_METHODS)
        raise ValueError(f"method must be one of {allowed}; got {method!r}")
    labels = _check_labels(labels, groups_or_samples, "groups_or_samples")
    confidence = _check_confidence(confidence)
    _check_adjust(adjust)
    if reference not in labels:
        known = ", ".join(repr(x) for x in labels) or "none"
        raise ValueError(f"reference {reference!r} is not one of the labels ({known})")
    ref = labels.index(reference)
    index_pairs = [(i, ref) for i in range(len(labels)) if i != ref]

    if method == "dunn":
        arrays = _check_samples(labels, groups_or_samples)
        pairs, notes = _dunn_pairs(labels, pooled_ranks(arrays), adjust, confidence, index_pairs)
        return PostHocResult("dunn", tuple(pairs), confidence, _join(notes), reference)

    groups = _summaries_from_either(labels, groups_or_samples)
    summaries = _as_float_groups(groups)
    if method == "games-howell":
        pairs, notes = _games_howell_pairs(labels, summaries, confidence, index_pairs)
        return PostHocResult("games-howell", tuple(pairs), confidence, _join(notes), reference)
    pairs, notes = _dunnett_pairs(labels, summaries, confidence, ref, index_pairs)
    return PostHocResult("dunnett", tuple(pairs), confidence, _join(notes), reference)


def _summaries_from_either(labels: tuple[str, ...], items: Sequence) -> list[Moments]:
    if all(hasattr(x, "m2") and hasattr(x, "n") for x in items):
        return _check_groups(items)
    from monitor.stats.summary import Moments

    arrays = _check_samples(labels, items)
    return [Moments.from_values(a) for a in arrays]


def _dunnett_pairs(
    labels: tuple[str, ...],
    summaries: list[_Summary],
    confidence: float,
    ref: int,
    index_pairs: list[tuple[int, int]],
) -> tuple[list[Pair], list[str]]:
    notes = _empty_segment_notes(labels, summaries)
    present = [i for i, s in enumerate(summaries) if s.n > 0]
    k = len(present)
    big_n = sum(summaries[i].n for i in present)
    df = big_n - k
    s0 = summaries[ref]
    usable = True
    if s0.n == 0:
        notes.append(f"the reference segment {labels[ref]!r} has no records, so nothing can be compared with it")
        usable = False
    elif k < 2:
        notes.append("fewer than two segments have records, so there is nothing to compare")
        usable = False
    elif df < 1:
        notes.append("every segment has a single record, so the within-segment variance is undefined")
        usable = False
    elif all(summaries[i].flat for i in present):
        notes.append("no segment varies within itself (zero variance), so the comparisons are undefined")
        usable = False
    compared = [i for i, _ in index_pairs if summaries[i].n > 0]
    if not usable or not compared:
        pairs = []
        for i, _ in index_pairs:
            if summaries[i].n and s0.n:
                pairs.append(_nan_pair(labels[i], labels[ref], diff=summaries[i].mean - s0.mean,
                                       df=float(df) if df >= 1 else _NAN))
            else:
                pairs.append(_nan_pair(labels[i], labels[ref]))
        return pairs, notes
    mse = sum(summaries[i].m2 for i in present) / df
    lam = np.array([math.sqrt(summaries[i].n / (summaries[i].n + s0.n)) for i in compared])
    rule = _DunnettRule(lam, float(df))
    stats_by_index = {}
    for i in compared:
        si = summaries[i]
        diff = si.mean - s0.mean
        se = math.sqrt(mse * (1.0 / si.n + 1.0 / s0.n))
        stats_by_index[i] = (diff, se, diff / se)
    t_abs = np.array([abs(stats_by_index[i][2]) for i in compared])
    p_values = 1.0 - rule.cdf(t_abs)
    c_crit = rule.quantile(confidence)
    p_by_index = dict(zip(compared, p_values))
    pairs = []
    for i, _ in index_pairs:
        if i not in stats_by_index:
            pairs.append(_nan_pair(labels[i], labels[ref]))
            continue
        diff, se, t = stats_by_index[i]
        half = c_crit * se
        pairs.append(
            Pair(labels[i], labels[ref], diff, se, t, float(df), _clip_p(float(p_by_index[i])),
                 diff - half, diff + half)
        )
    return pairs, notes


class _DunnettRule:
    """``P(max_j |T_j| <= c)`` for multivariate t with one-factor correlations.

    ``T_j = Z_j / S`` with ``Z_j = lambda_j Z_0 + sqrt(1 - lambda_j^2) E_j``
    (``Z_0, E_j`` independent standard normal) and ``S^2 ~ chi2_df / df``
    independent of them; see Dunnett (1955), section 2.
    """

    _NODES = 128  # Gauss-Legendre nodes over log S; ~1e-13 against exact k=2 values

    def __init__(self, lam: np.ndarray, df: float) -> None:
        self.lam = np.asarray(lam, dtype=float)
        self.df = df
        self.scale = np.sqrt(1.0 - self.lam**2)
        self.s, self.w = self._s_rule(df)

    @classmethod
    def _s_rule(cls, df: float) -> tuple[np.ndarray, np.ndarray]:
        # Nodes and weights for E[g(S)], S = sqrt(X/df), X ~ chi2(df), taken
        # over v = log S between the 1e-15 and 1 - 1e-15 quantiles.
        lo, hi = stats.chi2.ppf([1e-15, 1.0 - 1e-15], df)
        a, b = 0.5 * math.log(lo / df), 0.5 * math.log(hi / df)
        x, w = special.roots_legendre(cls._NODES)
        v = 0.5 * (b - a) * x + 0.5 * (b + a)
        xx = df * np.exp(2.0 * v)
        density = np.exp(stats.chi2.logpdf(xx, df)) * 2.0 * xx
        return np.exp(v), 0.5 * (b - a) * w * density

    def cdf(self, c: np.ndarray) -> np.ndarray:
        c = np.atleast_1d(np.asarray(c, dtype=float))
        lam, scale, s = self.lam, self.scale, self.s

        def integrand(z: float) -> np.ndarray:
            cs = c[:, None, None] * s[None, :, None]
            upper = (lam * z + cs) / scale
            lower = (lam * z - cs) / scale
            inside = np.prod(special.ndtr(upper) - special.ndtr(lower), axis=-1)
            return inside * math.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)

        value, _ = integrate.quad_vec(integrand, -np.inf, np.inf, epsabs=1e-12, epsrel=1e-11)
        return np.clip(value @ self.w, 0.0, 1.0)

    def quantile(self, level: float) -> float:
        """The critical value ``c`` with ``P(max_j |T_j| <= c) = level``."""

        def gap(c: float) -> float:
            return float(self.cdf(np.array([c]))[0]) - level

        # One comparison alone needs the two-sided t quantile; more comparisons
        # only push c up, and Bonferroni's c bounds it from above.
        m = self.lam.size
        low = float(stats.t.ppf(0.5 + level / 2.0, self.df)) - 1e-6
        high = float(stats.t.ppf(1.0 - (1.0 - level) / (2.0 * m), self.df)) + 0.5
        return float(optimize.brentq(gap, max(low, 0.0), high, xtol=1e-10, rtol=1e-12))


# ---------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------
def _upper_pairs(k: int) -> list[tuple[int, int]]:
    return [(i, j) for i in range(k) for j in range(i + 1, k)]


def _nan_pair(a: str, b: str, diff: float = _NAN, df: float = _NAN) -> Pair:
    return Pair(a, b, diff, _NAN, _NAN, df, _NAN, _NAN, _NAN)


def _empty_segment_notes(labels: Sequence[str], summaries: Sequence[_Summary]) -> list[str]:
    empty = [labels[i] for i, s in enumerate(summaries) if s.n == 0]
    if not empty:
        return []
    verb = "has" if len(empty) == 1 else "have"
    return [f"{_name_list(empty)} {verb} no records, so {'its' if len(empty) == 1 else 'their'} pairs are NaN"]


def _name_list(names: Sequence[str]) -> str:
    quoted = [repr(n) for n in names]
    word = "segment" if len(quoted) == 1 else "segments"
    if len(quoted) <= 2:
        return f"{word} {' and '.join(quoted)}"
    return f"{word} {', '.join(quoted[:-1])} and {quoted[-1]}"


def _join(notes: list[str]) -> str | None:
    if not notes:
        return None
    text = "; ".join(notes)
    return text[0].upper() + text[1:] + "."


def _clipped(p: np.ndarray) -> list[float]:
    """p-values as Python floats in [0, 1] (NaN stays NaN)."""
    return np.clip(np.atleast_1d(p), 0.0, 1.0).tolist()


def _clip_p(p: float) -> float:
    if math.isnan(p):
        return p
    return min(1.0, max(0.0, p))


def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    return f"{x:.4g}"


def _fmt_p(p: float) -> str:
    if p is None or math.isnan(p):
        return "n/a"
    return "<0.0001" if p < 1e-4 else f"{p:.4f}"
