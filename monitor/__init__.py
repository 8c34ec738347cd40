"""segwatch: watch recurring comparisons between segments, period after period.

Each period, segwatch reads a job's records from a SQL database, compares the
segments on every metric (Fisher's or Welch's one-way ANOVA, or Kruskal-Wallis, with
post-hoc pairs), controls the false discovery rate across metrics, stores the results,
and raises events when a difference newly appears or clears, or a test's assumptions
stop holding.

The command line (:mod:`monitor.cli`) is a thin layer over :class:`monitor.runner.Job`.
"""

__version__ = "0.1.0"
