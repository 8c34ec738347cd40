"""Small helpers shared by the source and the history: URL redaction and one-line
database error texts."""

from __future__ import annotations

import sqlalchemy as sa


def redact(url: str) -> str:
    """The URL with any password hidden, for messages and logs."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - a malformed URL is shown as given
        return url


def one_line(exc: BaseException | None) -> str:
    """The first line of a database error (the driver's own text when there is one)."""
    if exc is None:
        return "unknown error"
    text = str(getattr(exc, "orig", None) or exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
