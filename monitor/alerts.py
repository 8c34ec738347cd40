"""Alert sinks and the outbox relay that feeds them.

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

A sink is any object with a ``channel`` string (stable across runs: it names the
destination) and ``send(job, period, events)``, raising :class:`DeliveryError`.
"""

from __future__ import annotations

import hashlib
import http.client
import json
import logging
import mmap
import os
import smtplib
import socket
import ssl
import subprocess
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from datetime import timedelta
from email.message import EmailMessage
from email.utils import formatdate
from html import escape
from pathlib import Path
from typing import Any, Callable, Mapping, Protocol, Sequence

from .clock import Clock
from .config import CommandAlert, EmailAlert, JobConfig, LogAlert, WebhookAlert
from .errors import DeliveryError
from .model import Event
from .store.history import History, is_op
from .store.ledger import RELAY_RESOURCE, Ledger

try:  # POSIX; elsewhere (Windows) the log file is written without an advisory lock
    import fcntl
except ImportError:  # pragma: no cover - exercised by hiding the module in a test
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger(__name__)


#: Temporary failures of one alert before it is dead-lettered anyway.
MAX_ATTEMPTS = 10
#: Backoff between attempts: BASE * 2**(attempts-1), at most CAP (seconds).
BACKOFF_BASE_SECONDS = 60.0
BACKOFF_CAP_SECONDS = 6 * 3600.0
#: How long a ``run`` waits for another process's delivery to finish before leaving its alerts pending.
RELAY_WAIT_SECONDS = 30.0
#: Longest ``Retry-After`` honoured (seconds).
RETRY_AFTER_CAP_SECONDS = 24 * 3600.0


class Sink(Protocol):
    channel: str

    def send(self, job: str, period: str, events: Sequence[Mapping[str, Any]]) -> None: ...


def _line(event: Mapping[str, Any]) -> dict[str, Any]:
    """The contract's alert line: job, period, kind, metric, segment, message, detected_at (+ key, detail)."""
    return {
        "job": event["job"],
        "period": event["period"],
        "kind": event["kind"],
        "metric": event["metric"],
        "segment": event["segment"],
        "message": event["message"],
        "detected_at": event["detected_at"],
        "event_key": event["event_key"],
        "detail": event.get("detail", {}),
    }


def _batch_id(events: Sequence[Mapping[str, Any]]) -> str:
    """A stable id for a batch: the same events give the same id, on every retry."""
    key = "-".join(sorted(e["event_key"] for e in events))
    return hashlib.sha256(key.encode()).hexdigest()[:40]


@dataclass
class LogSink:
    """Appends one JSON object per event per line (JSON Lines) and fsyncs.

    Each batch is written under an exclusive ``flock`` in one ``write`` on a file
    opened with ``O_APPEND``, so two processes writing the same file never interleave
    lines. Under the same lock the file is searched for the batch's event keys and
    lines already present are not written again: a retry after a crash (written, not
    yet marked sent) leaves the file as one delivery would.
    """

    path: Path

    @property
    def channel(self) -> str:
        return f"log:{self.path}"

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as exc:
            raise DeliveryError(f"cannot open alert log {self.path}: {exc.strerror}", temporary=True) from exc
        try:
            if fcntl is not None:
                fcntl.flock(fd, fcntl.LOCK_EX)
            present = _keys_present(fd, [e["event_key"] for e in events])
            data = "".join(json.dumps(_line(e), ensure_ascii=False, default=str) + "\n"
                           for e in events if e["event_key"] not in present)
            if data:
                os.write(fd, data.encode("utf-8"))
                os.fsync(fd)
        except OSError as exc:
            raise DeliveryError(f"cannot write alert log {self.path}: {exc.strerror}", temporary=True) from exc
        finally:
            os.close(fd)


def _keys_present(fd: int, keys: Sequence[str]) -> set[str]:
    """Which of ``keys`` already appear as an ``event_key`` in the open file."""
    if os.fstat(fd).st_size == 0:
        return set()
    with mmap.mmap(fd, 0, access=mmap.ACCESS_READ) as data:
        return {k for k in keys if data.find(f'"event_key": "{k}"'.encode()) != -1}


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """Redirects are not followed: urllib would turn a POST into a body-less GET."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):  # noqa: D401, PLR0913
        return None


_OPENER = urllib.request.build_opener(_NoRedirect)


@dataclass
class WebhookSink:
    """POSTs ``{"job", "period", "events": [...]}`` as JSON with an ``Idempotency-Key`` header.

    The key is derived from the batch's event keys, so a retry of the same batch sends
    the same key. Redirects are not followed (a 3xx is a permanent failure naming the
    new location).
    """

    url: str
    timeout: float = 10.0
    headers: Mapping[str, str] | None = None

    @property
    def channel(self) -> str:
        return f"webhook:{self.url}"

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "events": [_line(e) for e in events]},
                          default=str).encode()
        headers = {"Content-Type": "application/json", "Idempotency-Key": _batch_id(events),
                   "User-Agent": "segwatch", **dict(self.headers or {})}
        req = urllib.request.Request(self.url, data=body, headers=headers, method="POST")
        where = _url_origin(self.url)
        try:
            with _OPENER.open(req, timeout=self.timeout) as resp:
                resp.read()
        except urllib.error.HTTPError as exc:
            code = exc.code
            if 300 <= code < 400:
                raise DeliveryError(f"webhook {where} answered HTTP {code} (redirect to "
                                    f"{exc.headers.get('Location', '?')}); configure the final URL",
                                    temporary=False) from exc
            temporary = code >= 500 or code == 429
            raise DeliveryError(f"webhook {where} answered HTTP {code} {exc.reason}".rstrip(), temporary,
                                retry_after=_retry_after(exc.headers.get("Retry-After"))) from exc
        except urllib.error.URLError as exc:
            reason = exc.reason
            permanent = isinstance(reason, ssl.SSLCertVerificationError)
            raise DeliveryError(f"webhook {where} unreachable: {reason}", temporary=not permanent) from exc
        except (http.client.HTTPException, TimeoutError, socket.timeout, OSError) as exc:
            raise DeliveryError(f"webhook {where} failed: {type(exc).__name__}: {exc}", temporary=True) from exc


def _url_origin(url: str) -> str:
    """Scheme, host and port only: a webhook's path is often its secret."""
    from urllib.parse import urlsplit

    parts = urlsplit(url)
    return f"{parts.scheme}://{parts.netloc}/..." if parts.path not in ("", "/") else f"{parts.scheme}://{parts.netloc}"


def _retry_after(value: str | None) -> float | None:
    """Seconds from an HTTP ``Retry-After`` header (delta-seconds only; dates are ignored)."""
    if value is None:
        return None
    try:
        seconds = float(value.strip())
    except ValueError:
        return None
    return min(max(seconds, 0.0), RETRY_AFTER_CAP_SECONDS)


@dataclass
class CommandSink:
    """Runs a program with the events as a JSON document on stdin; non-zero exit is a failure.

    A non-zero exit or a timeout is temporary (retried with backoff, dead after
    :data:`MAX_ATTEMPTS`); a program that cannot be started is permanent. The child is
    killed when it runs past ``timeout``.
    """

    run: Sequence[str]
    timeout: float = 60.0

    @property
    def channel(self) -> str:
        return "command:" + json.dumps(list(self.run))

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "events": [_line(e) for e in events]}, default=str)
        try:
            proc = subprocess.run(list(self.run), input=body.encode(), capture_output=True, timeout=self.timeout)
        except FileNotFoundError as exc:
            raise DeliveryError(f"alert command {self.run[0]!r} not found", temporary=False) from exc
        except PermissionError as exc:
            raise DeliveryError(f"alert command {self.run[0]!r} is not executable", temporary=False) from exc
        except subprocess.TimeoutExpired as exc:
            raise DeliveryError(f"alert command {self.run[0]!r} timed out after {self.timeout}s", True) from exc
        if proc.returncode != 0:
            err = proc.stderr.decode(errors="replace").strip().splitlines()
            raise DeliveryError(
                f"alert command {self.run[0]!r} exited with {proc.returncode}"
                + (f": {err[-1]}" if err else ""), temporary=True)


@dataclass
class EmailSink:
    """One digest mail per job, period and recipient (plain text and HTML), over SMTP.

    ``recipient`` is the envelope recipient; the ``To:`` header names every address of
    the alert. The connection has a timeout; STARTTLS and implicit TLS verify the
    server's certificate (``ssl.create_default_context()``).
    """

    cfg: EmailAlert
    recipient: str
    attachment: Callable[[str], tuple[str, str]] | None = None  # period -> (file name, HTML)

    @property
    def channel(self) -> str:
        return f"email:{self.recipient}"

    def message(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> EmailMessage:
        msg = EmailMessage()
        n = len(events)
        msg["Subject"] = f"{self.cfg.subject_prefix} {job} {period}: {n} event{'s' if n != 1 else ''}"
        msg["From"] = self.cfg.sender
        msg["To"] = ", ".join(self.cfg.to)
        msg["Date"] = formatdate(usegmt=True)
        msg["Message-ID"] = f"<{_batch_id(events)}.{hashlib.sha256(self.recipient.encode()).hexdigest()[:8]}@segwatch>"
        lines = [f"segwatch: {job}, period {period}", ""]
        lines += [f"- [{e['kind']}] {e['message']}" for e in events]
        lines += ["", "Statistical significance is not practical importance; review before acting."]
        msg.set_content("\n".join(lines))
        items = "".join(f"<li><b>{escape(e['kind'])}</b>: {escape(e['message'])}</li>" for e in events)
        msg.add_alternative(
            f"<html><body><p>segwatch: {escape(job)}, period {escape(str(period))}</p><ul>{items}</ul>"
            "<p><small>Statistical significance is not practical importance; review before acting.</small></p>"
            "</body></html>", subtype="html")
        if self.attachment is not None and period is not None:
            try:
                name, html = self.attachment(period)
            except Exception as exc:  # noqa: BLE001 - a report that cannot be drawn must not block the alert
                log.warning("report for %s %s not attached: %s", job, period, exc)
            else:
                msg.add_attachment(html.encode("utf-8"), maintype="text", subtype="html", filename=name)
        return msg

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        msg = self.message(job, period, events)
        smtp = self.cfg.smtp
        where = f"SMTP {smtp.host}:{smtp.port}"
        try:
            cls = smtplib.SMTP_SSL if smtp.ssl else smtplib.SMTP
            kwargs: dict[str, Any] = {"timeout": smtp.timeout}
            if smtp.ssl:
                kwargs["context"] = ssl.create_default_context()
            with cls(smtp.host, smtp.port, **kwargs) as client:
                if smtp.starttls and not smtp.ssl:
                    client.starttls(context=ssl.create_default_context())
                if smtp.username:
                    client.login(smtp.username, smtp.password or "")
                refused = client.send_message(msg, to_addrs=[self.recipient])
        except smtplib.SMTPRecipientsRefused as exc:
            codes = [code for code, _ in exc.recipients.values()]
            temporary = bool(codes) and all(400 <= c < 500 for c in codes)
            detail = "; ".join(f"{a}: {c} {_text(m)}" for a, (c, m) in exc.recipients.items())
            raise DeliveryError(f"{where} refused the recipient ({detail})", temporary) from exc
        except smtplib.SMTPResponseException as exc:
            raise DeliveryError(f"{where} answered {exc.smtp_code} {_text(exc.smtp_error)}".rstrip(),
                                temporary=exc.smtp_code < 500) from exc
        except smtplib.SMTPNotSupportedError as exc:
            raise DeliveryError(f"{where}: {exc} (check smtp.starttls / smtp.username)", temporary=False) from exc
        except ssl.SSLCertVerificationError as exc:
            raise DeliveryError(f"{where}: TLS certificate not accepted: {exc.verify_message}",
                                temporary=False) from exc
        except smtplib.SMTPServerDisconnected as exc:
            raise DeliveryError(f"{where} closed the connection: {exc or 'no reason given'}", True) from exc
        except (smtplib.SMTPException, OSError) as exc:
            raise DeliveryError(f"{where} failed: {type(exc).__name__}: {exc}", temporary=True) from exc
        if refused:  # only possible with several envelope recipients; kept for safety
            codes = [code for code, _ in refused.values()]
            raise DeliveryError(f"{where} refused {', '.join(sorted(refused))}",
                                temporary=all(400 <= c < 500 for c in codes))


def _text(raw: bytes | str) -> str:
    text = raw.decode(errors="replace") if isinstance(raw, bytes) else str(raw)
    return " ".join(text.split())


def build_sinks(job: JobConfig, attachment: Callable[[str], tuple[str, str]] | None = None) -> list[Sink]:
    """One sink per configured alert, in config order.

    ``attachment`` (period -> file name and HTML) is attached to email digests; the
    runner passes the report when ``report.attach`` is set.
    """
    sinks: list[Sink] = []
    for a in job.alerts:
        if isinstance(a, LogAlert):
            sinks.append(LogSink(Path(a.path)))
        elif isinstance(a, WebhookAlert):
            sinks.append(WebhookSink(a.url, a.timeout, dict(a.headers)))
        elif isinstance(a, CommandAlert):
            sinks.append(CommandSink(tuple(a.run), a.timeout))
        elif isinstance(a, EmailAlert):
            sinks.extend(EmailSink(a, addr, attachment) for addr in a.to)
    return sinks


def channel_display(channel: str) -> str:
    """A channel name fit for logs and terminals: a webhook URL loses its path (often its secret)."""
    kind, _, rest = channel.partition(":")
    return f"webhook:{_url_origin(rest)}" if kind == "webhook" else channel


def op_channels(sinks: Sequence[Sink]) -> list[str]:
    """The channels that receive operational events: the ``log`` sinks."""
    return [s.channel for s in sinks if isinstance(s, LogSink)]


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
          wait: float = 0.0, lease_seconds: float = 600.0) -> RelayOutcome:
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
    ledger = Ledger(history, clock, lease_seconds, ops)
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
        new_ops = _relay_round(history, sinks, clock, ledger, claim, force, totals)
        if new_ops:  # dead letters were recorded: write them to the log channels now
            _relay_round(history, [s for s in sinks if s.channel in ops], clock, ledger, claim, force, totals)
    finally:
        ledger.release(claim)
    return RelayOutcome(*totals)


def _relay_round(history: History, sinks: Sequence[Sink], clock: Clock, ledger: Ledger, claim,
                 force: bool, totals: list[int]) -> bool:
    new_ops = False
    for sink in sinks:
        pending = history.pending(sink.channel, None if force else clock.now())
        by_period: dict[str | None, list] = {}
        for item in pending:
            by_period.setdefault(item.event["period"], []).append(item)
        for period, items in by_period.items():
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
                                history.job, channel_display(sink.channel), period, attempts, retry_at.isoformat(), exc)
                    history.mark(sink.channel, keys, "pending", now, str(exc), next_attempt_at=retry_at)
                    totals[1] += len(keys)
                    break  # keep period order: later periods wait for this one
                reason = str(exc) if not exc.temporary else f"gave up after {attempts} attempts: {exc}"
                log.error("job %s: alert to %s for %s dead-lettered (%d events): %s; "
                          "see `segwatch alerts`, resend with `segwatch alerts --retry`",
                          history.job, channel_display(sink.channel), period, len(keys), reason)
                history.mark(sink.channel, keys, "dead", now, reason)
                totals[2] += len(keys)
                if not all(is_op(e["kind"]) for e in events):
                    new_ops |= ledger.record(period, Event(
                        "op_alert_dead", None, None,
                        f"Alert to {channel_display(sink.channel)} for period {period} ({len(keys)} event"
                        f"{'s' if len(keys) != 1 else ''}) failed permanently: {reason}",
                        {"channel": channel_display(sink.channel), "error": reason, "event_keys": sorted(keys),
                         "kinds": sorted({e['kind'] for e in events})},
                        subject=f"{sink.channel}\x1f{_batch_id(events)}\x1f{now.isoformat()}"))
            else:
                history.mark(sink.channel, keys, "sent", clock.now())
                totals[0] += len(keys)
            ledger.renew(claim)
    return new_ops
