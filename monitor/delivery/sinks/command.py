"""The ``command`` channel: a program run with the batch as JSON on stdin.

Config (``alerts[i]``)::

    - type: command
      run: ["notify-ops", "--stdin"]   # no shell; a relative path is taken from the config's folder
      timeout: 60                       # seconds
      kinds: [emerged, segment_missing] # optional; default every kind

The channel name shows the arguments with secrets masked
(:func:`monitor.redact.redact_argv`) and, when something was masked, a short hash of
the full command line.
"""

from __future__ import annotations

import json
import os
import subprocess
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

from monitor.delivery import digest
from monitor.errors import DeliveryError
from monitor.redact import redact, redact_argv

from .base import KINDS_KEY, Attachment, Sink, SinkType, SpecReader, alert_line, fingerprint, read_kinds

__all__ = ["CommandAlert", "CommandSink", "SINK_TYPE"]


@dataclass(frozen=True)
class CommandAlert:
    """Run ``run`` (no shell) with the events as JSON on stdin."""

    type = "command"
    run: tuple[str, ...]
    timeout: float = 60.0
    kinds: frozenset[str] | None = None

    def __repr__(self) -> str:
        return f"CommandAlert(run={tuple(redact_argv(self.run))!r}, timeout={self.timeout!r}, kinds={self.kinds!r})"


def channel_name(run: Sequence[str]) -> str:
    """``command:<arguments as JSON>``, secrets masked, plus a hash of the full command when masked."""
    full, shown = list(run), redact_argv(run)
    name = "command:" + json.dumps(shown)
    return name if shown == full else f"{name} #{fingerprint(*full)}"


@dataclass
class CommandSink:
    """Runs a program with the events as a JSON document on stdin; non-zero exit is a failure.

    A non-zero exit or a timeout is temporary (retried with backoff, dead after the
    relay's attempt limit); a program that cannot be started is permanent. The child is
    killed when it runs past ``timeout``.
    """

    run: Sequence[str]
    timeout: float = 60.0
    kinds: frozenset[str] | None = None

    @property
    def channel(self) -> str:
        return channel_name(self.run)

    @property
    def former_channels(self) -> tuple[str, ...]:
        """Names this channel had before secrets were masked (its outbox rows are moved)."""
        return ("command:" + json.dumps(list(self.run)),)

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None:
        body = json.dumps({"job": job, "period": period, "headline": redact(digest.headline(events)),
                           "events": [alert_line(e) for e in digest.ordered(events)]}, default=str)
        program = redact(self.run[0])
        try:
            proc = subprocess.run(list(self.run), input=body.encode(), capture_output=True, timeout=self.timeout)
        except FileNotFoundError as exc:
            raise DeliveryError(f"alert command {program!r} not found", temporary=False) from exc
        except PermissionError as exc:
            raise DeliveryError(f"alert command {program!r} is not executable", temporary=False) from exc
        except subprocess.TimeoutExpired as exc:
            raise DeliveryError(f"alert command {program!r} timed out after {self.timeout}s", True) from exc
        if proc.returncode != 0:
            err = proc.stderr.decode(errors="replace").strip().splitlines()
            raise DeliveryError(
                f"alert command {program!r} exited with {proc.returncode}"
                + (f": {redact(err[-1])}" if err else ""), temporary=True)


def _positive(x: float) -> bool:
    return x > 0


def _parse(r: SpecReader, spec: dict, path: str) -> CommandAlert:
    run = r.strings(spec, "run", path, 'a list: the program, then its arguments, like ["notify-ops", "--stdin"]')
    program = run[0]
    if "/" in program or os.sep in program:  # a path, not a name looked up on PATH
        run = (str(r.folder_path(program)),) + run[1:]
    return CommandAlert(run=run, timeout=r.number(spec, "timeout", path, _positive, "seconds, more than 0",
                                                  default=60.0),
                        kinds=read_kinds(r, spec, path))


def _build(cfg: CommandAlert, attachment: Attachment | None) -> list[Sink]:
    return [CommandSink(tuple(cfg.run), cfg.timeout, cfg.kinds)]


SINK_TYPE = SinkType("command", ("type", "run", "timeout", KINDS_KEY), _parse, _build, position=40)
