"""The exceptions segwatch raises on purpose, and the exit code each maps to.

Every message is one line a user can act on: it names the place (file, key path,
table, column or URL) and what to do about it. The command line prints
``Error: <message>`` and exits with :attr:`SegwatchError.exit_code`.

The tree (every exception class of the package is here)::

    Exception
    ├── SegwatchError            exit 1: an expected failure, one-line message
    │   ├── UsageError           exit 2: the command line was called wrongly
    │   │   ├── ConfigError      the config file is missing or invalid
    │   │   └── PeriodError      a period identifier is malformed or of the wrong kind
    │   ├── SourceError          the source database could not be reached or queried
    │   ├── HistoryError         the history database could not be reached, created or written
    │   │   └── LeaseLost        the run's lease was taken over before it stored its results
    │   ├── AlertError           an alert could not be delivered
    │   └── PeriodBusy           exit 3: another process holds the period's lease
    └── DeliveryError            one sink's delivery attempt failed (temporary or not); the
                                 relay turns it into a retry or a dead letter, never raised out

Exit codes of the command line (the README's list; 0, 1 and 2 are the outside
contract's, 3 and 4 were added to it):

====  ===========================================================================
0     success, whether or not anything was flagged
1     the run failed (source unreachable, SQL error, history not writable)
2     bad usage or bad config
3     skipped: another process holds the period's lease (nothing started; try later)
4     the period had no rows in the source (nothing stored)
====  ===========================================================================
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_USAGE = 2
EXIT_BUSY = 3
EXIT_EMPTY = 4


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


class LeaseLost(HistoryError):
    """The run's lease was taken over by another process before it could store its results."""


class PeriodBusy(SegwatchError):
    """Another process holds the period's lease; this run did not start (exit code 3)."""

    exit_code = EXIT_BUSY


class DeliveryError(Exception):
    """A sink could not deliver; ``temporary`` says whether a retry may succeed.

    ``retry_after`` (seconds) is the receiver's own wish (HTTP ``Retry-After``), if any.
    """

    def __init__(self, message: str, temporary: bool, retry_after: float | None = None):
        super().__init__(message)
        self.temporary = temporary
        self.retry_after = retry_after
