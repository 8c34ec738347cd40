"""Per-segment summaries: count, mean, central power sums, minimum and maximum.

A :class:`Moments` is everything the one-way ANOVA, Welch's ANOVA and the
parametric post-hoc tests need from one segment, so a segment's raw values never
have to leave the database: partial summaries :meth:`~Moments.merge` exactly
(in exact arithmetic), and sums of shifted powers computed by SQL turn into central
sums with :meth:`~Moments.from_shifted_sums`.

Two number types are supported:

* ``float`` (the usual path). :meth:`Moments.from_values` uses the corrected
  two-pass algorithm, which stays accurate when the mean is large compared with
  the spread (NIST StRD SmLs07-09: 13 constant leading digits).
* ``decimal.Decimal`` (the exact path). If the values are ``Decimal`` (e.g. a
  NUMERIC column), every field is a ``Decimal`` computed with
  :data:`DECIMAL_PRECISION` significant digits and the omnibus tests keep that
  arithmetic until the final statistic. Call :meth:`Moments.as_float` before mixing
  an exact summary with floats.

A float mean of values such as 1000000000000.4 cannot be stored closer than about
1e-4 (the spacing of doubles near 1e12), which is as large as the differences between
segment means that an ANOVA has to resolve. So a float summary also carries
``mean_residual``, the rounding error of ``mean`` (``mean + mean_residual`` is the
mean to about 32 significant digits, a double-double pair after Dekker 1971). The
omnibus tests use it; everything else may ignore it.

Non-finite input (NaN, +/-inf) is the caller's to remove and report as a data
quality problem; if it reaches this module, every field except ``n`` is NaN.

Example
-------
>>> a = Moments.from_values([1.0, 2.0, 3.0])
>>> b = Moments.from_values([10.0, 20.0])
>>> whole = a.merge(b)
>>> whole.n, whole.mean
(5, 7.2)
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Iterable
from dataclasses import dataclass
from decimal import Decimal, localcontext
from fractions import Fraction
from typing import Union

import numpy as np

from monitor.stats.warnings import InaccurateResultWarning

__all__ = ["DECIMAL_PRECISION", "Moments", "Number", "decimal_context"]

logger = logging.getLogger(__name__)

#: Significant digits used for every ``Decimal`` operation in ``monitor.stats``.
DECIMAL_PRECISION = 60

Number = Union[float, Decimal]

_NAN = float("nan")


class decimal_context:  # noqa: N801 - used like a function: ``with decimal_context():``
    """Decimal arithmetic with at least :data:`DECIMAL_PRECISION` significant digits.

    Wraps :func:`decimal.localcontext`, so the caller's global context is untouched
    and results do not depend on it.
    """

    def __enter__(self):
        self._cm = localcontext()
        ctx = self._cm.__enter__()
        ctx.prec = max(ctx.prec, DECIMAL_PRECISION)
        return ctx

    def __exit__(self, *exc):
        return self._cm.__exit__(*exc)


def _is_decimal(x: object) -> bool:
    return isinstance(x, Decimal)


def _is_finite(x: Number) -> bool:
    if isinstance(x, Decimal):
        return x.is_finite()
    return math.isfinite(x)


def _sqrt(x: Number) -> Number:
    if isinstance(x, Decimal):
        return x.sqrt()
    return math.sqrt(x) if x >= 0 else _NAN


def _nan_like(x: object) -> Number:
    return Decimal("NaN") if isinstance(x, Decimal) else _NAN


def _fraction_to(kind_decimal: bool, value: Fraction) -> Number:
    if kind_decimal:
        with decimal_context():
            return Decimal(value.numerator) / Decimal(value.denominator)
    return float(value)


@dataclass(frozen=True)
class Moments:
    """Count, mean and central power sums of one segment's values.

    Attributes
    ----------
    n : int
        Number of values.
    mean : float or Decimal
        Arithmetic mean (NaN when ``n == 0``).
    m2, m3, m4 : float or Decimal
        Sums of the 2nd, 3rd and 4th powers of the deviations from the mean,
        ``sum((x - mean)**p)`` (NaN when ``n == 0``).
    min, max : float or Decimal
        Smallest and largest value (NaN when ``n == 0``).
    mean_residual : float
        Float summaries: the exact mean minus ``mean`` (a few units in the last
        place of ``mean`` at most), so that ``mean + mean_residual`` carries the
        mean to about twice double precision; see :attr:`mean_decimal`. Always 0
        for exact summaries. Optional when constructing by hand.

    Notes
    -----
    Derived quantities (:attr:`var`, :attr:`sd`, :attr:`skewness`,
    :attr:`excess_kurtosis`) have the same number type as the fields; where they are
    undefined they are NaN of that type.
    """

    n: int
    mean: Number
    m2: Number
    m3: Number
    m4: Number
    min: Number
    max: Number
    mean_residual: float = 0.0

    # ------------------------------------------------------------------ builders
    @classmethod
    def empty(cls) -> Moments:
        """The summary of no values: ``n == 0`` and NaN everywhere else."""
        return cls(0, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN)

    @classmethod
    def _undefined(cls, n: int) -> Moments:
        return cls(n, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN)

    @classmethod
    def from_values(cls, values: Iterable) -> Moments:
        """Summarise values with the corrected two-pass algorithm.

        Parameters
        ----------
        values : array_like of float, or iterable of Decimal (ints allowed)
            The segment's values. ``Decimal`` values select the exact path.

        Returns
        -------
        Moments
            ``Moments.empty()`` for no values.

        Raises
        ------
        TypeError
            If ``Decimal`` values are mixed with floats (convert them first).

        Notes
        -----
        A constant segment (``min == max``) gets exact zeros. Otherwise, first
        pass: the mean; second pass: deviations ``d = x - mean``, a correction
        of the mean by ``sum(d)/n``, then the power sums of the corrected
        deviations. This is the "corrected two-pass algorithm" of Chan, Golub and
        LeVeque [1]_; its error does not grow with the size of the
        mean relative to the spread as the textbook one-pass formula's does.

        References
        ----------
        .. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1983). Algorithms for
           computing the sample variance: analysis and recommendations. The American
           Statistician 37(3), 242-247.
        """
        exact, data = _prepare_values(values)
        if exact:
            return cls._from_decimals(data)
        return cls._from_floats(data)

    @classmethod
    def _from_floats(cls, x: np.ndarray) -> Moments:
        n = int(x.size)
        if n == 0:
            return cls.empty()
        with np.errstate(all="ignore"):
            if not np.isfinite(x).all():
                return cls._undefined(n)
            lo, hi = float(np.min(x)), float(np.max(x))
            if lo == hi:  # constant: exact zeros, not rounding noise
                return cls(n, lo, 0.0, 0.0, 0.0, lo, hi)
            mean0 = float(np.mean(x))
            d = x - mean0
            correction = float(np.sum(d)) / n
            mean, residual = _two_sum(mean0, correction)
            d -= correction
            d2 = d * d
            m2 = float(np.sum(d2))
            m3 = float(np.sum(d2 * d))
            m4 = float(np.sum(d2 * d2))
        return cls(n, mean, m2, m3, m4, lo, hi, residual)

    @classmethod
    def _from_decimals(cls, values: list[Decimal]) -> Moments:
        n = len(values)
        if n == 0:
            return cls.empty()
        if not all(v.is_finite() for v in values):
            return cls._undefined(n)
        lo, hi = min(values), max(values)
        if lo == hi:
            return cls(n, lo, Decimal(0), Decimal(0), Decimal(0), lo, hi)
        with decimal_context():
            mean = sum(values, Decimal(0)) / n
            d = [v - mean for v in values]
            mean += sum(d, Decimal(0)) / n
            d = [v - mean for v in values]
            d2 = [x * x for x in d]
            m2 = sum(d2, Decimal(0))
            m3 = sum((a * b for a, b in zip(d2, d)), Decimal(0))
            m4 = sum((a * a for a in d2), Decimal(0))
        return cls(n, mean, m2, m3, m4, lo, hi)

    @classmethod
    def from_shifted_sums(
        cls,
        n: int,
        shift: Number,
        s1: Number,
        s2: Number,
        s3: Number,
        s4: Number,
        min: Number,  # noqa: A002 - field name of the dataclass
        max: Number,  # noqa: A002
    ) -> Moments:
        """Build a summary from sums of powers of shifted values.

        Parameters
        ----------
        n : int
            Number of values.
        shift : float or Decimal
            The constant ``k`` subtracted from every value (ideally a value near the
            data, e.g. one pilot value per metric).
        s1, s2, s3, s4 : float or Decimal
            ``sum((x - k)**p)`` for ``p = 1..4``, as computed by the database.
        min, max : float or Decimal
            Smallest and largest value.

        Returns
        -------
        Moments
            Exact (``Decimal``) if any input is a ``Decimal``, float otherwise.

        Notes
        -----
        With ``a = s1/n`` the mean is ``k + a`` and the central sums follow from the
        binomial expansion (as in Pébay [1]_)::

            m2 = s2 - n a^2
            m3 = s3 - 3 a s2 + 2 n a^3
            m4 = s4 - 4 a s3 + 6 a^2 s2 - 3 n a^4

        The conversion itself is done in exact rational arithmetic and rounded once,
        so it adds no error of its own; the accuracy is that of the sums given. When
        ``k`` is far from the data the database's own sums lose digits (the
        cancellation the shift is there to avoid). A negative ``m2`` or ``m4``
        within the rounding of the sums (``4 n eps`` relative to ``s2`` or ``s4``)
        is taken as 0; a larger one means inconsistent sums: it is set to 0 and an
        :class:`~monitor.stats.warnings.InaccurateResultWarning` is issued.

        References
        ----------
        .. [1] Pébay, P. (2008). Formulas for robust, one-pass parallel computation of
           covariances and arbitrary-order statistical moments. Sandia Report
           SAND2008-6212.
        """
        if isinstance(n, bool) or int(n) != n or n < 0:
            raise ValueError(f"n must be a non-negative whole number; got {n!r}")
        n = int(n)
        if n == 0:
            return cls.empty()
        parts = (shift, s1, s2, s3, s4)
        exact = any(_is_decimal(v) for v in (*parts, min, max))
        if not all(_is_finite(v) for v in (*parts, min, max)):
            return cls._undefined(n)
        k, f1, f2, f3, f4 = (Fraction(v) for v in parts)
        a = f1 / n
        mean = k + a
        c2 = f2 - n * a**2
        c3 = f3 - 3 * a * f2 + 2 * n * a**3
        c4 = f4 - 4 * a * f3 + 6 * a**2 * f2 - 3 * n * a**4
        # a negative central sum within the rounding of the given sums is a zero
        # (e.g. a constant segment summed in floating point); beyond that, warn
        slack = Fraction(4 * n) * Fraction(2.0**-52)
        if -slack * abs(f2) <= c2 < 0:
            c2 = Fraction(0)
        if -slack * abs(f4) <= c4 < 0:
            c4 = Fraction(0)
        if c2 < 0 or c4 < 0:
            warnings.warn(
                f"shifted sums are inconsistent (central sum of squares {float(c2):.6g}, "
                f"of fourth powers {float(c4):.6g}); negative values were set to 0",
                InaccurateResultWarning,
                stacklevel=2,
            )
            c2 = c2 if c2 >= 0 else Fraction(0)
            c4 = c4 if c4 >= 0 else Fraction(0)
        lo, hi = Fraction(min), Fraction(max)
        mean_out = _fraction_to(exact, mean)
        residual = 0.0 if exact else float(mean - Fraction(mean_out))
        return cls(
            n,
            mean_out,
            _fraction_to(exact, c2),
            _fraction_to(exact, c3),
            _fraction_to(exact, c4),
            _fraction_to(exact, lo),
            _fraction_to(exact, hi),
            residual,
        )

    # ------------------------------------------------------------------ combining
    def merge(self, other: Moments) -> Moments:
        """Summary of the union of two disjoint sets of values.

        Parameters
        ----------
        other : Moments
            Summary of the other values. Both must be float or both exact.

        Returns
        -------
        Moments

        Raises
        ------
        TypeError
            If one summary is exact (``Decimal``) and the other float.

        Notes
        -----
        Pairwise update of Chan, Golub and LeVeque [1]_ for ``m2``, extended to
        ``m3`` and ``m4`` by Pébay [2]_. With
        ``d = mean_b - mean_a`` and ``n = n_a + n_b``::

            mean = mean_a + d n_b / n
            m2 = m2_a + m2_b + d^2 n_a n_b / n
            m3 = m3_a + m3_b + d^3 n_a n_b (n_a - n_b) / n^2
                 + 3 d (n_a m2_b - n_b m2_a) / n
            m4 = m4_a + m4_b + d^4 n_a n_b (n_a^2 - n_a n_b + n_b^2) / n^3
                 + 6 d^2 (n_a^2 m2_b + n_b^2 m2_a) / n^2
                 + 4 d (n_a m3_b - n_b m3_a) / n

        References
        ----------
        .. [1] Chan, T. F., Golub, G. H. and LeVeque, R. J. (1979). Updating formulae
           and a pairwise algorithm for computing sample variances. Stanford
           University report STAN-CS-79-773.
        .. [2] Pébay, P. (2008). Formulas for robust, one-pass parallel computation of
           covariances and arbitrary-order statistical moments. Sandia Report
           SAND2008-6212.
        """
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        na, nb = self.n, other.n
        n = na + nb
        if not (self.is_finite and other.is_finite):
            return Moments._undefined(n)
        if _is_decimal(self.mean) != _is_decimal(other.mean):
            raise TypeError(
                "cannot merge an exact (Decimal) summary with a float one; "
                "call .as_float() on the exact one first"
            )
        exact = self.is_exact
        with decimal_context():
            if exact:
                d = other.mean - self.mean
                mean = self.mean + d * nb / n
                residual = 0.0
            else:
                d = (other.mean - self.mean) + (other.mean_residual - self.mean_residual)
                mean, err = _two_sum(self.mean, d * nb / n)
                mean, residual = _two_sum(mean, err + self.mean_residual)
            d2 = d * d
            m2 = self.m2 + other.m2 + d2 * na * nb / n
            m3 = (
                self.m3
                + other.m3
                + d2 * d * na * nb * (na - nb) / (n * n)
                + 3 * d * (na * other.m2 - nb * self.m2) / n
            )
            m4 = (
                self.m4
                + other.m4
                + d2 * d2 * na * nb * (na * na - na * nb + nb * nb) / (n * n * n)
                + 6 * d2 * (na * na * other.m2 + nb * nb * self.m2) / (n * n)
                + 4 * d * (na * other.m3 - nb * self.m3) / n
            )
        lo = self.min if self.min <= other.min else other.min
        hi = self.max if self.max >= other.max else other.max
        return Moments(n, mean, m2, m3, m4, lo, hi, residual)

    def as_float(self) -> Moments:
        """The same summary with every field converted to ``float``.

        Converting an exact summary keeps the rounding error of its mean in
        ``mean_residual``.
        """
        if not self.is_exact:
            return self
        mean = float(self.mean)
        residual = 0.0
        if self.mean.is_finite():
            with decimal_context():
                residual = float(self.mean - Decimal(mean))
        return Moments(
            self.n,
            mean,
            float(self.m2),
            float(self.m3),
            float(self.m4),
            float(self.min),
            float(self.max),
            residual,
        )

    # ------------------------------------------------------------------ derived
    @property
    def is_exact(self) -> bool:
        """True if the fields are ``Decimal`` (the exact path)."""
        return _is_decimal(self.mean)

    @property
    def mean_decimal(self) -> Decimal:
        """The mean as a ``Decimal``: ``mean`` itself when exact, else ``mean + mean_residual``.

        Both floats convert to ``Decimal`` exactly, so no precision is lost.
        """
        if self.is_exact:
            return self.mean
        with decimal_context():
            return Decimal(self.mean) + Decimal(self.mean_residual)

    @property
    def is_finite(self) -> bool:
        """True if ``mean`` and the central sums are finite (False for empty summaries)."""
        return all(_is_finite(v) for v in (self.mean, self.m2, self.m3, self.m4))

    @property
    def var(self) -> Number:
        """Sample variance ``m2 / (n - 1)``; NaN if ``n < 2``."""
        if self.n < 2:
            return _nan_like(self.m2)
        with decimal_context():
            return self.m2 / (self.n - 1)

    @property
    def sd(self) -> Number:
        """Sample standard deviation ``sqrt(var)``; NaN if ``n < 2``."""
        v = self.var
        if not _is_finite(v):
            return v
        with decimal_context():
            return _sqrt(v)

    @property
    def skewness(self) -> Number:
        """Moment coefficient of skewness ``g1 = sqrt(n) m3 / m2**1.5``.

        NaN if ``n == 0`` or ``m2 == 0``. This is the biased estimator ``g1`` of
        Joanes and Gill (1998), equal to ``scipy.stats.skew(x, bias=True)``.
        """
        if self.n == 0 or not self.is_finite or self.m2 == 0:
            return _nan_like(self.m2)
        with decimal_context():
            root_n = _sqrt(Decimal(self.n)) if self.is_exact else math.sqrt(self.n)
            return root_n * self.m3 / (self.m2 * _sqrt(self.m2))

    @property
    def excess_kurtosis(self) -> Number:
        """Excess kurtosis ``g2 = n m4 / m2**2 - 3``.

        NaN if ``n == 0`` or ``m2 == 0``. This is the biased estimator ``g2`` of
        Joanes and Gill (1998), equal to ``scipy.stats.kurtosis(x, bias=True)``.
        """
        if self.n == 0 or not self.is_finite or self.m2 == 0:
            return _nan_like(self.m2)
        with decimal_context():
            return self.n * self.m4 / (self.m2 * self.m2) - 3


def _two_sum(a: float, b: float) -> tuple[float, float]:
    """Knuth's TwoSum: ``s = fl(a + b)`` and the exact rounding error ``a + b - s``."""
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def _prepare_values(values: Iterable) -> tuple[bool, np.ndarray | list[Decimal]]:
    """Decide the number path (exact or float) and return the values for it.

    This is the edge of the module: anything that is not a number is refused here.
    """
    if not hasattr(values, "__len__") and not hasattr(values, "__array__"):
        values = list(values)  # a generator or other one-shot iterable
    arr = np.asarray(values)
    if arr.dtype.kind in "biuf":
        return False, arr.astype(np.float64, copy=False).ravel()
    if arr.dtype.kind != "O":
        raise TypeError(f"values must be numbers (float, int or decimal.Decimal); got dtype {arr.dtype}")
    items = list(arr.ravel())
    kinds = {type(v) for v in items}
    for kind in kinds:
        if not issubclass(kind, (Decimal, int, float, np.integer, np.floating)) or issubclass(kind, bool):
            raise TypeError(
                f"values must be numbers (float, int or decimal.Decimal); got {kind.__name__}"
            )
    if not any(issubclass(kind, Decimal) for kind in kinds):
        return False, np.asarray(items, dtype=np.float64)
    if any(issubclass(kind, (float, np.floating)) for kind in kinds):
        raise TypeError(
            "values mix decimal.Decimal with float; pass all Decimal (exact) or all float"
        )
    return True, [v if isinstance(v, Decimal) else Decimal(int(v)) for v in items]
