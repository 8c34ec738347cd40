"""The exceptions segwatch raises on purpose, and the exit code each maps to.

Every message is one line a user can act on: it names the place (file, key path,
table, column or URL) and what to do about it. The command line prints
``Error: <message>`` and exits with :attr:`SegwatchError.exit_code`.
"""

from __future__ import annotations


class SegwatchError(Exception):
    """Base class: an expected failure with a one-line, user-facing message."""

    exit_code = 1


class UsageError(SegwatchError):
    """The command line was called wrongly (bad option value, unknown period)."""

    exit_code = 2


class ConfigError(UsageError):
    """The config file is missing, unreadable or invalid; the message names file and key path."""


class PeriodError(UsageError):
    """A period identifier does not match the job's period kind or is malformed."""


class SourceError(SegwatchError):
    """The source database could not be reached or queried."""


class HistoryError(SegwatchError):
    """The history database could not be reached, created or written."""


class AlertError(SegwatchError):
    """An alert could not be delivered."""
