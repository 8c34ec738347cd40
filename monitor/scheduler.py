"""``segwatch serve``: run jobs on their cron schedule, catching up whatever is owed.

What is owed comes from the period ledger (:mod:`monitor.store.ledger`), never from the
scheduler's state: APScheduler only says *when* to look. Three pieces:

:func:`due_periods` (pure)
    Given a job's config, its ledger and ``now``, the periods to compute, oldest first:

    * **catch-up** — every closed period from the one after the newest ``done`` period
      up to the latest closed one. A period is *closed* when its end plus
      ``scheduling.settle_minutes`` is at or before ``now``. With an empty ledger only
      the latest closed period is owed: ``serve`` does not backfill history on its own
      (use ``segwatch backfill`` for that). A period counts as done only when it was
      computed after it closed and settled; one computed early (a manual ``run`` of
      the running week) is computed again once it has closed.
    * **retry** — every closed period the ledger holds as ``pending``, ``failed`` or
      ``running`` (a crash, or another process: the lease decides).
    * **look-back** — the last ``scheduling.lookback`` closed periods (the newest
      included) that are done, computed again to pick up late data. Re-running a
      period reconciles its events by key, so only real changes raise events and
      alerts. Look-back never backfills: it recomputes periods computed before.

:func:`tick`
    Computes the due periods of one job in order and stops at the first one that
    fails (later periods compare against it, so they wait) or that another process
    holds (it is left to that process; the next tick looks again). Between periods it
    honours a stop request. After each computed period with rows it writes the
    job's report when ``report.path`` is set (:func:`monitor.present.report.write_report`). A *sweep* tick (``sweep=True``) starts nothing new: it
    retries failed periods whose backoff is over, finishes periods left pending or
    interrupted, and delivers alerts whose backoff is over.

:class:`Service`
    An APScheduler 3 ``BackgroundScheduler`` in UTC, rebuilt in memory at every start
    (no persistent job store; the ledger holds the truth). Per job: one cron job from
    ``schedule`` via ``CronTrigger.from_crontab(schedule, timezone=UTC)`` that ticks
    at start and then on the schedule, and one interval job (every
    ``retry_minutes``) that sweeps. Jobs run with ``misfire_grace_time=None``,
    ``coalesce=True`` and ``max_instances=1``. Missed and failed runs are logged; a
    scheduled run skipped because the previous one was still going is logged and
    stored as the operational event ``op_run_skipped``.

The schedule is read in UTC, whatever the job's ``timezone``: ``"0 6 * * mon"`` fires
at 06:00 UTC every Monday, all year. Period windows are cut in the job's zone by
:mod:`monitor.periods`, and a tick computes what is closed at that moment, so a
clock change can neither skip nor repeat a period.

Stopping: :meth:`Service.shutdown` (``serve`` calls it on SIGINT/SIGTERM) lets the
period being computed finish, starts no other, and waits for the running ticks.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Mapping, Sequence

from apscheduler.events import (
    EVENT_JOB_ERROR,
    EVENT_JOB_MAX_INSTANCES,
    EVENT_JOB_MISSED,
    JobExecutionEvent,
    JobSubmissionEvent,
)
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from sqlalchemy.exc import SQLAlchemyError

from .delivery.relay import RelayOutcome
from .clock import Clock, SystemClock
from .config import JobConfig
from .errors import HistoryError, PeriodBusy, PeriodError, UsageError
from .model import Event
from .redact import one_line, redact
from .store.history import utc_aware
from .store.ledger import LEASE_SECONDS, LedgerEntry
from .periods import Period, latest_complete, parse_period
from .runner import Job

__all__ = ["Due", "TickReport", "due_periods", "ledger_state", "tick", "write_report", "Service",
           "RETRY_MINUTES"]

log = logging.getLogger(__name__)

UTC = timezone.utc
#: Default interval of the sweep that retries failed periods and due alerts.
RETRY_MINUTES = 5.0


@dataclass(frozen=True)
class Due:
    """A period to compute and why: ``catch-up``, ``retry`` or ``look-back``."""

    period: Period
    reason: str


@dataclass(frozen=True)
class TickReport:
    """What one tick did. A tick stops at the first ``failed`` or ``busy`` period."""

    job: str
    at: datetime
    due: tuple[str, ...]
    computed: tuple[str, ...] = ()
    skipped: tuple[str, ...] = ()  # done by another process meanwhile, or empty at the source
    busy: tuple[str, str] | None = None  # (period, holder)
    failed: tuple[str, str] | None = None  # (period, reason)
    stopped: bool = False
    delivery: RelayOutcome = field(default_factory=RelayOutcome)


def closed_by(config: JobConfig, now: datetime) -> Period:
    """The latest period of ``config`` that is closed at ``now`` (end + settle delay <= now)."""
    settle = timedelta(minutes=config.scheduling.settle_minutes)
    return latest_complete(config.period, now - settle, config.timezone)


def due_periods(config: JobConfig, ledger: Mapping[str, LedgerEntry], now: datetime, *,
                new: bool = True, lookback: bool = True, respect_backoff: bool = False) -> list[Due]:
    """The periods a tick at ``now`` should compute, oldest first (see the module notes).

    Parameters
    ----------
    ledger : mapping of period identifier to LedgerEntry
        The job's ledger (:meth:`monitor.store.ledger.Ledger.entries`, or :func:`ledger_state`).
        Identifiers that are not periods of the job's kind (the config changed) are ignored.
    new : bool
        Include catch-up of periods the ledger has never seen (a scheduled tick).
    lookback : bool
        Include the ``scheduling.lookback`` recomputations.
    respect_backoff : bool
        Leave out a failed period whose ``next_attempt_at`` is later than ``now``, and
        every period after it (a sweep).
    """
    kind, tz = config.period, config.timezone
    settle = timedelta(minutes=config.scheduling.settle_minutes)
    last = latest_complete(kind, now - settle, tz)

    def closed(p: Period) -> bool:
        return p.end_utc + settle <= now

    def settled(p: Period, e: LedgerEntry) -> bool:
        return e.state == "done" and e.finished_at is not None and e.finished_at >= p.end_utc + settle

    known: dict[str, tuple[Period, LedgerEntry]] = {}
    for ident, entry in ledger.items():
        try:
            known[ident] = (parse_period(kind, ident, tz), entry)
        except PeriodError:
            log.debug("job %s: ledger period %r is not a %s; ignored", config.job, ident, kind)

    due: dict[str, Due] = {}
    if new:
        done = [p for p, e in known.values() if settled(p, e) and closed(p)]
        p = max(done, key=lambda q: q.start_utc).next() if done else last
        while p.start_utc <= last.start_utc:
            due[p.ident] = Due(p, "catch-up")
            p = p.next()
    blocked: datetime | None = None
    for p, e in known.values():
        if p.ident in due or not closed(p) or settled(p, e):
            continue
        if e.state == "done" and not new:
            continue  # computed before it settled: the next scheduled tick redoes it
        if respect_backoff and e.state == "failed" and e.next_attempt_at is not None and e.next_attempt_at > now:
            blocked = p.start_utc if blocked is None else min(blocked, p.start_utc)
            continue
        due[p.ident] = Due(p, "retry")
    if lookback and config.scheduling.lookback:
        p = last
        for _ in range(config.scheduling.lookback):
            if p.ident not in due and p.ident in known and settled(*known[p.ident]):
                due[p.ident] = Due(p, "look-back")
            p = p.previous()
    ordered = sorted(due.values(), key=lambda d: d.period.start_utc)
    if blocked is not None:
        ordered = [d for d in ordered if d.period.start_utc < blocked]
    return ordered


def ledger_state(job: Job) -> dict[str, LedgerEntry]:
    """The job's ledger, plus a ``done`` entry for every stored period the ledger lacks
    (history written before the ledger existed)."""
    entries = job.ledger.entries()
    for row in job.history.periods():
        if row["period"] not in entries:
            entries[row["period"]] = LedgerEntry(row["period"], "done", 1, finished_at=utc_aware(row["computed_at"]))
    return entries


def tick(job: Job, now: datetime | None = None, *, stop: threading.Event | None = None,
         sweep: bool = False) -> TickReport:
    """Compute what is due for ``job`` at ``now`` (default: the job's clock), oldest first.

    Never raises for a failed period: the failure is in the ledger, the log and the
    returned report, and the tick stops there.
    """
    cfg = job.config
    now = now or job.clock.now()
    try:
        job.ledger.settle_owed()  # what an outage of the history left unrecorded
        due = due_periods(cfg, ledger_state(job), now, new=not sweep, lookback=not sweep, respect_backoff=sweep)
        if due:
            log.info("job %s: %s due: %s", cfg.job, "retries" if sweep else "periods",
                     ", ".join(f"{d.period.ident} ({d.reason})" for d in due))
        job.ledger.register([d.period.ident for d in due if d.reason != "look-back"])
    except (HistoryError, SQLAlchemyError) as exc:
        # the history is unreachable: nothing can start; the outage is stored once it answers again
        reason = str(exc) if isinstance(exc, HistoryError) else (
            f"cannot read the ledger of job {cfg.job} in the history at {redact(job.history.url)}: {one_line(exc)}")
        job.ledger.owe_outage(reason)
        log.error("job %s: %s; the next tick tries again", cfg.job, reason)
        return TickReport(cfg.job, now, (), failed=("", reason))
    computed: list[str] = []
    skipped: list[str] = []
    busy = failed = None
    stopped = False
    for d in due:
        if stop is not None and stop.is_set():
            stopped = True
            log.info("job %s: stopping before %s", cfg.job, d.period.ident)
            break
        try:
            report = job.run(d.period, only_if_owed=d.reason != "look-back")
        except PeriodBusy as exc:
            busy = (d.period.ident, str(exc))
            log.info("job %s: %s", cfg.job, exc)
            break
        except Exception as exc:  # noqa: BLE001 - recorded in the ledger by Job.run; the tick stops here
            failed = (d.period.ident, str(exc))
            log.error("job %s: period %s failed (%s); later periods wait for it: %s", cfg.job, d.period.ident,
                      d.reason, exc)
            break
        if report is None or report.note:
            skipped.append(d.period.ident)
            continue
        computed.append(d.period.ident)
        write_report(job, d.period)
    try:
        delivery = job.deliver(wait=0.0)
    except Exception as exc:  # noqa: BLE001 - undelivered alerts stay pending for the next tick
        log.error("job %s: alert delivery failed: %s", cfg.job, exc)
        delivery = RelayOutcome()
    return TickReport(cfg.job, now, tuple(d.period.ident for d in due), tuple(computed), tuple(skipped),
                      busy, failed, stopped, delivery)


def write_report(job: Job, period: Period) -> Path | None:
    """Write the job's report for ``period`` when ``report.path`` is set
    (:func:`monitor.present.report.write_report`); a failure is logged, never raised."""
    target = job.config.report.path
    if target is None:
        return None
    out = Path(str(target).replace("{period}", period.ident))
    try:
        # imported here, not at the top: the report draws with matplotlib, which a serve
        # process without report.path never needs
        from .present import report

        report.write_report(job, period, out)
    except Exception as exc:  # noqa: BLE001 - a report never fails the run
        log.error("job %s: report for %s not written to %s: %s", job.config.job, period.ident, out, exc)
        return None
    log.info("job %s: report for %s written to %s", job.config.job, period.ident, out)
    return out


class Service:
    """Every job on its schedule, in one process (see the module notes).

    Parameters
    ----------
    configs : sequence of JobConfig
        Each must have a ``schedule``; job names must differ.
    clock : Clock, optional
        For the jobs' timestamps and lease expiry, and the times the service
        schedules from (APScheduler's own waiting runs on the wall clock).
    retry_minutes : float
        Interval of the sweep (retries of failed periods and of alerts in backoff).
    """

    def __init__(self, configs: Sequence[JobConfig], *, clock: Clock | None = None,
                 retry_minutes: float = RETRY_MINUTES, lease_seconds: float = LEASE_SECONDS):
        if not configs:
            raise UsageError("serve: give at least one config file")
        seen: dict[str, Path] = {}
        for cfg in configs:
            if cfg.schedule is None:
                raise UsageError(f"{cfg.path}: schedule: missing; `serve` needs one, e.g. schedule: \"0 6 * * mon\" "
                                 "(cron fields, read in UTC)")
            if cfg.job in seen:
                raise UsageError(f"{cfg.path}: job {cfg.job!r} is also defined by {seen[cfg.job]}; "
                                 "give each job its own name (key `job`)")
            seen[cfg.job] = cfg.path
        if not retry_minutes > 0:
            raise UsageError(f"--retry-minutes: must be more than 0 (given: {retry_minutes})")
        self.clock = clock or SystemClock()
        self.jobs = {cfg.job: Job(cfg, clock=self.clock, lease_seconds=lease_seconds, relay_wait=0.0) for cfg in configs}
        self.retry_minutes = retry_minutes
        self.stop_event = threading.Event()
        self._locks = {name: threading.Lock() for name in self.jobs}
        never_drop = {"misfire_grace_time": None, "coalesce": True, "max_instances": 1}
        self.scheduler = BackgroundScheduler(timezone=UTC, job_defaults=never_drop)
        for name, job in self.jobs.items():
            self.scheduler.add_job(
                self._tick, CronTrigger.from_crontab(job.config.schedule, timezone=UTC), args=[name],
                id=f"tick:{name}", name=f"{name}: schedule {job.config.schedule}", **never_drop,
            )
            self.scheduler.add_job(
                self._sweep, IntervalTrigger(minutes=retry_minutes, timezone=UTC), args=[name],
                id=f"sweep:{name}", name=f"{name}: retries every {retry_minutes:g} min", **never_drop,
            )
        self.scheduler.add_listener(self._on_event, EVENT_JOB_MISSED | EVENT_JOB_ERROR | EVENT_JOB_MAX_INSTANCES)

    def start(self, catch_up: bool = True) -> None:
        """Start the scheduler; with ``catch_up``, every job ticks right away."""
        if catch_up:
            now = self.clock.now().astimezone(UTC)
            for name in self.jobs:
                self.scheduler.modify_job(f"tick:{name}", next_run_time=now)
        self.scheduler.start()

    def next_ticks(self) -> dict[str, datetime | None]:
        """When each job's next scheduled tick is due (after the start-up catch-up)."""
        out = {}
        now = self.clock.now().astimezone(UTC)
        for name, job in self.jobs.items():
            trigger = CronTrigger.from_crontab(job.config.schedule, timezone=UTC)
            out[name] = trigger.get_next_fire_time(None, now)
        return out

    def shutdown(self) -> None:
        """Finish the period being computed, start nothing else, wait for running ticks, close."""
        self.stop_event.set()
        if self.scheduler.running:
            self.scheduler.shutdown(wait=True)
        for job in self.jobs.values():
            job.close()

    # -------------------------------------------------------------- scheduled callables

    def _tick(self, name: str) -> None:
        job = self.jobs[name]
        with self._locks[name]:
            if self.stop_event.is_set():
                return
            report = tick(job, stop=self.stop_event)
        log.info("job %s: tick done: computed %s%s", name, ", ".join(report.computed) or "nothing",
                 f"; failed {report.failed[0]}" if report.failed else "")

    def _sweep(self, name: str) -> None:
        lock = self._locks[name]
        if not lock.acquire(blocking=False):
            return  # the scheduled tick is running; it does everything a sweep would
        try:
            if not self.stop_event.is_set():
                tick(self.jobs[name], stop=self.stop_event, sweep=True)
        finally:
            lock.release()

    def _on_event(self, event: JobSubmissionEvent | JobExecutionEvent) -> None:
        job_id = getattr(event, "job_id", "")
        kind, _, name = job_id.partition(":")
        if event.code == EVENT_JOB_MISSED:
            log.warning("scheduled run %s at %s was missed", job_id, getattr(event, "scheduled_run_time", "?"))
        elif event.code == EVENT_JOB_ERROR:
            log.error("scheduled run %s failed: %r", job_id, getattr(event, "exception", None))
        elif event.code == EVENT_JOB_MAX_INSTANCES:
            times = list(getattr(event, "scheduled_run_times", None) or [])
            if kind != "tick" or name not in self.jobs:
                log.debug("%s skipped: still running", job_id)
                return
            self.record_skipped(name, times)

    def record_skipped(self, name: str, times: Sequence[datetime]) -> None:
        """Log and store ``op_run_skipped`` for scheduled ticks of ``name`` that could not start."""
        job = self.jobs[name]
        for when in times or [self.clock.now()]:
            when = when.astimezone(UTC)
            period = closed_by(job.config, when)
            log.warning("job %s: the run scheduled at %s was skipped: the previous one is still running",
                        name, when.isoformat())
            try:
                job.ledger.record(period.ident, Event(
                    "op_run_skipped", None, None,
                    f"The run scheduled at {when.isoformat().replace('+00:00', 'Z')} was skipped because the "
                    "previous run of this job was still going; what it owed is caught up by the next tick.",
                    {"scheduled_at": when.isoformat()}, subject=when.isoformat()))
            except Exception as exc:  # noqa: BLE001 - already logged above
                log.error("job %s: could not record the skipped run: %s", name, exc)
