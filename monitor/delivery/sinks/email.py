"""The ``email`` channel: one digest mail per job, period and recipient, over SMTP.

Config (``alerts[i]``)::

    - type: email
      to: [ops@example.com]
      from: segwatch@example.com
      smtp: {host: localhost, port: 25, starttls: false, username: "${SMTP_USER}", password: "${SMTP_PASSWORD}"}
      subject_prefix: "[segwatch]"
      kinds: [emerged, segment_missing]   # optional; default every kind

Each recipient is its own channel (``email:<address>``), so a recipient the server
refuses is dead-lettered alone. The SMTP password never appears in a channel name, a
``repr`` or a message.
"""

from __future__ import annotations

import hashlib
import logging
import smtplib
import ssl
from dataclasses import dataclass
from email.message import EmailMessage
from email.utils import formatdate
from html import escape
from typing import Any, Mapping, Sequence

from monitor.errors import DeliveryError
from monitor.delivery import digest
from monitor.redact import redact

from .base import KINDS_KEY, Attachment, Sink, SinkType, SpecReader, batch_id, read_kinds

__all__ = ["SmtpConfig", "EmailAlert", "EmailSink", "SINK_TYPE"]

log = logging.getLogger(__name__)

_HIDDEN = "<hidden>"
_SMTP_KEYS = ("host", "port", "starttls", "ssl", "username", "password", "timeout")


@dataclass(frozen=True, repr=False)
class SmtpConfig:
    """How to reach the mail server. ``ssl`` is implicit TLS; ``starttls`` upgrades a plain connection.

    When the file sets ``ssl: true`` and no ``port``, the port is 465 (RFC 8314), else 25.
    A blank ``username`` or ``password`` (an empty variable, say) reads as None: no login.
    """

    host: str
    port: int = 25
    starttls: bool = False
    ssl: bool = False
    username: str | None = None
    password: str | None = None
    timeout: float = 30.0

    def __repr__(self) -> str:
        return (f"SmtpConfig(host={self.host!r}, port={self.port!r}, starttls={self.starttls!r}, ssl={self.ssl!r}, "
                f"username={self.username!r}, password={_HIDDEN if self.password else None!r}, "
                f"timeout={self.timeout!r})")


@dataclass(frozen=True)
class EmailAlert:
    """Mail the events; ``sender`` is the YAML key ``from``."""

    type = "email"
    to: tuple[str, ...]
    sender: str
    smtp: SmtpConfig
    subject_prefix: str = "[segwatch]"
    kinds: frozenset[str] | None = None


@dataclass
class EmailSink:
    """One digest mail per job, period and recipient (plain text and HTML), over SMTP.

    ``recipient`` is the envelope recipient; the ``To:`` header names every address of
    the alert. The connection has a timeout; STARTTLS and implicit TLS verify the
    server's certificate (``ssl.create_default_context()``).
    """

    cfg: EmailAlert
    recipient: str
    attachment: Attachment | None = None  # period -> (file name, HTML)

    @property
    def channel(self) -> str:
        return f"email:{self.recipient}"

    @property
    def kinds(self) -> frozenset[str] | None:
        return self.cfg.kinds

    def message(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> EmailMessage:
        msg = EmailMessage()
        n = len(events)
        msg["Subject"] = " ".join(redact(f"{self.cfg.subject_prefix} {job} {period}: {digest.headline(events)}").split())
        msg["From"] = self.cfg.sender
        msg["To"] = ", ".join(self.cfg.to)
        msg["Date"] = formatdate(usegmt=True)
        msg["Message-ID"] = f"<{batch_id(events)}.{hashlib.sha256(self.recipient.encode()).hexdigest()[:8]}@segwatch>"
        groups = digest.grouped(events)  # a metric's events together, the most important first
        lines = [f"segwatch: {job}, period {period}: {n} event{'s' if n != 1 else ''}", ""]
        for metric, items in groups:
            lines.append(f"{metric}:" if metric else "the whole table:")
            lines += [f"- [{e['kind']}] {redact(e['message'])}" for e in items]
            lines.append("")
        lines.pop()
        lines += ["", "Statistical significance is not practical importance; review before acting."]
        msg.set_content("\n".join(lines))
        items = "".join(
            f"<h3>{escape(metric) if metric else 'the whole table'}</h3><ul>"
            + "".join(f"<li><b>{escape(e['kind'])}</b>: {escape(redact(e['message']))}</li>" for e in group)
            + "</ul>" for metric, group in groups)
        msg.add_alternative(
            f"<html><body><p>segwatch: {escape(job)}, period {escape(str(period))}</p>{items}"
            "<p><small>Statistical significance is not practical importance; review before acting.</small></p>"
            "</body></html>", subtype="html")
        if self.attachment is not None and period is not None:
            try:
                name, html = self.attachment(period)
            except Exception as exc:  # noqa: BLE001 - a report that cannot be drawn must not block the alert
                log.warning("report for %s %s not attached: %s", job, period, redact(str(exc)))
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
            raise DeliveryError(f"{where} failed: {type(exc).__name__}: {redact(str(exc))}", temporary=True) from exc
        if refused:  # only possible with several envelope recipients; kept for safety
            codes = [code for code, _ in refused.values()]
            raise DeliveryError(f"{where} refused {', '.join(sorted(refused))}",
                                temporary=all(400 <= c < 500 for c in codes))


def _text(raw: bytes | str) -> str:
    text = raw.decode(errors="replace") if isinstance(raw, bytes) else str(raw)
    return redact(" ".join(text.split()))


def _positive(x: float) -> bool:
    return x > 0


def _parse(r: SpecReader, spec: dict, path: str) -> EmailAlert:
    def address(value: str) -> bool:
        return "@" in value and not any(ch.isspace() for ch in value)

    to = r.strings(spec, "to", path, "a list of e-mail addresses like [ops@example.com]", check=address,
                   bad="is not an e-mail address")
    sender = r.text(spec, "from", path, "an e-mail address like segwatch@example.com")
    if not address(sender):
        r.fail(f"{path}.from", "is not an e-mail address", sender, "an e-mail address like segwatch@example.com")
    where = f"{path}.smtp"
    smtp = r.section(spec, "smtp", path, _SMTP_KEYS, required=True)
    starttls = r.boolean(smtp, "starttls", where, default=False)
    use_ssl = r.boolean(smtp, "ssl", where, default=False)
    if starttls and use_ssl:
        r.fail(f"{where}.ssl", "cannot be combined with starttls: true", True,
               "ssl (implicit TLS, port 465) or starttls (port 587), not both")
    return EmailAlert(
        to=to,
        sender=sender,
        smtp=SmtpConfig(
            host=r.text(smtp, "host", where, "a mail server host name"),
            port=r.integer(smtp, "port", where, lambda x: 1 <= x <= 65535, "a port number from 1 to 65535",
                           default=465 if use_ssl else 25),
            starttls=starttls,
            ssl=use_ssl,
            username=r.text(smtp, "username", where, "a login name", default=None, blank_is_none=True),
            password=r.text(smtp, "password", where, "a password, best as ${VARIABLE}", default=None,
                            blank_is_none=True, secret=True),
            timeout=r.number(smtp, "timeout", where, _positive, "seconds, more than 0", default=30.0),
        ),
        subject_prefix=r.text(spec, "subject_prefix", path, "a subject prefix", default="[segwatch]",
                              blank_is_none=False, allow_blank=True),
        kinds=read_kinds(r, spec, path),
    )


def _build(cfg: EmailAlert, attachment: Attachment | None) -> list[Sink]:
    return [EmailSink(cfg, addr, attachment) for addr in cfg.to]


SINK_TYPE = SinkType("email", ("type", "to", "from", "smtp", "subject_prefix", KINDS_KEY), _parse, _build,
                     position=20)
