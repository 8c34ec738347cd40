"""Per-(segment, stratum cell) summaries: the input of the adjusted comparison.

A :class:`Cell` is what ``SELECT segment, a, b, COUNT(v), SUM(v - k), SUM((v - k)^2) ...
GROUP BY segment, a, b`` gives back, turned into a count, a mean and a sum of squared
deviations. This module has no scipy dependency, so the source layer can build cells without
loading the statistics (see :mod:`monitor.stats.adjusted` for the model).
"""

from __future__ import annotations

from collections.abc import Hashable, Iterable, Sequence
from dataclasses import dataclass

__all__ = ["Cell", "CellData", "merge_cells"]

_NAN = float("nan")


@dataclass(frozen=True)
class Cell:
    """The records of one segment in one stratum cell, summarised.

    Attributes
    ----------
    segment : str
        Segment label.
    levels : tuple
        The cell's level of each adjustment column, in the order of ``columns``.
    n : int
        Number of records (cells with 0 records may be given; they are ignored).
    mean : float
        Mean of the records' values (on the analysis scale, e.g. of the logs).
    m2 : float
        Sum of squared deviations of the values from ``mean``.
    mean_residual : float, optional
        The exact mean minus ``mean`` (as :attr:`monitor.stats.summary.Moments.mean_residual`);
        keeps the gaps accurate when the mean is large against the spread. Default 0.
    """

    segment: str
    levels: tuple
    n: int
    mean: float
    m2: float
    mean_residual: float = 0.0

    @classmethod
    def from_moments(cls, segment: str, levels: Sequence[Hashable], moments) -> Cell:
        """A cell from a :class:`~monitor.stats.summary.Moments` (``Decimal`` ones are converted)."""
        m = moments.as_float() if getattr(moments, "is_exact", False) else moments
        if m.n == 0:
            return cls(segment, tuple(levels), 0, _NAN, _NAN)
        return cls(segment, tuple(levels), int(m.n), float(m.mean), float(m.m2), float(m.mean_residual))

    def merge(self, other: Cell) -> Cell:
        """The cell of both sets of records (same segment and levels assumed).

        Chan, Golub and LeVeque's pairwise update: ``m2 = m2_a + m2_b + d^2 n_a n_b / n``.
        """
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        d = (other.mean - self.mean) + (other.mean_residual - self.mean_residual)
        mean = self.mean + d * other.n / n
        m2 = self.m2 + other.m2 + d * d * self.n * other.n / n
        return Cell(self.segment, self.levels, n, mean, m2)


def merge_cells(cells: Iterable[Cell]) -> tuple[Cell, ...]:
    """Cells with equal (segment, levels) merged into one, in order of first appearance.

    A database may return one key twice when two raw values print alike (SQLite's ``1`` and
    ``'1'``); their records belong to the same cell.
    """
    out: dict[tuple, Cell] = {}
    for c in cells:
        key = (c.segment, c.levels)
        out[key] = out[key].merge(c) if key in out else c
    return tuple(out.values())


@dataclass(frozen=True)
class CellData:
    """One metric's cells for one period.

    Attributes
    ----------
    columns : tuple of str
        The adjustment columns, in config order.
    cells : tuple of Cell
        Non-empty cells; levels are the columns' values as text.
    missing : int
        Usable values left out because an adjustment column was NULL.
    """

    columns: tuple[str, ...]
    cells: tuple[Cell, ...]
    missing: int = 0
