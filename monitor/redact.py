"""One rule for secrets in text: what segwatch hides before anything is shown or stored.

Every message, log line, stored error, event and channel name that may hold a URL,
a database error or a command line goes through :func:`redact` (or :func:`redact_argv`
for a program's arguments, :func:`one_line` for an exception) at the edge where it
leaves the program. The rule is the same everywhere:

* the password of a URL's user information: ``postgresql://app:***@db/ops`` (the user
  name stays, as SQLAlchemy's ``hide_password`` shows it);
* the value of a query or fragment parameter, a ``name=value`` pair in free text, or a
  ``--name=value`` / ``--name value`` argument, when the name says it is a secret:
  it contains ``pass``, ``pwd``, ``secret``, ``token``, ``auth``, ``signature``,
  ``credential`` or ``session``, or ends in ``key`` (``key``, ``api_key``,
  ``apikey``, ``X-Api-Key``), or is ``sig``: ``?token=***``;
* in an ``http(s)`` URL, every path segment that looks like a random token (at least
  16 characters of letters, digits and ``-_.~=+%``, with both letters and digits or
  both cases; webhook URLs often carry their secret there):
  ``https://hooks.example.com/services/***``;
* a command argument that looks like such a token (at least 20 characters, no ``/``).

Masks are ``***``. The rule errs towards hiding: an innocent ``?sslkey=`` or a long
mixed-case path segment is hidden too. Database file paths (``sqlite:///...``) keep
their path, so a message still names the file.

This module imports nothing from segwatch (floor 0).
"""

from __future__ import annotations

import re
from typing import Iterable

__all__ = ["MASK", "redact", "redact_argv", "one_line", "is_secret_name"]

MASK = "***"

_URL = re.compile(r"[A-Za-z][A-Za-z0-9+.-]*://[^\s'\"<>`]+")
_PAIR = re.compile(r"(?<![\w.-])([A-Za-z_][\w.-]*)=([^\s&'\"<>;,)#]+)")
_NAME_PARTS = ("pass", "pwd", "secret", "token", "auth", "signature", "credential", "session")
_TOKEN_CHARS = re.compile(r"[A-Za-z0-9._~=+%-]+")
_FLAG = re.compile(r"(-{1,2}[A-Za-z][\w-]*)(=|:\s*)(.+)", re.S)


def is_secret_name(name: str) -> bool:
    """Whether a parameter, option or header called ``name`` holds a secret (see the module notes)."""
    n = name.strip().lstrip("-").lower()
    return (any(part in n for part in _NAME_PARTS) or n.endswith("key") or n in ("sig", "pw"))


def _token_like(text: str, min_length: int) -> bool:
    if len(text) < min_length or not _TOKEN_CHARS.fullmatch(text):
        return False
    letters = any(c.isalpha() for c in text)
    digits = any(c.isdigit() for c in text)
    cases = any(c.islower() for c in text) and any(c.isupper() for c in text)
    return (letters and digits) or cases


def _params(text: str) -> str:
    """``a=1&token=x`` with the secret values masked."""
    parts = []
    for item in text.split("&"):
        name, eq, value = item.partition("=")
        parts.append(f"{name}={MASK}" if eq and value and is_secret_name(name) else item)
    return "&".join(parts)


def _url(url: str) -> str:
    scheme, _, rest = url.partition("://")
    cut = min((i for i in (rest.find("/"), rest.find("?"), rest.find("#")) if i >= 0), default=len(rest))
    netloc, tail = rest[:cut], rest[cut:]
    if "@" in netloc:
        userinfo, _, host = netloc.rpartition("@")
        user, colon, password = userinfo.partition(":")
        if colon and password:
            netloc = f"{user}:{MASK}@{host}"
        elif _token_like(userinfo, 16):
            netloc = f"{MASK}@{host}"
    path, hash_, fragment = tail.partition("#")
    path, q, query = path.partition("?")
    if scheme.lower() in ("http", "https", "ws", "wss"):
        path = "/".join(MASK if _token_like(seg, 16) else seg for seg in path.split("/"))
    query = _params(query) if q else ""
    fragment = _params(fragment) if hash_ else ""
    return f"{scheme}://{netloc}{path}{q}{query}{hash_}{fragment}"


def redact(text: str | None) -> str:
    """``text`` with every secret the module's rule knows masked (``None`` reads as ``""``).

    Safe on any text: URLs anywhere in it, ``name=value`` pairs, plain words. Applying it
    twice gives the same text as once.
    """
    if not text:
        return "" if text is None else text
    text = _URL.sub(lambda m: _url(m.group(0)), str(text))
    return _PAIR.sub(lambda m: f"{m.group(1)}={MASK}" if is_secret_name(m.group(1)) and not m.group(2).startswith(MASK)
                     else m.group(0), text)


def redact_argv(argv: Iterable[str]) -> list[str]:
    """A program's arguments with secrets masked: URLs, ``--token=x``, ``--token x``,
    ``Authorization: Bearer x`` and token-like arguments (the program itself is kept)."""
    out: list[str] = []
    hide_next = False
    for index, arg in enumerate(argv):
        arg = str(arg)
        if index == 0:
            out.append(redact(arg))
            continue
        if hide_next:
            out.append(MASK)
            hide_next = False
            continue
        flag = _FLAG.fullmatch(arg)
        header, colon, _ = arg.partition(":")
        if flag and is_secret_name(flag.group(1)):
            out.append(f"{flag.group(1)}{flag.group(2)}{MASK}")
        elif colon and "://" not in arg and " " not in header and is_secret_name(header):
            out.append(f"{header}: {MASK}")
        elif arg.startswith("-") and "=" not in arg and is_secret_name(arg):
            out.append(arg)
            hide_next = True
        elif "/" not in arg and _token_like(arg, 20):
            out.append(MASK)
        else:
            out.append(redact(arg))
    return out


#: The longest error text a message quotes (drivers may send a whole stack).
ONE_LINE_MAX = 300


def one_line(exc: BaseException | None) -> str:
    """The first line of an error (a database driver's own text when there is one), redacted
    and at most :data:`ONE_LINE_MAX` characters. A HiveServer2 (Thrift) response, as
    Spark's server sends, gives its ``errorMessage`` rather than the whole response with
    the server's Java stack."""
    if exc is None:
        return "unknown error"
    orig = getattr(exc, "orig", None) or exc
    args = getattr(orig, "args", ())
    status = getattr(args[0], "status", None) if args else None
    message = getattr(status, "errorMessage", None)
    text = str(message or orig).strip().splitlines()
    line = redact(text[0].strip()) if text else type(exc).__name__
    return line if len(line) <= ONE_LINE_MAX else line[: ONE_LINE_MAX - 3] + "..."
