"""The potential on a regular grid over the cell and on a lattice plane; the cube writer."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ...structure.crystal import Crystal
from ...errors import InputError
from ...sums.direct import EwaldParameters
from ...sums.geometry import plane_spacings, wrapped_fractional
from .points import _as_points, _PointSum, potential_at
from ...defaults import SCREENING_TOL

@dataclass(frozen=True)
class PotentialGrid:
    """The potential on a regular grid over the cell.

    Attributes
    ----------
    values : (n1, n2, n3) potential, V, at the fractional points (i/n1, j/n2, k/n3).
    shape : (n1, n2, n3).
    cell : (3, 3) lattice vectors, Å.
    spacing : (3,) grid step along each lattice vector, Å.
    smearing : Gaussian width of the ions, Å (0: point ions; grid points on ions then leave
        that ion out and hold its site potential).
    error_estimate : predicted truncation error of each value, V.
    params : splitting parameter and cutoffs used.
    crystal : the crystal.
    """

    values: np.ndarray
    shape: tuple
    cell: np.ndarray
    spacing: np.ndarray
    smearing: float
    error_estimate: float
    params: EwaldParameters
    crystal: Crystal

    def fractional_points(self):
        """(n1*n2*n3, 3) fractional coordinates of the grid points, in the order of ``values.ravel()``."""
        return grid_fractional(self.shape)

    def to_dict(self) -> dict:
        """JSON-ready: the grid's shape, cell Å, steps Å, smearing Å, the values V (nested n1 x n2 x n3),
        their range and mean V, the sum's parameters and the error estimate V."""
        values = np.asarray(self.values)
        return {"grid_shape": list(self.shape), "cell_angstrom": np.asarray(self.cell).tolist(),
                "grid_step_angstrom": np.asarray(self.spacing).tolist(), "smearing_angstrom": self.smearing,
                "potential_min_V": float(values.min()), "potential_max_V": float(values.max()),
                "potential_mean_V": float(values.mean()), "values_V": values.tolist(),
                "parameters": self.params.to_dict(), "error_estimate_V": self.error_estimate}

    def cartesian_points(self):
        return self.fractional_points() @ self.cell


def grid_shape(cell, spacing):
    """Points along each lattice vector for a grid step of at most ``spacing`` Å."""
    try:
        spacing = float(spacing)
    except (TypeError, ValueError):
        raise InputError(f"grid spacing must be a number of Å, got {spacing!r}") from None
    if not (math.isfinite(spacing) and spacing > 0):
        raise InputError(f"grid spacing must be positive (Å), got {spacing!r}")
    lengths = np.linalg.norm(np.asarray(cell, float), axis=1)
    shape = tuple(int(max(2, math.ceil(length / spacing - 1e-9))) for length in lengths)
    if np.prod(shape, dtype=float) > 2e7:
        raise InputError(f"a grid step of {spacing:g} Å gives {shape[0]}x{shape[1]}x{shape[2]} points; "
                         "use a coarser grid")
    return shape


def grid_fractional(shape):
    axes = [np.arange(n) / n for n in shape]
    f0, f1, f2 = np.meshgrid(*axes, indexing="ij")
    return np.stack([f0.ravel(), f1.ravel(), f2.ravel()], axis=1)


def potential_grid(crystal, spacing=0.2, *, shape=None, smearing=0.3, tol=SCREENING_TOL, alpha=None, chunk=200000):
    """The potential of a crystal on a regular grid over its cell.

    Parameters
    ----------
    crystal : Crystal
    spacing : float, optional
        Largest grid step along each lattice vector, Å (default 0.2).
    shape : (3,) ints, optional
        Grid points along each lattice vector (overrides ``spacing``).
    smearing : float, optional
        Gaussian width of the ions, Å (default 0.3), so the grid holds finite values everywhere.
        With 0 (point ions) a grid point sitting on an ion holds that ion's site potential.
    tol : float, optional
        Accuracy as in :func:`potential_at` (default 1e-8).

    Returns
    -------
    PotentialGrid

    Notes
    -----
    With smearing sigma the grid solves Poisson's equation for the Gaussian charge density,
    laplacian(phi) = -4 pi k_e rho_sigma. For a neutral cell the cell average of phi is zero (Ewald
    convention); for a net charge Q the smeared potential keeps the point-ion far field, and its
    average is -2 pi sigma^2 k_e Q / V.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    cell = np.asarray(crystal.cell, float)
    if shape is None:
        shape = grid_shape(cell, spacing)
    else:
        shape = tuple(int(x) for x in shape)
        if len(shape) != 3 or min(shape) < 1:
            raise InputError(f"grid shape must be three positive integers, got {shape}")
    engine = _PointSum(crystal, tol=tol, smearing=smearing, alpha=alpha)
    frac = grid_fractional(shape)
    points = frac @ cell
    values = np.empty(len(points))
    pairs = 0
    for start in range(0, len(points), chunk):
        block = points[start:start + chunk]
        wanted = engine.resolve_exclusions(block, "coincident" if engine.beta == 0 else None)
        phi, _, _, _, p = engine.evaluate(block, wanted, False)
        values[start:start + chunk] = phi
        pairs += p
    values = values.reshape(shape)
    values.setflags(write=False)
    lengths = np.linalg.norm(cell, axis=1)
    return PotentialGrid(values=values, shape=shape, cell=cell, spacing=lengths / np.array(shape),
                         smearing=engine.smearing, error_estimate=engine.potential_error,
                         params=engine.params(pairs), crystal=crystal)


def gaussian_charge_density(crystal, points, smearing):
    """Charge density of the ions as Gaussians of width ``smearing`` (Å) at Cartesian points, e/Å^3,
    minus the uniform neutralizing background for a charged cell (for checks of Poisson's equation)."""
    sigma = float(smearing)
    if sigma <= 0:
        raise InputError("the Gaussian charge density needs a smearing width > 0")
    cell = np.asarray(crystal.cell, float)
    points = _as_points(points)
    reach = np.ceil(6.0 * sigma / plane_spacings(cell)).astype(int)  # both folded into the cell
    shifts = np.array([(i, j, k) for i in range(-reach[0], reach[0] + 1) for j in range(-reach[1], reach[1] + 1)
                       for k in range(-reach[2], reach[2] + 1)], float) @ cell
    frac_points = wrapped_fractional(cell, points) @ cell
    frac_ions = wrapped_fractional(cell, crystal.positions) @ cell
    norm = (2.0 * math.pi * sigma ** 2) ** -1.5
    density = np.zeros(len(points))
    for q, r in zip(crystal.charges, frac_ions):
        d = frac_points[:, None, :] - (r + shifts)[None, :, :]
        density += q * norm * np.exp(-np.einsum("mnk,mnk->mn", d, d) / (2 * sigma ** 2)).sum(axis=1)
    return density - crystal.net_charge / crystal.volume


@dataclass(frozen=True)
class PlaneSection:
    """The potential on a lattice plane, for maps.

    Attributes
    ----------
    miller : (h, k, l). offset : the plane is h f1 + k f2 + l f3 = offset (f fractional).
    origin : (3,) Cartesian origin of the section, Å; u, v : (3,) in-plane lattice vectors spanning it, Å.
    values : (n_u, n_v) potential at origin + (i/n_u) u + (j/n_v) v, V.
    atoms : ions within ``thickness`` of the plane as (s, t, label, charge, distance), s and t in [0, 1).
    smearing : Gaussian width of the ions, Å.
    """

    miller: tuple
    offset: float
    origin: np.ndarray
    u: np.ndarray
    v: np.ndarray
    values: np.ndarray
    atoms: tuple
    smearing: float

    def to_dict(self) -> dict:
        """JSON-ready: the plane (Miller indices, offset), its origin and in-plane vectors Å, the values
        V (n_u x n_v) and their range, the ions in the plane (s, t, label, charge e, distance Å)."""
        return {"plane": list(self.miller), "offset": self.offset, "origin_angstrom": np.asarray(self.origin).tolist(),
                "u_angstrom": np.asarray(self.u).tolist(), "v_angstrom": np.asarray(self.v).tolist(),
                "plane_min_V": float(np.min(self.values)), "plane_max_V": float(np.max(self.values)),
                "values_V": np.asarray(self.values).tolist(), "smearing_angstrom": self.smearing,
                "ions_in_plane": [{"label": label, "s": s, "t": t, "charge_e": q, "distance_angstrom": d}
                                  for s, t, label, q, d in self.atoms]}


def _miller_indices(plane):
    """Three integers, not all zero, from a Miller-index triple (text such as ``"001"`` is read by
    the command line)."""
    try:
        array = np.asarray(plane, dtype=float)
    except (TypeError, ValueError):
        array = np.zeros(0)
    if isinstance(plane, str) or array.shape != (3,) or not np.all(np.isfinite(array)) \
            or np.any(array != np.round(array)) or not np.any(array):
        raise InputError(f"plane {plane!r} must be three Miller indices, not all zero, e.g. (0, 0, 1)")
    return tuple(int(x) for x in np.round(array))


def _in_plane_vectors(cell, miller):
    """The two shortest independent lattice vectors n with h.n = 0 (Cartesian rows)."""
    h = np.array(miller)
    rng = range(-4, 5)
    cands = np.array([(i, j, k) for i in rng for j in rng for k in rng if (i, j, k) != (0, 0, 0)
                      and i * h[0] + j * h[1] + k * h[2] == 0], float)
    cart = cands @ cell
    order = np.argsort(np.linalg.norm(cart, axis=1), kind="stable")
    u = cart[order[0]]
    for i in order[1:]:
        if np.linalg.norm(np.cross(u, cart[i])) > 1e-6 * np.linalg.norm(u) * np.linalg.norm(cart[i]):
            return u, cart[i]
    raise InputError(f"cannot find two lattice vectors in the plane {miller}")


def plane_section(crystal, plane=(0, 0, 1), offset=0.5, *, spacing=0.1, smearing=0.3, tol=SCREENING_TOL, thickness=0.5):
    """The potential on the lattice plane h f1 + k f2 + l f3 = offset, sampled on a mesh of
    step ``spacing`` Å over the parallelogram of its two shortest in-plane lattice vectors;
    ``plane`` is the Miller-index triple (h, k, l)."""
    miller = _miller_indices(plane)
    try:
        offset = float(offset)
    except (TypeError, ValueError):
        raise InputError(f"plane offset must be a number, got {offset!r}") from None
    cell = np.asarray(crystal.cell, float)
    h = np.array(miller, float)
    origin = (offset * h / float(h @ h)) @ cell
    u, v = _in_plane_vectors(cell, miller)
    n_u = max(2, int(math.ceil(np.linalg.norm(u) / spacing)))
    n_v = max(2, int(math.ceil(np.linalg.norm(v) / spacing)))
    s, t = np.meshgrid(np.arange(n_u) / n_u, np.arange(n_v) / n_v, indexing="ij")
    points = origin + s.reshape(-1, 1) * u + t.reshape(-1, 1) * v
    result = potential_at(crystal, points, tol=tol, smearing=smearing,
                          exclude="coincident" if smearing == 0 else None)
    normal = np.cross(u, v)
    normal /= np.linalg.norm(normal)
    atoms = []
    basis = np.stack([u, v, normal])
    for position, label, q in zip(crystal.positions, crystal.labels, crystal.charges):
        # nearest image of the ion to the plane through origin
        for shift in np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)]) @ cell:
            coords = np.linalg.solve(basis.T, position + shift - origin)
            if abs(coords[2]) <= thickness:
                st = coords[:2] - np.floor(coords[:2])
                if not any(np.allclose(st, a[:2], atol=1e-6) and a[2] == label for a in atoms):
                    atoms.append((float(st[0]), float(st[1]), label, float(q), float(coords[2])))
    return PlaneSection(miller=tuple(miller), offset=offset, origin=origin, u=u, v=v,
                        values=result.potentials.reshape(n_u, n_v), atoms=tuple(atoms),
                        smearing=float(smearing))


def write_gaussian_cube(path, grid: PotentialGrid):
    """Write a potential grid as a Gaussian cube file (values in V; positions converted by ASE)."""
    import ase.io

    atoms = grid.crystal.to_ase()
    try:
        ase.io.write(str(path), atoms, format="cube", data=np.asarray(grid.values))
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({exc.strerror or exc})") from None
