"""``test: auto``: which method runs, why, and which checks are watched.

The rule itself is statistics and lives with the checks it reads
(:func:`monitor.stats.diagnostics.choose_method`: values all 0 or 1 -> the test of
homogeneity of proportions; strong non-normality in small segments -> Kruskal-Wallis
unless spreads differ; unequal spreads or sizes -> Welch's ANOVA; else Fisher's
ANOVA). This module turns a metric's requested test (``auto`` or a method's name)
into a registered :class:`~monitor.methods.base.TestMethod` and the reason kept with
the result, and applies the rules every method shares, in this order:

1. a method that needs the values is replaced by its ``instead_without_values`` when
   they are not available;
2. a method outside the sizes where its error rate holds
   (:meth:`~monitor.methods.base.TestMethod.unusable`, e.g. Welch's ANOVA with tiny
   segments) is replaced by the first of its :meth:`~monitor.methods.base.TestMethod.instead`
   methods that may run, named or chosen alike;
3. under ``auto`` only: when the chosen method cannot be computed on the data (Welch's
   ANOVA with a segment of identical values), the first of its ``instead`` methods
   that can be computed is used, so ``auto`` never gives no answer where another
   method gives one. A method asked for by name is kept, with its note.

Each replacement is said in the reason.
"""

from __future__ import annotations

from dataclasses import dataclass
import math
from typing import TYPE_CHECKING, Any, Mapping, Sequence

from monitor import stats
from monitor.methods.base import Segments, TestMethod, get, normality_matters

if TYPE_CHECKING:  # pragma: no cover
    from monitor.stats.diagnostics import Check
    from monitor.stats.summary import Moments

__all__ = ["AUTO", "Choice", "choose", "named", "watched_checks"]

#: The config word that lets segwatch choose.
AUTO = "auto"

#: The method ``auto`` names when nothing could be computed (its first choice).
AUTO_NOT_COMPUTED = "anova"


@dataclass(frozen=True)
class Choice:
    """The method that runs for a metric, and why (kept as ``method_reason``).

    ``result`` is the method's omnibus result when choosing already computed it
    (``auto``), else None.
    """

    method: TestMethod
    reason: str
    result: Any = None


def choose(requested: str, segs: Segments, checks: Mapping[str, Check]) -> Choice:
    """The method for ``requested`` (``auto``: the checks decide) on these segments.

    ``checks`` is :func:`monitor.stats.diagnostics.run_checks` on the segments (empty
    when no values were available). With ``segs.samples`` None, a method that needs
    the values gives way to its ``instead_without_values``, and the reason says so.
    """
    if requested == AUTO:
        picked = stats.diagnostics.choose_method(segs.groups, segs.samples, checks, labels=segs.labels)
        method, reason = get(picked.method), picked.reason
    else:
        method, reason = get(requested), f"set in the config (test: {requested})"
    if method.needs_values and segs.samples is None:
        instead = get(method.instead_without_values)
        method, reason = instead, f"{reason}; {method.without_values_reason}, so {instead.label} was used"
    why = method.unusable(segs)
    if why is not None:
        for name in method.instead(segs, checks):
            other = get(name)
            if _runs(other, segs):
                reason = f"{reason.rstrip('.')}; {why}, so {other.label} was used"
                method = other
                break
    if requested != AUTO:
        return Choice(method, reason)
    result = method.omnibus(segs)
    if not math.isfinite(result.statistic):
        for name in method.instead(segs, checks):
            other = get(name)
            if not _runs(other, segs):
                continue
            tried = other.omnibus(segs)
            if math.isfinite(tried.statistic):
                note = (result.note or "undefined").rstrip(".")
                reason = (f"{reason.rstrip('.')}; {method.label} cannot be computed here ({note}), "
                          f"so {other.label} was used")
                method, result = other, tried
                break
    return Choice(method, reason, result)


def _runs(method: TestMethod, segs: Segments) -> bool:
    """Whether ``method`` may run on these segments (values there if needed, within its sizes)."""
    return not (method.needs_values and segs.samples is None) and method.unusable(segs) is None


def named(requested: str) -> TestMethod:
    """The method a result names when nothing could be computed (no choice was made)."""
    return get(AUTO_NOT_COMPUTED if requested == AUTO else requested)


def watched_checks(requested: str, method: TestMethod, groups: Sequence[Moments]) -> tuple[str, ...]:
    """The assumption checks whose change is worth an event for this metric.

    For ``auto``: the checks its choice reads, equal spreads (Brown-Forsythe: its
    first choice is Fisher's ANOVA) and, when some segment is small (fewer than 30
    values; common practice, leaning on the central limit theorem for larger
    segments), normality; but when the chosen method declares that these checks do
    not apply to its data (:attr:`~monitor.methods.base.TestMethod.checks_apply`
    False: proportions), only its own. For a method asked for by name: that method's
    own :meth:`~monitor.methods.base.TestMethod.watched_checks`. The other checks (sd
    ratio, size ratio, outlier share) are stored and shown but raise no events.
    """
    if requested == AUTO and method.checks_apply:
        return ("brown_forsythe",) + (("normality",) if normality_matters(groups) else ())
    return method.watched_checks(groups)
