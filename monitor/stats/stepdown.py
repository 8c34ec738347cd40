"""Segments against the rest, step by step: a flag no other segment's shift can invent.

:func:`monitor.stats.flags.segment_vs_rest` compares every segment with the pooled
records of all the others at once. When one segment is far above the others, it pulls
"the rest" up, and every other segment is then truly below its rest: with enough
records they are all flagged ``low``, although none of them moved. That is an
invented flag.

:func:`stepdown_vs_rest` removes that failure. It flags one segment at a time, the
one that stands out most, and takes every flagged segment out of the reference of the
segments still to be judged:

1. the *active* segments are all segments with records;
2. each active segment is compared with the pooled records of the other active
   segments (the contrast of :func:`~monitor.stats.flags.segment_vs_rest`, or for
   proportions the two-proportion test of :func:`proportion_vs_rest`);
3. the smallest raw p-value is held against ``alpha / a`` (``a`` active segments); if
   it passes, that segment is flagged by the sign of its difference and leaves the
   active set, and step 2 is repeated; otherwise no further segment is flagged.

The level steps as in Holm's (1979) procedure, so under no difference at all the
chance of any flag is at most ``alpha`` (the first step is a Bonferroni test over the
``k`` segments). The removal of flagged segments from the reference follows the
sequential outlier procedures (Rosner's 1983 generalized ESD does the same with the
largest studentized deviation). Each flagged segment's reported contrast is the one it
was flagged by: its difference from the segments that were still unflagged then.

References
----------
.. [1] Holm, S. (1979). A simple sequentially rejective multiple test procedure.
   Scandinavian Journal of Statistics 6(2), 65-70.
.. [2] Rosner, B. (1983). Percentage points for a generalized ESD many-outlier
   procedure. Technometrics 25(2), 165-172.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Sequence

import numpy as np

from monitor.stats import flags, proportions
from monitor.stats.flags import SegmentContrast

__all__ = ["stepdown_vs_rest", "proportion_vs_rest"]

logger = logging.getLogger(__name__)

_NAN = float("nan")

# one raw contrast per active segment: (diff, se, statistic, df, p)
_Contrasts = Callable[[list[int]], list[tuple[float, float, float, float, float]]]


def _stepdown(labels: Sequence[str], present: list[int], contrasts: _Contrasts,
              alpha: float) -> tuple[SegmentContrast, ...]:
    active = list(present)
    found: dict[int, SegmentContrast] = {}
    last: dict[int, tuple[float, float, float, float, float]] = {}
    running = 0.0  # Holm's adjusted p is monotone over the steps
    while len(active) >= 2:
        raw = contrasts(active)
        last = dict(zip(active, raw))
        p = np.array([r[4] for r in raw], float)
        if not np.any(np.isfinite(p)):
            break
        j = int(np.nanargmin(p))
        adj = min(1.0, max(running, float(p[j]) * len(active)))
        diff = raw[j][0]
        if not (adj <= alpha and math.isfinite(diff) and diff != 0.0):
            break
        running = adj
        i = active[j]
        found[i] = SegmentContrast(labels[i], raw[j][0], raw[j][1], raw[j][2], raw[j][3], adj,
                                   "high" if diff > 0 else "low")
        active.remove(i)
    out = []
    for i, label in enumerate(labels):
        if i in found:
            out.append(found[i])
        elif i in last:
            d, se, stat, df, p = last[i]
            adj = min(1.0, max(running, p * len(active))) if math.isfinite(p) else _NAN
            out.append(SegmentContrast(label, d, se, stat, df, adj, None))
        else:
            note = ("This segment has no records, so it cannot be compared." if i not in present
                    else "Fewer than two segments are left to compare with.")
            out.append(SegmentContrast(label, _NAN, _NAN, _NAN, _NAN, _NAN, None, note))
    return tuple(out)


def stepdown_vs_rest(labels: Sequence[str], groups, samples, method: str,
                     alpha: float = 0.05) -> tuple[SegmentContrast, ...]:
    """Flag segments against the rest of the unflagged ones (see the module notes).

    Parameters
    ----------
    labels : sequence of str
    groups : sequence of Moments or None
        Needed for ``'anova'`` and ``'welch'``.
    samples : sequence of 1-D arrays or None
        Needed for ``'kruskal'``.
    method : {'anova', 'welch', 'kruskal'}
        The contrast of :func:`monitor.stats.flags.segment_vs_rest` used at each step.
    alpha : float
        Family-wise level of the flags.

    Returns
    -------
    tuple of SegmentContrast
        One per segment, in label order; ``p_adj`` is Holm's step-down value.
    """
    labels = tuple(str(s) for s in labels)
    if method == "kruskal":
        sizes = [len(s) for s in samples]
    else:
        sizes = [int(g.n) for g in groups]
    present = [i for i, n in enumerate(sizes) if n > 0]

    def contrasts(active: list[int]):
        sub_labels = [labels[i] for i in active]
        res = flags.segment_vs_rest(sub_labels, [groups[i] for i in active] if groups is not None else None,
                                    [samples[i] for i in active] if samples is not None else None,
                                    method=method, alpha=0.5, adjust="none")
        return [(c.diff, c.se, c.statistic, c.df, c.p_adj) for c in res]

    return _stepdown(labels, present, contrasts, alpha)


def proportion_vs_rest(labels: Sequence[str], successes: Sequence[float], totals: Sequence[float],
                       alpha: float = 0.05) -> tuple[SegmentContrast, ...]:
    """:func:`stepdown_vs_rest` for proportions: each segment's share of 1s against the
    pooled records of the other unflagged segments.

    Each step's contrast is the two-proportion test of the segment against that pooled
    rest (pooled z, or Fisher's exact test with small expected counts; see
    :func:`monitor.stats.proportions.pairwise`); ``diff`` is a difference of
    proportions (0 to 1), ``df`` is ``inf``.
    """
    labels = tuple(str(s) for s in labels)
    x = [int(round(float(v))) for v in successes]
    n = [int(round(float(v))) for v in totals]
    present = [i for i, m in enumerate(n) if m > 0]

    def contrasts(active: list[int]):
        xs = sum(x[i] for i in active)
        ns = sum(n[i] for i in active)
        out = []
        for i in active:
            res = proportions.pairwise(["a", "rest"], [x[i], xs - x[i]], [n[i], ns - n[i]], adjust="none")
            p = res.pairs[0]
            out.append((p.diff, p.se, p.statistic, math.inf, p.p_raw))
        return out

    return _stepdown(labels, present, contrasts, alpha)
