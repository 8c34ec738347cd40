"""The source floor: reading one period from the job's database.

:mod:`~monitor.source.reader` (:class:`Source`) runs the period's queries,
:mod:`~monitor.source.pushdown` builds the aggregate SQL and
:mod:`~monitor.source.sampling` the seeded sample; what differs per database engine
comes from :mod:`monitor.engines`.
"""

from __future__ import annotations

from .reader import PeriodData, Source, SourceInfo, summarise_frame

__all__ = ["PeriodData", "Source", "SourceInfo", "summarise_frame"]
