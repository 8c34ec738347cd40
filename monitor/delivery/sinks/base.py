"""The alert-channel protocol and the registry of channel types.

A channel type is one module in this folder named after its config ``type`` (``log.py``
for ``type: log``) that defines ``SINK_TYPE``, a :class:`SinkType`:

* ``keys`` — the keys its config section may hold (``type`` and ``kinds`` included);
* ``parse(reader, spec, path)`` — read and validate the section (``alerts[i]``) into
  the type's frozen config object, failing through ``reader.fail`` with one line that
  names the file and key path;
* ``build(config, attachment)`` — the sinks of one configured alert (an e-mail alert
  has one per recipient);
* ``position`` — where the type stands in lists shown to users.

A sink (:class:`Sink`) names its ``channel``: stable across runs (the outbox keys its
rows by it), free of secrets (it is shown by ``segwatch alerts`` and stored in the
outbox), and distinct for distinct destinations (a short hash of the full destination
stands in for the hidden parts). It sends one batch (one job, one period) and raises
:class:`~monitor.errors.DeliveryError` on failure. ``kinds`` is the set of event kinds
it receives (``None``: all).

Adding a channel is one module here, its tests and its documentation: the config
reader and the relay find it through :func:`get` and :func:`types`.
"""

from __future__ import annotations

import hashlib
import importlib
import pkgutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, NoReturn, Protocol, Sequence

__all__ = ["Sink", "SinkType", "SpecReader", "Attachment", "get", "types", "read_kinds", "fingerprint",
           "alert_line", "batch_id", "KINDS_KEY"]

#: period -> (file name, HTML) of a report to attach (e-mail digests).
Attachment = Callable[[str], tuple[str, str]]

#: The key every channel type accepts: the event kinds it receives.
KINDS_KEY = "kinds"


class SpecReader(Protocol):
    """What a channel type may ask of the config reader (``monitor.config``'s reader is one)."""

    file: str

    def fail(self, path: str, what: str, given: Any, accepted: str, *, secret: bool = False) -> NoReturn: ...
    def folder_path(self, text: str) -> Path: ...
    def mapping(self, value: Any, path: str, keys: tuple[str, ...] | None, accepted: str) -> dict: ...
    def section(self, parent: dict, key: str, path: str, keys: tuple[str, ...] | None, *,
                required: bool = False, accepted: str | None = None) -> dict: ...
    def strings(self, parent: dict, key: str, path: str, accepted: str, *,
                check: Callable[[str], bool] | None = None, bad: str = ...) -> tuple[str, ...]: ...
    def text(self, parent: dict, key: str, path: str, accepted: str, *, default: Any = ...,
             secret: bool = False, allow_blank: bool = False, blank_is_none: bool = False) -> Any: ...
    def number(self, parent: dict, key: str, path: str, check: Callable[[float], bool], accepted: str, *,
               default: Any = ...) -> Any: ...
    def integer(self, parent: dict, key: str, path: str, check: Callable[[int], bool], accepted: str, *,
                default: Any = ...) -> Any: ...
    def boolean(self, parent: dict, key: str, path: str, *, default: bool) -> bool: ...


class Sink(Protocol):
    """One alert channel: a secret-free ``channel`` name, the ``kinds`` it receives, ``send``."""

    channel: str
    kinds: frozenset[str] | None
    # optional: ``former_channels``, names the channel was stored under before (the relay
    # moves their outbox rows to ``channel``; see monitor.delivery.relay.rename_old_channels)

    def send(self, job: str, period: str | None, events: Sequence[Mapping[str, Any]]) -> None: ...


@dataclass(frozen=True)
class SinkType:
    """A channel type: its config ``type``, accepted keys, reader and sink builder."""

    type: str
    keys: tuple[str, ...]
    parse: Callable[[SpecReader, dict, str], Any]
    build: Callable[[Any, Attachment | None], list[Sink]]
    position: int = 100
    #: True for channels that also receive operational (``op_...``) events.
    receives_ops: bool = False


_REGISTRY: dict[str, SinkType] | None = None


def _load() -> dict[str, SinkType]:
    global _REGISTRY
    if _REGISTRY is None:
        package = __name__.rpartition(".")[0]
        found = []
        for info in pkgutil.iter_modules([str(Path(__file__).parent)]):
            if info.name == "base" or info.name.startswith("_"):
                continue
            module = importlib.import_module(f"{package}.{info.name}")
            sink_type = getattr(module, "SINK_TYPE", None)
            if isinstance(sink_type, SinkType):
                found.append(sink_type)
        found.sort(key=lambda t: (t.position, t.type))
        _REGISTRY = {t.type: t for t in found}
    return _REGISTRY


def types() -> tuple[str, ...]:
    """The known channel types, in the order shown to users."""
    return tuple(_load())


def get(name: str) -> SinkType:
    """The channel type called ``name`` (KeyError if unknown)."""
    return _load()[name]


def read_kinds(r: SpecReader, spec: dict, path: str) -> frozenset[str] | None:
    """The optional ``kinds:`` list of an alert: the event kinds its channel receives (None: all)."""
    if spec.get(KINDS_KEY) is None:
        return None
    from monitor.model import EVENT_KINDS  # only when asked: the model loads numpy, config errors stay fast

    accepted = f"a list of event kinds from {', '.join(EVENT_KINDS)}"
    kinds = r.strings(spec, KINDS_KEY, path, accepted)
    for index, kind in enumerate(kinds):
        if kind not in EVENT_KINDS:
            r.fail(f"{path}.{KINDS_KEY}[{index}]", "unknown event kind", kind, ", ".join(EVENT_KINDS))
    return frozenset(kinds)


def fingerprint(*parts: object) -> str:
    """A short stable hash of a destination, so that two channels whose visible names
    are equal once their secrets are hidden stay apart."""
    return hashlib.sha256("\x1f".join(map(str, parts)).encode()).hexdigest()[:8]


def alert_line(event: Mapping[str, Any]) -> dict[str, Any]:
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


def batch_id(events: Sequence[Mapping[str, Any]]) -> str:
    """A stable id for a batch: the same events give the same id, on every retry."""
    key = "-".join(sorted(e["event_key"] for e in events))
    return hashlib.sha256(key.encode()).hexdigest()[:40]
