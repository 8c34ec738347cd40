"""Alert sinks and the outbox relay that feeds them.

Events reach people only through the outbox (see :mod:`monitor.history`): the
period's results, its events and one outbox row per (event, channel) are committed
together; afterwards :func:`relay` reads the pending rows of each channel, hands
them to the channel's sink one period at a time, and marks them ``sent``, leaves
them ``pending`` after a temporary failure (retried on the next run), or marks them
``dead`` after a permanent one. Delivery is therefore at least once; each event
carries its stable ``event_key`` so a receiver can drop a repeat.

A sink is any object with a ``channel`` string (stable across runs: it names the
destination) and ``send(job, period, events)``, raising :class:`DeliveryError`.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import logging
import os
import smtplib
import socket
import ssl
import subprocess
import urllib.error
import urllib.request
from dataclasses import dataclass
from datetime import datetime
from email.message import EmailMessage
from html import escape
from pathlib import Path
from typing import Any, Mapping, Protocol, Sequence

from .clock import Clock
from .config import CommandAlert, EmailAlert, JobConfig, LogAlert, WebhookAlert
from .history import History

log = logging.getLogger(__name__)


class DeliveryError(Exception):
    """A sink could not deliver; ``temporary`` says whether a retry may succeed."""

    def __init__(self, message: str, temporary: bool):
        super().__init__(message)
        self.temporary = temporary


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


@dataclass
class LogSink:
    """Appends one JSON object per event per line (JSON Lines) and fsyncs.

    Each batch is written under an exclusive ``flock`` in one ``write`` on a file
    opened with ``O_APPEND``, so two processes writing the same file never interleave
    lines.
    """

    path: Path

    @property
    def channel(self) -> str:
        return f"log:{self.path}"

    def send(self, job: str, period: str, events: Sequence[Mapping[str, Any]]) -> None:
        data = "".join(json.dumps(_line(e), ensure_ascii=False, default=str) + "\n" for e in events)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        except OSError as exc:
            raise DeliveryError(f"cannot open alert log {self.path}: {exc.strerror}", temporary=True) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            os.write(fd, data.encode("utf-8"))
            os.fsync(fd)
        except OSError as exc:
            raise DeliveryError(f"cannot write alert log {self.path}: {exc.strerror}", temporary=True) from exc
        finally:
            os.close(fd)


@dataclass
class WebhookSink:
    """POSTs ``{"job", "period", "events": [...]}`` as JSON with an idempotency key header."""

    url: str
    timeout: float = 10.0
    headers: Mapping[str, str] | None = None

    @property
    def channel(self) -> str:
        return f"webhook:{self.url}"

    def send(self, job: str, period: str, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "events": [_line(e) for e in events]},
                          default=str).encode()
        key = "-".join(sorted(e["event_key"] for e in events))
        headers = {"Content-Type": "application/json",
                   "Idempotency-Key": hashlib.sha256(key.encode()).hexdigest()[:40],
                   **dict(self.headers or {})}
        req = urllib.request.Request(self.url, data=body, headers=headers, method="POST")
        try:
            with urllib.request.urlopen(req, timeout=self.timeout) as resp:
                resp.read()
        except urllib.error.HTTPError as exc:
            temporary = exc.code >= 500 or exc.code == 429
            raise DeliveryError(f"webhook {self.url} answered HTTP {exc.code}", temporary) from exc
        except (urllib.error.URLError, socket.timeout, ConnectionError, OSError) as exc:
            raise DeliveryError(f"webhook {self.url} unreachable: {exc}", temporary=True) from exc


@dataclass
class CommandSink:
    """Runs a program with the events as a JSON document on stdin; non-zero exit is a failure."""

    run: Sequence[str]
    timeout: float = 60.0

    @property
    def channel(self) -> str:
        return "command:" + json.dumps(list(self.run))

    def send(self, job: str, period: str, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "events": [_line(e) for e in events]}, default=str)
        try:
            proc = subprocess.run(list(self.run), input=body.encode(), capture_output=True, timeout=self.timeout)
        except FileNotFoundError as exc:
            raise DeliveryError(f"alert command {self.run[0]!r} not found", temporary=False) from exc
        except subprocess.TimeoutExpired as exc:
            raise DeliveryError(f"alert command {self.run[0]!r} timed out after {self.timeout}s", True) from exc
        if proc.returncode != 0:
            err = proc.stderr.decode(errors="replace").strip().splitlines()
            raise DeliveryError(
                f"alert command {self.run[0]!r} exited with {proc.returncode}"
                + (f": {err[-1]}" if err else ""), temporary=True)


@dataclass
class EmailSink:
    """One digest mail per job and period (plain text and HTML), over SMTP."""

    cfg: EmailAlert

    @property
    def channel(self) -> str:
        return "email:" + ",".join(self.cfg.to)

    def send(self, job: str, period: str, events: Sequence[Mapping[str, Any]]) -> None:
        msg = EmailMessage()
        msg["Subject"] = f"{self.cfg.subject_prefix} {job} {period}: {len(events)} event{'s' if len(events) != 1 else ''}"
        msg["From"] = self.cfg.sender
        msg["To"] = ", ".join(self.cfg.to)
        lines = [f"segwatch: {job}, period {period}", ""]
        lines += [f"- [{e['kind']}] {e['message']}" for e in events]
        lines += ["", "Statistical significance is not practical importance; review before acting."]
        msg.set_content("\n".join(lines))
        items = "".join(f"<li><b>{escape(e['kind'])}</b>: {escape(e['message'])}</li>" for e in events)
        msg.add_alternative(
            f"<html><body><p>segwatch: {escape(job)}, period {escape(period)}</p><ul>{items}</ul>"
            "<p><small>Statistical significance is not practical importance; review before acting.</small></p>"
            "</body></html>", subtype="html")
        smtp = self.cfg.smtp
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
                refused = client.send_message(msg)
        except smtplib.SMTPResponseException as exc:
            raise DeliveryError(f"SMTP {smtp.host}:{smtp.port} answered {exc.smtp_code}", exc.smtp_code < 500) from exc
        except smtplib.SMTPRecipientsRefused as exc:
            raise DeliveryError(f"SMTP {smtp.host} refused every recipient", temporary=False) from exc
        except (smtplib.SMTPException, OSError) as exc:
            raise DeliveryError(f"SMTP {smtp.host}:{smtp.port} failed: {exc}", temporary=True) from exc
        if refused:
            raise DeliveryError(f"SMTP {smtp.host} refused {', '.join(sorted(refused))}", temporary=False)


def build_sinks(job: JobConfig) -> list[Sink]:
    """One sink per configured alert, in config order."""
    sinks: list[Sink] = []
    for a in job.alerts:
        if isinstance(a, LogAlert):
            sinks.append(LogSink(Path(a.path)))
        elif isinstance(a, WebhookAlert):
            sinks.append(WebhookSink(a.url, a.timeout, dict(a.headers)))
        elif isinstance(a, CommandAlert):
            sinks.append(CommandSink(tuple(a.run), a.timeout))
        elif isinstance(a, EmailAlert):
            sinks.append(EmailSink(a))
    return sinks


@dataclass(frozen=True)
class RelayOutcome:
    sent: int = 0
    retrying: int = 0
    dead: int = 0


def relay(history: History, sinks: Sequence[Sink], clock: Clock) -> RelayOutcome:
    """Deliver every pending outbox row of the job, channel by channel, period by period."""
    sent = retrying = dead = 0
    for sink in sinks:
        pending = history.pending(sink.channel)
        by_period: dict[str, list] = {}
        for item in pending:
            by_period.setdefault(item.event["period"], []).append(item)
        for period, items in by_period.items():
            keys = [i.event_key for i in items]
            try:
                sink.send(history.job, period, [i.event for i in items])
            except DeliveryError as exc:
                if exc.temporary:
                    log.warning("alert to %s for %s not delivered, will retry: %s", sink.channel, period, exc)
                    history.mark(sink.channel, keys, "pending", clock.now(), str(exc))
                    retrying += len(keys)
                    break  # keep period order: later periods wait for this one
                log.error("alert to %s for %s failed permanently: %s", sink.channel, period, exc)
                history.mark(sink.channel, keys, "dead", clock.now(), str(exc))
                dead += len(keys)
            else:
                history.mark(sink.channel, keys, "sent", clock.now())
                sent += len(keys)
    return RelayOutcome(sent, retrying, dead)
