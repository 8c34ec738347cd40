"""The error-rate harness: false alarms and detection delay, measured by simulation.

Run it as one command from the repository root::

    python -m tests.sim                 # every table (tens of minutes on two cores)
    python -m tests.sim --quick         # the same tables with a tenth of the replications
    python -m tests.sim --only null,e2e --workers 2 --out /tmp/tables.md

It prints Markdown tables (the ones in docs/error_rates.md) with their settings,
replication counts and Monte Carlo standard errors. The engine is
:mod:`tests.sim.engine`; :mod:`tests.sim.experiments` defines the scenarios and
:mod:`tests.sim.endtoend` checks that the engine and a real job (SQLite source,
history, :class:`monitor.runner.Job`) raise the same events on the same data.
"""
