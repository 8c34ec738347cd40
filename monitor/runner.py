"""One period from start to finish: read, analyse, compare with history, store, alert.

:class:`Job` is the Python API behind the command line::

    from monitor.config import load_config
    from monitor.runner import Job

    job = Job(load_config("configs/demo.yaml"))
    report = job.run("2026-W14")          # or job.run() for the latest complete period
    for event in report.events:
        print(event.kind, event.message)
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any, Callable, Iterable

from .alerts import RelayOutcome, build_sinks, relay
from .analysis import MetricResult, analyse_period
from .clock import Clock, SystemClock
from .config import JobConfig, config_hash
from .events import Baseline, Event, derive_events
from .history import History
from .periods import Period, latest_complete, parse_period, period_range
from .source import Source

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class PeriodReport:
    """The outcome of one period's run (the contract's ``run --json`` document)."""

    job: str
    period: Period
    metrics: tuple[MetricResult, ...]
    events: tuple[Event, ...]
    new_events: int
    rows: int
    null_segment_rows: int
    segments: tuple[str, ...]
    delivery: RelayOutcome

    def to_json(self) -> dict[str, Any]:
        return {
            "job": self.job,
            "period": self.period.ident,
            "start": self.period.start.isoformat(),
            "end": self.period.end.isoformat(),
            "rows": self.rows,
            "null_segment_rows": self.null_segment_rows,
            "segments_seen": list(self.segments),
            "metrics": [m.to_json() for m in self.metrics],
            "events": [e.to_json() for e in self.events],
            "alerts": {"sent": self.delivery.sent, "retrying": self.delivery.retrying,
                       "dead": self.delivery.dead},
        }


class Job:
    """A configured job: its source, history and alert sinks."""

    def __init__(self, config: JobConfig, clock: Clock | None = None,
                 source: Source | None = None, history: History | None = None):
        self.config = config
        self.clock = clock or SystemClock()
        self._source = source
        self._history = history
        self.sinks = build_sinks(config)

    @property
    def source(self) -> Source:
        if self._source is None:
            self._source = Source(self.config)
        return self._source

    @property
    def history(self) -> History:
        if self._history is None:
            self._history = History(self.config.history.url, self.config.job)
        return self._history

    def period(self, ident: str | None = None) -> Period:
        """The period named by ``ident``, or the latest complete one by the clock."""
        cfg = self.config
        if ident is None:
            return latest_complete(cfg.period, self.clock.now(), cfg.timezone)
        return parse_period(cfg.period, ident, cfg.timezone)

    def periods(self, first: str, last: str) -> list[Period]:
        return period_range(self.config.period, first, last, self.config.timezone)

    def run(self, period: Period | str | None = None) -> PeriodReport:
        """Compute one period, store it (replacing an earlier run of it) and deliver its alerts."""
        if not isinstance(period, Period):
            period = self.period(period)
        cfg = self.config
        log.info("job %s: computing %s [%s, %s)", cfg.job, period.ident, period.start, period.end)
        data = self.source.fetch(period)
        results = analyse_period(data.metrics, cfg)
        stored = self.history.previous(period)
        baseline = (
            Baseline.from_stored(stored.period, stored.segments, stored.metrics, cfg)
            if stored else Baseline.empty()
        )
        events = derive_events(cfg, results, data.segments, data.null_segment_rows, data.rows, baseline)
        fresh = self.history.store_period(
            period, results, events, [s.channel for s in self.sinks],
            computed_at=self.clock.now(), fingerprint=config_hash(cfg),
            rows=data.rows, null_segment_rows=data.null_segment_rows, segments=data.segments,
        )
        outcome = relay(self.history, self.sinks, self.clock)
        log.info("job %s: %s stored, %d events (%d new), alerts sent %d", cfg.job, period.ident,
                 len(events), len(fresh), outcome.sent)
        return PeriodReport(cfg.job, period, results, tuple(events), len(fresh), data.rows,
                            data.null_segment_rows, data.segments, outcome)

    def backfill(self, first: str, last: str,
                 progress: Callable[[int, int, Period], None] | None = None) -> list[PeriodReport]:
        """Run every period from ``first`` to ``last``, oldest first."""
        periods = self.periods(first, last)
        reports = []
        for i, p in enumerate(periods):
            if progress:
                progress(i, len(periods), p)
            reports.append(self.run(p))
        if progress and periods:
            progress(len(periods), len(periods), periods[-1])
        return reports

    def close(self) -> None:
        if self._source is not None:
            self._source.dispose()
        if self._history is not None:
            self._history.dispose()

    def __enter__(self) -> "Job":
        return self

    def __exit__(self, *exc: Iterable[Any]) -> None:
        self.close()
