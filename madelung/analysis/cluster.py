"""Cutting clusters of whole ions out of a crystal, for embedding.

The ions around a centre out to a radius are found for any cell shape: the lattice translations
to try follow from the cell's plane spacings (a point within R of the centre differs from it by at
most R / spacing in each fractional coordinate), not from a fixed number of neighbouring cells.
Polyatomic ions given as groups of sites are kept whole: an ion belongs where its centroid lies.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.spatial import cKDTree

from ..errors import InputError
from ..sums.geometry import plane_spacings, wrapped_fractional

#: Grid points nearer than this to an ion (Å) are not fitted (the potential there is dominated by
#: that ion, which the array holds exactly).
GRID_CLEARANCE = 0.3

#: Refuse arrays that need more than this many candidate ion positions.
MAX_CANDIDATES = 5_000_000

#: A cation outside the cluster is a boundary cation when it lies within this factor times the
#: shortest cation-anion distance of the crystal from an anion of the cluster.
BOUNDARY_FACTOR = 1.2


def resolve_center(crystal, center):
    """Cartesian centre and a description from a site index (int), a site label (or element; its
    first site) or fractional coordinates (three numbers). Text such as ``"#3"`` or ``"x,y,z"`` is
    read by the command line."""
    if isinstance(center, (int, np.integer)) and not isinstance(center, bool):
        index = int(center)
    elif isinstance(center, str):
        text = center.strip()
        matches = [i for i, lab in enumerate(crystal.labels) if lab == text]
        matches = matches or [i for i, sym in enumerate(crystal.symbols) if sym == text]
        if not matches:
            known = ", ".join(dict.fromkeys(crystal.labels))
            raise InputError(f"centre {center!r} is not a site label of the structure (labels: {known}), "
                             "a site index or fractional coordinates")
        index = matches[0]
    else:
        try:
            values = list(center)
        except TypeError:
            raise InputError(f"centre {center!r} not understood; give a site label, a site index or "
                             "fractional coordinates") from None
        return _fractional_center(crystal, values, center), ",".join(f"{float(v):g}" if _is_number(v) else str(v)
                                                                     for v in values)
    if not 0 <= index < len(crystal):
        raise InputError(f"centre #{index}: the structure has sites #0..#{len(crystal) - 1}")
    return np.array(crystal.positions[index], dtype=float), f"{crystal.labels[index]} (#{index})"


def _is_number(value):
    try:
        float(value)
    except (TypeError, ValueError):
        return False
    return True


def _fractional_center(crystal, values, original):
    try:
        frac = np.array([float(v) for v in values])
    except (TypeError, ValueError):
        raise InputError(f"centre {original!r}: fractional coordinates must be three numbers, e.g. 0.5,0.5,0.5") from None
    if frac.shape != (3,) or not np.all(np.isfinite(frac)):
        raise InputError(f"centre {original!r}: fractional coordinates must be three numbers, e.g. 0.5,0.5,0.5")
    return frac @ crystal.cell


def _ion_units(crystal, groups):
    """Whole ions of the cell: each unit's atoms, their fractional positions kept together (a
    polyatomic ion across the cell edge is unwrapped), and the unit's centroid folded into the cell.

    Returns (atom_unit (N,), atom_frac (N, 3), unit_centroid_frac (U, 3)).
    """
    n = len(crystal)
    frac = wrapped_fractional(crystal.cell, crystal.positions)
    if groups is None:
        return np.arange(n), frac, frac.copy()
    try:
        ids = np.array(groups).reshape(-1)
    except (TypeError, ValueError):
        raise InputError("groups must give one ion number per site") from None
    if ids.shape != (n,):
        raise InputError(f"groups has {ids.size} entries for {n} sites")
    _, atom_unit = np.unique(ids, return_inverse=True)
    atom_unit = atom_unit.reshape(-1)
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)], dtype=float)
    limit = 0.5 * float(plane_spacings(crystal.cell).min())
    atom_frac = frac.copy()
    centroids = []
    for unit in range(atom_unit.max() + 1):
        members = np.flatnonzero(atom_unit == unit)
        anchor = frac[members[0]]
        for m in members[1:]:
            candidates = frac[m] - anchor + shifts
            lengths = np.linalg.norm(candidates @ crystal.cell, axis=1)
            best = int(np.argmin(lengths))
            if lengths[best] > limit:
                raise InputError(f"groups: site {crystal.labels[m]} is {lengths[best]:.2f} Å from "
                                 f"{crystal.labels[members[0]]} of the same ion, more than half the cell allows")
            atom_frac[m] = anchor + candidates[best]
        centroid = atom_frac[members].mean(axis=0)
        fold = np.floor(centroid)
        atom_frac[members] -= fold
        centroids.append(centroid - fold)
    return atom_unit, atom_frac, np.array(centroids)


def array_ions(crystal, center, field_radius, groups):
    """Every whole ion whose centre lies within ``field_radius`` of ``center``: crystal site, Cartesian
    position and distance of its ion's centre, sorted by that distance."""
    atom_unit, atom_frac, centroids = _ion_units(crystal, groups)
    cell = crystal.cell
    spacings = plane_spacings(cell)
    center_frac = np.linalg.solve(cell.T, center)
    low = np.floor(center_frac - field_radius / spacings - 1).astype(int)
    high = np.ceil(center_frac + field_radius / spacings).astype(int)
    counts = high - low + 1
    if int(np.prod(counts)) * len(centroids) > MAX_CANDIDATES:
        raise InputError(f"field radius {field_radius:g} Å needs {int(np.prod(counts)) * len(centroids)} "
                         f"candidate ion positions in this cell (limit {MAX_CANDIDATES}); choose a smaller radius")
    grid = np.stack(np.meshgrid(*[np.arange(low[a], high[a] + 1) for a in range(3)], indexing="ij"), -1)
    translations = grid.reshape(-1, 3).astype(float)
    centres = (translations[:, None, :] + centroids[None, :, :]) @ cell  # (T, U, 3)
    distance = np.linalg.norm(centres - center, axis=2)
    t_index, u_index = np.nonzero(distance <= field_radius + 1e-9)
    unit_distance = distance[t_index, u_index]
    members = [np.flatnonzero(atom_unit == u) for u in range(len(centroids))]
    sites, positions, distances = [], [], []
    for t, u, d in zip(t_index, u_index, unit_distance):
        for m in members[u]:
            sites.append(m)
            positions.append((translations[t] + atom_frac[m]) @ cell)
            distances.append(d)
    sites, positions, distances = np.array(sites), np.array(positions), np.array(distances)
    order = np.lexsort((sites, np.round(distances, 9)))
    return sites[order], np.ascontiguousarray(positions[order]), distances[order]


def sphere_grid(center, radius, spacing, shift):
    """Points of a cubic grid of the given step (offset by ``shift`` steps) inside a sphere."""
    steps = int(math.floor(radius / spacing)) + 1
    axis = (np.arange(-steps, steps + 1) + shift) * spacing
    points = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), -1).reshape(-1, 3)
    return points[np.linalg.norm(points, axis=1) <= radius] + center


def clear_of_ions(points, positions):
    """The points farther than GRID_CLEARANCE from every ion."""
    distance, _ = cKDTree(positions).query(points)
    return points[distance > GRID_CLEARANCE]


def boundary_cations(positions, charges, in_cluster, anion_cation_distance):
    """Indices of the cations outside the cluster within BOUNDARY_FACTOR x the shortest cation-anion
    distance of an anion of the cluster, and those distances (Å)."""
    cluster_anions = positions[in_cluster & (charges < 0)]
    outside = np.flatnonzero(~in_cluster & (charges > 0))
    if not len(cluster_anions) or not len(outside) or anion_cation_distance is None:
        return np.array([], dtype=int), np.array([])
    distance, _ = cKDTree(cluster_anions).query(positions[outside])
    near = distance <= BOUNDARY_FACTOR * anion_cation_distance
    return outside[near], distance[near]


def shortest_cation_anion(positions, charges):
    """Shortest distance between a positive and a negative charge, Å (None without both)."""
    cations, anions = positions[charges > 0], positions[charges < 0]
    if not len(cations) or not len(anions):
        return None
    distance, _ = cKDTree(anions).query(cations)
    return float(distance.min())
