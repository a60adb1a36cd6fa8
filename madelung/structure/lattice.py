"""Lattice arithmetic on a cell alone: the reduced basis, plane spacings, wrapping into the cell.

Plain NumPy and spglib; no ions, no sums. Everything that needs a shortest lattice vector or the
spacing of lattice planes (bounds, supercells, sum plans, neighbour bins) takes it from here.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import spglib

from ..caches import remember

#: Recently reduced cells (bytes of the cell -> :class:`ReducedCell`): a sum reduces the same cell
#: for its plan, its shortest distance and its bins.
_REDUCED = {}
_REDUCED_KEEP = 64


@dataclass(frozen=True)
class ReducedCell:
    """The reduced basis of a lattice and the arithmetic every sum needs of it, worked out once.

    Attributes
    ----------
    cell : (3, 3) the reduced, right-handed basis, rows, Å (read-only).
    change : (3, 3) integers with ``cell = change @ given cell`` (read-only).
    inverse : (3, 3) inverse of ``cell`` (fractional = Cartesian @ inverse), 1/Å (read-only).
    volume : Å^3. lengths : (3,) lengths of the reduced vectors, Å. spacings : (3,) distances
        between adjacent lattice planes (100), (010), (001) of ``cell``, Å (both read-only).
    by_spglib : whether spglib reduced it (False: the given cell is used as it is).
    """

    cell: np.ndarray
    change: np.ndarray
    inverse: np.ndarray
    volume: float
    lengths: np.ndarray
    spacings: np.ndarray
    by_spglib: bool

    def own(self) -> "ReducedCell":
        """The same, as the reduction of the reduced basis itself (``change`` the identity)."""
        if self.change is _IDENTITY:
            return self
        return ReducedCell(self.cell, _IDENTITY, self.inverse, self.volume, self.lengths, self.spacings,
                           self.by_spglib)


def reduced_cell(cell) -> ReducedCell:
    """The :class:`ReducedCell` of ``cell``: its Niggli-reduced, right-handed basis (Křivý &
    Gruber, Acta Cryst. A32 (1976) 297), or the cell itself if spglib cannot reduce it. Kept for
    recent cells; the reduced basis of a reduced basis is itself."""
    cell = np.ascontiguousarray(cell, dtype=float)
    key = cell.tobytes()
    found = _REDUCED.get(key)
    if found is None:
        found = _reduce(cell)
        remember(_REDUCED, _REDUCED_KEEP, key, found)
        remember(_REDUCED, _REDUCED_KEEP, found.cell.tobytes(), found.own())
    return found


def reduced_basis(cell):
    """``(reduced cell, integer basis change)`` with ``reduced = change @ cell``: the
    Niggli-reduced, right-handed basis of the lattice (Křivý & Gruber, Acta Cryst. A32 (1976)
    297), or the cell itself if spglib cannot reduce it."""
    found = reduced_cell(cell)
    return found.cell.copy(), found.change.copy()


def niggli_reduced(cell):
    """The Niggli-reduced basis of :func:`reduced_basis`, or None where spglib could not reduce
    the cell (the same kept reduction: no second call of spglib).

    Its vectors are three shortest non-coplanar lattice vectors (a Niggli cell is a Buerger cell),
    so in three dimensions their lengths are those of a Minkowski-reduced basis.

    References
    ----------
    I. Křivý and B. Gruber, Acta Cryst. A32 (1976) 297; M. J. Buerger, Z. Kristallogr. 109 (1957) 42.
    """
    found = reduced_cell(cell)
    return found.cell.copy() if found.by_spglib else None


_IDENTITY = np.eye(3, dtype=np.int64)
_IDENTITY.setflags(write=False)


def _det(rows):
    """Determinant of a 3x3 matrix given as nested lists."""
    (a, b, c), (d, e, f), (g, h, i) = rows
    return a * (e * i - f * h) + b * (f * g - d * i) + c * (d * h - e * g)


def _inverse(rows, det):
    """Inverse of a 3x3 matrix given as nested lists with determinant ``det`` (NaN if it is 0), by cofactors."""
    (a, b, c), (d, e, f), (g, h, i) = rows
    s = 1.0 / det if det != 0.0 else math.nan
    return [[(e * i - f * h) * s, (c * h - b * i) * s, (b * f - c * e) * s],
            [(f * g - d * i) * s, (a * i - c * g) * s, (c * d - a * f) * s],
            [(d * h - e * g) * s, (b * g - a * h) * s, (a * e - b * d) * s]]


def _facts(cell, change, by_spglib):
    """A :class:`ReducedCell` for a reduced (or kept) basis, in scalar arithmetic (3x3 NumPy calls
    cost microseconds each, more than the arithmetic)."""
    rows = cell.tolist()
    det = _det(rows)
    inverse = _inverse(rows, det)
    lengths = [math.sqrt(x * x + y * y + z * z) for x, y, z in rows]
    arrays = (cell, np.asarray(change, dtype=np.int64), np.array(inverse), np.array(lengths), _spacings(inverse))
    for array in arrays:
        array.setflags(write=False)
    return ReducedCell(arrays[0], arrays[1], arrays[2], abs(det), arrays[3], arrays[4], by_spglib)


def _reduce(cell):
    rows = cell.tolist()
    det = _det(rows)
    reduced = None
    if det != 0.0:
        try:
            with warnings.catch_warnings():  # spglib 2.x warns about its error-handling switch on every call
                warnings.simplefilter("ignore", DeprecationWarning)
                reduced = spglib.niggli_reduce(cell, eps=1e-5)
        except Exception:  # spglib reports failures as None or as an error depending on its version
            reduced = None
    if reduced is not None:
        change = np.rint(reduced @ np.array(_inverse(rows, det))).astype(np.int64)
        change_det = _det(change.tolist())
        if abs(change_det) == 1:
            if change_det * det < 0:    # make the reduced basis right-handed
                change = -change
            return _facts(np.ascontiguousarray(change @ cell), change, True)
    return _facts(cell.copy(), _IDENTITY, False)


def plane_spacings(cell) -> np.ndarray:
    """Distances between adjacent lattice planes (100), (010), (001) of the cell, Å.

    A point displaced by r from another differs in fractional coordinate a by at most
    ``|r| / spacing[a]``.
    """
    rows = np.asarray(cell, dtype=float).tolist()
    return _spacings(_inverse(rows, _det(rows)))


def _spacings(inverse):
    """Plane spacings (array) from the inverse cell (nested lists): the spacing of planes (a) is
    1 / |b_a|, with b_a the reciprocal vector, column a of the inverse."""
    return np.array([1.0 / math.sqrt(inverse[0][a] ** 2 + inverse[1][a] ** 2 + inverse[2][a] ** 2) for a in range(3)])


def wrapped_fractional(cell, positions) -> np.ndarray:
    """Fractional coordinates folded into [0, 1)."""
    rows = np.asarray(cell, dtype=float).tolist()
    frac = np.asarray(positions, dtype=float) @ np.array(_inverse(rows, _det(rows)))
    frac -= np.floor(frac)
    frac[frac >= 1.0] = 0.0
    return np.ascontiguousarray(frac)
