"""One period's events as a person reads them first: ranked, grouped, and named in a headline.

A period can raise many events (a new difference with a dozen segments flagged, a
depot that stops reporting). A digest should say in its subject what changed, and
keep a metric's events together. This module orders a batch of stored events (the
dicts the outbox hands to a sink) and writes a one-line headline from the most
important one, with its numbers in the metric's units:

    dwell_hours: Quarry above the others by 2.79 h (+2 more)

The order of importance is our own, from what an operations lead acts on first:
a difference that newly appears (the metric, then its segments), a segment that
stops reporting, a broken assumption, a difference that clears, a new segment, a
restored assumption, a data-quality note. Pure functions, no I/O.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

__all__ = ["ordered", "headline", "grouped"]

_RANK = {"emerged": 0, "segment_missing": 2, "assumption_broken": 3, "cleared": 4, "segment_new": 5,
         "assumption_restored": 6, "data_quality": 7}


def _rank(e: Mapping[str, Any]) -> tuple[int, int]:
    kind = e.get("kind", "")
    base = _RANK.get(kind, 9 if kind.startswith("op_") else 8)
    if kind == "emerged" and e.get("segment") is not None:
        base = 1
    return base, 0


def ordered(events: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """The events by importance; a metric's events stay together, in the order of its
    most important one (stable otherwise)."""
    first: dict[Any, tuple[int, int]] = {}
    for i, e in enumerate(events):
        key = e.get("metric")
        r = (_rank(e)[0], i)
        if key not in first or r < first[key]:
            first[key] = r
    return sorted(events, key=lambda e: (first[e.get("metric")], _rank(e)[0]))


def grouped(events: Sequence[Mapping[str, Any]]) -> list[tuple[str | None, list[Mapping[str, Any]]]]:
    """:func:`ordered` events in groups of one metric each (None: events of the whole table)."""
    out: list[tuple[str | None, list[Mapping[str, Any]]]] = []
    for e in ordered(events):
        m = e.get("metric")
        if out and out[-1][0] == m:
            out[-1][1].append(e)
        else:
            out.append((m, [e]))
    return out


def headline(events: Sequence[Mapping[str, Any]]) -> str:
    """What changed, in a few words: the most important event, its numbers, and how
    many more events the batch holds."""
    if not events:
        return "no events"
    top = ordered(events)[0]
    more = len(events) - 1
    return _phrase(top) + (f" (+{more} more)" if more else "")


def _num(x: Any, unit: str | None = None) -> str | None:
    if not isinstance(x, (int, float)) or isinstance(x, bool) or not math.isfinite(x):
        return None
    text = f"{abs(x):.3g}"
    return f"{text} {unit}" if unit else text


def _phrase(e: Mapping[str, Any]) -> str:
    kind, metric, segment = e.get("kind"), e.get("metric"), e.get("segment")
    d = e.get("detail") or {}
    if kind == "emerged" and segment is not None:
        word = "above" if d.get("flag") == "high" else "below"
        if d.get("reference") is not None:
            pct = d.get("percent")
            if isinstance(pct, (int, float)) and math.isfinite(pct):
                return f"{metric}: {segment} {pct:+.1f}% against {d['reference']}"
            gap = _num(d.get("gap"), d.get("unit"))
            if gap is not None:
                return f"{metric}: {segment} {word} {d['reference']} by {gap}"
            return f"{metric}: {segment} {word} {d['reference']}"
        gap = _num(d.get("diff_vs_rest"), d.get("unit"))
        return f"{metric}: {segment} {word} the others" + (f" by {gap}" if gap else "")
    if kind == "emerged":
        return f"{metric} now differs"
    if kind == "cleared":
        return f"{metric}: {segment} no longer stands apart" if segment else f"{metric} no longer differs"
    if kind == "segment_missing":
        return f"{segment} has no records"
    if kind == "segment_new":
        return f"{segment} now has records"
    if kind == "assumption_broken":
        return f"{metric}: {d.get('check', 'a check')} fails"
    if kind == "assumption_restored":
        return f"{metric}: {d.get('check', 'a check')} passes again"
    if kind == "data_quality":
        return f"{metric or 'the table'}: data quality ({d.get('problem', 'see the message')})"
    return f"{kind}: {metric or ''} {segment or ''}".strip()
