"""Where "now" comes from.

Everything that needs the current time takes a :class:`Clock`, so period windows,
schedules and catch-up can be tested at exact instants (DST changes included)::

    clock = FixedClock(datetime(2026, 3, 30, 6, 0, tzinfo=timezone.utc))
    latest_complete("week", clock.now(), "Europe/Berlin").ident   # '2026-W13'

Clocks always answer in UTC; converting to the job's zone is the caller's business.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from typing import Protocol, runtime_checkable

__all__ = ["Clock", "SystemClock", "FixedClock"]


@runtime_checkable
class Clock(Protocol):
    """Anything with a ``now()`` that returns an aware UTC datetime."""

    def now(self) -> datetime:  # pragma: no cover - protocol
        ...


class SystemClock:
    """The real wall clock, in UTC."""

    def now(self) -> datetime:
        return datetime.now(timezone.utc)

    def __repr__(self) -> str:
        return "SystemClock()"


class FixedClock:
    """A clock that stands still until told to move; for tests.

    Parameters
    ----------
    instant : datetime
        An aware datetime; it is kept (and returned) in UTC.
    """

    def __init__(self, instant: datetime) -> None:
        self._now = _as_utc(instant)

    def now(self) -> datetime:
        return self._now

    def set(self, instant: datetime) -> None:
        """Move the clock to ``instant`` (aware)."""
        self._now = _as_utc(instant)

    def advance(self, delta: timedelta) -> None:
        """Move the clock forward (or back, with a negative ``delta``)."""
        self._now = self._now + delta

    def __repr__(self) -> str:
        return f"FixedClock({self._now.isoformat()})"


def _as_utc(instant: datetime) -> datetime:
    if instant.tzinfo is None or instant.utcoffset() is None:
        raise ValueError(f"FixedClock needs an aware datetime, got naive {instant.isoformat()}")
    return instant.astimezone(timezone.utc)
