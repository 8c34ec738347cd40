"""Pure statistics: summaries, omnibus tests, post-hoc pairs, effect sizes, assumption
checks, segment flags, power and multiplicity. No SQL, no YAML, no I/O.

Most of these modules import scipy (about 65 MB and most of a second of start-up), so
the package loads its submodules on first use (PEP 562 module ``__getattr__``)::

    from monitor import stats          # cheap: nothing of scipy is loaded yet
    stats.omnibus.welch_anova(groups)  # imports monitor.stats.omnibus (and scipy) now

This is the one way the rest of segwatch reaches the scipy-bearing routines without
loading them at import time; :func:`load` imports them all at once (a run does it
while a database server computes the period's sums). ``from monitor.stats import
omnibus`` still works and imports at once, as usual.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # for type checkers and readers: the submodules reached lazily below
    from monitor.stats import (  # noqa: F401
        adjusted,
        cells,
        diagnostics,
        effects,
        evidence,
        flags,
        multiplicity,
        omnibus,
        posthoc,
        power,
        proportions,
        stepdown,
        studentized,
        summary,
        warnings,
    )

#: The submodules reached as attributes of the package (each imported on first access).
SUBMODULES = ("adjusted", "cells", "diagnostics", "effects", "evidence", "flags", "multiplicity", "omnibus",
              "posthoc", "power", "proportions", "stepdown", "studentized", "summary", "warnings")

#: The submodules a period's analysis uses (what :func:`load` imports).
ANALYSIS_MODULES = ("diagnostics", "effects", "flags", "multiplicity", "omnibus", "posthoc", "power",
                    "proportions", "stepdown")


def __getattr__(name: str) -> Any:
    if name in SUBMODULES:
        # importing a submodule also sets it as an attribute of this package, so this
        # runs once per submodule
        return importlib.import_module(f"{__name__}.{name}")
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(SUBMODULES))


def load() -> None:
    """Import the routines a period's analysis uses now (otherwise they load on first use)."""
    for name in ANALYSIS_MODULES:
        importlib.import_module(f"{__name__}.{name}")
