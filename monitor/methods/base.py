"""The test-method protocol and the registry of methods.

A *test method* is everything segwatch needs to know about one way of comparing
segments: its name (the contract's ``method`` value), how people call it, its
statistic, whether it needs the values themselves (ranks) or only the per-segment
:class:`~monitor.stats.summary.Moments`, its omnibus test, its effect size, its
post-hoc family (all pairs) and its many-to-one family (pairs with a reference),
its segment-against-the-rest contrast, which assumption checks matter to it and
how its degrees of freedom are written. The numbers themselves come from
:mod:`monitor.stats`; a method module only says which routine to use.

Each method lives in a module of its own (:mod:`monitor.methods.anova`,
:mod:`~monitor.methods.welch`, :mod:`~monitor.methods.kruskal`,
:mod:`~monitor.methods.proportions`) and registers its
class with :func:`register`; :mod:`monitor.methods` imports those modules. The rest
of segwatch finds a method by name::

    from monitor import methods
    methods.names()                    # ('anova', 'welch', 'kruskal', 'proportions')
    fisher = methods.get("anova")
    fisher.label, fisher.posthoc.name  # ("Fisher's ANOVA", 'tukey-kramer')
    res = fisher.omnibus(Segments.of(labels, groups))

Importing this package loads no scipy: method modules reach the statistics through
the lazy :mod:`monitor.stats` package (``stats.omnibus.fisher_anova``), so the
command line and the config check stay light. How ``test: auto`` picks a method is
in :mod:`monitor.methods.auto`.

Adding a method is one module here (a :class:`TestMethod` subclass decorated with
:func:`register`, and its name in :mod:`monitor.methods`' import line), its tests
and its documentation. The config then accepts its name, the analysis runs it, the
events, report and command line name it.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import TYPE_CHECKING, ClassVar, Mapping, Sequence, TypeVar

if TYPE_CHECKING:  # pragma: no cover - typing only; these modules load scipy
    import numpy as np

    from monitor.stats.diagnostics import Check
    from monitor.stats.effects import EffectSize
    from monitor.stats.flags import SegmentContrast
    from monitor.stats.omnibus import OmnibusResult
    from monitor.stats.posthoc import PostHocResult
    from monitor.stats.summary import Moments

__all__ = ["Family", "Segments", "TestMethod", "SMALL_SEGMENT_N", "normality_matters",
           "register", "get", "find", "names", "family"]

#: Below this many records in some segment, normality matters to the F tests (common
#: practice, leaning on the central limit theorem for larger segments). The ``auto``
#: rule uses the same bound (:data:`monitor.stats.diagnostics.SMALL_SEGMENT_N`).
SMALL_SEGMENT_N = 30


@dataclass(frozen=True)
class Family:
    """A family of pairwise comparisons read after a method's omnibus test.

    Attributes
    ----------
    name : str
        As stored in the contract's ``posthoc`` field (``'tukey-kramer'``).
    label : str
        As people read it (``'Tukey-Kramer'``).
    ranks : bool
        True when a pair's ``diff`` is a difference of mean ranks: it has no unit,
        and under ``transform: log`` it is not a log ratio.
    points : bool
        True when a pair's ``diff`` is a difference of proportions (the means of 0/1
        values): stored as a proportion, written in percentage points.
    """

    name: str
    label: str
    ranks: bool = False
    points: bool = False


@dataclass(frozen=True)
class Segments:
    """One metric's compared segments in one order: names, summaries and (maybe) values.

    ``samples`` is None when the values are not available (a push-down without a
    sample); methods with ``needs_values`` are then never run on it.
    """

    labels: tuple[str, ...]
    groups: tuple[Moments, ...]
    samples: tuple[np.ndarray, ...] | None = None

    @classmethod
    def of(cls, labels: Sequence[str], groups: Sequence[Moments],
           samples: Sequence[np.ndarray] | None = None) -> Segments:
        return cls(tuple(labels), tuple(groups), None if samples is None else tuple(samples))


class TestMethod(ABC):
    """One omnibus test with its follow-ups: subclass, fill the attributes, register.

    Attributes (class level)
    ------------------------
    name : str
        The config's ``metrics[i].test`` value and the contract's ``method``.
    label : str
        The method as people read it, e.g. ``"Welch's ANOVA"``. The ``auto`` rule's
        reasons start with it (``"Welch's ANOVA: spreads look unequal ..."``).
    statistic : str
        The symbol of its statistic (``'F'``, ``'H'``).
    df_count : int
        How many degrees of freedom its result carries (see :meth:`statistic_text`).
    needs_values : bool
        True when the test needs the values themselves (ranks), not only the moments.
    instead_without_values : str or None
        With ``needs_values``: the method run when the values are not available.
    without_values_reason : str
        Why, in words (``"values were not available for ranks"``).
    posthoc : Family
        All pairs, read when no ``reference`` is set.
    many_to_one : Family
        The pairs of every segment with the ``reference`` segment.
    adjusted_covariance : str or None
        With ``adjust_for``: the covariance of the additive model that replaces this test
        (``'classic'`` when the test assumes equal spreads, ``'hc3'`` otherwise; see
        :mod:`monitor.stats.adjusted`); None when the test cannot be asked for with
        ``adjust_for`` (a rank test has no additive model).
    transforms : bool
        False when the method compares the values as they are and a metric's
        ``transform`` (log, log1p) would destroy its data (proportions: 0 and 1); the
        config refuses a transform with it.
    checks_apply : bool
        False when the assumption checks of means (equal spreads, normality) say
        nothing about this method's data (proportions: the spread of 0/1 values is a
        function of the proportion). Then only :meth:`watched_checks` raise events, also
        when ``test: auto`` chose the method.
    """

    __test__ = False  # not a pytest test class, whatever its name

    name: ClassVar[str]
    label: ClassVar[str]
    statistic: ClassVar[str]
    df_count: ClassVar[int]
    needs_values: ClassVar[bool] = False
    instead_without_values: ClassVar[str | None] = None
    without_values_reason: ClassVar[str] = "values were not available"
    posthoc: ClassVar[Family]
    many_to_one: ClassVar[Family]
    adjusted_covariance: ClassVar[str | None] = "hc3"
    transforms: ClassVar[bool] = True
    checks_apply: ClassVar[bool] = True

    # ------------------------------------------------------------ the numbers

    @abstractmethod
    def omnibus(self, segs: Segments) -> OmnibusResult:
        """The omnibus test of equal segments (NaN with a note on degenerate data)."""

    @abstractmethod
    def effect_size(self, res: OmnibusResult, confidence: float) -> EffectSize:
        """The effect size reported for ``res`` (with an interval where one exists)."""

    def other_effect_sizes(self, res: OmnibusResult) -> tuple[EffectSize, ...]:
        """Further effect sizes shown beside the main one (none by default)."""
        return ()

    @abstractmethod
    def pairs(self, segs: Segments, *, confidence: float, adjust: str) -> PostHocResult:
        """Every pair of segments, in the :attr:`posthoc` family.

        ``adjust`` is the within-family adjustment for families whose procedure does
        not control the error rate by itself (Dunn's z tests); others ignore it.
        """

    @abstractmethod
    def pairs_to_reference(self, segs: Segments, reference: str, *, confidence: float,
                           adjust: str) -> PostHocResult:
        """Every other segment against ``reference``, in the :attr:`many_to_one` family."""

    @abstractmethod
    def versus_rest(self, segs: Segments, *, alpha: float) -> tuple[SegmentContrast, ...]:
        """Each segment against the pooled rest of the unflagged ones, step by step
        (:func:`monitor.stats.stepdown.stepdown_vs_rest`: no segment's shift can invent
        a flag on another), flagged at ``alpha``; used when there are too many segments
        for pairs."""

    @abstractmethod
    def watched_checks(self, groups: Sequence[Moments]) -> tuple[str, ...]:
        """The assumption checks (:data:`monitor.stats.diagnostics.CHECK_NAMES`) whose
        change is worth an event when this method was asked for by name."""

    def unusable(self, segs: Segments) -> str | None:
        """Why this method's error rate does not hold for these segments (a clause that
        starts with the method's label), or None when it may run. The default: it may."""
        return None

    def instead(self, segs: Segments, checks: Mapping[str, Check]) -> tuple[str, ...]:
        """The methods to run, in order of preference, when :meth:`unusable` says no
        (the first that may run on these segments is used). The default: the others in
        registration order."""
        return tuple(n for n in names() if n != self.name)

    # ------------------------------------------------------------ how it is written

    @property
    def nan_df(self) -> tuple[float, ...]:
        """The degrees of freedom of a result that could not be computed."""
        return (math.nan,) * self.df_count

    def statistic_text(self, value: str, df: Sequence[str]) -> str:
        """The statistic as people read it, from already formatted numbers: ``F(2, 31.4) = 5.1``."""
        return f"{self.statistic}({', '.join(df)}) = {value}"

    def __repr__(self) -> str:
        return f"<test method {self.name!r}: {self.label}>"


def normality_matters(groups: Sequence[Moments]) -> bool:
    """True when some segment has fewer than :data:`SMALL_SEGMENT_N` records, so that
    the F tests lean on normal errors (common practice)."""
    return bool(groups) and min(g.n for g in groups) < SMALL_SEGMENT_N


# ---------------------------------------------------------------- the registry

_REGISTRY: dict[str, TestMethod] = {}
_RESERVED = ("auto",)  # config words that are not methods

M = TypeVar("M", bound=type[TestMethod])


def register(cls: M) -> M:
    """Class decorator: register one instance of ``cls`` under ``cls.name``.

    Raises ``ValueError`` for a name that is taken or reserved (``auto``), or a
    class that does not fill the protocol's attributes: a mistake in a method
    module shows at import, not during a run.
    """
    missing = [a for a in ("name", "label", "statistic", "df_count", "posthoc", "many_to_one")
               if not hasattr(cls, a)]
    if missing:
        raise ValueError(f"test method {cls.__name__} does not set {', '.join(missing)}")
    name = cls.name
    if name in _RESERVED:
        raise ValueError(f"test method name {name!r} is reserved for the config")
    if name in _REGISTRY:
        raise ValueError(f"test method name {name!r} is taken by {type(_REGISTRY[name]).__name__}")
    if cls.needs_values and cls.instead_without_values is None:
        raise ValueError(f"test method {name!r} needs values but names no method to use without them")
    _REGISTRY[name] = cls()
    return cls


def get(name: str) -> TestMethod:
    """The registered method called ``name``; ``LookupError`` naming the known ones otherwise."""
    try:
        return _REGISTRY[name]
    except KeyError:
        raise LookupError(f"unknown test method {name!r}; registered: {', '.join(_REGISTRY)}") from None


def find(name: str | None) -> TestMethod | None:
    """The registered method called ``name``, or None (for names read from old records)."""
    return _REGISTRY.get(name) if name else None


def names() -> tuple[str, ...]:
    """The registered method names, in registration order."""
    return tuple(_REGISTRY)


def family(name: str | None) -> Family | None:
    """The pair family stored as ``name`` (a method's :attr:`~TestMethod.posthoc` or
    :attr:`~TestMethod.many_to_one`), or None."""
    for method in _REGISTRY.values():
        for fam in (method.posthoc, method.many_to_one):
            if fam.name == name:
                return fam
    return None
