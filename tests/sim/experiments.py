"""The scenarios of the error-rate harness and their summaries.

Every experiment is split into chunks with their own seeds
(``numpy.random.SeedSequence([SEED, experiment, setting, chunk])``), so the numbers do
not depend on how many worker processes ran them. Each ``*_chunk`` function is a
top-level function (picklable) returning plain numbers; each ``summarise_*``
function turns the chunks into table rows with Monte Carlo standard errors.

Monte Carlo standard errors
---------------------------
* a proportion ``p`` from ``n`` independent replications: ``sqrt(p (1 - p) / n)``;
* a mean of per-replication values (false alarms per simulated year, the false
  discovery proportion per period): the sample sd over ``sqrt(n)``;
* a difference of two proportions on the same draws (paired): the sd of the
  per-draw differences over ``sqrt(n)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from tests.sim.engine import (
    METHODS,
    Design,
    StreamSpec,
    StreamTally,
    draw,
    method_pvalues,
    run_stream,
    shift_for_f,
)
from monitor.stats.multiplicity import adjust

SEED = 20261201
ALPHA = 0.05
FDR_METHODS = ("bh", "by", "holm", "bonferroni", "none")
#: ``auto`` as it is, and two variants of its rule for comparison (not in segwatch):
#: ``auto_welch`` - Kruskal-Wallis where ``auto`` picks it, Welch instead of Fisher;
#: ``auto_alt`` - Kruskal-Wallis only where ``auto`` picks it and the spreads look equal
#: (Brown-Forsythe and sd-ratio checks pass), Welch otherwise.
COLUMNS = METHODS + ("auto_welch", "auto_alt")
PERIODS_PER_YEAR = 52

#: Five segments; the spreads multiply a standardised error (sd 1).
SHAPES: dict[str, tuple[tuple[int, ...], tuple[float, ...]]] = {
    "equal, n=50": ((50,) * 5, (1.0,) * 5),
    "equal, n=10": ((10,) * 5, (1.0,) * 5),
    "unequal sizes": ((15, 25, 50, 75, 135), (1.0,) * 5),
    "unequal spreads": ((50,) * 5, (1.0, 1.0, 1.0, 2.0, 3.0)),
    "both, wide in small": ((15, 25, 50, 75, 135), (3.0, 2.0, 1.0, 1.0, 1.0)),
    "both, wide in large": ((15, 25, 50, 75, 135), (1.0, 1.0, 1.0, 2.0, 3.0)),
}

#: Three segments, small and unequal (the classic case where Fisher's ANOVA is liberal).
SMALL_SHAPES: dict[str, tuple[tuple[int, ...], tuple[float, ...]]] = {
    "n 10/20/40, sd 2/1.5/1": ((10, 20, 40), (2.0, 1.5, 1.0)),
    "n 10/20/40, sd 3/2/1": ((10, 20, 40), (3.0, 2.0, 1.0)),
    "n 40/20/10, sd 2/1.5/1": ((40, 20, 10), (2.0, 1.5, 1.0)),
    "n 20/20/20, sd 2/1.5/1": ((20, 20, 20), (2.0, 1.5, 1.0)),
}


def design(shape: str, distribution: str = "normal", small: bool = False) -> Design:
    sizes, sds = (SMALL_SHAPES if small else SHAPES)[shape]
    return Design(sizes, sds, distribution, name=shape)


def seed_for(*key: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([SEED, *key]))


# ---------------------------------------------------------------- per-method p-values


def pvalue_chunk(design_: Design, metrics: int, periods: int, shifted: int, effect_f: float,
                 key: tuple[int, ...]) -> dict[str, Any]:
    """``periods`` periods of ``metrics`` metrics; the first ``shifted`` have one segment
    moved by Cohen's ``effect_f``. Returns p-values ``[period, metric, column]`` and the
    method ``auto`` picked."""
    rng = seed_for(*key)
    moved = shift_for_f(design_, effect_f) if shifted else None
    p = np.empty((periods, metrics, len(COLUMNS)))
    picks = np.empty((periods, metrics), dtype=object)
    for t in range(periods):
        for i in range(metrics):
            mp = method_pvalues(design_.labels, draw(rng, design_, moved if i < shifted else None))
            row = [mp.get(m) for m in METHODS]
            row.append(mp.kruskal if mp.auto_method == "kruskal" else mp.welch)
            row.append(mp.kruskal if mp.auto_method == "kruskal" and mp.spreads_look_equal else mp.welch)
            p[t, i] = row
            picks[t, i] = mp.auto_method
    return {"p": p, "picks": picks}


@dataclass(frozen=True)
class Rate:
    """An estimate and its Monte Carlo standard error."""

    value: float
    se: float
    n: int

    def __str__(self) -> str:
        if not math.isfinite(self.value):
            return "n/a"
        return f"{self.value:.3f} ± {self.se:.3f}"


def proportion(hits: np.ndarray) -> Rate:
    hits = np.asarray(hits, float).ravel()
    n = hits.size
    p = float(hits.mean()) if n else math.nan
    return Rate(p, math.sqrt(p * (1 - p) / n) if n else math.nan, n)


def mean_rate(values: Sequence[float]) -> Rate:
    v = np.asarray(values, float)
    n = v.size
    if n == 0:
        return Rate(math.nan, math.nan, 0)
    return Rate(float(v.mean()), float(v.std(ddof=1) / math.sqrt(n)) if n > 1 else math.nan, n)


def paired_difference(a: np.ndarray, b: np.ndarray) -> Rate:
    d = np.asarray(a, float).ravel() - np.asarray(b, float).ravel()
    return mean_rate(d)


def join_chunks(chunks: Sequence[dict[str, Any]]) -> tuple[np.ndarray, np.ndarray]:
    return (np.concatenate([c["p"] for c in chunks]), np.concatenate([c["picks"] for c in chunks]))


def per_test_rates(p: np.ndarray, metrics: slice | None = None, alpha: float = ALPHA) -> dict[str, Rate]:
    """Share of metric-periods with raw p <= alpha, per column."""
    sel = p if metrics is None else p[:, metrics]
    return {c: proportion(sel[..., j] <= alpha) for j, c in enumerate(COLUMNS)}


def fdr_rates(p: np.ndarray, truth: np.ndarray, level: float = ALPHA) -> dict[tuple[str, str], dict[str, Rate]]:
    """Per (test column, FDR method): the realised FDR (mean over periods of V / max(R, 1)),
    the share of periods with any false discovery, and the power (share of true
    differences discovered), with q-values from :func:`monitor.stats.multiplicity.adjust`."""
    out = {}
    for j, col in enumerate(COLUMNS):
        for fm in FDR_METHODS:
            fdp, anyfalse, found = [], [], []
            for t in range(p.shape[0]):
                q = adjust(p[t, :, j], fm)
                rej = q <= level
                v = int(np.sum(rej & ~truth))
                r = int(np.sum(rej))
                fdp.append(v / max(r, 1))
                anyfalse.append(v > 0)
                if truth.any():
                    found.extend(rej[truth])
            out[(col, fm)] = {"fdr": mean_rate(fdp), "any": proportion(np.array(anyfalse)),
                              "power": proportion(np.array(found)) if found else Rate(math.nan, math.nan, 0)}
    return out


def auto_picks(picks: np.ndarray) -> str:
    flat = list(picks.ravel())
    n = len(flat)
    return ", ".join(f"{m} {flat.count(m) / n:.0%}" for m in ("anova", "welch", "kruskal") if flat.count(m))


# ---------------------------------------------------------------- streams


def stream_chunk(spec: StreamSpec, runs: int, key: tuple[int, ...]) -> list[dict[tuple[float, int], StreamTally]]:
    """``runs`` independent runs of ``spec`` (one tally dict per run)."""
    rng = seed_for(*key)
    return [run_stream(spec, rng) for _ in range(runs)]


def merge_runs(runs: Sequence[dict[tuple[float, int], StreamTally]]) -> dict[tuple[float, int], StreamTally]:
    total: dict[tuple[float, int], StreamTally] = {}
    for run in runs:
        for key, tally in run.items():
            total.setdefault(key, StreamTally()).add(tally)
    return total


def per_year(runs: Sequence[dict[tuple[float, int], StreamTally]], key: tuple[float, int], field: str) -> Rate:
    """Mean of ``field`` per 52 periods over runs, with the between-run standard error."""
    vals = [getattr(r[key], field) * PERIODS_PER_YEAR / r[key].periods for r in runs]
    return mean_rate(vals)


def delay_summary(delays: Sequence[int | None], horizon: int) -> dict[str, Any]:
    """Median delay (periods after the shift's first period; None beyond ``horizon``) and
    the shares detected in the first, within two, and within ``horizon + 1`` periods."""
    n = len(delays)
    d = np.array([x if x is not None else np.inf for x in delays], float)
    med = float(np.median(d)) if n else math.nan
    return {
        "n": n,
        "median": med,
        "first": proportion(d <= 0),
        "within2": proportion(d <= 1),
        "within_h": proportion(d <= horizon),
    }


def fmt_delay(med: float, horizon: int) -> str:
    if not math.isfinite(med):
        return f"> {horizon}"
    return f"{med:g}"
