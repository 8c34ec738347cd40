"""Test methods behind one protocol, found by name (see :mod:`monitor.methods.base`).

Importing this package registers every method module imported below; none of them
loads scipy until a method computes something. A new method is a new module here and
one more import line below.
"""

# Each import registers its module's method; the order is the order the config lists them in.
from monitor.methods import anova  # noqa: F401  # isort: skip
from monitor.methods import welch  # noqa: F401  # isort: skip
from monitor.methods import kruskal  # noqa: F401  # isort: skip
from monitor.methods import proportions  # noqa: F401  # isort: skip
from monitor.methods.auto import AUTO, Choice, choose, named, watched_checks
from monitor.methods.base import (
    Family,
    Segments,
    TestMethod,
    family,
    find,
    get,
    names,
    register,
)

__all__ = ["AUTO", "Choice", "Family", "Segments", "TestMethod", "choose", "family", "find", "get",
           "named", "names", "register", "watched_checks"]
