"""Calendar periods: the day, ISO week or month windows a job compares segments over.

A :class:`Period` is a half-open window ``[start, end)`` cut at local midnights in the
job's time zone, named by an ISO 8601 identifier:

========  ==============  ==========================================
kind      identifier      window
========  ==============  ==========================================
``day``   ``2026-02-03``  that calendar day
``week``  ``2026-W06``    Monday 00:00 to the next Monday 00:00
``month`` ``2026-02``     the first of the month to the first of the next
========  ==============  ==========================================

Weeks are ISO 8601 weeks: they start on Monday and belong to the ISO week-year of their
Thursday, so ``2026-W01`` starts on 2025-12-29 and 2027-01-01 falls in ``2026-W53``.

Clock changes are honoured, not smoothed over: a day on which daylight saving time
starts is 23 hours long in Europe/Berlin, the week around it 167 hours. Where local
midnight does not exist (a zone that springs forward at 00:00), the window starts at
the first instant of that local date. All comparisons are made in UTC, because Python
compares two datetimes that share a ``tzinfo`` by wall time and would get the
repeated hour of an autumn night wrong.

Example::

    >>> p = parse_period("week", "2026-W06", "UTC")
    >>> p.start.isoformat(), p.end.isoformat()
    ('2026-02-02T00:00:00+00:00', '2026-02-09T00:00:00+00:00')
    >>> p.next().ident
    '2026-W07'

Everything here is pure: no I/O, no clock. Pass ``now`` in (see :mod:`monitor.clock`).
Zones are IANA names or ``zoneinfo.ZoneInfo`` objects (any PEP 495 tzinfo works; pytz's
do not).
"""

from __future__ import annotations

import calendar
import re
from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone, tzinfo
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from monitor.errors import PeriodError

__all__ = [
    "KINDS",
    "Period",
    "parse_period",
    "period_containing",
    "latest_complete",
    "period_range",
    "periods_between",
]

KINDS = ("day", "week", "month")

_SHAPES = {
    "day": re.compile(r"([0-9]{4})-([0-9]{2})-([0-9]{2})"),
    "week": re.compile(r"([0-9]{4})-W([0-9]{2})"),
    "month": re.compile(r"([0-9]{4})-([0-9]{2})"),
}
_EXPECTED = {
    "day": "a day like 2026-02-03",
    "week": "an ISO week like 2026-W06",
    "month": "a month like 2026-02",
}


@dataclass(frozen=True, order=True)
class Period:
    """One window ``[start, end)`` of a job's calendar.

    Attributes
    ----------
    kind : str
        ``'day'``, ``'week'`` or ``'month'``.
    ident : str
        ISO 8601 identifier: ``2026-02-03``, ``2026-W06`` or ``2026-02``.
    start, end : datetime
        Aware datetimes in the job's zone; local midnights (or the first instant of the
        local date where midnight was skipped by a clock change).

    Notes
    -----
    Ordering is chronological among periods of one kind (identifiers sort as text).
    Build periods with :func:`parse_period` or :func:`period_containing`, not by hand.
    """

    kind: str
    ident: str
    start: datetime
    end: datetime

    @property
    def start_utc(self) -> datetime:
        return self.start.astimezone(timezone.utc)

    @property
    def end_utc(self) -> datetime:
        return self.end.astimezone(timezone.utc)

    @property
    def duration(self) -> timedelta:
        """Elapsed time in the window (23 h for a spring-forward day, 25 h in autumn)."""
        return self.end_utc - self.start_utc

    def next(self) -> Period:
        """The period that starts where this one ends."""
        return _build(self.kind, _step(self.kind, _first_day(self.kind, self.ident), +1), self.start.tzinfo)

    def previous(self) -> Period:
        """The period that ends where this one starts."""
        return _build(self.kind, _step(self.kind, _first_day(self.kind, self.ident), -1), self.start.tzinfo)

    def contains(self, instant: datetime) -> bool:
        """Whether the aware ``instant`` lies in ``[start, end)``."""
        moment = _utc(instant)
        return self.start_utc <= moment < self.end_utc

    def __str__(self) -> str:
        return self.ident


def parse_period(kind: str, ident: str, tz: str | tzinfo) -> Period:
    """The period of ``kind`` named ``ident``, cut in zone ``tz``.

    Raises
    ------
    PeriodError
        ``ident`` does not have the shape of ``kind`` or names a date that does not
        exist (month 13, 30 February, week 53 of a year with 52 ISO weeks).
    """
    kind = _check_kind(kind)
    zone = _zone(tz)
    match = _SHAPES[kind].fullmatch(ident) if isinstance(ident, str) else None
    if match is None:
        raise PeriodError(
            f"period {ident!r} does not fit period kind {kind!r}; expected {_EXPECTED[kind]}"
        )
    year, number = int(match.group(1)), int(match.group(2))
    problem = None
    if year < 1:
        problem = "years run from 0001 to 9999"
    elif kind == "week":
        weeks = _iso_weeks_in(year)
        if not 1 <= number <= weeks:
            problem = f"{year:04d} has {weeks} ISO weeks, W01 to W{weeks}"
    elif not 1 <= number <= 12:
        problem = "months run from 01 to 12"
    elif kind == "day":
        days = calendar.monthrange(year, number)[1]
        if not 1 <= int(match.group(3)) <= days:
            problem = f"{year:04d}-{number:02d} has {days} days"
    if problem is not None:
        raise PeriodError(f"period {ident!r} does not exist: {problem}; expected {_EXPECTED[kind]}")
    return _build(kind, _first_day(kind, ident), zone)


def period_containing(kind: str, instant: datetime, tz: str | tzinfo) -> Period:
    """The period of ``kind`` whose window holds the aware ``instant``.

    Raises
    ------
    ValueError
        ``instant`` is naive.
    """
    kind = _check_kind(kind)
    zone = _zone(tz)
    moment = _utc(instant)
    period = _build(kind, _first_of(kind, moment.astimezone(zone).date()), zone)
    # Windows tile the time line exactly; the local date can only disagree with them
    # in a zone whose clocks fall back across midnight. Walk to the window that holds it.
    while not period.contains(moment):
        period = period.next() if moment >= period.end_utc else period.previous()
    return period


def latest_complete(kind: str, now: datetime, tz: str | tzinfo) -> Period:
    """The latest period whose end is at or before ``now``.

    At ``now`` exactly equal to a boundary, the period ending there counts as complete.
    """
    return period_containing(kind, now, tz).previous()


def period_range(kind: str, first: str, last: str, tz: str | tzinfo) -> list[Period]:
    """Every period from ``first`` to ``last`` inclusive, oldest first.

    Raises
    ------
    PeriodError
        Either identifier is malformed, or ``first`` comes after ``last``.
    """
    begin = parse_period(kind, first, tz)
    stop = parse_period(kind, last, tz)
    if _first_day(kind, begin.ident) > _first_day(kind, stop.ident):
        raise PeriodError(
            f"period range {first!r} to {last!r} runs backwards; the first period must not come after the last"
        )
    periods = [begin]
    while periods[-1].ident != stop.ident:
        periods.append(periods[-1].next())
    return periods


def periods_between(kind: str, start_instant: datetime, end_instant: datetime, tz: str | tzinfo) -> list[Period]:
    """Every period whose window overlaps ``[start_instant, end_instant)``, oldest first.

    Empty when ``end_instant <= start_instant``. A window of zero length (a calendar day
    a zone skipped entirely) overlaps nothing and is left out.
    """
    start, end = _utc(start_instant), _utc(end_instant)
    if end <= start:
        return []
    periods = []
    period = period_containing(kind, start, tz)
    while period.start_utc < end:
        if period.start_utc < period.end_utc:
            periods.append(period)
        period = period.next()
    return periods


# -- internals (trusted input) ------------------------------------------------------


def _check_kind(kind: str) -> str:
    if kind not in KINDS:
        raise ValueError(f"unknown period kind {kind!r}; expected one of day, week, month")
    return kind


def _zone(tz: str | tzinfo) -> tzinfo:
    if isinstance(tz, tzinfo):
        return tz
    if isinstance(tz, str):
        try:
            return ZoneInfo(tz)
        except (ZoneInfoNotFoundError, ValueError, OSError):
            raise ValueError(f"unknown time zone {tz!r}; expected an IANA name like Europe/Berlin") from None
    raise TypeError(f"time zone must be a name or a tzinfo, not {type(tz).__name__}")


def _utc(instant: datetime) -> datetime:
    if instant.tzinfo is None or instant.utcoffset() is None:
        raise ValueError(f"instant {instant.isoformat()} has no time zone; pass an aware datetime")
    return instant.astimezone(timezone.utc)


def _iso_weeks_in(year: int) -> int:
    # 28 December always lies in the last ISO week of its year.
    return date(year, 12, 28).isocalendar().week


def _ident(kind: str, first: date) -> str:
    if kind == "day":
        return first.isoformat()
    if kind == "week":
        iso = first.isocalendar()
        return f"{iso.year:04d}-W{iso.week:02d}"
    return f"{first.year:04d}-{first.month:02d}"


def _first_day(kind: str, ident: str) -> date:
    """First calendar date of a well-formed identifier."""
    if kind == "day":
        return date.fromisoformat(ident)
    if kind == "week":
        return date.fromisocalendar(int(ident[:4]), int(ident[6:]), 1)
    return date(int(ident[:4]), int(ident[5:]), 1)


def _first_of(kind: str, day: date) -> date:
    """First calendar date of the period of ``kind`` holding ``day``."""
    if kind == "day":
        return day
    if kind == "week":
        return day - timedelta(days=day.weekday())
    return day.replace(day=1)


def _step(kind: str, first: date, steps: int) -> date:
    """First date of the period ``steps`` periods after the one starting on ``first``."""
    try:
        if kind == "day":
            return first + timedelta(days=steps)
        if kind == "week":
            return first + timedelta(weeks=steps)
        months = first.year * 12 + first.month - 1 + steps
        return date(months // 12, months % 12 + 1, 1)
    except (OverflowError, ValueError):
        side = "after" if steps > 0 else "before"
        raise PeriodError(f"there is no {kind} {side} {_ident(kind, first)} within years 0001 to 9999") from None


def _local_midnight(day: date, zone: tzinfo) -> datetime:
    # fold=0 gives the earlier of two repeated midnights; for a midnight inside a
    # spring-forward gap it yields the gap's end once normalised through UTC.
    naive = datetime(day.year, day.month, day.day, tzinfo=zone)
    return naive.astimezone(timezone.utc).astimezone(zone)


def _build(kind: str, first: date, zone: tzinfo) -> Period:
    ident = _ident(kind, first)
    try:
        start = _local_midnight(first, zone)
        end = _local_midnight(_step(kind, first, 1), zone)
    except (OverflowError, ValueError, PeriodError):
        raise PeriodError(f"period {ident!r} lies too close to the ends of years 0001 to 9999") from None
    return Period(kind, ident, start, end)
