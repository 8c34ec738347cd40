"""Log lines on stderr for the command line: ISO 8601 UTC timestamps, as text or JSON Lines.

Two formats, chosen with ``--log-format``:

``text`` (default)
    ``2026-12-02T20:50:05.123Z WARNING monitor.runner: message`` -- one line per record;
    control characters in the message (a newline in a segment label, an escape
    sequence) are written as ``\\n`` / ``\\x1b`` so that a record can neither forge a
    second line nor drive the terminal.
``json``
    one JSON object per line (JSON Lines) with ``time``, ``level``, ``logger`` and
    ``message``, plus ``traceback`` when the record carries one. A log collector can
    read it without parsing text.

The time is the record's own creation time (``LogRecord.created``), written in UTC.
"""

from __future__ import annotations

import json
import logging
import re
from datetime import datetime, timezone
from typing import Any, TextIO

FORMATS = ("text", "json")

_CONTROL = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u2028\u2029]")


def iso_time(created: float) -> str:
    """``created`` (seconds since the epoch) as ISO 8601 UTC with milliseconds and ``Z``."""
    stamp = datetime.fromtimestamp(created, tz=timezone.utc)
    return stamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{stamp.microsecond // 1000:03d}Z"


def _escape(text: str) -> str:
    text = text.replace("\n", "\\n").replace("\t", "\\t")
    return _CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}" if ord(m.group()) < 0x100
                        else f"\\u{ord(m.group()):04x}", text)


class TextFormatter(logging.Formatter):
    """``<ISO 8601 UTC> <LEVEL> <logger>: <message>`` on one line (tracebacks follow it)."""

    def format(self, record: logging.LogRecord) -> str:
        line = f"{iso_time(record.created)} {record.levelname} {record.name}: {_escape(record.getMessage())}"
        if record.exc_info:
            line += "\n" + self.formatException(record.exc_info)
        return line


class JsonFormatter(logging.Formatter):
    """One JSON object per record: ``time``, ``level``, ``logger``, ``message`` [, ``traceback``]."""

    def format(self, record: logging.LogRecord) -> str:
        doc: dict[str, Any] = {"time": iso_time(record.created), "level": record.levelname.lower(),
                               "logger": record.name, "message": record.getMessage()}
        if record.exc_info:
            doc["traceback"] = self.formatException(record.exc_info)
        exit_code = getattr(record, "exit_code", None)
        if exit_code is not None:
            doc["exit_code"] = exit_code
        return json.dumps(doc, ensure_ascii=False, default=str)


class _Handler(logging.StreamHandler):
    """segwatch's own stderr handler (told apart from handlers others installed)."""


def configure(level: int, fmt: str = "text", stream: TextIO | None = None) -> logging.Handler:
    """Send log records at ``level`` and above to ``stream`` (stderr) in format ``fmt``.

    Replaces a handler installed by an earlier call (the command line may be called
    more than once in one process, as tests do) and leaves other handlers alone.
    """
    if fmt not in FORMATS:
        raise ValueError(f"log format {fmt!r}: use one of {', '.join(FORMATS)}")
    root = logging.getLogger()
    for old in [h for h in root.handlers if isinstance(h, _Handler)]:
        root.removeHandler(old)
    handler = _Handler(stream)
    handler.setFormatter(JsonFormatter() if fmt == "json" else TextFormatter())
    root.addHandler(handler)
    root.setLevel(level)
    return handler


def remove(handler: logging.Handler) -> None:
    """Take ``handler`` (from :func:`configure`) off the root logger."""
    logging.getLogger().removeHandler(handler)
