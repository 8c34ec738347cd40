"""One period from start to finish: read, analyse, compare with history, store, alert.

:class:`Job` is the Python API behind the command line::

    from monitor.config import load_config
    from monitor.runner import Job

    job = Job(load_config("configs/demo.yaml"))
    report = job.run("2026-W14")          # or job.run() for the latest complete period
    for event in report.events:
        print(event.kind, event.message)

Every run goes through the period ledger (:mod:`monitor.store.ledger`): it first claims the
period's lease (another process holding it raises :class:`~monitor.errors.PeriodBusy`,
exit code 3: nothing started), marks the period ``running``, renews the lease while
it computes, and stores results, events, outbox rows and the ``done`` mark in one
transaction that also checks the lease is still ours. A failure on the way (source
unreachable, history not writable, anything unexpected) marks the period ``failed``
with the reason, releases the lease and records ``op_run_failed``; nothing of the
run is half-written. A period whose source has no rows is not stored: it is ``done``
with a note and ``op_period_empty``, and earlier results of it (if any) are kept.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, replace
from datetime import timedelta
from typing import Any, Callable, Iterable, Iterator, Sequence

from .delivery.relay import RELAY_WAIT_SECONDS, RelayOutcome, build_sinks, channel_kinds, op_channels, relay
from .analysis import analyse_period, load_statistics_in_background
from .clock import Clock, SystemClock
from .config import JobConfig, config_hash
from .errors import ConfigError, LeaseLost, PeriodBusy, PeriodError, SegwatchError
from .decisions import decide_period, previous_state
from .events import Baseline, derive_events, lookback
from .store.history import History, iso_utc
from .store.ledger import LEASE_SECONDS, Claim, Ledger, LedgerEntry
from .model import Event, MetricResult, RunSettings
from .periods import Period, latest_complete, parse_period, period_range
from .redact import one_line
from .source import Source

log = logging.getLogger(__name__)

#: At most this many never-completed periods before a run are computed first (:meth:`Job.owed_before`).
MAX_COMPUTED_FIRST = 12


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
    note: str | None = None  # why the period was not stored (the source had no rows)
    computed_first: tuple[str, ...] = ()  # skipped periods before this one, computed first (oldest first)

    def to_json(self, pairs: str = "all") -> dict[str, Any]:
        """The ``run --json`` document; ``pairs`` says which pairs each metric holds
        (:data:`monitor.model.PAIR_FORMS`: ``top`` is what ``run --json`` prints by default)."""
        doc = {
            "job": self.job,
            "period": self.period.ident,
            "start": self.period.start.isoformat(),
            "end": self.period.end.isoformat(),
            "rows": self.rows,
            "null_segment_rows": self.null_segment_rows,
            "segments_seen": list(self.segments),
            "metrics": [m.to_json(pairs=pairs) for m in self.metrics],
            "events": [e.to_json() for e in self.events],
            "alerts": {"sent": self.delivery.sent, "retrying": self.delivery.retrying,
                       "dead": self.delivery.dead},
        }
        if self.note:
            doc["note"] = self.note
        if self.computed_first:
            doc["computed_first"] = list(self.computed_first)
        return doc


class Job:
    """A configured job: its source, history, ledger and alert sinks.

    ``lease_seconds`` is how long a claim on a period lasts without renewal (a
    running period renews it every third of that); ``relay_wait`` how long a run
    waits for another process's alert delivery before leaving its alerts pending.
    """

    def __init__(self, config: JobConfig, clock: Clock | None = None,
                 source: Source | None = None, history: History | None = None, *,
                 lease_seconds: float = LEASE_SECONDS, relay_wait: float = RELAY_WAIT_SECONDS):
        self.config = config
        self.clock = clock or SystemClock()
        self._source = source
        self._history = history
        self._ledger: Ledger | None = None
        self.lease_seconds = lease_seconds
        self.relay_wait = relay_wait
        self.sinks = build_sinks(config, self._report_attachment if config.report.attach else None)

    def _report_attachment(self, period: str) -> tuple[str, str]:
        """The stored period's HTML report, for email digests (``report.attach``)."""
        from .present.report import report_html  # draws with matplotlib: imported only when needed

        return f"{self.config.job}-{period}.html", report_html(self.history, self.config, period)

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

    @property
    def ledger(self) -> Ledger:
        if self._ledger is None:
            self._ledger = Ledger(self.history, self.clock, self.lease_seconds, op_channels(self.sinks))
        return self._ledger

    @property
    def settle(self) -> timedelta:
        return timedelta(minutes=self.config.scheduling.settle_minutes)

    def period(self, ident: str | None = None) -> Period:
        """The period named by ``ident``, or the latest complete one by the clock.

        Raises :class:`~monitor.errors.PeriodError` for a period that has not started yet
        (no record can be in it: computing it would store an empty or partial answer).
        """
        cfg = self.config
        if ident is None:
            return latest_complete(cfg.period, self.clock.now(), cfg.timezone)
        period = parse_period(cfg.period, ident, cfg.timezone)
        self._refuse_future(period, f"period {period.ident}")
        return period

    def periods(self, first: str, last: str) -> list[Period]:
        """Every period from ``first`` to ``last``; refuses a range that reaches a period that
        has not started by the clock (no record can be in it: it would only add empty ledger
        rows). The running period may end a range (as ``run --period`` may compute it);
        ``serve`` computes it again once it has closed."""
        found = period_range(self.config.period, first, last, self.config.timezone)
        if found:
            self._refuse_future(found[-1], f"--to {found[-1].ident}")
        return found

    def _refuse_future(self, period: Period, what: str) -> None:
        now = self.clock.now()
        if period.start_utc > now:
            latest = latest_complete(self.config.period, now, self.config.timezone)
            raise PeriodError(f"{what}: that period of job {self.config.job} has not started yet (it starts "
                              f"{period.start:%Y-%m-%d %H:%M} {period.start.tzinfo}); the latest complete "
                              f"period is {latest.ident}")

    def settled(self, entry: LedgerEntry | None, period: Period) -> bool:
        """Whether ``entry`` says ``period`` is done from a run made after it closed and settled."""
        return (entry is not None and entry.state == "done" and entry.finished_at is not None
                and entry.finished_at >= period.end_utc + self.settle)

    def owed_before(self, period: Period) -> list[Period]:
        """The periods between the latest stored one and ``period`` that were never
        completed (failed, interrupted or not attempted), oldest first.

        Events compare a period with the one immediately before it; a run of a later
        period over such a gap would compare with an older period and announce a change
        that the skipped period announces again when it is computed. :meth:`run` computes
        them first. A period done without rows ends the walk (there is nothing to
        compute; the next period is then judged alone, and says so). Beyond
        :data:`MAX_COMPUTED_FIRST` periods nothing is filled in.
        """
        stored = self.history.recent(period, 1)
        if not stored:
            return []
        latest, gap, p = stored[0].period, [], period.previous()
        while p.ident != latest:
            entry = self.ledger.entry(p.ident)
            if entry is not None and entry.state == "done":
                break
            gap.append(p)
            if len(gap) > MAX_COMPUTED_FIRST:
                log.info("job %s: %d periods before %s were never completed; they are not computed first "
                            "(backfill them): %s is judged alone", self.config.job, len(gap), period.ident,
                            period.ident)
                return []
            p = p.previous()
        return gap[::-1]

    def run(self, period: Period | str | None = None, *, only_if_owed: bool = False, store: bool = True,
            deliver: bool | None = None, fill: bool = True,
            announce_empty: bool = True) -> PeriodReport | None:
        """Compute one period, store it (replacing an earlier run of it) and deliver its alerts.

        Raises :class:`~monitor.errors.PeriodBusy` when another process holds the
        period. With ``only_if_owed`` (the scheduler's catch-up), a period that became
        done (and settled) meanwhile is left alone and None is returned.

        ``store=False`` (``segwatch run --dry-run``) computes the period and its events
        against the stored history but writes nothing -- no ledger mark, no results, no
        outbox -- and sends nothing, so a config can be tried safely. ``deliver=False``
        with ``store=True`` stores the results and leaves their alerts pending in the
        outbox (``segwatch alerts --retry`` or the next run sends them).
        ``announce_empty=False`` stores no ``op_period_empty`` for a period without rows
        (a backfill announces a stretch of them once: :meth:`backfill_runs`).
        """
        if deliver is None:
            deliver = store
        if deliver and not store:
            raise ValueError("deliver=True needs store=True: alerts are sent from the stored outbox")
        if not isinstance(period, Period):
            period = self.period(period)
        if not store:
            return self._preview(period)
        cfg = self.config
        first: list[str] = []
        if fill:
            for owed in self.owed_before(period):
                log.info("job %s: %s was never completed; computing it before %s, which is compared with it",
                         cfg.job, owed.ident, period.ident)
                try:
                    self.run(owed, deliver=deliver, fill=False)
                except PeriodBusy as exc:
                    log.warning("job %s: %s", cfg.job, exc)
                    break
                first.append(owed.ident)
        claim = self.ledger.claim(period.ident)
        if not claim.won:
            raise PeriodBusy(f"period {period.ident} of job {cfg.job} is being computed by {claim.owner} "
                             f"until {iso_utc(claim.expires_at)}; not started (if that process has stopped, "
                             f"run again after that time)")
        if only_if_owed and self.settled(claim.entry, period):
            self.ledger.release(claim)
            log.info("job %s: %s was completed by another run meanwhile", cfg.job, period.ident)
            return None
        try:
            entry = self.ledger.start(claim)
            log.info("job %s: computing %s [%s, %s) (attempt %d)", cfg.job, period.ident, period.start,
                     period.end, entry.attempts)
            with self.ledger.heartbeat(claim):
                report = self._compute(period, claim, deliver, announce_empty)
        except LeaseLost:
            raise
        except ConfigError:
            # the config is wrong (found only now: a column that is not there, a URL no driver
            # opens); the period did not fail: its ledger row is put back as it was
            try:
                self.ledger.abandon(claim)
            except Exception as err:  # noqa: BLE001 - the config error is what the caller sees
                self.ledger.keep_as_own(claim)
                log.info("job %s: could not put back the ledger row of %s: %s", cfg.job, period.ident, err)
            raise
        except BaseException as exc:
            self._failed(claim, exc)
            raise
        return replace(report, computed_first=tuple(first)) if first else report

    def _preview(self, period: Period) -> PeriodReport:
        """One period computed and compared with the stored history, nothing written or sent."""
        cfg = self.config
        log.info("job %s: computing %s [%s, %s) as a dry run", cfg.job, period.ident, period.start, period.end)
        data = self.source.fetch(period)
        nothing = RelayOutcome()
        if data.rows == 0:
            return PeriodReport(cfg.job, period, (), (), 0, 0, 0, (), nothing,
                                "the source had no rows in this period; dry run: nothing stored, nothing sent")
        stored = self._stored_before(period)
        results = decide_period(analyse_period(data.metrics, cfg), cfg,
                                previous_state(stored, period.previous().ident, cfg))
        baseline = Baseline.from_history(stored, cfg)
        events = derive_events(cfg, results, data.segments, data.null_segment_rows, data.rows, baseline)
        return PeriodReport(cfg.job, period, results, tuple(events), 0, data.rows, data.null_segment_rows,
                            data.segments, nothing, "dry run: nothing stored, nothing sent")

    def _stored_before(self, period: Period) -> list[Any]:
        """The stored periods a dry run compares with; none when the history has no tables yet
        (they are not created: a dry run writes nothing)."""
        import sqlalchemy as sa

        try:
            if not sa.inspect(self.history.engine).has_table("sw_runs"):
                return []
        except sa.exc.SQLAlchemyError as exc:
            log.warning("job %s: dry run without the history (%s): every finding counts as new", self.config.job,
                        exc.__class__.__name__)
            return []
        return self.history.recent(period, lookback(self.config.confirm))

    def _compute(self, period: Period, claim: Claim, deliver: bool = True,
                 announce_empty: bool = True) -> PeriodReport:
        cfg = self.config
        # a server computes the sums while this process waits: load scipy meanwhile
        loading = load_statistics_in_background() if self.source.remote else None
        data = self.source.fetch(period)
        if loading is not None:
            loading.join()
        if data.rows == 0:
            self.ledger.finish_empty(claim, period.start, period.end, announce=announce_empty)
            outcome = self.deliver() if deliver else RelayOutcome()
            note = "the source had no rows in this period; nothing was stored"
            log.info("job %s: %s skipped: %s", cfg.job, period.ident, note)
            return PeriodReport(cfg.job, period, (), (), 0, 0, 0, (), outcome, note)
        stored = self.history.recent(period, lookback(cfg.confirm))
        results = decide_period(analyse_period(data.metrics, cfg), cfg,
                                previous_state(stored, period.previous().ident, cfg))
        baseline = Baseline.from_history(stored, cfg)
        events = derive_events(cfg, results, data.segments, data.null_segment_rows, data.rows, baseline)
        fresh = self.history.store_period(
            period, results, events, channel_kinds(self.sinks),
            computed_at=self.clock.now(), fingerprint=config_hash(cfg),
            rows=data.rows, null_segment_rows=data.null_segment_rows, segments=data.segments,
            lease_owner=claim.owner, settings=RunSettings.of(cfg, results),
        )
        outcome = self.deliver() if deliver else RelayOutcome()
        log.info("job %s: %s stored, %d events (%d new), alerts sent %d", cfg.job, period.ident,
                 len(events), len(fresh), outcome.sent)
        return PeriodReport(cfg.job, period, results, tuple(events), len(fresh), data.rows,
                            data.null_segment_rows, data.segments, outcome)

    def _failed(self, claim: Claim, exc: BaseException) -> None:
        """Record a failed attempt (ledger, lease, op event) and try to log it; never raises."""
        if isinstance(exc, SegwatchError):
            reason = str(exc)
        elif isinstance(exc, KeyboardInterrupt):
            reason = "interrupted"
        else:
            reason = f"unexpected {type(exc).__name__}: {one_line(exc)}"
        try:
            self.ledger.fail(claim, reason)
        except Exception as err:  # noqa: BLE001 - the original error is what the caller sees
            # the history is unreachable: the failure is recorded (with its time) and the lease
            # given back as soon as it answers again; until then this process treats the lease as its own
            self.ledger.owe_failure(claim, reason)
            log.info("job %s: could not record the failure of %s in the history (%s); it is recorded when "
                     "the history answers again", self.config.job, claim.resource, err)
            return
        log.info("job %s: %s failed and is recorded as failed: %s", self.config.job, claim.resource, reason)
        if isinstance(exc, Exception):
            try:
                relay(self.history, [s for s in self.sinks if s.channel in self.ledger.op_channels], self.clock,
                      lease_seconds=self.lease_seconds, ledger=self.ledger)
            except Exception as err:  # noqa: BLE001
                log.warning("job %s: could not write the failure to the alert log: %s", self.config.job, err)

    def deliver(self, *, force: bool = False, wait: float | None = None) -> RelayOutcome:
        """Deliver the job's due alerts now (all pending and, after :meth:`History.requeue`, dead ones)."""
        return relay(self.history, self.sinks, self.clock, force=force,
                     wait=self.relay_wait if wait is None else wait, lease_seconds=self.lease_seconds,
                     ledger=self.ledger)

    def backfill(self, first: str, last: str,
                 progress: Callable[[int, int, Period], None] | None = None) -> list[PeriodReport]:
        """Run every period from ``first`` to ``last``, oldest first (:meth:`backfill_runs`)."""
        periods = self.periods(first, last)
        reports = []
        if progress and periods:
            progress(0, len(periods), periods[0])
        for i, report in enumerate(self.backfill_runs(periods)):
            reports.append(report)
            if progress and i + 1 < len(periods):
                progress(i + 1, len(periods), periods[i + 1])
        if progress and periods:
            progress(len(periods), len(periods), periods[-1])
        return reports

    def backfill_runs(self, periods: Sequence[Period]) -> Iterator[PeriodReport]:
        """Run ``periods`` oldest first, yielding each report as it is done. A stretch of
        periods without rows (years before the source's first record) is announced as one
        ``op_period_empty`` when it ends, not one per period."""
        stretch: list[Period] = []
        try:
            for p in periods:
                report = self.run(p, announce_empty=False)
                if report.rows == 0:
                    stretch.append(p)
                else:
                    self._announce_empty(stretch)
                    stretch = []
                yield report
        finally:
            self._announce_empty(stretch)

    def _announce_empty(self, stretch: Sequence[Period]) -> None:
        """One ``op_period_empty`` for consecutive periods without rows (never raises)."""
        if not stretch:
            return
        first, last = stretch[0], stretch[-1]
        if len(stretch) == 1:
            text = (f"Period {first.ident} was skipped: the source had no rows from {first.start.isoformat()} "
                    f"to {first.end.isoformat()}.")
        else:
            text = (f"Periods {first.ident} to {last.ident} ({len(stretch)} periods) were skipped: the source had "
                    f"no rows from {first.start.isoformat()} to {last.end.isoformat()}.")
        event = Event("op_period_empty", None, None, text,
                      {"start": first.start.isoformat(), "end": last.end.isoformat(), "periods": len(stretch),
                       "first": first.ident, "last": last.ident},
                      subject="" if len(stretch) == 1 else f"{first.ident}..{last.ident}")
        try:
            self.ledger.record(first.ident, event)
        except Exception as err:  # noqa: BLE001 - the ledger already says each period is done and empty
            log.warning("job %s: could not record the empty periods %s to %s: %s", self.config.job, first.ident,
                        last.ident, err)

    def close(self) -> None:
        if self._source is not None:
            self._source.dispose()
        if self._history is not None:
            self._history.dispose()

    def __enter__(self) -> "Job":
        return self

    def __exit__(self, *exc: Iterable[Any]) -> None:
        self.close()
