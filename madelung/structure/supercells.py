"""Supercells for defect calculations: repeat matrices, the near-cubic choice, tiling."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .crystal import Crystal
from ..errors import InputError
from .lattice import plane_spacings

@dataclass(frozen=True)
class Supercell:
    """A supercell of a crystal: ``crystal.cell = matrix @ parent.cell``; the parent's sites come first."""

    crystal: Crystal
    matrix: np.ndarray
    parent: Crystal

    @property
    def size(self) -> int:
        """Parent cells in the supercell."""
        return int(round(abs(np.linalg.det(self.matrix))))

    def to_dict(self) -> dict:
        """JSON-ready: the repeats in words, the matrix, the parent cells, the ions and the volume Å^3."""
        return {"supercell": self.describe(), "matrix": np.asarray(self.matrix).tolist(), "size": self.size,
                "ions": len(self.crystal), "volume_angstrom3": self.crystal.volume}

    def describe(self) -> str:
        m = self.matrix
        if np.count_nonzero(m - np.diag(np.diag(m))) == 0:
            return "x".join(str(int(x)) for x in np.diag(m))
        return "[" + "; ".join(" ".join(str(int(x)) for x in row) for row in m) + "]"


def supercell_matrix(supercell):
    """The integer repeat matrix of a supercell: an int ``n`` (n x n x n), three repeats, or a 3x3
    integer matrix (rows: the supercell vectors in parent-cell units). Text such as ``"3x3x3"`` is
    read by the command line (:func:`madelung.cli.text.parse_supercell`), not here."""
    if isinstance(supercell, str):
        raise InputError(f"supercell {supercell!r}: give an integer, three repeats or a 3x3 integer matrix, "
                         "e.g. (3, 3, 3)")
    try:
        array = np.asarray(supercell, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"supercell {supercell!r} must be an integer, three repeats or a 3x3 integer matrix") from None
    if array.size == 1:
        array = np.full(3, array.ravel()[0])
    if array.shape == (3,):
        array = np.diag(array)
    if array.shape != (3, 3) or not np.all(np.isfinite(array)) or np.any(array != np.round(array)):
        raise InputError(f"supercell {np.asarray(supercell).tolist()} must be an integer, three repeats or a 3x3 "
                         "integer matrix")
    matrix = np.round(array).astype(np.int64)
    if round(np.linalg.det(matrix)) <= 0:
        raise InputError(f"supercell {matrix.tolist()} must have a positive determinant")
    return matrix


def near_cubic_matrix(cell, smallest_plane_spacing):
    """The smallest supercell matrix whose lattice-plane spacings all reach ``smallest_plane_spacing`` Å (so
    every periodic image of a defect is at least that far away), preferring the most cubic shape."""
    cell = np.asarray(cell, float)
    try:
        smallest_plane_spacing = float(smallest_plane_spacing)
    except (TypeError, ValueError):
        raise InputError(f"minimum supercell length must be a number of Å, got {smallest_plane_spacing!r}") from None
    if not (math.isfinite(smallest_plane_spacing) and smallest_plane_spacing > 0):
        raise InputError(f"minimum supercell length must be positive, got {smallest_plane_spacing!r}")
    spacing = plane_spacings(cell)
    best = np.diag(np.maximum(1, np.ceil(smallest_plane_spacing / spacing - 1e-9)).astype(np.int64))
    best_key = (round(abs(np.linalg.det(best))), 0.0)
    deltas = np.array(np.meshgrid(*[[-1, 0, 1]] * 9, indexing="ij")).reshape(9, -1).T.reshape(-1, 3, 3)
    for scale in np.linspace(1.0, 1.6, 13):
        ideal = np.round(scale * smallest_plane_spacing * np.linalg.inv(cell)).astype(np.int64)
        matrices = ideal[None] + deltas
        dets = np.round(np.linalg.det(matrices.astype(float))).astype(np.int64)
        ok = (dets > 0) & (dets <= best_key[0])
        if not ok.any():
            continue
        matrices, dets = matrices[ok], dets[ok]
        cells = matrices @ cell
        volumes = np.abs(np.linalg.det(cells))
        spacings = np.stack([volumes / np.linalg.norm(np.cross(cells[:, (a + 1) % 3], cells[:, (a + 2) % 3]), axis=1)
                             for a in range(3)], axis=1)
        shortest = spacings.min(axis=1)
        reach = shortest >= smallest_plane_spacing - 1e-9
        if not reach.any():
            continue
        cubicness = -shortest[reach] / volumes[reach] ** (1.0 / 3.0)
        order = np.lexsort((cubicness, dets[reach]))
        key = (int(dets[reach][order[0]]), float(cubicness[order[0]]))
        if key < best_key:
            best, best_key = matrices[reach][order[0]], key
    return best


def supercell_cell(cell, supercell=None, smallest_plane_spacing=None) -> np.ndarray:
    """The lattice vectors (rows, Å) of a supercell of ``cell``: from repeats (see
    :func:`supercell_matrix`), or the smallest near-cubic one whose plane spacings all reach
    ``smallest_plane_spacing`` Å (:func:`near_cubic_matrix`); the cell itself when neither is given."""
    if supercell is not None and smallest_plane_spacing is not None:
        raise InputError("give either a supercell (e.g. 3x3x3) or a minimum length, not both")
    cell = np.asarray(cell, dtype=float)
    if supercell is not None:
        return supercell_matrix(supercell) @ cell
    if smallest_plane_spacing is not None:
        return near_cubic_matrix(cell, smallest_plane_spacing) @ cell
    return cell


def tile_supercell(crystal, supercell=None, smallest_plane_spacing=None) -> Supercell:
    """Build a supercell from repeats (an int, three repeats or a 3x3 integer matrix, see
    :func:`supercell_matrix`) or the smallest near-cubic one with all plane spacings at least
    ``smallest_plane_spacing`` Å."""
    if supercell is not None and smallest_plane_spacing is not None:
        raise InputError("give either a supercell (e.g. 3x3x3) or a minimum length, not both")
    if supercell is None and smallest_plane_spacing is None:
        matrix = np.eye(3, dtype=np.int64)
    elif supercell is not None:
        matrix = supercell_matrix(supercell)
    else:
        matrix = near_cubic_matrix(crystal.cell, smallest_plane_spacing)
    if round(np.linalg.det(matrix)) * len(crystal) > 200000:
        raise InputError(f"supercell of {round(np.linalg.det(matrix))} cells is too large")
    if np.count_nonzero(matrix - np.diag(np.diag(matrix))) == 0:
        return Supercell(crystal.repeat(np.diag(matrix)), matrix, crystal)
    new_cell = matrix @ crystal.cell
    det = int(round(np.linalg.det(matrix)))
    # lattice points of the parent inside the supercell: corners of the supercell in parent units bound them
    corners = np.array([(i, j, k) for i in (0, 1) for j in (0, 1) for k in (0, 1)]) @ matrix
    low, high = corners.min(axis=0), corners.max(axis=0)
    grid = np.array(np.meshgrid(*[np.arange(low[a], high[a] + 1) for a in range(3)], indexing="ij")).reshape(3, -1).T
    inside = np.linalg.solve(matrix.T.astype(float), grid.T.astype(float)).T
    keep = np.all((inside > -1e-9) & (inside < 1 - 1e-9), axis=1)
    shifts = grid[keep]
    order = np.lexsort((shifts[:, 2], shifts[:, 1], shifts[:, 0], np.abs(shifts).sum(axis=1)))
    shifts = shifts[order]
    if len(shifts) != det:
        raise InputError(f"supercell matrix {matrix.tolist()} does not tile the cell ({len(shifts)} of {det} cells)")
    translations = shifts @ crystal.cell
    positions = (crystal.positions[None] + translations[:, None]).reshape(-1, 3)
    tile = lambda seq: [x for _ in range(det) for x in seq]  # noqa: E731
    big = Crystal(new_cell, positions, np.tile(crystal.charges, det), tile(crystal.symbols), tile(crystal.labels),
                  np.tile(crystal.occupancies, det), source=crystal.source, min_distance=crystal.min_distance,
                  info=crystal.info, species=None if crystal.species is None else tile(crystal.species))
    return Supercell(big, matrix, crystal)
