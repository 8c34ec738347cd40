"""Demo data for segwatch's pricing use: households on a utility's plan tiers, month by month.

The generator writes one SQLite table, ``household_months``: each month a fresh sample of
households on each of the utility's customer plan tiers (Basic, Saver, Standard, Premium, and
Green from its launch) reports its annual household income, and the month's bill gives its
monthly spend. 24 months, 2025-01 to 2026-12. Everything is invented. Most of it is noise with
no difference between tiers; :data:`STORIES` lists what was planted (which tier, which metric,
which months), so that tests and docs can refer to the stories by key.

Money is stored the way a DECIMAL column would hold it: the two money columns are declared
``NUMERIC(12,2)`` and ``NUMERIC(10,2)``, which gives them SQLite's NUMERIC affinity. Values are
rounded to cents before they are written; SQLite then keeps a whole amount as an INTEGER and any
other amount as a REAL (never as TEXT), and SQLAlchemy reflects the columns as ``NUMERIC`` and
hands the values to Python as :class:`decimal.Decimal`, as a server database would.

Usage::

    python sample_db/plans.py                      # writes sample_db/plans.sqlite
    python sample_db/plans.py --out /tmp/p.sqlite --seed 7

or from Python::

    from plans import build
    build("plans.sqlite", seed=20250101)

The same seed gives the same table contents, row for row. An existing file at the target path
is deleted and rebuilt, never appended to.
"""

from __future__ import annotations

import logging
import os
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from types import MappingProxyType

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))  # the sibling helper, however this file is loaded
import _sqlite_sample  # noqa: E402

logger = logging.getLogger(__name__)

DEFAULT_SEED = 20250101
DEFAULT_OUT = Path(__file__).resolve().parent / "plans.sqlite"

FIRST_YEAR = 2025
N_MONTHS = 24  # 2025-01 .. 2026-12

REFERENCE_TIER = "Basic"
#: Tier names and their typical number of surveyed households per month.
TIER_VOLUME: Mapping[str, int] = MappingProxyType(
    {"Basic": 300, "Saver": 170, "Standard": 240, "Premium": 90, "Green": 70}
)
TIERS: tuple[str, ...] = tuple(TIER_VOLUME)
MIN_PER_MONTH, MAX_PER_MONTH = 50, 400

METRICS: tuple[str, ...] = ("household_income", "monthly_spend")
REGIONS: tuple[str, ...] = ("North", "South", "East", "West", "Capital")
REGION_WEIGHTS = np.array([0.2, 0.2, 0.2, 0.2, 0.2])
REGION_INCOME = np.array([0.95, 0.97, 0.93, 1.0, 1.15])  # multiplies the income median

# --- baseline distributions (equal for every tier unless a story says otherwise) ---------
SIZES = np.array([1, 2, 3, 4, 5])
#: Household size mix of a tier (shares of 1..5 persons).
BASE_SIZE_MIX = np.array([0.28, 0.32, 0.17, 0.15, 0.08])
#: Median annual net household income by household size, EUR.
INCOME_MEDIAN_BY_SIZE = np.array([26_000.0, 42_000.0, 50_000.0, 56_000.0, 58_000.0])
INCOME_SIGMA = 0.55  # lognormal spread within a household size
TOP_SHARE, TOP_FACTOR_LOW, TOP_FACTOR_HIGH = 0.015, 3.0, 8.0  # a few very high incomes: a long right tail
ZERO_SHARE = 0.006  # income "not stated", recorded as 0
LOSS_SHARE = 0.002  # a net loss (self-employed households): a small negative income
SPEND_MEAN: Mapping[str, float] = MappingProxyType(
    {"Basic": 78.0, "Saver": 66.0, "Standard": 78.0, "Premium": 124.0, "Green": 78.0}
)  # EUR per month
SPEND_CV = 0.30  # gamma: sd / mean
SPEND_NULL_SHARE = 0.003  # bill not yet issued

# --- planted stories -------------------------------------------------------------------
PREMIUM_INCOME_FACTOR = 1.5  # Premium households earn more, every month
ZERO_BURST_MONTH, ZERO_BURST_TIER, ZERO_BURST_SHARE = 5, "Standard", 0.35
LAUNCH_MONTH, LAUNCH_TIER = 7, "Green"
PRICE_MONTH, PRICE_TIER, PRICE_FACTOR = 10, "Standard", 1.15
COMPOSITION_MONTH, COMPOSITION_TIER = 13, "Saver"
#: Saver's household size mix once it is opened to single-person households.
SAVER_NEW_SIZE_MIX = np.array([0.75, 0.13, 0.05, 0.04, 0.03])
SAVER_NEW_VOLUME = 320  # the offer brings more households onto the tier


@dataclass(frozen=True)
class Story:
    """One planted pattern in the demo data.

    ``months`` are month numbers 1..24 (1 = 2025-01) where the pattern is in the data;
    ``flag_from`` is the first month in which a monthly run is expected to report it (None: not
    a statistical story).
    """

    key: str
    tiers: tuple[str, ...]
    metric: str | None
    months: tuple[int, ...]
    flag_from: int | None
    summary: str

    @property
    def period_ids(self) -> tuple[str, ...]:
        """The story's months as ISO 8601 period identifiers, e.g. ``2026-01``."""
        return tuple(month_id(m) for m in self.months)


def month_id(month: int) -> str:
    """ISO 8601 identifier of month ``month`` (1 = 2025-01), e.g. ``month_id(13) == "2026-01"``."""
    year, index = divmod(month - 1, 12)
    return f"{FIRST_YEAR + year}-{index + 1:02d}"


def _span(first: int, last: int = N_MONTHS) -> tuple[int, ...]:
    return tuple(range(first, last + 1))


STORIES: Mapping[str, Story] = MappingProxyType(
    {
        s.key: s
        for s in (
            Story(
                "composition_gap",
                (COMPOSITION_TIER,),
                "household_income",
                _span(COMPOSITION_MONTH),
                COMPOSITION_MONTH,
                f"From {month_id(COMPOSITION_MONTH)} the {COMPOSITION_TIER} tier is opened to single-person "
                f"households; its mix turns to {SAVER_NEW_SIZE_MIX[0]:.0%} single-person households (from "
                f"{BASE_SIZE_MIX[0]:.0%}) and its volume to about {SAVER_NEW_VOLUME} a month, so its income gap to "
                f"{REFERENCE_TIER} opens to about -25%. Within each household size incomes are unchanged: the gap "
                "is composition.",
            ),
            Story(
                "price_rise",
                (PRICE_TIER,),
                "monthly_spend",
                _span(PRICE_MONTH),
                PRICE_MONTH,
                f"{PRICE_TIER}'s prices rise {PRICE_FACTOR - 1:.0%} from {month_id(PRICE_MONTH)}; before that "
                f"its monthly spend equals {REFERENCE_TIER}'s.",
            ),
            Story(
                "steady_premium",
                ("Premium",),
                "household_income",
                _span(1),
                1,
                f"Premium households' incomes are {PREMIUM_INCOME_FACTOR - 1:.0%} higher (geometric mean) "
                f"than {REFERENCE_TIER}'s every month, and they spend more: a permanent, known gap.",
            ),
            Story(
                "launch",
                (LAUNCH_TIER,),
                None,
                (LAUNCH_MONTH,),
                LAUNCH_MONTH,
                f"The {LAUNCH_TIER} tier launches in {month_id(LAUNCH_MONTH)}; it has no rows before. "
                f"It is otherwise like {REFERENCE_TIER}.",
            ),
            Story(
                "zero_burst",
                (ZERO_BURST_TIER,),
                "household_income",
                (ZERO_BURST_MONTH,),
                ZERO_BURST_MONTH,
                f"A survey-form fault in {month_id(ZERO_BURST_MONTH)} records the income of "
                f"{ZERO_BURST_SHARE:.0%} of {ZERO_BURST_TIER}'s households as 0: more than 5% of that "
                "month's incomes cannot be logged.",
            ),
            Story(
                "stray_values",
                TIERS,
                None,
                _span(1),
                None,
                f"Every month about {ZERO_SHARE:.1%} of incomes are 0 (not stated) and {LOSS_SHARE:.1%} are "
                f"small net losses (negative), and {SPEND_NULL_SHARE:.1%} of bills are missing (NULL spend).",
            ),
        )
    }
)

_COLUMNS = ("bill_date", "tier", "region", "household_size") + METRICS
_SCHEMA = """
CREATE TABLE household_months (
    id INTEGER PRIMARY KEY,
    bill_date TEXT NOT NULL,
    tier TEXT NOT NULL,
    region TEXT NOT NULL,
    household_size INTEGER NOT NULL,
    household_income NUMERIC(12, 2),
    monthly_spend NUMERIC(10, 2)
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


def _first_day(month: int) -> date:
    year, index = divmod(month - 1, 12)
    return date(FIRST_YEAR + year, index + 1, 1)


def _days_in(month: int) -> int:
    return (_first_day(month + 1) - _first_day(month)).days


def _tier_present(tier: str, month: int) -> bool:
    return not (tier == LAUNCH_TIER and month < LAUNCH_MONTH)


def _size_mix(tier: str, month: int) -> np.ndarray:
    if tier == COMPOSITION_TIER and month >= COMPOSITION_MONTH:
        return SAVER_NEW_SIZE_MIX
    return BASE_SIZE_MIX


def _volume(tier: str, month: int) -> int:
    if tier == COMPOSITION_TIER and month >= COMPOSITION_MONTH:
        return SAVER_NEW_VOLUME
    return TIER_VOLUME[tier]


def _generate(seed: int) -> list[tuple[object, ...]]:
    """All rows, in id order, as tuples matching ``_COLUMNS``."""
    rng = np.random.default_rng(seed)
    rows: list[tuple[str, int, tuple[object, ...]]] = []  # (bill_date, tier index, row)
    shape = 1.0 / SPEND_CV**2
    for month in range(1, N_MONTHS + 1):
        first = _first_day(month)
        for t_index, tier in enumerate(TIERS):
            if not _tier_present(tier, month):
                continue
            n = int(np.clip(round(_volume(tier, month) * rng.lognormal(0.0, 0.1)), MIN_PER_MONTH, MAX_PER_MONTH))
            day = rng.integers(0, _days_in(month), size=n)
            region = rng.choice(len(REGIONS), size=n, p=REGION_WEIGHTS)
            size_index = rng.choice(len(SIZES), size=n, p=_size_mix(tier, month))

            median = INCOME_MEDIAN_BY_SIZE[size_index] * REGION_INCOME[region]
            if tier == "Premium":
                median = median * PREMIUM_INCOME_FACTOR
            income = median * rng.lognormal(0.0, INCOME_SIGMA, size=n)
            top = rng.random(n) < TOP_SHARE
            income[top] *= rng.uniform(TOP_FACTOR_LOW, TOP_FACTOR_HIGH, size=int(top.sum()))
            stray = rng.random(n)
            income[stray < ZERO_SHARE] = 0.0
            loss = (stray >= ZERO_SHARE) & (stray < ZERO_SHARE + LOSS_SHARE)
            income[loss] = -rng.uniform(500.0, 8000.0, size=int(loss.sum()))
            if tier == ZERO_BURST_TIER and month == ZERO_BURST_MONTH:
                income[rng.random(n) < ZERO_BURST_SHARE] = 0.0

            mean = SPEND_MEAN[tier] * (PRICE_FACTOR if tier == PRICE_TIER and month >= PRICE_MONTH else 1.0)
            spend: list[float | None] = [round(float(x), 2) for x in rng.gamma(shape, mean / shape, size=n)]
            for i in np.flatnonzero(rng.random(n) < SPEND_NULL_SHARE):
                spend[int(i)] = None

            for i in range(n):
                stamp = date.fromordinal(first.toordinal() + int(day[i])).isoformat()
                row = (stamp, tier, REGIONS[int(region[i])], int(SIZES[size_index[i]]),
                       round(float(income[i])), spend[i])
                rows.append((stamp, t_index, row))

    rows.sort(key=lambda r: (r[0], r[1]))  # stable: equal dates keep their generated order
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
    _sqlite_sample.write_table(out, _SCHEMA, "household_months", _COLUMNS, rows,
                               "CREATE INDEX household_months_bill_date ON household_months (bill_date)")
    logger.info("wrote %s rows to %s (seed %s)", len(rows), out, seed)
    return out


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: build the demo database; returns the exit code (0 ok, 2 bad arguments)."""
    return _sqlite_sample.run_cli(
        argv, prog="plans.py", description="Build segwatch's demo database of households on a utility's plan tiers.", example_seed=20250101,
        default_out=DEFAULT_OUT, default_seed=DEFAULT_SEED, build=build, table="household_months", noun="household-months",
    )


if __name__ == "__main__":
    sys.exit(main())
