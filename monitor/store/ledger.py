"""The period ledger and leases: what is owed, what is running, and who may run it.

Two tables in the history database (defined in :mod:`monitor.store.history`):

``sw_ledger``
    One row per (job, period). ``pending`` (owed: registered by a scheduler tick) →
    ``running`` (an attempt started) → ``done`` (results committed) or ``failed``
    (the reason in ``last_error``, retried later with backoff). ``attempts`` counts
    started attempts; ``started_at``/``finished_at`` are UTC. A period whose source
    had no rows is ``done`` with a ``note`` saying so.

``sw_leases``
    One row per (job, resource) while somebody holds it: a period identifier while
    that period is computed, ``~relay`` while the job's alerts are delivered. The row
    names its ``owner`` (``host:pid:uuid``, unique per claim) and ``expires_at``.

Claiming is a conditional write in one transaction (``BEGIN IMMEDIATE`` on SQLite,
``INSERT .. ON CONFLICT DO NOTHING`` then ``SELECT .. FOR UPDATE`` on PostgreSQL):
insert the lease row if there is none; otherwise take it over only when it has
expired, or when its owner ran on this host and that process is gone (so a crashed
run does not block the next one for a whole lease). Anything else loses, and the
loser learns who holds the lease and until when. A long run renews its lease from a
heartbeat thread. The final store of a period checks, in its own transaction, that
the lease is still ours and releases it (:func:`monitor.store.history.finish_period`), so
two processes can never both commit a period, even after a takeover.

A takeover is an operational event (``op_lease_taken_over``), stored in the history
and written to the job's log channels.

Owner ids carry the host name: two machines (or containers) that share a host name
and a history database cannot tell each other's processes apart, and fall back on
lease expiry alone.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import uuid
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Iterator, Mapping, Sequence

import sqlalchemy as sa
from sqlalchemy.exc import SQLAlchemyError

from ..clock import Clock
from ..redact import one_line, redact
from ..errors import HistoryError, LeaseLost, PeriodBusy
from ..model import Event
from .history import History, _utc_naive, insert_missing, insert_op, iso_utc, leases_t, ledger_t, utc_aware

__all__ = [
    "LEASE_SECONDS",
    "RELAY_RESOURCE",
    "STATES",
    "Claim",
    "Ledger",
    "LedgerEntry",
    "LeaseLost",
    "PeriodBusy",
    "new_owner",
    "owner_gone",
    "retry_delay",
]

log = logging.getLogger(__name__)

#: How long a lease lasts without renewal; a running period renews it every third of this.
LEASE_SECONDS = 600.0
#: The lease resource that serialises alert delivery of one job.
RELAY_RESOURCE = "~relay"
STATES = ("pending", "running", "done", "failed")
#: Backoff before a failed period is retried by the serve sweep: 5 min, doubling, at most 6 h.
RETRY_BASE_SECONDS = 300.0
RETRY_MAX_SECONDS = 6 * 3600.0


@dataclass(frozen=True)
class LedgerEntry:
    """One ledger row: the state of one period of a job. Times are aware UTC."""

    period: str
    state: str
    attempts: int
    last_error: str | None = None
    note: str | None = None
    owner: str | None = None
    started_at: datetime | None = None
    finished_at: datetime | None = None
    next_attempt_at: datetime | None = None

    def to_json(self) -> dict[str, object]:
        return {
            "period": self.period, "state": self.state, "attempts": self.attempts,
            "last_error": self.last_error, "note": self.note, "owner": self.owner,
            "started_at": iso_utc(self.started_at), "finished_at": iso_utc(self.finished_at),
            "next_attempt_at": iso_utc(self.next_attempt_at),
        }

    @classmethod
    def from_json(cls, data: Mapping[str, object]) -> "LedgerEntry":
        """An entry from its JSON (``alerts --json``'s ``periods``); times back as aware UTC."""
        return cls(str(data["period"]), str(data["state"]), int(data.get("attempts") or 0),  # type: ignore[arg-type]
                   data.get("last_error"), data.get("note"), data.get("owner"),  # type: ignore[arg-type]
                   _when(data.get("started_at")), _when(data.get("finished_at")), _when(data.get("next_attempt_at")))


def _when(x: object) -> datetime | None:
    return utc_aware(str(x).replace("Z", "+00:00")) if x else None


@dataclass(frozen=True)
class Claim:
    """The outcome of claiming a lease.

    ``won``: whether we hold it now. ``owner``/``expires_at``: ours when won, the
    holder's when not. ``previous_owner``/``takeover_reason``: set when we took over
    a stale lease (``'expired'`` or ``'owner process gone'``). ``entry``: the ledger
    row of the period as it was when claimed (None for a new period, or a non-period
    resource).
    """

    job: str
    resource: str
    won: bool
    owner: str
    expires_at: datetime
    previous_owner: str | None = None
    previous_expires_at: datetime | None = None
    takeover_reason: str | None = None
    entry: LedgerEntry | None = None


def new_owner() -> str:
    """A fresh owner id: ``host:pid:uuid`` (the uuid makes every claim distinct)."""
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:12]}"


def owner_gone(owner: str) -> bool:
    """Whether ``owner`` names a process on this host that no longer runs.

    Only a process on this host can be checked; for any other host, or this very
    process, the answer is False (trust the lease's expiry). A zombie (killed, not
    yet reaped) counts as gone.
    """
    parts = owner.split(":")
    if len(parts) < 3:
        return False
    host, pid_text = ":".join(parts[:-2]), parts[-2]
    if host != socket.gethostname() or not pid_text.isdigit():
        return False
    pid = int(pid_text)
    if pid == os.getpid() or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        return False
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            state = fh.read().rsplit(")", 1)[1].split()[0]
        return state in ("Z", "X")
    except (OSError, IndexError):
        return False


def retry_delay(attempts: int, base: float = RETRY_BASE_SECONDS, cap: float = RETRY_MAX_SECONDS) -> timedelta:
    """Exponential backoff after ``attempts`` failures: ``base * 2**(attempts-1)``, at most ``cap``."""
    return timedelta(seconds=min(cap, base * 2 ** max(0, min(attempts - 1, 30))))


class Ledger:
    """The ledger and leases of one job in its history database.

    Parameters
    ----------
    history : History
        The job's history (its engine and job name are used).
    clock : Clock
        Where "now" comes from (lease expiry, timestamps).
    lease_seconds : float
        Lease duration; renewed every third of it while a period runs.
    op_channels : sequence of str
        Alert channels that receive operational events (the job's ``log`` sinks).
    """

    def __init__(self, history: History, clock: Clock, lease_seconds: float = LEASE_SECONDS,
                 op_channels: Sequence[str] = ()):
        self.history = history
        self.job = history.job
        self.clock = clock
        self.lease = timedelta(seconds=lease_seconds)
        self.op_channels = tuple(op_channels)
        # what could not be written while the history was unreachable (see :meth:`owe_failure`)
        self._owed: dict[str, tuple[Claim, str, datetime]] = {}
        self._outage: tuple[datetime, datetime, int, str] | None = None  # first, last, count, reason
        self._mine: set[str] = set()  # owners of leases of ours that could not be released
        self._owed_lock = threading.Lock()

    # -------------------------------------------------------------- reads

    def entries(self) -> dict[str, LedgerEntry]:
        """Every ledger row of the job, by period identifier (reading only: nothing is created)."""
        if not self.history.readable("sw_ledger"):
            return {}
        with self.history.engine.connect() as conn:
            rows = conn.execute(sa.select(ledger_t).where(ledger_t.c.job == self.job)).mappings().all()
        return {r["period"]: _entry(r) for r in rows}

    def entry(self, period: str) -> LedgerEntry | None:
        if not self.history.readable("sw_ledger"):
            return None
        with self.history.engine.connect() as conn:
            row = conn.execute(sa.select(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == period)).mappings().one_or_none()
        return _entry(row) if row else None

    def holder(self, resource: str) -> tuple[str, datetime] | None:
        """Who holds ``resource`` and until when, if anybody."""
        if not self.history.readable("sw_leases"):
            return None
        with self.history.engine.connect() as conn:
            row = conn.execute(sa.select(leases_t.c.owner, leases_t.c.expires_at).where(
                leases_t.c.job == self.job, leases_t.c.resource == resource)).one_or_none()
        return (row.owner, utc_aware(row.expires_at)) if row else None

    # -------------------------------------------------------------- writes

    def register(self, periods: Sequence[str]) -> int:
        """Add ``pending`` rows for periods the ledger does not know yet; returns how many."""
        if not periods:
            return 0
        now = _utc_naive(self.clock.now())
        added = 0
        with self._write("register owed periods") as conn:
            for p in periods:
                added += insert_missing(conn, ledger_t, {"job": self.job, "period": p, "state": "pending",
                                                         "attempts": 0, "created_at": now})
        return added

    def claim(self, resource: str) -> Claim:
        """Try to take the lease on ``resource`` (a period identifier or :data:`RELAY_RESOURCE`).

        A takeover of a stale lease is recorded as ``op_lease_taken_over`` in the
        same transaction. Never raises for a lease held by someone else: see
        :attr:`Claim.won`.
        """
        self.settle_owed()
        now = self.clock.now()
        owner = new_owner()
        until = now + self.lease
        row = {"job": self.job, "resource": resource, "owner": owner,
               "acquired_at": _utc_naive(now), "expires_at": _utc_naive(until)}
        where = (leases_t.c.job == self.job, leases_t.c.resource == resource)
        with self._write(f"claim the lease on {resource}") as conn:
            entry = None
            if resource != RELAY_RESOURCE:
                found = conn.execute(sa.select(ledger_t).where(
                    ledger_t.c.job == self.job, ledger_t.c.period == resource)).mappings().one_or_none()
                entry = _entry(found) if found else None
            for _ in range(3):
                if insert_missing(conn, leases_t, row):
                    return Claim(self.job, resource, True, owner, until, entry=entry)
                held = conn.execute(sa.select(leases_t).where(*where).with_for_update()).one_or_none()
                if held is None:  # released between our insert and our read: try again
                    continue
                held_until = utc_aware(held.expires_at)
                if held.owner in self._mine:  # our own, left behind by an outage: free for us
                    taken = conn.execute(sa.update(leases_t).where(*where, leases_t.c.owner == held.owner).values(
                        owner=owner, acquired_at=row["acquired_at"], expires_at=row["expires_at"]))
                    if taken.rowcount != 1:
                        continue
                    self._mine.discard(held.owner)
                    log.info("job %s: reclaimed our own lease on %s (%s), left behind while the history was "
                             "unreachable", self.job, resource, held.owner)
                    return Claim(self.job, resource, True, owner, until, entry=entry)
                if held_until > now and not owner_gone(held.owner):
                    return Claim(self.job, resource, False, held.owner, held_until, entry=entry)
                reason = "expired" if held_until <= now else "owner process gone"
                taken = conn.execute(sa.update(leases_t).where(*where, leases_t.c.owner == held.owner).values(
                    owner=owner, acquired_at=row["acquired_at"], expires_at=row["expires_at"]))
                if taken.rowcount != 1:
                    continue
                log.warning("job %s: took over the lease on %s from %s (%s)", self.job, resource, held.owner,
                            reason)
                insert_op(conn, self.job, None if resource == RELAY_RESOURCE else resource, Event(
                    "op_lease_taken_over", None, None,
                    f"Took over the lease on {_what(resource)} from {held.owner} "
                    f"({'it expired at ' + iso_utc(held_until) if reason == 'expired' else 'its process is gone'});"
                    " the interrupted work is redone.",
                    {"resource": resource, "previous_owner": held.owner, "previous_expires_at": iso_utc(held_until),
                     "reason": reason, "owner": owner},
                    subject=held.owner), self.op_channels, now)
                return Claim(self.job, resource, True, owner, until, held.owner, held_until, reason, entry)
        raise HistoryError(f"could not claim the lease on {resource} of job {self.job}: it changed hands "
                           "three times while claiming; try again")

    def start(self, claim: Claim) -> LedgerEntry:
        """Mark the claimed period ``running`` and count the attempt."""
        now = _utc_naive(self.clock.now())
        with self._write(f"start period {claim.resource}") as conn:
            insert_missing(conn, ledger_t, {"job": self.job, "period": claim.resource, "state": "pending",
                                            "attempts": 0, "created_at": now})
            conn.execute(sa.update(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == claim.resource).values(
                state="running", attempts=ledger_t.c.attempts + 1, started_at=now, finished_at=None,
                owner=claim.owner, next_attempt_at=None))
            found = conn.execute(sa.select(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == claim.resource)).mappings().one()
        return _entry(found)

    def renew(self, claim: Claim) -> bool:
        """Extend our lease by a full lease from now; False when it is no longer ours."""
        until = self.clock.now() + self.lease
        with self._write(f"renew the lease on {claim.resource}") as conn:
            n = conn.execute(sa.update(leases_t).where(
                leases_t.c.job == self.job, leases_t.c.resource == claim.resource,
                leases_t.c.owner == claim.owner).values(expires_at=_utc_naive(until))).rowcount
        return n == 1

    def release(self, claim: Claim) -> None:
        """Give the lease back (a no-op when it is no longer ours). When the history cannot
        be reached, the lease is remembered as ours: the next claim of this ledger takes it
        back at once instead of waiting for it to expire."""
        try:
            with self._write(f"release the lease on {claim.resource}") as conn:
                conn.execute(sa.delete(leases_t).where(
                    leases_t.c.job == self.job, leases_t.c.resource == claim.resource,
                    leases_t.c.owner == claim.owner))
        except HistoryError:
            self._mine.add(claim.owner)
            raise

    def fail(self, claim: Claim, error: str, at: datetime | None = None) -> LedgerEntry | None:
        """Record a failed attempt: ledger ``failed`` with the reason and the next retry time,
        lease released, and ``op_run_failed`` stored — in one transaction (``error`` redacted).

        ``at`` is when the attempt failed (default now): a failure recorded late, after an
        outage of the history (:meth:`settle_owed`), keeps its own time. The ledger row is
        only marked when it is still this attempt's (``running`` under our owner).
        """
        error = redact(error)
        now = at or self.clock.now()
        naive = _utc_naive(now)
        with self._write(f"record the failure of period {claim.resource}") as conn:
            found = conn.execute(sa.select(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == claim.resource)).mappings().one_or_none()
            attempts = found["attempts"] if found else 1
            retry_at = now + retry_delay(attempts)
            conn.execute(sa.update(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == claim.resource,
                ledger_t.c.state == "running", ledger_t.c.owner == claim.owner).values(
                state="failed", last_error=error, finished_at=naive, next_attempt_at=_utc_naive(retry_at)))
            conn.execute(sa.delete(leases_t).where(
                leases_t.c.job == self.job, leases_t.c.resource == claim.resource, leases_t.c.owner == claim.owner))
            insert_op(conn, self.job, claim.resource, Event(
                "op_run_failed", None, None,
                f"Computing period {claim.resource} failed (attempt {attempts}): {error}",
                {"attempt": attempts, "error": error, "retry_after": iso_utc(retry_at), "owner": claim.owner},
                subject=f"attempt {attempts}"), self.op_channels, now)
            after = conn.execute(sa.select(ledger_t).where(
                ledger_t.c.job == self.job, ledger_t.c.period == claim.resource)).mappings().one_or_none()
        return _entry(after) if after else None

    def abandon(self, claim: Claim) -> None:
        """Undo an attempt that never touched the period: the ledger row goes back to what it
        was when claimed (a ``done`` period stays done), and the lease is released. For a
        fault of the configuration found at run time (a column that is not there, a URL
        no driver opens): the period did not fail, the config did."""
        before = claim.entry
        where = (ledger_t.c.job == self.job, ledger_t.c.period == claim.resource, ledger_t.c.owner == claim.owner)
        with self._write(f"put back the ledger row of period {claim.resource}") as conn:
            if before is None:
                conn.execute(sa.delete(ledger_t).where(*where))
            else:
                conn.execute(sa.update(ledger_t).where(*where).values(
                    state=before.state, attempts=before.attempts, last_error=before.last_error, note=before.note,
                    owner=before.owner, started_at=_naive(before.started_at), finished_at=_naive(before.finished_at),
                    next_attempt_at=_naive(before.next_attempt_at)))
            conn.execute(sa.delete(leases_t).where(
                leases_t.c.job == self.job, leases_t.c.resource == claim.resource, leases_t.c.owner == claim.owner))

    # -------------------------------------------------------------- outages of the history

    def owe_failure(self, claim: Claim, error: str) -> None:
        """Remember a failure that could not be recorded (the history was unreachable), and
        that the claim's lease is still ours; :meth:`settle_owed` records it later with the
        time it happened, and the next claim treats the lease as free."""
        with self._owed_lock:
            self._owed[claim.resource] = (claim, error, self.clock.now())
            self._mine.add(claim.owner)

    def keep_as_own(self, claim: Claim) -> None:
        """Remember that the claim's lease, which could not be released, is ours (the next
        claim of this ledger takes it back at once)."""
        self._mine.add(claim.owner)

    def owe_outage(self, error: str) -> None:
        """Remember that the history could not be reached at all (a scheduled tick could not
        read the ledger); one ``op_run_failed`` for the whole outage is stored once it is back."""
        now = self.clock.now()
        with self._owed_lock:
            first, _, count, _ = self._outage or (now, now, 0, error)
            self._outage = (first, now, count + 1, redact(error))

    @property
    def owed(self) -> int:
        """How many failure records wait for the history to be reachable again."""
        return len(self._owed) + (self._outage is not None)

    def settle_owed(self) -> int:
        """Write what an outage of the history left unwritten: each owed failure (ledger
        ``failed`` at the time it happened, its lease released, ``op_run_failed``) and one
        ``op_run_failed`` for an outage that stopped whole ticks. Returns how many were
        written; raises :class:`HistoryError` while the history is still unreachable (what
        is left stays owed)."""
        done = 0
        with self._owed_lock:
            for resource, (claim, error, at) in list(self._owed.items()):
                self.fail(claim, error, at=at)
                del self._owed[resource]
                self._mine.discard(claim.owner)
                log.info("job %s: the failure of %s at %s is now recorded in the history", self.job, resource,
                         iso_utc(at))
                done += 1
            if self._outage is not None:
                first, last, count, error = self._outage
                self.history.record_op(None, Event(
                    "op_run_failed", None, None,
                    f"The history could not be reached from {iso_utc(first)} to {iso_utc(last)} "
                    f"({count} scheduled run{'s' if count != 1 else ''} could not start): {error}",
                    {"error": error, "first_failure": iso_utc(first), "last_failure": iso_utc(last),
                     "runs": count}, subject=f"outage {iso_utc(first)}"), self.op_channels, first)
                self._outage = None
                done += 1
        return done

    def finish_empty(self, claim: Claim, start: datetime, end: datetime, announce: bool = True) -> None:
        """The source had no rows: mark the period done with a note, keep any earlier results,
        release the lease and (with ``announce``) store ``op_period_empty`` — in one transaction."""
        from .history import finish_period

        now = self.clock.now()
        note = "skipped: the source had no rows in the window"
        with self._write(f"record the empty period {claim.resource}") as conn:
            finish_period(conn, self.job, claim.resource, claim.owner, now, note=note)
            if not announce:
                return
            insert_op(conn, self.job, claim.resource, Event(
                "op_period_empty", None, None,
                f"Period {claim.resource} was skipped: the source had no rows from {start.isoformat()} "
                f"to {end.isoformat()}.", {"start": start.isoformat(), "end": end.isoformat()}),
                self.op_channels, now)

    def record(self, period: str | None, event: Event) -> bool:
        """Store any operational event for the job's log channels; True when new."""
        return self.history.record_op(period, event, self.op_channels, self.clock.now())

    @contextmanager
    def heartbeat(self, claim: Claim, interval: float | None = None) -> Iterator[threading.Event]:
        """Renew ``claim`` every ``interval`` seconds (a third of the lease) while the block runs.

        Yields an event that is set when a renewal found the lease gone; the final
        store notices that anyway (:class:`LeaseLost`).
        """
        every = interval if interval is not None else self.lease.total_seconds() / 3
        stop, lost = threading.Event(), threading.Event()

        def beat() -> None:
            while not stop.wait(every):
                try:
                    if not self.renew(claim):
                        log.warning("job %s: the lease on %s is no longer ours", self.job, claim.resource)
                        lost.set()
                        return
                except Exception as exc:  # noqa: BLE001 - a failed renewal is retried on the next beat
                    log.warning("job %s: could not renew the lease on %s: %s", self.job, claim.resource, exc)

        thread = threading.Thread(target=beat, name=f"lease:{self.job}:{claim.resource}", daemon=True)
        thread.start()
        try:
            yield lost
        finally:
            stop.set()
            thread.join()

    # -------------------------------------------------------------- internals

    @contextmanager
    def _write(self, what: str) -> Iterator[sa.Connection]:
        try:
            with self.history.begin() as conn:
                yield conn
        except (LeaseLost, PeriodBusy):
            raise
        except SQLAlchemyError as exc:
            raise HistoryError(f"cannot {what} of job {self.job} in the history at "
                               f"{redact(self.history.url)}: {one_line(exc)}") from exc


def _naive(dt: datetime | None) -> datetime | None:
    return None if dt is None else _utc_naive(dt)


def _what(resource: str) -> str:
    return "alert delivery" if resource == RELAY_RESOURCE else f"period {resource}"


def _entry(r: Mapping[str, object]) -> LedgerEntry:
    return LedgerEntry(
        period=r["period"], state=r["state"], attempts=int(r["attempts"]), last_error=r["last_error"],
        note=r["note"], owner=r["owner"], started_at=utc_aware(r["started_at"]),
        finished_at=utc_aware(r["finished_at"]), next_attempt_at=utc_aware(r["next_attempt_at"]),
    )
