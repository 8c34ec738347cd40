"""The ``webhook`` channel: a JSON POST per batch.

Config (``alerts[i]``)::

    - type: webhook
      url: https://hooks.example.com/segwatch
      timeout: 10                 # seconds
      headers: {X-Api-Key: "${HOOK_KEY}"}
      kinds: [emerged]            # optional; default every kind

The channel name shows only the URL's scheme, host and port (its path, often the
secret, as ``/...``; a password in it as ``***``) and, when something was hidden, a
short hash of the full URL so that two hooks stay apart.
"""

from __future__ import annotations

import http.client
import json
import re
import socket
import ssl
import urllib.error
import urllib.request
from dataclasses import dataclass
from typing import Any, Mapping, Sequence
from urllib.parse import urlsplit

from monitor.delivery import digest
from monitor.errors import DeliveryError
from monitor.redact import redact

from .base import KINDS_KEY, Attachment, Sink, SinkType, SpecReader, alert_line, batch_id, fingerprint, read_kinds

__all__ = ["WebhookAlert", "WebhookSink", "SINK_TYPE", "RETRY_AFTER_CAP_SECONDS"]

#: Longest ``Retry-After`` honoured (seconds).
RETRY_AFTER_CAP_SECONDS = 24 * 3600.0
_HEADER_NAME = re.compile(r"[!#$%&'*+.^_`|~0-9A-Za-z-]+")
_HIDDEN = "<hidden>"


@dataclass(frozen=True, repr=False)
class WebhookAlert:
    """POST the events as JSON to ``url``. ``headers`` is a tuple of (name, value) pairs."""

    type = "webhook"
    url: str
    timeout: float = 10.0
    headers: tuple[tuple[str, str], ...] = ()
    kinds: frozenset[str] | None = None

    @property
    def header_dict(self) -> dict[str, str]:
        return dict(self.headers)

    def __repr__(self) -> str:
        headers = tuple((name, _HIDDEN) for name, _ in self.headers)
        return (f"WebhookAlert(url={shown_url(self.url)!r}, timeout={self.timeout!r}, headers={headers!r}, "
                f"kinds={self.kinds!r})")


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """Redirects are not followed: urllib would turn a POST into a body-less GET."""

    def redirect_request(self, req, fp, code, msg, headers, newurl):  # noqa: D401, PLR0913
        return None


_OPENER = urllib.request.build_opener(_NoRedirect)


def shown_url(url: str) -> str:
    """The webhook URL as shown: scheme, host and port (user information without its
    password), ``/...`` for any path or query (a webhook's path is often its secret)."""
    parts = urlsplit(url)
    origin = redact(f"{parts.scheme}://{parts.netloc}")
    return origin + ("/..." if parts.path not in ("", "/") or parts.query or parts.fragment else "")


def channel_name(url: str) -> str:
    """``webhook:<shown URL>``, plus a hash of the full URL when anything was hidden."""
    shown = shown_url(url)
    return f"webhook:{shown}" if shown == url else f"webhook:{shown} #{fingerprint(url)}"


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
    kinds: frozenset[str] | None = None

    @property
    def channel(self) -> str:
        return channel_name(self.url)

    @property
    def former_channels(self) -> tuple[str, ...]:
        """Names this channel had before secrets were masked (its outbox rows are moved)."""
        return (f"webhook:{self.url}",)

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "headline": redact(digest.headline(events)),
                           "events": [alert_line(e) for e in digest.ordered(events)]},
                          default=str).encode()
        headers = {"Content-Type": "application/json", "Idempotency-Key": batch_id(events),
                   "User-Agent": "segwatch", **dict(self.headers or {})}
        req = urllib.request.Request(self.url, data=body, headers=headers, method="POST")
        where = shown_url(self.url)
        try:
            with _OPENER.open(req, timeout=self.timeout) as resp:
                resp.read()
        except urllib.error.HTTPError as exc:
            code = exc.code
            if 300 <= code < 400:
                raise DeliveryError(f"webhook {where} answered HTTP {code} (redirect to "
                                    f"{redact(exc.headers.get('Location', '?'))}); configure the final URL",
                                    temporary=False) from exc
            temporary = code >= 500 or code == 429
            raise DeliveryError(f"webhook {where} answered HTTP {code} {exc.reason}".rstrip(), temporary,
                                retry_after=_retry_after(exc.headers.get("Retry-After"))) from exc
        except urllib.error.URLError as exc:
            reason = exc.reason
            permanent = isinstance(reason, ssl.SSLCertVerificationError)
            raise DeliveryError(f"webhook {where} unreachable: {redact(str(reason))}",
                                temporary=not permanent) from exc
        except (http.client.HTTPException, TimeoutError, socket.timeout, OSError) as exc:
            raise DeliveryError(f"webhook {where} failed: {type(exc).__name__}: {redact(str(exc))}",
                                temporary=True) from exc


def _retry_after(value: str | None) -> float | None:
    """Seconds from an HTTP ``Retry-After`` header (delta-seconds only; dates are ignored)."""
    if value is None:
        return None
    try:
        seconds = float(value.strip())
    except ValueError:
        return None
    return min(max(seconds, 0.0), RETRY_AFTER_CAP_SECONDS)


def _positive(x: float) -> bool:
    return x > 0


def _parse(r: SpecReader, spec: dict, path: str) -> WebhookAlert:
    accepted = "an http:// or https:// URL"
    url = r.text(spec, "url", path, accepted)
    parts = urlsplit(url)
    if parts.scheme.lower() not in ("http", "https") or not parts.netloc:
        r.fail(f"{path}.url", "is not an http(s) URL", url, accepted)
    header_accepted = "a mapping of HTTP header names to text values"
    headers = r.section(spec, "headers", path, None, accepted=header_accepted)
    pairs = []
    for name in headers:
        if not isinstance(name, str) or not _HEADER_NAME.fullmatch(name):
            r.fail(f"{path}.headers", "has a key that is not an HTTP header name", name,
                   "letters, digits and - like X-Api-Key")
        value = r.text(headers, name, f"{path}.headers", "header text", secret=True, allow_blank=True)
        if "\r" in value or "\n" in value:
            r.fail(f"{path}.headers.{name}", "contains a line break", value, "header text on one line", secret=True)
        pairs.append((name, value))
    return WebhookAlert(
        url=url,
        timeout=r.number(spec, "timeout", path, _positive, "seconds, more than 0", default=10.0),
        headers=tuple(pairs),
        kinds=read_kinds(r, spec, path),
    )


def _build(cfg: WebhookAlert, attachment: Attachment | None) -> list[Sink]:
    return [WebhookSink(cfg.url, cfg.timeout, dict(cfg.headers), cfg.kinds)]


SINK_TYPE = SinkType("webhook", ("type", "url", "timeout", "headers", KINDS_KEY), _parse, _build, position=30)
