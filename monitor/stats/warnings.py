"""Warning classes of segwatch's statistics package.

Degenerate data (one segment, no variance, all ties) is *not* reported by warnings:
every result type carries a ``note`` with the reason and NaN in place of the number
(see :mod:`monitor.stats.omnibus`). The classes below are for the rarer case where a
number *is* returned but the caller should know it was repaired or is less accurate
than usual, e.g. inconsistent pushed-down sums in
:meth:`monitor.stats.summary.Moments.from_shifted_sums`.

The hierarchy is small on purpose; filter on :class:`StatsWarning` to catch them all::

    StatsWarning (UserWarning)
    ├── DegenerateDataWarning
    └── InaccurateResultWarning
"""

from __future__ import annotations

__all__ = ["StatsWarning", "DegenerateDataWarning", "InaccurateResultWarning"]


class StatsWarning(UserWarning):
    """Base class of every warning issued by ``monitor.stats``."""


class DegenerateDataWarning(StatsWarning):
    """The data cannot support the requested quantity; NaN was returned in its place."""


class InaccurateResultWarning(StatsWarning):
    """A value was returned, but repaired (e.g. clamped) or computed with reduced accuracy."""
