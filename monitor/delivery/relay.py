"""The outbox relay: delivers stored alerts to the channels of :mod:`monitor.delivery.sinks`.

Events reach people only through the outbox (see :mod:`monitor.store.history`): the
period's results, its events and one outbox row per (event, channel) are committed
together; afterwards :func:`relay` reads the due rows of each channel, hands them to
the channel's sink one period at a time, and marks them

* ``sent``;
* ``pending`` after a temporary failure, with ``next_attempt_at`` pushed out by an
  exponential backoff (1 min doubling to 6 h, or the server's ``Retry-After`` when
  longer); the next run, serve tick or sweep tries again once it is due;
* ``dead`` after a permanent failure, or after :data:`MAX_ATTEMPTS` temporary ones. A
  dead letter is logged at ERROR, stored as an ``op_alert_dead`` operational event
  (written to the log channels) and listed by ``segwatch alerts``; ``segwatch alerts
  --retry`` sends it again.

Delivery is at least once. Every event carries its stable ``event_key``; the webhook
sends an ``Idempotency-Key`` header and the mail a ``Message-ID`` derived from the
keys of the batch (stable across retries of the same batch); the log sink skips
lines whose key the file already holds, so a crash between writing and marking never
leaves a line twice. One process at a time delivers a job's alerts: :func:`relay`
holds the job's ``~relay`` lease (see :mod:`monitor.store.ledger`).

What counts as temporary:

========  =====================================================  ============================
sink      temporary (retried)                                     permanent (dead letter)
========  =====================================================  ============================
log       any OS error opening or writing the file                —
webhook   connection errors, timeouts, HTTP 5xx and 429           other 4xx, 3xx (redirects are
                                                                  not followed), TLS certificate
email     SMTP 4xx, disconnects, timeouts, connection errors      SMTP 5xx (RFC 5321), refused
                                                                  recipients (5xx), TLS
                                                                  certificate, no STARTTLS
command   non-zero exit, timeout                                  program not found / not runnable
========  =====================================================  ============================

Email goes out as one digest per job, period and recipient: each recipient is its own
channel (``email:<address>``), so a recipient the server refuses is dead-lettered
alone, and the others are neither blocked nor mailed twice. The ``To:`` header lists
all configured recipients.

Operational events (``op_...``) go to the ``log`` channels only.

A channel may choose the event kinds it receives (``kinds:``); the runner gives the
outbox rows only for those. Within a channel, periods go oldest first, and a period
whose alerts wait in backoff holds back every later period of that channel until it
is delivered or dead (receivers never see W12 before W11).

A sink is described in :mod:`monitor.delivery.sinks.base`; channel names are free of
secrets, and every text the relay logs or stores passes :func:`monitor.redact.redact`.
"""

from __future__ import annotations

import logging
import time
from dataclasses import dataclass
from datetime import timedelta
from typing import Sequence

from monitor.clock import Clock
from monitor.errors import DeliveryError
import sqlalchemy as sa

from monitor.store.history import History, is_op, outbox
from monitor.store.ledger import RELAY_RESOURCE, Ledger
from monitor.model import Event
from monitor.redact import redact

from .sinks import base as sinks_base
from .sinks.base import Attachment, Sink, batch_id

__all__ = ["MAX_ATTEMPTS", "RELAY_WAIT_SECONDS", "RelayOutcome", "backoff", "build_sinks", "op_channels",
           "channel_kinds", "relay", "DeliveryError"]

log = logging.getLogger(__name__)

#: Temporary failures of one alert before it is dead-lettered anyway.
MAX_ATTEMPTS = 10
#: Backoff between attempts: BASE * 2**(attempts-1), at most CAP (seconds).
BACKOFF_BASE_SECONDS = 60.0
BACKOFF_CAP_SECONDS = 6 * 3600.0
#: How long a ``run`` waits for another process's delivery to finish before leaving its alerts pending.
RELAY_WAIT_SECONDS = 30.0


def build_sinks(job, attachment: Attachment | None = None) -> list[Sink]:
    """One sink per configured alert (an e-mail alert: one per recipient), in config order.

    ``attachment`` (period -> file name and HTML) is attached to email digests; the
    runner passes the report when ``report.attach`` is set.
    """
    sinks: list[Sink] = []
    for alert in job.alerts:
        sinks.extend(sinks_base.get(alert.type).build(alert, attachment))
    return sinks


def op_channels(sinks: Sequence[Sink]) -> list[str]:
    """The channels that receive operational events (the ``log`` sinks)."""
    return [s.channel for s in sinks if _type_of(s).receives_ops]


def channel_kinds(sinks: Sequence[Sink]) -> dict[str, frozenset[str] | None]:
    """Each channel and the event kinds it receives (None: all), for the outbox."""
    return {s.channel: getattr(s, "kinds", None) for s in sinks}


def _type_of(sink: Sink) -> sinks_base.SinkType:
    name = type(sink).__module__.rpartition(".")[2]
    try:
        return sinks_base.get(name)
    except KeyError:  # a sink from outside the registry (tests): ops only when it says so
        return sinks_base.SinkType(name, (), None, None, receives_ops=getattr(sink, "receives_ops", False))


@dataclass(frozen=True)
class RelayOutcome:
    """What one relay did: alerts ``sent``, left ``retrying`` (pending), made ``dead``;
    ``busy`` names the process delivering instead when this relay could not start."""

    sent: int = 0
    retrying: int = 0
    dead: int = 0
    busy: str | None = None


def backoff(attempts: int, retry_after: float | None = None) -> timedelta:
    """Wait before the next attempt after ``attempts`` failures (see the module notes)."""
    seconds = min(BACKOFF_CAP_SECONDS, BACKOFF_BASE_SECONDS * 2 ** max(0, min(attempts - 1, 30)))
    if retry_after is not None:
        seconds = max(seconds, retry_after)
    return timedelta(seconds=seconds)


def relay(history: History, sinks: Sequence[Sink], clock: Clock, *, force: bool = False,
          wait: float = 0.0, lease_seconds: float = 600.0, ledger: Ledger | None = None) -> RelayOutcome:
    """Deliver the job's due outbox rows, channel by channel, period by period.

    Parameters
    ----------
    force : bool
        Ignore backoff (``segwatch alerts --retry``); otherwise only rows that are due.
    wait : float
        Seconds to wait for another process's delivery of the same job to finish;
        after that the rows stay pending for it (or for the next run) and the outcome
        names the holder in ``busy``.

    Within a channel, periods go oldest first; a temporary failure stops the channel
    for this round (later periods wait for the earlier one).
    """
    ops = op_channels(sinks)
    ledger = ledger or Ledger(history, clock, lease_seconds, ops)
    claim = ledger.claim(RELAY_RESOURCE)
    deadline = time.monotonic() + wait
    while not claim.won and time.monotonic() < deadline:
        time.sleep(0.2)
        claim = ledger.claim(RELAY_RESOURCE)
    if not claim.won:
        log.info("job %s: alerts are being delivered by %s; leaving them to it", history.job, claim.owner)
        return RelayOutcome(busy=claim.owner)
    totals = [0, 0, 0]
    try:
        rename_old_channels(history, sinks)
        new_ops = _relay_round(history, sinks, clock, ledger, claim, force, totals)
        if new_ops:  # dead letters were recorded: write them to the log channels now
            _relay_round(history, [s for s in sinks if s.channel in ops], clock, ledger, claim, force, totals)
    finally:
        ledger.release(claim)
    return RelayOutcome(*totals)


def rename_old_channels(history: History, sinks: Sequence[Sink]) -> int:
    """Move outbox rows stored under a channel's earlier name to its name now.

    Webhook and command channels were once named by their full URL or arguments (secrets
    included); they are named with secrets masked now (:mod:`monitor.delivery.sinks`).
    Rows written under the old name would never be delivered, and keep a secret in the
    history: they are renamed (a row the new name already holds is dropped as a duplicate).
    Returns how many rows were moved.
    """
    renames = {old: s.channel for s in sinks for old in getattr(s, "former_channels", ()) if old != s.channel}
    if not renames:
        return 0
    history.ensure()
    with history.engine.connect() as conn:
        stored = set(conn.execute(sa.select(outbox.c.channel).where(
            outbox.c.job == history.job, outbox.c.channel.in_(list(renames))).distinct()).scalars())
    moved = 0
    if not stored:
        return 0
    with history.begin() as conn:
        for old in stored:
            new = renames[old]
            taken = list(conn.execute(sa.select(outbox.c.event_key).where(
                outbox.c.job == history.job, outbox.c.channel == new)).scalars())
            for i in range(0, len(taken), 500):
                conn.execute(sa.delete(outbox).where(outbox.c.job == history.job, outbox.c.channel == old,
                                                     outbox.c.event_key.in_(taken[i:i + 500])))
            moved += conn.execute(sa.update(outbox).where(outbox.c.job == history.job, outbox.c.channel == old)
                                  .values(channel=new)).rowcount or 0
    log.info("job %s: %d outbox rows moved to the channels' current names", history.job, moved)
    return moved


def _relay_round(history: History, sinks: Sequence[Sink], clock: Clock, ledger: Ledger, claim,
                 force: bool, totals: list[int]) -> bool:
    new_ops = False
    for sink in sinks:
        pending = history.pending(sink.channel)
        due = None if force else {i.event_key for i in history.pending(sink.channel, clock.now())}
        by_period: dict[str | None, list] = {}
        for item in pending:
            by_period.setdefault(item.event["period"], []).append(item)
        for period, items in by_period.items():
            if due is not None and any(i.event_key not in due for i in items):
                break  # this period waits in backoff; later periods wait for it
            keys = [i.event_key for i in items]
            events = [i.event for i in items]
            try:
                sink.send(history.job, period, events)
            except DeliveryError as exc:
                now = clock.now()
                attempts = max(i.attempts for i in items) + 1
                if exc.temporary and attempts < MAX_ATTEMPTS:
                    retry_at = now + backoff(attempts, exc.retry_after)
                    log.warning("job %s: alert to %s for %s not delivered (attempt %d), retrying after %s: %s",
                                history.job, sink.channel, period, attempts, retry_at.isoformat(), redact(str(exc)))
                    history.mark(sink.channel, keys, "pending", now, redact(str(exc)), next_attempt_at=retry_at)
                    totals[1] += len(keys)
                    break  # keep period order: later periods wait for this one
                reason = redact(str(exc) if not exc.temporary else f"gave up after {attempts} attempts: {exc}")
                log.error("job %s: alert to %s for %s dead-lettered (%d events): %s; "
                          "see `segwatch alerts`, resend with `segwatch alerts --retry`",
                          history.job, sink.channel, period, len(keys), reason)
                history.mark(sink.channel, keys, "dead", now, reason)
                totals[2] += len(keys)
                if not all(is_op(e["kind"]) for e in events):
                    new_ops |= ledger.record(period, Event(
                        "op_alert_dead", None, None,
                        f"Alert to {sink.channel} for period {period} ({len(keys)} event"
                        f"{'s' if len(keys) != 1 else ''}) failed permanently: {reason}",
                        {"channel": sink.channel, "error": reason, "event_keys": sorted(keys),
                         "kinds": sorted({e['kind'] for e in events})},
                        subject=f"{sink.channel}\x1f{batch_id(events)}\x1f{now.isoformat()}"))
            else:
                history.mark(sink.channel, keys, "sent", clock.now())
                totals[0] += len(keys)
            ledger.renew(claim)
    return new_ops
