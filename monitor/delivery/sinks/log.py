"""The ``log`` channel: events appended to a file as JSON Lines.

Config (``alerts[i]``)::

    - type: log
      path: logs/alerts.jsonl     # relative to the config file's folder
      kinds: [emerged, cleared]   # optional; default every kind

The log channels also receive the operational events (``op_...``), whatever ``kinds``
says.
"""

from __future__ import annotations

import json
import mmap
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

from monitor.errors import DeliveryError
from monitor.redact import redact

from .base import KINDS_KEY, Attachment, Sink, SinkType, SpecReader, alert_line, read_kinds

try:  # POSIX; elsewhere (Windows) the log file is written without an advisory lock
    import fcntl
except ImportError:  # pragma: no cover - exercised by hiding the module in a test
    fcntl = None  # type: ignore[assignment]

__all__ = ["LogAlert", "LogSink", "SINK_TYPE"]


@dataclass(frozen=True)
class LogAlert:
    """Append events as JSON Lines to ``path`` (absolute)."""

    type = "log"
    path: Path
    kinds: frozenset[str] | None = None


@dataclass
class LogSink:
    """Appends one JSON object per event per line (JSON Lines) and fsyncs.

    Each batch is written under an exclusive ``flock`` on a file opened with
    ``O_APPEND``, so two processes writing the same file never interleave lines. Under
    the same lock the file is searched for the batch's event keys and lines already
    present are not written again: a retry after a crash (written, not yet marked sent)
    leaves the file as one delivery would.

    A write is complete or it is a failure: ``os.write`` is repeated until every byte
    is written, and a write that stops short (a full disk) raises a temporary
    :class:`DeliveryError`, so the batch stays pending and is retried. A batch starts on
    a fresh line: when the file does not end in a newline (a torn line left by such a
    failure) a newline is written first, so the torn line stays alone (one unreadable
    line, whose events are written again whole by the retry) and never swallows the
    next one.
    """

    path: Path
    kinds: frozenset[str] | None = None

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
            data = "".join(json.dumps(_redacted(alert_line(e)), ensure_ascii=False, default=str) + "\n"
                           for e in events if e["event_key"] not in present)
            if data:
                if not _ends_with_newline(fd):
                    data = "\n" + data
                _write_all(fd, data.encode("utf-8"))
                os.fsync(fd)
        except OSError as exc:
            raise DeliveryError(f"cannot write alert log {self.path}: {exc.strerror or exc}", temporary=True) from exc
        finally:
            os.close(fd)


def _write_all(fd: int, data: bytes) -> None:
    """Write every byte of ``data`` or raise OSError (a write that makes no progress is a failure)."""
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        if written <= 0:
            raise OSError(f"short write: {len(data) - len(view)} of {len(data)} bytes written")
        view = view[written:]


def _ends_with_newline(fd: int) -> bool:
    """Whether the file is empty or its last byte is a newline."""
    size = os.fstat(fd).st_size
    return size == 0 or os.pread(fd, 1, size - 1) == b"\n"


def _redacted(line: dict[str, Any]) -> dict[str, Any]:
    """The alert line with secrets masked in its message and in the text of its detail."""
    line["message"] = redact(line["message"])
    detail = line.get("detail")
    if isinstance(detail, Mapping):
        line["detail"] = {k: redact(v) if isinstance(v, str) else v for k, v in detail.items()}
    return line


def _keys_present(fd: int, keys: Sequence[str]) -> set[str]:
    """Which of ``keys`` already appear as the ``event_key`` of a whole line of the open file.

    A line torn by a failed write (no newline after it, or not valid JSON) does not
    count: its events are written again.
    """
    if os.fstat(fd).st_size == 0:
        return set()
    found: set[str] = set()
    with mmap.mmap(fd, 0, access=mmap.ACCESS_READ) as data:
        for key in keys:
            needle = f'"event_key": "{key}"'.encode()
            at = data.find(needle)
            while at != -1 and key not in found:
                start, end = data.rfind(b"\n", 0, at) + 1, data.find(b"\n", at)
                if end != -1 and _line_key(data[start:end]) == key:
                    found.add(key)
                at = data.find(needle, at + 1)
    return found


def _line_key(raw: bytes) -> str | None:
    try:
        line = json.loads(raw)
    except ValueError:
        return None
    return line.get("event_key") if isinstance(line, dict) else None


def _parse(r: SpecReader, spec: dict, path: str) -> LogAlert:
    return LogAlert(path=r.folder_path(r.text(spec, "path", path, "a file path for the JSON Lines log")),
                    kinds=read_kinds(r, spec, path))


def _build(cfg: LogAlert, attachment: Attachment | None) -> list[Sink]:
    return [LogSink(Path(cfg.path), cfg.kinds)]


SINK_TYPE = SinkType("log", ("type", "path", KINDS_KEY), _parse, _build, position=10, receives_ops=True)
