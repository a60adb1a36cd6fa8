"""Lattice arithmetic on a cell alone: the reduced basis, plane spacings, wrapping into the cell.

Plain NumPy and spglib; no ions, no sums. Everything that needs a shortest lattice vector or the
spacing of lattice planes (bounds, supercells, sum plans, neighbour bins) takes it from here.
"""

from __future__ import annotations

import warnings

import numpy as np
import spglib

#: Recently reduced cells (bytes of the cell -> result): a sum reduces the same cell for its plan,
#: its shortest distance and its bins.
_REDUCED = {}
_REDUCED_KEEP = 64


def reduced_basis(cell):
    """``(reduced cell, integer basis change)`` with ``reduced = change @ cell``: the
    Niggli-reduced, right-handed basis of the lattice (Křivý & Gruber, Acta Cryst. A32 (1976)
    297), or the cell itself if spglib cannot reduce it."""
    found = _reduction(cell)
    return found[0].copy(), found[1].copy()


def niggli_reduced(cell):
    """The Niggli-reduced basis of :func:`reduced_basis`, or None where spglib could not reduce
    the cell (the same kept reduction: no second call of spglib).

    Its vectors are three shortest non-coplanar lattice vectors (a Niggli cell is a Buerger cell),
    so in three dimensions their lengths are those of a Minkowski-reduced basis.

    References
    ----------
    I. Křivý and B. Gruber, Acta Cryst. A32 (1976) 297; M. J. Buerger, Z. Kristallogr. 109 (1957) 42.
    """
    found = _reduction(cell)
    return found[0].copy() if found[2] else None


def _reduction(cell):
    cell = np.ascontiguousarray(cell, dtype=float)
    key = cell.tobytes()
    found = _REDUCED.get(key)
    if found is None:
        found = _reduce(cell)
        if len(_REDUCED) >= _REDUCED_KEEP:
            _REDUCED.pop(next(iter(_REDUCED)))
        _REDUCED[key] = found
    return found


def _reduce(cell):
    """``(reduced, change, reduced by spglib)``."""
    try:
        with warnings.catch_warnings():  # spglib 2.x warns about its error-handling switch on every call
            warnings.simplefilter("ignore", DeprecationWarning)
            reduced = spglib.niggli_reduce(cell, eps=1e-5)
    except Exception:  # spglib reports failures as None or as an error depending on its version
        reduced = None
    if reduced is None:
        return np.ascontiguousarray(cell), np.eye(3, dtype=np.int64), False
    change = np.rint(np.asarray(reduced) @ np.linalg.inv(cell)).astype(np.int64)
    if round(abs(np.linalg.det(change))) != 1:
        return np.ascontiguousarray(cell), np.eye(3, dtype=np.int64), False
    if np.linalg.det(change @ cell) < 0:
        change = -change
    return np.ascontiguousarray(change @ cell), change, True


def plane_spacings(cell) -> np.ndarray:
    """Distances between adjacent lattice planes (100), (010), (001) of the cell, Å.

    A point displaced by r from another differs in fractional coordinate a by at most
    ``|r| / spacing[a]``.
    """
    # the spacing of planes (a) is 1 / |b_a| with b_a the reciprocal vector: column a of inv(cell)
    return 1.0 / np.linalg.norm(np.linalg.inv(np.asarray(cell, dtype=float)), axis=0)


def wrapped_fractional(cell, positions) -> np.ndarray:
    """Fractional coordinates folded into [0, 1)."""
    frac = np.linalg.solve(np.asarray(cell, float).T, np.asarray(positions, float).T).T
    frac -= np.floor(frac)
    frac[frac >= 1.0] = 0.0
    return np.ascontiguousarray(frac)
