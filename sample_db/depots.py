"""Demo data for segwatch: an invented network of parcel depots, with planted stories.

The generator writes one SQLite table, ``shipments``, holding one row per parcel handled
by eight depots over 26 ISO weeks (2026-W01 to 2026-W26, Monday 2025-12-29 to Sunday
2026-06-28). ``shipped_at`` is naive wall-clock time in Europe/Berlin. Most of the data
is pure noise with no differences between depots; a few stories are planted on purpose
so that a weekly backfill has something to find. :data:`STORIES` lists them (which depot,
which metric, which weeks) so that tests and docs can refer to them by key.

Usage::

    python sample_db/depots.py                      # writes sample_db/depots.sqlite
    python sample_db/depots.py --out /tmp/d.sqlite --seed 7

or from Python::

    from depots import build
    build("depots.sqlite", seed=20260105)

The same seed gives the same table contents, row for row. An existing file at the target
path is deleted and rebuilt, never appended to.
"""

from __future__ import annotations

import logging
import os
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from pathlib import Path
from types import MappingProxyType

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))  # the sibling helper, however this file is loaded
import _sqlite_sample  # noqa: E402

logger = logging.getLogger(__name__)

DEFAULT_SEED = 20260105
DEFAULT_OUT = Path(__file__).resolve().parent / "depots.sqlite"

YEAR = 2026
N_WEEKS = 26
FIRST_MONDAY = date.fromisocalendar(YEAR, 1, 1)  # 2025-12-29
END = FIRST_MONDAY + timedelta(weeks=N_WEEKS)  # 2026-06-29, exclusive

#: Depot names and their typical weekly parcel count (weekly counts vary around it).
DEPOT_VOLUME: Mapping[str, int] = MappingProxyType(
    {
        "Harbor": 135,
        "Ridge": 95,
        "Millbrook": 120,
        "Eastgate": 130,
        "Quarry": 105,
        "Fenwick": 85,
        "Northpoint": 80,
        "Lakeside": 110,
    }
)
DEPOTS: tuple[str, ...] = tuple(DEPOT_VOLUME)
MIN_PER_WEEK, MAX_PER_WEEK = 60, 160

METRICS: tuple[str, ...] = ("dwell_hours", "on_time", "claim_cost", "sort_minutes", "counter_wait_min")

# --- baseline distributions (identical for every depot unless a story says otherwise) -----
DWELL_SHAPE, DWELL_SCALE = 16.0, 1.5  # gamma: mean 24 h, sd 6 h
ON_TIME_RATE = 0.93
CLAIM_MEDIAN, CLAIM_SIGMA = 2.5, 0.7  # lognormal, EUR
CLAIM_LARGE_SHARE, CLAIM_LARGE_MEDIAN, CLAIM_LARGE_SIGMA = 0.02, 90.0, 0.6
SORT_MEAN, SORT_SD = 7.5, 1.5  # normal, minutes
WAIT_RANGE = 24.0  # counter wait = WAIT_RANGE * Beta(a, a): symmetric, mean 12 min
WAIT_SD = 2.0
# Day-of-week weights, Monday first (Sunday is a light day).
DAY_WEIGHTS = np.array([0.17, 0.17, 0.17, 0.17, 0.17, 0.11, 0.04])
NIGHT_SHARE = 0.06  # share of parcels handled between 00:00 and 06:00

# --- planted stories -------------------------------------------------------------------
DRIFT_DEPOT, DRIFT_START_WEEK, DRIFT_CLEAR_WEEK = "Quarry", 12, 16
DRIFT_RATE_PER_WEEK, DRIFT_CAP = 1.25, 9.0  # dwell hours added per week since the start, at most
SPREAD_DEPOTS, SPREAD_START_WEEK, SPREAD_FACTOR = ("Harbor", "Lakeside"), 14, 3.0
OPENING_DEPOT, OPENING_WEEK = "Northpoint", 9
MISSING_DEPOT, MISSING_WEEK = "Fenwick", 18
BURST_DEPOT, BURST_WEEK, BURST_METRIC = "Eastgate", 7, "sort_minutes"
BURST_DAYS = (1, 2, 3)  # Tuesday to Thursday: the sorter's scanner log was lost
OFFSET_DEPOT, OFFSET_METRIC, OFFSET_MINUTES = "Millbrook", "sort_minutes", 1.2
MIDNIGHT_ROWS = 4  # Fenwick's first parcels after the closed week, Monday 00:00-02:00 local

# Bad values at fixed places (week, depot, column); the row within the depot-week is drawn.
NULL_DEPOT_AT: tuple[tuple[int, str], ...] = ((3, "Ridge"), (21, "Harbor"), (21, "Quarry"))
TEXT_AT: tuple[tuple[int, str, str], ...] = (
    (5, "Lakeside", "claim_cost"),
    (11, "Ridge", "dwell_hours"),
    (22, "Millbrook", "counter_wait_min"),
    (22, "Eastgate", "claim_cost"),
)
TEXT_VALUE = "n/a"
NULL_METRIC_AT: tuple[tuple[int, str, str], ...] = (
    (2, "Harbor", "dwell_hours"),
    (6, "Quarry", "on_time"),
    (10, "Millbrook", "claim_cost"),
    (15, "Ridge", "counter_wait_min"),
    (19, "Lakeside", "sort_minutes"),
    (24, "Northpoint", "dwell_hours"),
    (24, "Fenwick", "claim_cost"),
)
ALL_NULL_AT: tuple[tuple[int, str], ...] = ((13, "Eastgate"),)  # every metric NULL


@dataclass(frozen=True)
class Story:
    """One planted pattern in the demo data.

    ``weeks`` are ISO week numbers of 2026 where the pattern is in the data; ``flag_from`` is
    the first week in which a weekly run is expected to report it (None: not a statistical story).
    """

    key: str
    depots: tuple[str, ...]
    metric: str | None
    weeks: tuple[int, ...]
    flag_from: int | None
    summary: str

    @property
    def period_ids(self) -> tuple[str, ...]:
        """The story's weeks as ISO 8601 period identifiers, e.g. ``2026-W12``."""
        return tuple(week_id(w) for w in self.weeks)


def week_id(week: int) -> str:
    """ISO 8601 identifier of a week of 2026, e.g. ``week_id(6) == "2026-W06"``."""
    return f"{YEAR}-W{week:02d}"


def _span(first: int, last: int = N_WEEKS) -> tuple[int, ...]:
    return tuple(range(first, last + 1))


STORIES: Mapping[str, Story] = MappingProxyType(
    {
        s.key: s
        for s in (
            Story(
                "drift",
                (DRIFT_DEPOT,),
                "dwell_hours",
                _span(DRIFT_START_WEEK),
                DRIFT_CLEAR_WEEK,
                f"{DRIFT_DEPOT}'s dwell time creeps up by {DRIFT_RATE_PER_WEEK:g} h a week from "
                f"{week_id(DRIFT_START_WEEK)} (at most +{DRIFT_CAP:g} h); before that all depots are equal.",
            ),
            Story(
                "spread_break",
                SPREAD_DEPOTS,
                "counter_wait_min",
                _span(SPREAD_START_WEEK),
                SPREAD_START_WEEK,
                f"From {week_id(SPREAD_START_WEEK)} the counter wait at {' and '.join(SPREAD_DEPOTS)} "
                f"spreads {SPREAD_FACTOR:g} times as wide (sd {WAIT_SD:g} -> {WAIT_SD * SPREAD_FACTOR:g} min), "
                "same mean and median.",
            ),
            Story(
                "opening",
                (OPENING_DEPOT,),
                None,
                (OPENING_WEEK,),
                OPENING_WEEK,
                f"{OPENING_DEPOT} opens in {week_id(OPENING_WEEK)}; it has no rows before.",
            ),
            Story(
                "missing_week",
                (MISSING_DEPOT,),
                None,
                (MISSING_WEEK,),
                MISSING_WEEK,
                f"{MISSING_DEPOT} is closed for {week_id(MISSING_WEEK)}: no rows at all that week.",
            ),
            Story(
                "midnight_edge",
                (MISSING_DEPOT,),
                None,
                (MISSING_WEEK + 1,),
                None,
                f"{MISSING_DEPOT}'s first {MIDNIGHT_ROWS} parcels after reopening are on Monday of "
                f"{week_id(MISSING_WEEK + 1)} between 00:00 and 02:00 Berlin time, which is still Sunday "
                f"of {week_id(MISSING_WEEK)} in UTC: weeks cut in the wrong zone make the gap disappear.",
            ),
            Story(
                "null_burst",
                (BURST_DEPOT,),
                BURST_METRIC,
                (BURST_WEEK,),
                BURST_WEEK,
                f"{BURST_DEPOT} lost its sort-time log Tuesday to Thursday of {week_id(BURST_WEEK)}: "
                f"{BURST_METRIC} is NULL there, more than 5% of that week's rows.",
            ),
            Story(
                "bad_values",
                tuple(sorted({d for _, d in NULL_DEPOT_AT} | {d for _, d, _ in TEXT_AT}
                             | {d for _, d, _ in NULL_METRIC_AT} | {d for _, d in ALL_NULL_AT})),
                None,
                tuple(sorted({w for w, _ in NULL_DEPOT_AT} | {w for w, _, _ in TEXT_AT}
                             | {w for w, _, _ in NULL_METRIC_AT} | {w for w, _ in ALL_NULL_AT})),
                None,
                f"A handful of stray problems: {len(NULL_DEPOT_AT)} rows with NULL depot, "
                f"{len(TEXT_AT)} rows with the text '{TEXT_VALUE}' in a REAL column, "
                f"{len(NULL_METRIC_AT)} rows with one NULL metric and {len(ALL_NULL_AT)} with all metrics NULL.",
            ),
            Story(
                "steady_offset",
                (OFFSET_DEPOT,),
                OFFSET_METRIC,
                _span(1),
                1,
                f"{OFFSET_DEPOT}'s older sorter takes {OFFSET_MINUTES:g} min longer per parcel, every week "
                "(a permanent, known difference).",
            ),
        )
    }
)

_COLUMNS = ("shipped_at", "depot", "route") + METRICS
_SCHEMA = """
CREATE TABLE shipments (
    id INTEGER PRIMARY KEY,
    shipped_at TEXT NOT NULL,
    depot TEXT,
    route TEXT,
    dwell_hours REAL,
    on_time REAL,
    claim_cost REAL,
    sort_minutes REAL,
    counter_wait_min REAL
)
"""


def _check_args(path: str | os.PathLike[str], seed: object) -> tuple[Path, int]:
    """Validate the arguments of :func:`build`; raise ``ValueError`` with a one-line message."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    out = Path(path)
    if out.is_dir():
        raise ValueError(f"output must be a file path, not a folder: {out}")
    return out, int(seed)


def _wait_alpha(sd: float) -> float:
    """Beta(a, a) parameter giving WAIT_RANGE * Beta(a, a) the standard deviation ``sd``.

    Var(Beta(a, a)) = 1 / (4 (2a + 1)), so sd = WAIT_RANGE / (2 sqrt(2a + 1)).
    """
    return ((WAIT_RANGE / (2.0 * sd)) ** 2 - 1.0) / 2.0


def _depot_present(depot: str, week: int) -> bool:
    if depot == OPENING_DEPOT and week < OPENING_WEEK:
        return False
    if depot == MISSING_DEPOT and week == MISSING_WEEK:
        return False
    return True


def _routes(depot: str, rng: np.random.Generator, n: int) -> list[str]:
    n_routes = 3 + len(depot) % 3  # 3 to 5 routes per depot
    codes = [f"{depot[:3].upper()}-{k:02d}" for k in range(1, n_routes + 1)]
    return [codes[i] for i in rng.integers(0, n_routes, size=n)]


def _times(rng: np.random.Generator, monday: date, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Day offset (0-6) and second of day for ``n`` parcels, in local wall-clock time."""
    day = rng.choice(7, size=n, p=DAY_WEIGHTS)
    night = rng.random(n) < NIGHT_SHARE
    second = np.where(
        night,
        rng.integers(0, 6 * 3600, size=n),
        rng.integers(6 * 3600, 22 * 3600, size=n),
    )
    # Berlin skips 02:00-03:00 on the last Sunday of March: no parcel can carry such a time.
    for i in range(n):
        d = monday + timedelta(days=int(day[i]))
        if d.month == 3 and d.weekday() == 6 and d.day + 7 > 31 and 2 * 3600 <= second[i] < 3 * 3600:
            second[i] += 3600
    return day, second


def _generate(seed: int) -> list[tuple[object, ...]]:
    """All rows, in id order, as tuples matching ``_COLUMNS``."""
    rng = np.random.default_rng(seed)
    rows: list[tuple[str, int, tuple[object, ...]]] = []  # (shipped_at, depot index, row)
    alpha_base, alpha_wide = _wait_alpha(WAIT_SD), _wait_alpha(WAIT_SD * SPREAD_FACTOR)
    drift_start = datetime.combine(date.fromisocalendar(YEAR, DRIFT_START_WEEK, 1), datetime.min.time())

    for week in range(1, N_WEEKS + 1):
        monday = date.fromisocalendar(YEAR, week, 1)
        for d_index, depot in enumerate(DEPOTS):
            if not _depot_present(depot, week):
                continue
            n = int(np.clip(round(DEPOT_VOLUME[depot] * rng.lognormal(0.0, 0.12)), MIN_PER_WEEK, MAX_PER_WEEK))
            day, second = _times(rng, monday, n)
            if depot == MISSING_DEPOT and week == MISSING_WEEK + 1:
                day[:MIDNIGHT_ROWS] = 0
                second[:MIDNIGHT_ROWS] = np.sort(rng.integers(0, 2 * 3600, size=MIDNIGHT_ROWS))
            stamps = [
                datetime.combine(monday + timedelta(days=int(dd)), datetime.min.time()) + timedelta(seconds=int(ss))
                for dd, ss in zip(day, second)
            ]
            routes = _routes(depot, rng, n)

            dwell = rng.gamma(DWELL_SHAPE, DWELL_SCALE, size=n)
            if depot == DRIFT_DEPOT:
                weeks_in = np.array([(t - drift_start).total_seconds() / (7 * 86400) for t in stamps])
                dwell = dwell + np.clip(weeks_in * DRIFT_RATE_PER_WEEK, 0.0, DRIFT_CAP)
            on_time = (rng.random(n) < ON_TIME_RATE).astype(float)
            claim = rng.lognormal(np.log(CLAIM_MEDIAN), CLAIM_SIGMA, size=n)
            large = rng.random(n) < CLAIM_LARGE_SHARE
            claim[large] = rng.lognormal(np.log(CLAIM_LARGE_MEDIAN), CLAIM_LARGE_SIGMA, size=int(large.sum()))
            sort = rng.normal(SORT_MEAN + (OFFSET_MINUTES if depot == OFFSET_DEPOT else 0.0), SORT_SD, size=n)
            sort = np.maximum(sort, 1.0)
            wide = depot in SPREAD_DEPOTS and week >= SPREAD_START_WEEK
            a = alpha_wide if wide else alpha_base
            wait = WAIT_RANGE * rng.beta(a, a, size=n)

            values: list[list[object]] = [
                [
                    round(float(dwell[i]), 2),
                    float(on_time[i]),
                    round(float(claim[i]), 2),
                    round(float(sort[i]), 2),
                    round(float(wait[i]), 1),
                ]
                for i in range(n)
            ]
            depot_of: list[str | None] = [depot] * n

            if depot == BURST_DEPOT and week == BURST_WEEK:
                col = METRICS.index(BURST_METRIC)
                for i in range(n):
                    if int(day[i]) in BURST_DAYS:
                        values[i][col] = None
            for w, dep in NULL_DEPOT_AT:
                if (w, dep) == (week, depot):
                    depot_of[int(rng.integers(n))] = None
            for w, dep, col_name in TEXT_AT:
                if (w, dep) == (week, depot):
                    values[int(rng.integers(n))][METRICS.index(col_name)] = TEXT_VALUE
            for w, dep, col_name in NULL_METRIC_AT:
                if (w, dep) == (week, depot):
                    values[int(rng.integers(n))][METRICS.index(col_name)] = None
            for w, dep in ALL_NULL_AT:
                if (w, dep) == (week, depot):
                    values[int(rng.integers(n))] = [None] * len(METRICS)

            for i in range(n):
                stamp = stamps[i].strftime("%Y-%m-%d %H:%M:%S")
                rows.append((stamp, d_index, (stamp, depot_of[i], routes[i], *values[i])))

    rows.sort(key=lambda r: (r[0], r[1]))  # stable: equal stamps keep their generated order
    return [r[2] for r in rows]


def build(path: str | os.PathLike[str] = DEFAULT_OUT, seed: int = DEFAULT_SEED) -> Path:
    """Write the demo database to ``path`` (replacing any file there) and return the path.

    Parameters
    ----------
    path : str or path-like
        Target SQLite file. Missing parent folders are created.
    seed : int
        Non-negative seed for ``numpy.random.default_rng``; equal seeds give equal tables.

    Returns
    -------
    pathlib.Path
        The path written.

    Raises
    ------
    ValueError
        If ``seed`` is not a non-negative integer or ``path`` is a folder.
    """
    out, seed = _check_args(path, seed)
    rows = _generate(seed)
    _sqlite_sample.write_table(out, _SCHEMA, "shipments", _COLUMNS, rows,
                               "CREATE INDEX shipments_shipped_at ON shipments (shipped_at)")
    logger.info("wrote %s rows to %s (seed %s)", len(rows), out, seed)
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: build the demo database; returns the exit code (0 ok, 2 bad arguments)."""
    return _sqlite_sample.run_cli(
        argv, prog="depots.py", description="Build segwatch's demo database of parcel depots.", example_seed=20260105,
        default_out=DEFAULT_OUT, default_seed=DEFAULT_SEED, build=build, table="shipments", noun="shipments",
    )


if __name__ == "__main__":
    sys.exit(main())
