"""segwatch: watch recurring comparisons between segments, period after period.

Each period, segwatch reads a job's records from a SQL database, compares the
segments on every metric (Fisher's or Welch's one-way ANOVA, or Kruskal-Wallis, with
post-hoc pairs), controls the false discovery rate across metrics, stores the results,
and raises events when a difference newly appears or clears, or a test's assumptions
stop holding.

The command line (:mod:`monitor.cli`) is a thin layer over :class:`monitor.runner.Job`,
also reachable as ``from monitor import Job, load_config`` (loaded on first use, so that
``import monitor`` and ``segwatch --help`` stay fast).
"""

__version__ = "0.1.0"

__all__ = ["Job", "PeriodReport", "load_config", "__version__"]

_LAZY = {"Job": "monitor.runner", "PeriodReport": "monitor.runner", "load_config": "monitor.config"}


def __getattr__(name: str):  # PEP 562: ``from monitor import Job`` without loading it on ``import monitor``
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'monitor' has no attribute {name!r}")
