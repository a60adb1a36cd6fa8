"""Defect electrostatics of point-charge crystals.

* :func:`potential_at` — the Ewald potential (and field) at any Cartesian points;
  :func:`potential_grid` — the potential on a regular grid over the cell.
* :func:`find_interstitials` — candidate positions for a probe charge.
* :func:`defect_energy` — vacancies, substitutions and interstitials in a supercell:
  the unrelaxed electrostatic energy change and the change of the neighbouring site potentials;
  :func:`vacancy_ranking` — the inequivalent sites of a species ranked by vacancy electrostatics.
* :func:`charged_cell_correction` — the point-charge image energy of a charge q in a supercell
  with a scalar or tensor dielectric constant; :func:`correction_series` — its 1/L check.

The model is rigid point ions with fixed (usually formal) charges: no relaxation, no
polarisation, no electronic structure. Energies are model estimates; with formal charges they
overstate what a real, partly covalent solid costs or gains.

Vacancy identity
----------------
Write the periodic Ewald pair function with the k = 0 term left out (a uniform neutralizing
background) as psi(r), and its regular part at the origin as xi = lim_{r->0} [psi(r) - 1/r].
The energy of a cell of charges is E = 1/2 sum_{i!=j} q_i q_j psi(r_ij) + 1/2 sum_i q_i^2 xi and
the site potential is phi_v = sum_{j!=v} q_j psi(r_vj) + q_v xi (both times k_e). Changing the
charge at one position r from q to q' (q = 0 for an interstitial, q' = 0 for a vacancy) changes
the energy by exactly

    Delta E = (q' - q) phi(r) + 1/2 k_e (q' - q)^2 xi = (q' - q) phi(r) + E_point(q' - q)

with phi(r) the potential of the perfect supercell at r and E_point(Q) = 1/2 k_e Q^2 xi the Ewald
energy of a lone charge Q in the supercell with its neutralizing background (negative; for a
cube of side L, -Q^2 alpha_M k_e / 2L with alpha_M = 2.8373). For a vacancy,
Delta E = -q phi_site + E_point(q): minus the charge times the site potential, plus the background
(image) term. Several defects add their interaction: Delta E = sum_d Dq_d phi(r_d) + E_Ewald of the
array of defect charges Dq_d. The Madelung-site-potential estimate (dilute limit) is Dq phi(r);
the image term vanishes as 1/L, and adding the charged-cell correction with eps = 1
(-E_point) recovers the dilute limit exactly in this model.

References
----------
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the lattice sums).
G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (point charge in a neutralizing
background, image energy q^2 alpha / 2 eps L).
R. Rurali and X. Cartoixà, Nano Lett. 9 (2009) 975 and Y. Kumagai and F. Oba, Phys. Rev. B 89
(2014) 195205 (anisotropic screening: Ewald sum with a dielectric tensor).
"""

from __future__ import annotations

import math
import re
import time
import warnings
from dataclasses import dataclass

import numpy as np

from .crystal import Crystal
from .errors import InputError, MadelungWarning
from .ewald import kernels, point_kernels
from .ewald.direct import EwaldParameters
from .ewald.plan import NEUTRAL_TOLERANCE, plan_for, plan_sum, reciprocal_vectors
from .geometry import (EXAMINED_PAIR_NS, build_bins, nearest_neighbour_distances, plane_spacings, reduced_basis,
                       thread_budget, wrapped_fractional)
from .units import COULOMB_CONSTANT

#: A point nearer than this to an ion (Å) sits on it.
ON_ION_DISTANCE = 1e-4

#: Rough cost of one (point or ion, k-vector) reciprocal term, ns, for choosing the thread count.
RECIPROCAL_TERM_NS = 4.0

#: Born–Mayer contact term of the interstitial probe: E = b exp((R_ion + R_probe - d) / rho).
#: b = 0.338e-19 J = 0.211 eV and rho = 0.33 Å are the Tosi–Fumi values for the alkali halides
#: (M. P. Tosi and F. G. Fumi, J. Phys. Chem. Solids 25 (1964) 45; from memory).
CONTACT_PREFACTOR = 0.211
CONTACT_SOFTNESS = 0.33

#: Grid points nearer than this to an ion (Å) are not evaluated in the interstitial search.
NEAR_ION_GRID_DISTANCE = 0.1

#: Default probe radius, Å (about a small monovalent cation; Shannon's Li+ in VI is 0.76 Å).
DEFAULT_PROBE_RADIUS = 0.76


def _where(crystal):
    return f"{crystal.source}: " if getattr(crystal, "source", None) else ""


# =====================================================================================
# potentials at points
# =====================================================================================

@dataclass(frozen=True)
class PointPotentials:
    """The electrostatic potential of a crystal at given points.

    Attributes
    ----------
    points : (M, 3) Cartesian points, Å.
    potentials : (M,) potential, V (eV per e).
    field : (M, 3) electric field -grad(phi), V/Å, or None if not asked for.
    nearest_distance : (M,) distance to the nearest ion (periodic images count), Å.
    nearest_index : (M,) index of that ion.
    excluded : (M,) index of the ion left out at each point (-1: none).
    smearing : Gaussian width sigma of the ions, Å (0: point ions).
    params : splitting parameter and cutoffs used.
    error_estimate : predicted truncation error of each potential, V.
    background : True when the cell has a net charge and a uniform neutralizing background.
    net_charge : total charge of the cell, e.
    seconds : wall time, s.
    """

    points: np.ndarray
    potentials: np.ndarray
    field: np.ndarray | None
    nearest_distance: np.ndarray
    nearest_index: np.ndarray
    excluded: np.ndarray
    smearing: float
    params: EwaldParameters
    error_estimate: float
    background: bool
    net_charge: float
    seconds: float


def _point_bins(bins, points):
    """Wrapped fractional and Cartesian coordinates of points, and the bin of each among ``bins``."""
    frac = wrapped_fractional(bins.cell, points)
    point_bin = np.minimum(np.floor(frac * bins.counts).astype(np.int64), bins.counts - 1)
    return frac, np.ascontiguousarray(frac @ bins.cell), np.ascontiguousarray(point_bin)


class _PointSum:
    """The Ewald sum of one crystal prepared once (bins, structure factors) for many point queries."""

    def __init__(self, crystal, tol=1e-10, smearing=0.0, alpha=None, warn=True):
        if not isinstance(crystal, Crystal):
            raise InputError(f"a madelung.Crystal is needed, got {type(crystal).__name__}")
        smearing = float(smearing)
        if not (math.isfinite(smearing) and smearing >= 0):
            raise InputError(f"smearing must be a width >= 0 in Å, got {smearing!r}")
        self.crystal = crystal
        self.smearing = smearing
        charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
        n = len(charges)
        d_min = None if n > 1 else float(np.min(plane_spacings(crystal.cell)))
        self.beta = 1.0 / (math.sqrt(2.0) * smearing) if smearing > 0 else 0.0
        plan = plan_for(crystal, tol, method="direct", alpha=alpha, d_min=d_min)
        if self.beta > 0 and self.beta <= plan.alpha:
            # wide Gaussians: their potential is the reciprocal sum at alpha = beta alone
            plan = plan_for(crystal, tol, method="direct", alpha=self.beta, d_min=plan.d_min)
        self.plan = plan
        self.alpha = plan.alpha
        self.background = plan.background
        net = plan.sums.net
        if self.background and warn:
            warnings.warn(f"{_where(crystal)}the cell carries a net charge of {net:+.6g} e; "
                          "a uniform neutralizing background was added", MadelungWarning, stacklevel=3)
        self.cell, self.charges, self.volume, self.net = plan.cell, charges, plan.volume, net
        self.tol = tol
        self.bins = plan.bins
        self.sorted_charges = self.bins.sorted_values(charges)
        self.examined_per_point = n * self.bins.examined_volume / plan.volume
        self.rank = np.empty(n, dtype=np.int64)
        self.rank[self.bins.order] = np.arange(n)
        ks = plan.kspace
        self.hkl, self.kvectors, self.hmax, self.weights = ks.hkl, ks.kvectors, ks.hmax, ks.weights
        if len(self.hkl):
            with thread_budget(RECIPROCAL_TERM_NS * n * len(self.hkl)):
                self.s_re, self.s_im = kernels.structure_factors(plan.frac, charges, self.hkl, self.hmax,
                                                                 kernels.CHUNKS)
        # potential error: the energy estimate is k_e/2 sum|q| dphi
        self.potential_error = 2.0 * plan.error_estimate / plan.sums.absolute_sum

    def params(self, pairs):
        return EwaldParameters(method="direct", alpha=self.alpha, real_cutoff=self.plan.real_cutoff,
                               reciprocal_cutoff=self.plan.reciprocal_cutoff, real_space_pairs=int(pairs),
                               k_vectors=int(len(self.hkl)), image_reach=tuple(int(x) for x in self.bins.reach),
                               extra={"smearing_angstrom": self.smearing})

    def point_bins(self, points):
        return _point_bins(self.bins, points)

    def evaluate(self, points, exclude=None, want_field=False):
        """Raw evaluation: (potential V, field V/Å or zeros, nearest distance, nearest original index, pairs).

        ``exclude`` holds original ion indices (-1 none): that ion is left out where the point sits on it.
        """
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        m = len(points)
        frac, wrapped, point_bin = self.point_bins(points)
        if exclude is None:
            exclude = np.full(m, -1, dtype=np.int64)
        exclude_sorted = np.where(exclude >= 0, self.rank[np.maximum(exclude, 0)], -1).astype(np.int64)
        b = self.bins
        with thread_budget(m * (self.examined_per_point * EXAMINED_PAIR_NS + RECIPROCAL_TERM_NS * len(self.hkl))):
            phi_r, e_r, nearest, nearest_sorted, pairs = point_kernels.real_space_at_points(
                wrapped, point_bin, exclude_sorted, b.positions, self.sorted_charges, b.cell, b.counts, b.offsets,
                b.bin_start, self.alpha, self.beta, self.plan.real_cutoff, ON_ION_DISTANCE, bool(want_field))
            if len(self.hkl):
                phi_k, e_k = kernels.reciprocal_site_terms(frac, np.ones(m), self.hkl, self.hmax, self.kvectors,
                                                           self.weights, self.s_re, self.s_im, bool(want_field))
            else:
                phi_k, e_k = np.zeros(m), np.zeros((m, 3))
        phi = phi_r + phi_k
        if self.background:
            phi = phi - math.pi * self.net / (self.volume * self.alpha ** 2)
        # the excluded ion's smooth (reciprocal) part: erf(alpha d)/d -> 2 alpha / sqrt(pi) at d = 0
        excluded_here = exclude >= 0
        if excluded_here.any():
            phi[excluded_here] -= 2.0 * self.alpha / math.sqrt(math.pi) * self.charges[exclude[excluded_here]]
        nearest_index = np.where(nearest_sorted >= 0, b.order[np.maximum(nearest_sorted, 0)], -1)
        k_e = COULOMB_CONSTANT
        return k_e * phi, k_e * (e_r + e_k), nearest, nearest_index, pairs

    def nearest(self, points):
        """Distance to the nearest ion (within the real-space cutoff) and its original index."""
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        _, wrapped, point_bin = self.point_bins(points)
        b = self.bins
        with thread_budget(len(points) * self.examined_per_point * EXAMINED_PAIR_NS):
            _, _, nearest, nearest_sorted, _ = point_kernels.real_space_at_points(
                wrapped, point_bin, np.full(len(points), -1, dtype=np.int64), b.positions, self.sorted_charges,
                b.cell, b.counts, b.offsets, b.bin_start, self.alpha, self.beta, self.plan.real_cutoff,
                ON_ION_DISTANCE, False)
        return nearest, np.where(nearest_sorted >= 0, b.order[np.maximum(nearest_sorted, 0)], -1)

    def resolve_exclusions(self, points, exclude):
        """Check the points against the ions and turn ``exclude`` into one ion index per point."""
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        m = len(points)
        labels = self.crystal.labels
        if self.beta > 0 and (exclude is None or (isinstance(exclude, str) and exclude == "none")):
            return np.full(m, -1, dtype=np.int64)  # smeared ions: every point is allowed
        # nearest ion of each point (one real-space pass without the field)
        nearest, nearest_index = self.nearest(points)
        if exclude is None or (isinstance(exclude, str) and exclude == "none"):
            wanted = np.full(m, -1, dtype=np.int64)
        elif isinstance(exclude, str):
            if exclude != "coincident":
                raise InputError(f"exclude={exclude!r} not understood; give 'coincident', None or ion indices")
            wanted = np.where(nearest < ON_ION_DISTANCE, nearest_index, -1).astype(np.int64)
        else:
            try:
                wanted = np.array(exclude, dtype=np.int64).reshape(-1)
            except (TypeError, ValueError):
                raise InputError("exclude must hold one ion index per point (-1 for none)") from None
            if wanted.shape != (m,):
                raise InputError(f"exclude has {wanted.size} entries for {m} points")
            if np.any(wanted >= len(labels)) or np.any(wanted < -1):
                bad = int(wanted[(wanted >= len(labels)) | (wanted < -1)][0])
                raise InputError(f"exclude names ion {bad}, but the structure has ions 0..{len(labels) - 1}")
            for p in np.flatnonzero(wanted >= 0):
                if not (nearest[p] < ON_ION_DISTANCE and nearest_index[p] == wanted[p]):
                    raise InputError(f"point {p} at {np.round(points[p], 6).tolist()} Å is not on ion "
                                     f"{labels[wanted[p]]} (#{wanted[p]}); exclude only leaves out an ion "
                                     "the point sits on")
        if self.beta == 0:
            on_ion = np.flatnonzero((nearest < ON_ION_DISTANCE) & (wanted < 0))
            if len(on_ion):
                p = int(on_ion[0])
                i = int(nearest_index[p])
                raise InputError(f"point {p} at {np.round(points[p], 6).tolist()} Å sits on ion {labels[i]} (#{i}); "
                                 "the potential of a point charge is infinite there (exclude that ion "
                                 "explicitly, or use a smearing width)")
        return wanted


def _as_points(points, name="points"):
    try:
        array = np.array(points, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be numbers (Cartesian coordinates in Å)") from None
    if array.ndim == 1 and array.size == 3:
        array = array.reshape(1, 3)
    if array.ndim != 2 or array.shape[1] != 3:
        raise InputError(f"{name} must have shape (M, 3), got {array.shape}")
    bad = np.flatnonzero(~np.all(np.isfinite(array), axis=1))
    if len(bad):
        raise InputError(f"{name}: point {bad[0]} has a non-finite coordinate")
    return np.ascontiguousarray(array)


def potential_at(crystal, points, *, tol=1e-10, field=False, exclude=None, smearing=0.0, alpha=None):
    """Electrostatic potential (and optionally field) of a periodic crystal at any Cartesian points.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and charges.
    points : (M, 3) array_like
        Cartesian points, Å (any; they are folded into the cell).
    tol : float, optional
        Accuracy, as in :func:`madelung.ewald` (relative to ``k_e sum(q^2) / d_min``).
    field : bool, optional
        Also return the electric field E = -grad(phi), V/Å.
    exclude : None, "coincident" or (M,) ints, optional
        Ions to leave out: "coincident" leaves out any ion a point sits on; an array names one
        ion per point (-1 none), which the point must sit on. A point on an ion that is not
        left out is refused for point ions (the potential is infinite there).
    smearing : float, optional
        Treat each ion as a normalised Gaussian charge exp(-r^2 / 2 sigma^2) of this width
        sigma (Å) instead of a point (default 0, point ions). The potential is then finite
        everywhere; beyond about 4 sigma from an ion it equals the point-ion potential.
    alpha : float, optional
        Fix the Ewald splitting parameter (1/Å).

    Returns
    -------
    PointPotentials
        ``potentials`` in V, ``field`` in V/Å, the nearest ion of each point and the parameters.

    Notes
    -----
    phi(r) = k_e [sum_j,n q_j erfc(alpha d)/d + (4 pi / V) sum_{k != 0} exp(-k^2 / 4 alpha^2) / k^2
    Re(S(k) exp(-i k.r)) - pi Q / (V alpha^2)], d = |r - r_j - n|, the last term only for a net
    charge Q (neutralizing background). With an ion left out at its own site this is the
    engine's site potential. The zero of the potential is the Ewald convention: the cell average
    of phi is zero.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (error estimates, used for tuning).
    """
    started = time.perf_counter()
    points = _as_points(points)
    engine = _PointSum(crystal, tol=tol, smearing=smearing, alpha=alpha)
    wanted = engine.resolve_exclusions(points, exclude)
    phi, efield, nearest, nearest_index, pairs = engine.evaluate(points, wanted, field)
    for array in (phi, efield, nearest, nearest_index, wanted):
        array.setflags(write=False)
    return PointPotentials(points=points, potentials=phi, field=efield if field else None,
                           nearest_distance=nearest, nearest_index=nearest_index, excluded=wanted,
                           smearing=engine.smearing, params=engine.params(pairs),
                           error_estimate=engine.potential_error, background=bool(engine.background),
                           net_charge=engine.net, seconds=time.perf_counter() - started)


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


def potential_grid(crystal, spacing=0.2, *, shape=None, smearing=0.3, tol=1e-8, alpha=None, chunk=200000):
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


# =====================================================================================
# periodic distances (few points, all ions)
# =====================================================================================

def _distances_to_ions(cell, positions, point, cutoff=None):
    """Distances (N,) from one point to the nearest image of every ion, Å."""
    cell = np.asarray(cell, float)
    frac = np.linalg.solve(cell.T, (np.asarray(positions, float) - point).T).T
    frac -= np.round(frac)
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)], float)
    d = (frac[:, None, :] + shifts[None, :, :]) @ cell
    return np.sqrt(np.min(np.einsum("nsk,nsk->ns", d, d), axis=1))


def _periodic_distance(cell, a_frac, b_frac):
    diff = np.asarray(a_frac, float) - np.asarray(b_frac, float)
    diff = diff - np.round(diff)
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)], float)
    d = (diff[..., None, :] + shifts) @ cell
    return np.sqrt(np.min(np.sum(d * d, axis=-1), axis=-1))


# =====================================================================================
# symmetry (spglib, local to this module)
# =====================================================================================

def _spglib_cell(crystal):
    kinds = {}
    types = [kinds.setdefault((s, round(float(q), 6)), len(kinds) + 1)
             for s, q in zip(crystal.symbols, crystal.charges)]
    return (np.asarray(crystal.cell, float), wrapped_fractional(crystal.cell, crystal.positions),
            np.array(types, dtype=int))


def _symmetry_operations(crystal, symprec):
    import spglib

    with warnings.catch_warnings():  # spglib 2.x warns about its error-handling switch on every call
        warnings.simplefilter("ignore", DeprecationWarning)
        data = spglib.get_symmetry(_spglib_cell(crystal), symprec=symprec)
    if data is None:
        return np.eye(3, dtype=int)[None], np.zeros((1, 3))
    return np.asarray(data["rotations"]), np.asarray(data["translations"])


def equivalent_sites(crystal, symprec=1e-3):
    """For each ion, the index of the first ion symmetry-equivalent to it (spglib)."""
    import spglib

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        dataset = spglib.get_symmetry_dataset(_spglib_cell(crystal), symprec=symprec)
    if dataset is None:
        return np.arange(len(crystal))
    return np.asarray(dataset.equivalent_atoms if hasattr(dataset, "equivalent_atoms")
                      else dataset["equivalent_atoms"])


def _orbit(rotations, translations, frac, cell, tolerance):
    """Distinct images (fractional, in [0,1)) of a point under the operations."""
    images = np.einsum("oij,j->oi", rotations, frac) + translations
    images -= np.floor(images + 1e-6)  # fold 0.9999997 (optimiser precision) onto 0, not 1
    images[np.abs(images) < 1e-6] = 0.0
    distinct = []
    for image in images:
        if not distinct or np.min(_periodic_distance(cell, np.array(distinct), image)) > tolerance:
            distinct.append(image)
    return np.array(distinct)


# =====================================================================================
# interstitials
# =====================================================================================

@dataclass(frozen=True)
class InterstitialSite:
    """One candidate position of a probe charge.

    Attributes
    ----------
    fractional : (3,) fractional coordinates of the representative, in [0, 1).
    position : (3,) Cartesian position, Å.
    potential : potential of the crystal there, V.
    electrostatic_energy : probe charge times potential, eV.
    contact_energy : the Born–Mayer contact term of the probe with the ions, eV.
    total_energy : the sum, eV (the function that was minimised).
    nearest_distance : distance to the nearest ion, Å; nearest_label : its site label.
    multiplicity : symmetry-equivalent positions in the cell.
    found : grid minima that refined to this site (before symmetry merging).
    """

    fractional: np.ndarray
    position: np.ndarray
    potential: float
    electrostatic_energy: float
    contact_energy: float
    total_energy: float
    nearest_distance: float
    nearest_label: str
    multiplicity: int
    found: int


@dataclass(frozen=True)
class InterstitialSearch:
    """Result of :func:`find_interstitials`.

    Attributes
    ----------
    sites : candidates, lowest electrostatic energy first.
    probe : probe charge, e. probe_radius : Å.
    radii : ion radius used per site label, Å.
    clearance : a candidate must keep a distance of at least clearance * (R_ion + R_probe) from every ion.
    grid_shape : points of the search grid. grid_minima : local minima on the grid.
    rejected : refined minima dropped (too close to an ion or not converged inside the search box).
    error_estimate : predicted error of the potentials, V.
    """

    sites: tuple
    probe: float
    probe_radius: float
    radii: dict
    clearance: float
    grid_shape: tuple
    grid_minima: int
    rejected: int
    error_estimate: float
    seconds: float


def ion_radii(crystal, radii=None):
    """Radius of every ion (Å): from ``radii`` (map by site label or element), else Shannon's
    effective ionic radius for the element and its (integer) charge."""
    from .elements import shannon_radius

    radii = dict(radii or {})
    result = np.empty(len(crystal))
    cache = {}
    for i, (symbol, label, q) in enumerate(zip(crystal.symbols, crystal.labels, crystal.charges)):
        if label in radii or symbol in radii:
            value = float(radii.get(label, radii.get(symbol)))
        else:
            key = (symbol, float(q))
            if key not in cache:
                if abs(q - round(q)) > 1e-6 or round(q) == 0:
                    raise InputError(f"{_where(crystal)}site {label} has charge {q:g}, for which no ionic radius "
                                     f"is tabulated; give one, e.g. --radius {symbol}=1.0")
                try:
                    cache[key] = shannon_radius(symbol, int(round(q)))
                except InputError as exc:
                    raise InputError(f"{_where(crystal)}{exc}; give one, e.g. --radius {symbol}=1.0") from None
            value = cache[key]
        if not (math.isfinite(value) and value >= 0):
            raise InputError(f"radius of {label} must be >= 0 Å, got {value!r}")
        result[i] = value
    return result


class _ProbeEnergy:
    """Electrostatic energy of a probe charge plus its contact term, with gradients."""

    def __init__(self, crystal, probe, probe_radius, radii, tol):
        self.sum = _PointSum(crystal, tol=tol, warn=False)
        self.probe = probe
        self.probe_radius = probe_radius
        b = self.sum.bins
        self.sorted_radii = b.sorted_values(radii)
        # the contact term is below 1e-12 eV beyond this distance
        reach = float(np.max(radii)) + probe_radius + CONTACT_SOFTNESS * math.log(CONTACT_PREFACTOR / 1e-12)
        self.contact_bins = build_bins(crystal.cell, crystal.positions, reach)
        self.contact_radii = self.contact_bins.sorted_values(radii)
        self.contact_cutoff = reach

    def __call__(self, points, want_gradient=False):
        phi, efield, nearest, nearest_index, _ = self.sum.evaluate(points, None, want_gradient)
        cb = self.contact_bins
        _, wrapped, point_bin = _point_bins(cb, points)
        examined = len(points) * len(self.contact_radii) * cb.examined_volume / abs(np.linalg.det(cb.cell))
        with thread_budget(examined * EXAMINED_PAIR_NS):
            contact, grad_contact = point_kernels.contact_repulsion_at_points(
                wrapped, point_bin, cb.positions, self.contact_radii, cb.cell, cb.counts, cb.offsets, cb.bin_start,
                self.probe_radius, CONTACT_PREFACTOR, CONTACT_SOFTNESS, self.contact_cutoff, bool(want_gradient))
        electrostatic = self.probe * phi
        gradient = -self.probe * efield + grad_contact
        return phi, electrostatic, contact, gradient, nearest, nearest_index


def _grid_minima(values, allowed):
    """Indices of the ``allowed`` grid points not above any of their 26 periodic neighbours."""
    is_min = allowed & np.isfinite(values)
    for d0 in (-1, 0, 1):
        for d1 in (-1, 0, 1):
            for d2 in (-1, 0, 1):
                if d0 == d1 == d2 == 0:
                    continue
                is_min &= values <= np.roll(values, (d0, d1, d2), axis=(0, 1, 2))
    return np.argwhere(is_min)


def _refine(energy, minima, shape, cell, positions, radii, probe_radius, clearance, box):
    """Bounded L-BFGS from each grid minimum; returns the accepted positions and the number rejected."""
    from scipy.optimize import minimize

    refined = []
    rejected = 0
    for index in minima:
        start = (index / np.array(shape)) @ cell

        def objective(x):
            _, el, contact, grad, near, _ = energy(x.reshape(1, 3), True)
            if near[0] < 0.05:  # never reached through the contact wall; guards the optimiser
                return 1e6, np.zeros(3)
            return float(el[0] + contact[0]), grad[0]

        bounds = [(c - box, c + box) for c in start]
        result = minimize(objective, start, jac=True, method="L-BFGS-B", bounds=bounds,
                          options={"gtol": 1e-7, "ftol": 1e-13, "maxiter": 500})
        x = result.x
        on_edge = np.any(np.abs(np.abs(x - start) - box) < 1e-6)
        distances = _distances_to_ions(cell, positions, x)
        if on_edge or np.any(distances < clearance * (radii + probe_radius)):
            rejected += 1
            continue
        refined.append(x)

    return refined, rejected


def find_interstitials(crystal, probe=1.0, *, spacing=0.2, probe_radius=DEFAULT_PROBE_RADIUS, radii=None,
                       clearance=0.75, tol=1e-8, symprec=1e-3, merge_distance=0.25, box=0.6):
    """Candidate interstitial positions of a probe charge.

    The probe's energy is its charge times the crystal's potential plus a Born–Mayer contact
    term with each ion, b exp((R_ion + R_probe - d) / rho) (b = 0.211 eV, rho = 0.33 Å). The
    contact term is needed: by Earnshaw's theorem the potential of point charges has no local
    minimum in charge-free space (fact of the trade), so a bare point charge has no stable site.
    Local minima on a grid are refined by bounded L-BFGS inside a box of ``box`` Å around each
    grid minimum, candidates nearer than ``clearance * (R_ion + R_probe)`` to any ion are dropped,
    and the rest are merged by the crystal's symmetry (spglib).

    Parameters
    ----------
    crystal : Crystal
    probe : float
        Probe charge, e (e.g. +1 for a cation interstitial).
    spacing : float
        Search-grid step, Å (default 0.2).
    probe_radius : float
        Radius of the probe, Å (default 0.76, about Li+).
    radii : mapping, optional
        Ion radii by site label or element, Å; default Shannon's effective ionic radii.
    clearance : float
        Minimum distance to every ion as a fraction of R_ion + R_probe (default 0.75).
    tol : float
        Accuracy of the potentials (default 1e-8).
    symprec : float
        spglib tolerance, Å. merge_distance : positions closer than this are one site, Å.
    box : float
        Half-width of the refinement box around each grid minimum, Å.

    Returns
    -------
    InterstitialSearch

    References
    ----------
    S. Earnshaw, Trans. Camb. Phil. Soc. 7 (1842) 97 (no electrostatic minimum in free space).
    M. P. Tosi and F. G. Fumi, J. Phys. Chem. Solids 25 (1964) 45 (Born–Mayer constants).
    R. D. Shannon, Acta Cryst. A32 (1976) 751 (ionic radii).
    """
    started = time.perf_counter()
    try:
        probe = float(probe)
    except (TypeError, ValueError):
        raise InputError(f"probe charge must be a number, got {probe!r}") from None
    if not math.isfinite(probe) or probe == 0:
        raise InputError(f"probe charge must be a non-zero number of e, got {probe!r}")
    for name, value in (("probe radius", probe_radius), ("clearance", clearance), ("box", box)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
            raise InputError(f"{name} must be a number >= 0, got {value!r}")
    radii_array = ion_radii(crystal, radii)
    energy = _ProbeEnergy(crystal, probe, float(probe_radius), radii_array, tol)
    cell = np.asarray(crystal.cell, float)
    shape = grid_shape(cell, spacing)
    frac = grid_fractional(shape)
    points = frac @ cell

    # the energy on the whole grid (but on the ions); minima are sought among the points that keep
    # their clearance, compared with all 26 neighbours, so the rim of the excluded region round an
    # attracting ion (where the energy keeps falling inwards) is not taken for a minimum
    nearest, nearest_index = energy.sum.nearest(points)
    evaluable = nearest > NEAR_ION_GRID_DISTANCE
    total = np.full(len(points), np.inf)
    _, el, contact, _, _, _ = energy(points[evaluable])
    total[evaluable] = el + contact
    allowed = nearest >= clearance * (radii_array[nearest_index] + probe_radius)
    minima = _grid_minima(total.reshape(shape), allowed.reshape(shape))

    refined, rejected = _refine(energy, minima, shape, cell, crystal.positions, radii_array, probe_radius,
                                clearance, box)

    # merge: duplicates and symmetry images
    rotations, translations = _symmetry_operations(crystal, symprec)
    entries = []
    if refined:
        refined = np.array(refined)
        phi, el, contact, _, _, _ = energy(refined)
        order = np.argsort(el + contact, kind="stable")
        representatives = []
        for i in order:
            f = wrapped_fractional(cell, refined[i:i + 1])[0]
            merged = False
            for rep in representatives:
                if np.min(_periodic_distance(cell, rep["orbit"], f)) < merge_distance:
                    rep["found"] += 1
                    merged = True
                    break
            if not merged:
                orbit = _orbit(rotations, translations, f, cell, merge_distance)
                # report the image nearest the cell centre (ties: smallest coordinates)
                centre = _periodic_distance(cell, orbit, np.full(3, 0.5))
                best = min(range(len(orbit)), key=lambda o: (round(float(centre[o]), 4),
                                                            tuple(np.round(orbit[o], 4))))
                representatives.append({"i": i, "f": orbit[best], "orbit": orbit, "found": 1})
        for rep in representatives:
            i = rep["i"]
            distances = _distances_to_ions(cell, crystal.positions, refined[i])
            j = int(np.argmin(distances))
            entries.append(InterstitialSite(
                fractional=rep["f"], position=rep["f"] @ cell, potential=float(phi[i]),
                electrostatic_energy=float(el[i]), contact_energy=float(contact[i]),
                total_energy=float(el[i] + contact[i]), nearest_distance=float(distances[j]),
                nearest_label=crystal.labels[j], multiplicity=len(rep["orbit"]), found=rep["found"]))
    entries.sort(key=lambda s: s.electrostatic_energy)
    radii_by_label = {}
    for label, r in zip(crystal.labels, radii_array):
        radii_by_label.setdefault(label, float(r))
    return InterstitialSearch(sites=tuple(entries), probe=probe, probe_radius=float(probe_radius),
                              radii=radii_by_label, clearance=float(clearance), grid_shape=shape,
                              grid_minima=len(minima), rejected=rejected,
                              error_estimate=energy.sum.potential_error, seconds=time.perf_counter() - started)


# =====================================================================================
# supercells
# =====================================================================================

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

    def describe(self) -> str:
        m = self.matrix
        if np.count_nonzero(m - np.diag(np.diag(m))) == 0:
            return "x".join(str(int(x)) for x in np.diag(m))
        return "[" + "; ".join(" ".join(str(int(x)) for x in row) for row in m) + "]"


def parse_supercell(text):
    """``"3x3x3"``, ``"3"`` or ``"2x2x1"`` into a diagonal matrix; nine integers (rows) into a matrix."""
    if isinstance(text, (int, np.integer)):
        values = [int(text)] * 3
    elif isinstance(text, str):
        parts = [p for p in re.split(r"[x×,;\s]+", text.strip().lower()) if p]
        try:
            values = [int(p) for p in parts]
        except ValueError:
            raise InputError(f"supercell {text!r} must look like 3x3x3 (or nine integers, rows of the matrix)") from None
        if len(values) == 1:
            values = values * 3
    else:
        values = np.asarray(text).astype(int).ravel().tolist()
    if len(values) == 3:
        matrix = np.diag(values)
    elif len(values) == 9:
        matrix = np.array(values).reshape(3, 3)
    else:
        raise InputError(f"supercell {text!r} must have 3 repeats (3x3x3) or 9 integers")
    if round(np.linalg.det(matrix)) <= 0:
        raise InputError(f"supercell {text!r} must have a positive determinant")
    return matrix.astype(np.int64)


def near_cubic_matrix(cell, min_length):
    """The smallest supercell matrix whose lattice-plane spacings all reach ``min_length`` Å (so
    every periodic image of a defect is at least that far away), preferring the most cubic shape."""
    cell = np.asarray(cell, float)
    try:
        min_length = float(min_length)
    except (TypeError, ValueError):
        raise InputError(f"minimum supercell length must be a number of Å, got {min_length!r}") from None
    if not (math.isfinite(min_length) and min_length > 0):
        raise InputError(f"minimum supercell length must be positive, got {min_length!r}")
    spacing = plane_spacings(cell)
    best = np.diag(np.maximum(1, np.ceil(min_length / spacing - 1e-9)).astype(np.int64))
    best_key = (round(abs(np.linalg.det(best))), 0.0)
    deltas = np.array(np.meshgrid(*[[-1, 0, 1]] * 9, indexing="ij")).reshape(9, -1).T.reshape(-1, 3, 3)
    for scale in np.linspace(1.0, 1.6, 13):
        ideal = np.round(scale * min_length * np.linalg.inv(cell)).astype(np.int64)
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
        reach = shortest >= min_length - 1e-9
        if not reach.any():
            continue
        cubicness = -shortest[reach] / volumes[reach] ** (1.0 / 3.0)
        order = np.lexsort((cubicness, dets[reach]))
        key = (int(dets[reach][order[0]]), float(cubicness[order[0]]))
        if key < best_key:
            best, best_key = matrices[reach][order[0]], key
    return best


def make_supercell(crystal, supercell=None, min_length=None) -> Supercell:
    """Build a supercell from a repeat spec (``"3x3x3"``, an int, a 3x3 matrix) or the smallest
    near-cubic one with all plane spacings at least ``min_length`` Å."""
    if supercell is not None and min_length is not None:
        raise InputError("give either a supercell (e.g. 3x3x3) or a minimum length, not both")
    if supercell is None and min_length is None:
        matrix = np.eye(3, dtype=np.int64)
    elif supercell is not None:
        matrix = parse_supercell(supercell)
    else:
        matrix = near_cubic_matrix(crystal.cell, min_length)
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


# =====================================================================================
# point defects
# =====================================================================================

@dataclass(frozen=True)
class DefectSite:
    """One defect of a defect calculation.

    Attributes
    ----------
    kind : "vacancy", "substitution" or "interstitial".
    spec : the text that asked for it (e.g. "O1", "Mg1=Al:+3", "0.5,0.5,0.5=Li").
    label : site label of the ion removed or replaced ("" for an interstitial).
    index : supercell index of that ion (-1 for an interstitial).
    element_before, element_after : element symbols ("" where none).
    charge_before, charge_after : charge at the position before and after, e.
    delta_charge : charge_after - charge_before, e (the defect's charge relative to the lattice).
    position : Cartesian position in the supercell, Å.
    potential : potential of the perfect supercell at the position (the ion itself left out), V.
    madelung_estimate : delta_charge * potential, eV: the Madelung-site-potential estimate of the
        defect's energy in the dilute limit (for a vacancy, -q phi_site).
    """

    kind: str
    spec: str
    label: str
    index: int
    element_before: str
    element_after: str
    charge_before: float
    charge_after: float
    delta_charge: float
    position: np.ndarray
    potential: float
    madelung_estimate: float


@dataclass(frozen=True)
class NeighbourChange:
    """Change of the potential at a site near the defects (V)."""

    index: int
    label: str
    element: str
    distance: float
    potential_before: float
    potential_after: float
    change: float


@dataclass(frozen=True)
class DefectResult:
    """Unrelaxed electrostatics of point defects in a supercell (rigid point ions).

    Attributes
    ----------
    supercell : the perfect supercell (Supercell: crystal, matrix).
    defects : tuple of DefectSite.
    perfect_energy, defective_energy : Ewald energies of the two supercells, eV.
    energy_change : defective - perfect, eV (signed; the cost of making the defects with the
        removed ions taken to infinity and added ions brought from infinity).
    defect_charge : net charge of the defects, e.
    background : True when the defective cell is charged and summed with a uniform neutralizing background.
    madelung_estimate : sum of the defects' Madelung-site-potential estimates, eV.
    defect_array_energy : Ewald energy of the defect charges alone (their images and mutual
        interaction, background included), eV.
    identity_residual : energy_change - (madelung_estimate + defect_array_energy), eV; zero up to
        the accuracy of the sums (see the module docstring).
    image_correction : charged-cell correction for the net defect charge with eps = 1 (the point-
        charge model has no screening), eV; energy_change + image_correction is the dilute-limit value
        for a single defect.
    dielectric_correction : the same correction with the dielectric constant or tensor asked for
        (None if none was given), eV: what a screened (e.g. ab-initio) calculation of this supercell adds.
    neighbours : changes of the potential at the sites near the defects.
    error_estimate : predicted error of the energies, eV.
    """

    supercell: Supercell
    defects: tuple
    perfect_energy: float
    defective_energy: float
    energy_change: float
    defect_charge: float
    background: bool
    madelung_estimate: float
    defect_array_energy: float
    identity_residual: float
    image_correction: float
    dielectric_correction: "ChargedCellCorrection | None"
    neighbours: tuple
    error_estimate: float
    seconds: float


_SITE_AT = re.compile(r"^(?P<label>[^@]+?)(?:@(?P<at>[^@]+))?$")


def _parse_vector(text, what):
    try:
        values = [float(x) for x in re.split(r"[,\s]+", str(text).strip()) if x]
    except ValueError:
        raise InputError(f"{what} {text!r} must be three numbers, e.g. 0.5,0.5,0.5") from None
    if len(values) != 3 or not all(math.isfinite(v) for v in values):
        raise InputError(f"{what} {text!r} must be three numbers, e.g. 0.5,0.5,0.5")
    return np.array(values)


def _find_site(supercell: Supercell, spec):
    """Supercell index of the site named by ``spec``: LABEL (the copy in the first cell), LABEL@x,y,z
    (the copy nearest the supercell fractional point) or #INDEX."""
    crystal = supercell.crystal
    spec = str(spec).strip()
    if spec.startswith("#"):
        try:
            index = int(spec[1:])
        except ValueError:
            raise InputError(f"site {spec!r}: #INDEX needs an integer") from None
        if not 0 <= index < len(crystal):
            raise InputError(f"site {spec!r}: the supercell has sites #0..#{len(crystal) - 1}")
        return index
    match = _SITE_AT.match(spec)
    if not match:
        raise InputError(f"site {spec!r} not understood; give a site label such as O1, O1@0.5,0.5,0.5 or #INDEX")
    label = match.group("label").strip()
    candidates = [i for i, lab in enumerate(crystal.labels) if lab == label]
    if not candidates:
        candidates = [i for i, sym in enumerate(crystal.symbols) if sym == label]
    if not candidates:
        known = ", ".join(dict.fromkeys(supercell.parent.labels))
        raise InputError(f"{_where(crystal)}site label {label!r} does not exist (labels: {known})")
    if match.group("at") is None:
        return candidates[0]
    target = _parse_vector(match.group("at"), "site position") @ crystal.cell
    frac = wrapped_fractional(crystal.cell, crystal.positions[candidates])
    distance = _periodic_distance(crystal.cell, frac, wrapped_fractional(crystal.cell, target[None])[0])
    return candidates[int(np.argmin(distance))]


def _parse_species(text, what):
    """``Al``, ``Al:+3`` or ``Al+3`` into (element, charge or None)."""
    text = str(text).strip()
    match = re.match(r"^([A-Z][a-z]?)\s*(?::\s*([+-]?\d+(?:\.\d+)?)|([+-]\d+(?:\.\d+)?))?$", text)
    if not match:
        raise InputError(f"{what} {text!r} must be an element with an optional charge, e.g. Al:+3")
    element = match.group(1)
    value = match.group(2) or match.group(3)
    return element, (None if value is None else float(value))


def _species_charge(element, charge, crystal, what):
    from .elements import common_oxidation_states, is_element

    if charge is not None:
        return float(charge)
    present = sorted({float(q) for s, q in zip(crystal.symbols, crystal.charges) if s == element})
    if len(present) == 1:
        return present[0]
    if not is_element(element):
        raise InputError(f"{what}: {element!r} is not an element")
    states = common_oxidation_states(element)
    if len(states) == 1:
        return float(states[0])
    raise InputError(f"{what}: give the charge of {element}, e.g. {element}:{'+' if not states or states[0] > 0 else ''}"
                     f"{states[0] if states else 1} (its common oxidation states are {list(states) or 'unknown'})")


def defect_energy(crystal, *, vacancy=(), substitute=(), interstitial=(), supercell=None, min_length=None,
                  tol=1e-10, neighbour_radius=3.5, dielectric=None) -> DefectResult:
    """Unrelaxed electrostatic energy of point defects in a supercell, and the change of the site
    potentials round them.

    Parameters
    ----------
    crystal : Crystal
        The perfect crystal (its cell is the parent cell).
    vacancy : sequence of str
        Sites to empty: a label (``"O1"``: its copy in the first cell), ``"O1@x,y,z"`` (the copy
        nearest a fractional point of the supercell) or ``"#INDEX"`` (supercell index).
    substitute : sequence of str
        ``"SITE=ELEMENT"`` or ``"SITE=ELEMENT:CHARGE"`` (e.g. ``"Mg1=Al:+3"``); without a charge
        the element's charge in the crystal, or its only common oxidation state, is used.
    interstitial : sequence of str
        ``"x,y,z=ELEMENT[:CHARGE]"`` with x, y, z fractional coordinates of the parent cell.
    supercell : str, int or (3, 3) ints, optional
        Repeats such as ``"3x3x3"`` or a matrix; or give ``min_length`` (Å) for the smallest
        near-cubic supercell whose plane spacings all reach it. Default: the cell itself.
    tol : float
        Accuracy of the Ewald sums.
    neighbour_radius : float
        Report the potential change on sites within this distance of a defect, Å.
    dielectric : float or (3, 3), optional
        Also give the charged-cell correction with this dielectric constant or tensor.

    Returns
    -------
    DefectResult

    Notes
    -----
    Charge compensation is explicit: a charged set of defects is summed with a uniform
    neutralizing background (``background`` says so), or the user adds a compensating defect
    (e.g. a Schottky pair ``vacancy=["Mg1", "O1@0.5,0.5,0.5"]``). The energy change obeys
    Delta E = sum_d Dq_d phi(r_d) + E_Ewald(defect charges) exactly (module docstring); the
    result carries the residual of that identity as a check.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (charged supercells, image energy).
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    from . import ewald

    started = time.perf_counter()
    vacancy, substitute, interstitial = ([vacancy] if isinstance(vacancy, str) else list(vacancy),
                                         [substitute] if isinstance(substitute, str) else list(substitute),
                                         [interstitial] if isinstance(interstitial, str) else list(interstitial))
    if not (vacancy or substitute or interstitial):
        raise InputError("no defect given: name a vacancy, a substitution or an interstitial")
    sc = make_supercell(crystal, supercell, min_length)
    big = sc.crystal
    where = _where(crystal)

    changes = []  # (kind, spec, index, new element, new charge, position)
    used = {}
    for spec in vacancy:
        index = _find_site(sc, spec)
        changes.append(("vacancy", str(spec), index, "", 0.0, big.positions[index]))
    for spec in substitute:
        site, sep, species = str(spec).partition("=")
        if not sep:
            raise InputError(f"substitution {spec!r} must look like SITE=ELEMENT, e.g. Mg1=Al:+3")
        index = _find_site(sc, site)
        element, charge = _parse_species(species, f"substitution {spec!r}")
        charge = _species_charge(element, charge, crystal, f"substitution {spec!r}")
        changes.append(("substitution", str(spec), index, element, charge, big.positions[index]))
    for spec in interstitial:
        where_text, sep, species = str(spec).partition("=")
        if not sep:
            raise InputError(f"interstitial {spec!r} must look like x,y,z=ELEMENT, e.g. 0.5,0.5,0.5=Li")
        frac = _parse_vector(where_text, f"interstitial {spec!r}: position")
        element, charge = _parse_species(species, f"interstitial {spec!r}")
        charge = _species_charge(element, charge, crystal, f"interstitial {spec!r}")
        position = frac @ crystal.cell
        distances = _distances_to_ions(big.cell, big.positions, position)
        j = int(np.argmin(distances))
        if distances[j] < max(crystal.min_distance, ON_ION_DISTANCE):
            raise InputError(f"{where}interstitial {spec!r} lies {distances[j]:.3f} Å from ion {big.labels[j]}, "
                             "on top of an existing ion")
        changes.append(("interstitial", str(spec), -1, element, charge, position))
    for kind, spec, index, *_ in changes:
        if index >= 0:
            if index in used:
                raise InputError(f"{where}defects {used[index]!r} and {spec!r} name the same site "
                                 f"{big.labels[index]} (#{index})")
            used[index] = spec
    inter = [c[5] for c in changes if c[0] == "interstitial"]
    for a in range(len(inter)):
        for b in range(a):
            if _periodic_distance(big.cell, wrapped_fractional(big.cell, inter[a][None])[0],
                                  wrapped_fractional(big.cell, inter[b][None])[0]) < max(big.min_distance, 1e-3):
                raise InputError(f"{where}two interstitials sit on the same place")

    # the defective supercell
    charges = np.array(big.charges, dtype=float)
    symbols = list(big.symbols)
    labels = list(big.labels)
    keep = np.ones(len(big), bool)
    for kind, spec, index, element, charge, position in changes:
        if kind == "vacancy":
            keep[index] = False
        elif kind == "substitution":
            charges[index] = charge
            symbols[index] = element
            labels[index] = f"{element}_{big.labels[index]}"
    added = [(c[3], c[4], c[5]) for c in changes if c[0] == "interstitial"]
    new_positions = np.concatenate([big.positions[keep]] + [np.array([p for _, _, p in added])] if added
                                   else [big.positions[keep]])
    new_charges = np.concatenate([charges[keep], np.array([q for _, q, _ in added])])
    new_symbols = [s for s, k in zip(symbols, keep) if k] + [e for e, _, _ in added]
    new_labels = [s for s, k in zip(labels, keep) if k] + [f"{e}_i" for e, _, _ in added]
    if not len(new_positions) or not np.any(new_charges != 0):
        raise InputError(f"{where}the defects leave no charged ion in the supercell")
    defective = Crystal(big.cell, new_positions, new_charges, new_symbols, new_labels,
                        source=big.source, min_distance=big.min_distance)
    old_index = np.concatenate([np.flatnonzero(keep), np.full(len(added), -1)])

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        perfect_result = ewald(big, tol=tol)
        defective_result = ewald(defective, tol=tol)

    # potentials of the perfect supercell at the defect positions (the ion itself left out)
    positions = np.array([c[5] for c in changes])
    exclude = np.array([c[2] for c in changes], dtype=np.int64)
    at = potential_at(big, positions, tol=tol, exclude=exclude)
    sites = []
    for (kind, spec, index, element, charge, position), phi in zip(changes, at.potentials):
        before = float(big.charges[index]) if index >= 0 else 0.0
        dq = float(charge) - before
        sites.append(DefectSite(
            kind=kind, spec=spec, label=big.labels[index] if index >= 0 else "", index=int(index),
            element_before=big.symbols[index] if index >= 0 else "", element_after=element,
            charge_before=before, charge_after=float(charge), delta_charge=dq, position=np.array(position),
            potential=float(phi), madelung_estimate=dq * float(phi)))

    delta = np.array([s.delta_charge for s in sites])
    defect_charge = float(delta.sum())
    # Ewald energy of the defect charges alone (images, mutual interaction, background)
    charged = np.abs(delta) > 0
    if charged.any():
        array = Crystal(big.cell, positions[charged], delta[charged], min_distance=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MadelungWarning)
            array_energy = ewald(array, tol=tol).energy
    else:
        array_energy = 0.0
    energy_change = defective_result.energy - perfect_result.energy
    estimate = float(sum(s.madelung_estimate for s in sites))
    residual = energy_change - (estimate + array_energy)

    image = 0.0
    screened = None
    if abs(defect_charge) > NEUTRAL_TOLERANCE:
        image = charged_cell_correction(big.cell, defect_charge, 1.0, tol=tol).energy
        if dielectric is not None:
            screened = charged_cell_correction(big.cell, defect_charge, dielectric, tol=tol)
    elif dielectric is not None:
        screened = charged_cell_correction(big.cell, 0.0, dielectric, tol=tol)

    # neighbours: remaining sites within the radius of any defect
    if not (isinstance(neighbour_radius, (int, float)) and neighbour_radius >= 0):
        raise InputError(f"neighbour radius must be a distance >= 0 Å, got {neighbour_radius!r}")
    nearest = np.full(len(defective), np.inf)
    for position in positions:
        nearest = np.minimum(nearest, _distances_to_ions(big.cell, defective.positions, position))
    neighbours = []
    for i in np.argsort(nearest, kind="stable"):
        if nearest[i] > neighbour_radius:
            break
        j = old_index[i]
        if j < 0:
            continue
        before = float(perfect_result.potentials[j])
        after = float(defective_result.potentials[i])
        neighbours.append(NeighbourChange(index=int(j), label=big.labels[j], element=big.symbols[j],
                                          distance=float(nearest[i]), potential_before=before,
                                          potential_after=after, change=after - before))
    return DefectResult(
        supercell=sc, defects=tuple(sites), perfect_energy=perfect_result.energy,
        defective_energy=defective_result.energy, energy_change=energy_change, defect_charge=defect_charge,
        background=bool(defective_result.background), madelung_estimate=estimate,
        defect_array_energy=float(array_energy), identity_residual=float(residual), image_correction=float(image),
        dielectric_correction=screened, neighbours=tuple(neighbours),
        error_estimate=perfect_result.error_estimate + defective_result.error_estimate,
        seconds=time.perf_counter() - started)


def vacancy_energy(crystal, site, **options) -> DefectResult:
    """One vacancy (see :func:`defect_energy` for the options)."""
    return defect_energy(crystal, vacancy=[site], **options)


def substitution_energy(crystal, site, species, **options) -> DefectResult:
    """One substitution ``site`` -> ``species`` (``"Al"`` or ``"Al:+3"``); see :func:`defect_energy`."""
    return defect_energy(crystal, substitute=[f"{site}={species}"], **options)


def interstitial_energy(crystal, fractional, species, **options) -> DefectResult:
    """One interstitial at parent fractional coordinates; see :func:`defect_energy`."""
    text = ",".join(repr(float(x)) for x in np.asarray(fractional, float).ravel())
    return defect_energy(crystal, interstitial=[f"{text}={species}"], **options)


@dataclass(frozen=True)
class DefectSeries:
    """The same defects in the supercells n x (a base supercell), with the 1/L extrapolation.

    Attributes
    ----------
    repeats : n of each supercell. lengths : V^(1/3), Å. results : DefectResult each.
    energy_changes : supercell energy changes, eV. corrected : energy change + image correction (eps = 1), eV.
    dilute_limit : intercept c of the least-squares fit energy_change = c + a / L, eV.
    slope : a, eV·Å. madelung_estimate : the dilute-limit estimate sum Dq phi, eV (the fit should find it).
    """

    repeats: tuple
    lengths: np.ndarray
    results: tuple
    energy_changes: np.ndarray
    corrected: np.ndarray
    dilute_limit: float
    slope: float
    madelung_estimate: float


def defect_series(crystal, repeats=(1, 2, 3), *, supercell=None, min_length=None, **defects) -> DefectSeries:
    """:func:`defect_energy` in the supercells n x base (base from ``supercell`` / ``min_length``,
    default the cell), and the fit E(L) = E_dilute + a / L of the uncorrected energy changes.

    For a charged defect the supercell energy falls off as the image term, which is exactly a / L
    for supercells of one shape in this model (Makov & Payne); the fitted E_dilute must match the
    Madelung-site-potential estimate, and the image-corrected values must not depend on L.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014.
    """
    repeats = _series_repeats(repeats)
    base = make_supercell(crystal, supercell, min_length).matrix
    defects.setdefault("neighbour_radius", 0.0)
    results = tuple(defect_energy(crystal, supercell=n * base, **defects) for n in repeats)
    lengths = np.array([r.supercell.crystal.volume ** (1.0 / 3.0) for r in results])
    changes = np.array([r.energy_change for r in results])
    corrected = np.array([r.energy_change + r.image_correction for r in results])
    design = np.stack([np.ones_like(lengths), 1.0 / lengths], axis=1)
    (limit, slope), *_ = np.linalg.lstsq(design, changes, rcond=None)
    return DefectSeries(repeats=repeats, lengths=lengths, results=results, energy_changes=changes,
                        corrected=corrected, dilute_limit=float(limit), slope=float(slope),
                        madelung_estimate=results[0].madelung_estimate)


@dataclass(frozen=True)
class VacancyRow:
    """One inequivalent site in a vacancy ranking.

    ``potential`` is the site potential (V) of the perfect crystal; ``madelung_estimate`` = -q phi (eV),
    the dilute-limit electrostatic cost of removing the ion to infinity; ``supercell_energy`` the
    direct supercell energy change (eV, neutralizing background) when a supercell was asked for.
    """

    label: str
    element: str
    charge: float
    index: int
    multiplicity: int
    potential: float
    madelung_estimate: float
    supercell_energy: float | None
    image_term: float | None


@dataclass(frozen=True)
class VacancyRanking:
    """Inequivalent sites ranked by the Madelung-site-potential estimate of their vacancy (cheapest first)."""

    rows: tuple
    species: str
    supercell: Supercell | None
    error_estimate: float


def vacancy_ranking(crystal, species="anions", *, supercell=None, min_length=None, tol=1e-10, symprec=1e-3):
    """Rank the symmetry-inequivalent sites of a species by vacancy electrostatics.

    Parameters
    ----------
    crystal : Crystal
    species : str
        ``"anions"``, ``"cations"``, an element symbol or a site label.
    supercell, min_length : optional
        Also compute each vacancy directly in this supercell (neutralizing background).
    tol, symprec : accuracy of the sums; spglib tolerance for equivalent sites.

    Returns
    -------
    VacancyRanking

    References
    ----------
    E. Madelung, Phys. Z. 19 (1918) 524 (site potentials); G. Makov and M. C. Payne,
    Phys. Rev. B 51 (1995) 4014 (the image term of the supercell values).
    """
    from . import ewald

    charges = np.asarray(crystal.charges)
    if species == "anions":
        chosen = charges < 0
    elif species == "cations":
        chosen = charges > 0
    else:
        chosen = np.array([lab == species or sym == species for lab, sym in zip(crystal.labels, crystal.symbols)])
    if not chosen.any():
        raise InputError(f"{_where(crystal)}no site matches {species!r} (labels: "
                         f"{', '.join(dict.fromkeys(crystal.labels))})")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        bulk = ewald(crystal, tol=tol)
    equivalent = equivalent_sites(crystal, symprec)
    rows = []
    sc = make_supercell(crystal, supercell, min_length) if (supercell is not None or min_length is not None) else None
    for rep in dict.fromkeys(int(equivalent[i]) for i in np.flatnonzero(chosen)):
        q = float(charges[rep])
        phi = float(bulk.potentials[rep])
        energy = image = None
        if sc is not None:
            result = defect_energy(crystal, vacancy=[f"#{rep}"], supercell=sc.matrix, tol=tol, neighbour_radius=0)
            energy = result.energy_change
            image = result.defect_array_energy
        rows.append(VacancyRow(label=crystal.labels[rep], element=crystal.symbols[rep], charge=q, index=rep,
                               multiplicity=int(np.sum(equivalent == rep)), potential=phi,
                               madelung_estimate=-q * phi, supercell_energy=energy, image_term=image))
    rows.sort(key=lambda r: r.madelung_estimate)
    return VacancyRanking(rows=tuple(rows), species=str(species), supercell=sc, error_estimate=bulk.error_estimate)


# =====================================================================================
# charged-supercell correction
# =====================================================================================

@dataclass(frozen=True)
class ChargedCellCorrection:
    """Point-charge image correction of a charge q in a periodic supercell with dielectric screening.

    Attributes
    ----------
    energy : correction to add to the supercell energy, eV: -(q^2 / 2) k_e v_M (positive for a
        charged defect; for a cube, q^2 alpha_M k_e / (2 eps L)).
    charge : q, e. dielectric : (3, 3) tensor used.
    madelung_potential : k_e v_M, the potential of the screened periodic point-charge array with its
        background at the charge's own site (its own 1/r left out), V per e.
    cell : (3, 3) supercell, Å. length : V^(1/3), Å.
    effective_constant : 2 L E / (k_e q^2) with L = V^(1/3) (the Madelung-type constant over eps;
        equals alpha_M / eps for a simple cubic cell), or nan for q = 0.
    alpha, real_cutoff, reciprocal_cutoff : splitting parameter and cutoffs (in the metric of eps).
    real_terms, k_vectors : terms summed.
    error_estimate : predicted error of ``energy``, eV.
    """

    energy: float
    charge: float
    dielectric: np.ndarray
    madelung_potential: float
    cell: np.ndarray
    length: float
    effective_constant: float
    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    real_terms: int
    k_vectors: int
    error_estimate: float


def dielectric_tensor(value, source=None):
    """A validated dielectric tensor (3, 3) from a number, three diagonal numbers or nine numbers."""
    where = f"{source}: " if source else ""
    try:
        array = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{where}dielectric constant must be numbers, got {value!r}") from None
    if array.size == 1:
        array = float(array.ravel()[0]) * np.eye(3)
    elif array.size == 3:
        array = np.diag(array.ravel())
    elif array.size == 9:
        array = array.reshape(3, 3)
    else:
        raise InputError(f"{where}dielectric tensor needs 1, 3 (diagonal) or 9 numbers, got {array.size}")
    if not np.all(np.isfinite(array)):
        raise InputError(f"{where}dielectric tensor contains a non-finite number")
    scale = float(np.max(np.abs(array)))
    if scale == 0 or abs(np.linalg.det(array)) <= 1e-12 * scale ** 3:
        raise InputError(f"{where}dielectric tensor is singular (determinant {np.linalg.det(array):.3g})")
    if np.max(np.abs(array - array.T)) > 1e-6 * scale:
        raise InputError(f"{where}dielectric tensor is not symmetric")
    array = 0.5 * (array + array.T)
    eigenvalues = np.linalg.eigvalsh(array)
    if eigenvalues.min() <= 0:
        raise InputError(f"{where}dielectric tensor is not positive definite (eigenvalues "
                         f"{', '.join(f'{e:.4g}' for e in eigenvalues)})")
    return array


def read_dielectric_tensor(path):
    """Read 1, 3 or 9 numbers (whitespace or commas; '#' comments) from a text file."""
    import os

    path = os.fspath(path)
    if not os.path.isfile(path):
        raise InputError(f"{path}: no such file")
    numbers = []
    with open(path, encoding="utf-8") as handle:
        for line in handle:
            line = line.split("#", 1)[0]
            for token in re.split(r"[,\s]+", line.strip()):
                if token:
                    try:
                        numbers.append(float(token))
                    except ValueError:
                        raise InputError(f"{path}: {token!r} is not a number") from None
    return dielectric_tensor(numbers, source=path)


def charged_cell_correction(cell, charge, dielectric=1.0, *, tol=1e-10) -> ChargedCellCorrection:
    """Image correction of a point charge in a periodic cell with a scalar or tensor dielectric constant.

    Parameters
    ----------
    cell : (3, 3) array_like, or Crystal, or Supercell
        The (super)cell, rows are lattice vectors, Å; any shape.
    charge : float
        Defect charge q, e.
    dielectric : float, three numbers or (3, 3)
        Scalar dielectric constant, diagonal or full symmetric positive-definite tensor.
    tol : float
        Relative accuracy of the lattice sum.

    Returns
    -------
    ChargedCellCorrection

    Notes
    -----
    The anisotropic Madelung potential of the array of point charges with a neutralizing
    background, screened by eps (Rurali & Cartoixà; Kumagai & Oba), is

        v_M = sum_{n != 0} erfc(alpha s_n) / (sqrt(det eps) s_n)
              + (4 pi / V) sum_{k != 0} exp(-k.eps.k / 4 alpha^2) / (k.eps.k)
              - pi / (V alpha^2) - 2 alpha / (sqrt(pi) sqrt(det eps)),   s_n = sqrt(n.eps^-1.n),

    and the correction is E = -(q^2 / 2) k_e v_M. For eps = e I it is 1/e times the vacuum
    value, and for a cube of side L it is the Makov–Payne q^2 alpha_M / (2 e L). The splitting
    parameter and cutoffs are chosen for the isotropic sum of the lattice eps^-1/2 n, which is the
    same sum in other coordinates.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014.
    R. Rurali and X. Cartoixà, Nano Lett. 9 (2009) 975.
    Y. Kumagai and F. Oba, Phys. Rev. B 89 (2014) 195205.
    """
    if isinstance(cell, Supercell):
        cell = cell.crystal.cell
    elif isinstance(cell, Crystal):
        cell = cell.cell
    try:
        cell = np.array(cell, dtype=float)
    except (TypeError, ValueError):
        raise InputError("cell must be a 3x3 matrix of numbers (Å)") from None
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)):
        raise InputError(f"cell must be a finite 3x3 matrix (rows are lattice vectors), got shape {cell.shape}")
    volume = abs(float(np.linalg.det(cell)))
    if volume < 1e-6 * float(np.prod(np.linalg.norm(cell, axis=1))) or volume < 1e-8:
        raise InputError(f"the cell is degenerate (volume {volume:.3g} Å^3)")
    try:
        charge = float(charge)
    except (TypeError, ValueError):
        raise InputError(f"charge must be a number of e, got {charge!r}") from None
    if not math.isfinite(charge):
        raise InputError("charge must be finite")
    eps = dielectric_tensor(dielectric)
    k_e = COULOMB_CONSTANT
    det = float(np.linalg.det(eps))
    root_det = math.sqrt(det)
    values, vectors = np.linalg.eigh(eps)
    inverse = np.ascontiguousarray(np.linalg.inv(eps))
    inverse_root = vectors @ np.diag(values ** -0.5) @ vectors.T

    # the lattice sums run in the reduced basis (the same lattice, well-shaped image boxes);
    # tuning in the coordinates where the sum is isotropic
    sum_cell, _ = reduced_basis(cell)
    scaled = sum_cell @ inverse_root
    # one unit charge in the scaled cell: the plan's splitting parameter and cutoffs
    choice = plan_sum(scaled, np.zeros((1, 3)), np.ones(1), tol=tol, method="direct")
    a = choice.alpha

    # real space: s_n < r_cut needs |n| < r_cut sqrt(max eigenvalue)
    reach = choice.real_cutoff * math.sqrt(values.max())
    nmax = np.ceil(reach / plane_spacings(sum_cell)).astype(np.int64)
    real_sum, real_terms = point_kernels.anisotropic_real_space_sum(
        np.ascontiguousarray(sum_cell), inverse, a, choice.real_cutoff, nmax)
    # reciprocal space: k.eps.k <= k_cut^2 needs |k| <= k_cut / sqrt(min eigenvalue)
    _, kvectors, _ = reciprocal_vectors(sum_cell, choice.reciprocal_cutoff / math.sqrt(values.min()))
    kek = np.einsum("mi,ij,mj->m", kvectors, eps, kvectors)
    inside = kek <= choice.reciprocal_cutoff ** 2
    kek = kek[inside]
    reciprocal_sum = 2.0 * (4.0 * math.pi / volume) * float(np.sum(np.exp(-kek / (4.0 * a * a)) / kek))
    v_m = (real_sum / root_det + reciprocal_sum - math.pi / (volume * a * a)
           - 2.0 * a / (math.sqrt(math.pi) * root_det))
    energy = -0.5 * charge * charge * k_e * v_m
    length = volume ** (1.0 / 3.0)
    constant = 2.0 * length * energy / (k_e * charge * charge) if charge != 0 else float("nan")
    # the tuning's error is for sum q^2 = 1 in the scaled frame; the sum scales by 1/sqrt(det eps)
    error = charge * charge * choice.error_estimate / root_det
    return ChargedCellCorrection(
        energy=float(energy), charge=charge, dielectric=eps, madelung_potential=float(k_e * v_m), cell=cell,
        length=float(length), effective_constant=float(constant), alpha=float(a), real_cutoff=choice.real_cutoff,
        reciprocal_cutoff=choice.reciprocal_cutoff, real_terms=int(real_terms), k_vectors=int(inside.sum()),
        error_estimate=float(error))


def _series_repeats(repeats):
    repeats = tuple(int(n) for n in repeats)
    if len(repeats) < 2 or min(repeats) < 1 or len(set(repeats)) != len(repeats):
        raise InputError(f"the series needs at least two different positive repeats, got {list(repeats)}")
    return repeats


@dataclass(frozen=True)
class CorrectionSeries:
    """The correction over the supercells n x (the given cell), with its 1/L check.

    Attributes
    ----------
    repeats : the n of each cell. lengths : V^(1/3) of each, Å. corrections : ChargedCellCorrection each.
    energies : their energies, eV. slope : least-squares a in E = a / L + c, eV·Å; intercept : c, eV
        (zero for a point-charge image energy, which falls exactly as 1/L for cells of one shape).
    spread : largest relative deviation of E·L from its mean.
    """

    repeats: tuple
    lengths: np.ndarray
    corrections: tuple
    energies: np.ndarray
    slope: float
    intercept: float
    spread: float


def correction_series(cell, charge, dielectric=1.0, repeats=(1, 2, 3, 4), *, tol=1e-10) -> CorrectionSeries:
    """:func:`charged_cell_correction` for the cells n x ``cell`` (n in ``repeats``), with the 1/L fit.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (the 1/L law of the image energy).
    """
    if isinstance(cell, Supercell):
        cell = cell.crystal.cell
    elif isinstance(cell, Crystal):
        cell = cell.cell
    repeats = _series_repeats(repeats)
    cell = np.asarray(cell, float)
    corrections = tuple(charged_cell_correction(n * cell, charge, dielectric, tol=tol) for n in repeats)
    lengths = np.array([c.length for c in corrections])
    energies = np.array([c.energy for c in corrections])
    design = np.stack([1.0 / lengths, np.ones_like(lengths)], axis=1)
    (slope, intercept), *_ = np.linalg.lstsq(design, energies, rcond=None)
    products = energies * lengths
    mean = float(np.mean(products))
    spread = float(np.max(np.abs(products - mean)) / abs(mean)) if mean != 0 else 0.0
    return CorrectionSeries(repeats=repeats, lengths=lengths, corrections=corrections, energies=energies,
                            slope=float(slope), intercept=float(intercept), spread=spread)


# =====================================================================================
# plane sections and file output of grids
# =====================================================================================

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


def parse_miller(text):
    """``"001"``, ``"1-10"`` or ``"1,1,0"`` into three integers."""
    text = str(text).strip()
    if "," in text or " " in text:
        parts = [p for p in re.split(r"[,\s]+", text) if p]
    else:
        parts = re.findall(r"-?\d", text)
    try:
        miller = tuple(int(p) for p in parts)
    except ValueError:
        miller = ()
    if len(miller) != 3 or miller == (0, 0, 0):
        raise InputError(f"plane {text!r} must be three Miller indices such as 001, 110 or 1,-1,0")
    return miller


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


def plane_section(crystal, plane="001", offset=0.5, *, spacing=0.1, smearing=0.3, tol=1e-8, thickness=0.5):
    """The potential on the lattice plane h f1 + k f2 + l f3 = offset, sampled on a mesh of
    step ``spacing`` Å over the parallelogram of its two shortest in-plane lattice vectors."""
    miller = parse_miller(plane) if not isinstance(plane, tuple) else plane
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


def write_cube(path, grid: PotentialGrid):
    """Write a potential grid as a Gaussian cube file (values in V; positions converted by ASE)."""
    import ase.io

    atoms = grid.crystal.to_ase()
    try:
        ase.io.write(str(path), atoms, format="cube", data=np.asarray(grid.values))
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({exc.strerror or exc})") from None


def write_plane_png(path, section: PlaneSection, title=""):
    """Heat map of a plane section with the ions in the plane marked (matplotlib, Agg)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    u, v = section.u, section.v
    lu = np.linalg.norm(u)
    ex = u / lu
    vx, vy = float(v @ ex), float(np.linalg.norm(v - (v @ ex) * ex))
    n_u, n_v = section.values.shape
    s, t = np.meshgrid(np.arange(n_u + 1) / n_u, np.arange(n_v + 1) / n_v, indexing="ij")
    s0, t0 = s - 0.5 / n_u, t - 0.5 / n_v
    x = s0 * lu + t0 * vx
    y = t0 * vy
    limit = float(np.percentile(np.abs(section.values), 98)) or 1.0
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    mesh = ax.pcolormesh(x, y, section.values, cmap="PuOr_r", vmin=-limit, vmax=limit, shading="flat")
    fig.colorbar(mesh, ax=ax, label="potential / V")
    for st0, st1, label, q, _ in section.atoms:
        px, py = st0 * lu + st1 * vx, st1 * vy
        ax.plot(px, py, marker="+" if q > 0 else "o", color="black", markersize=8, mfc="none")
        ax.annotate(label, (px, py), textcoords="offset points", xytext=(4, 4), fontsize=7)
    ax.set_aspect("equal")
    ax.set_xlabel("Å along u")
    ax.set_ylabel("Å")
    h, k, l = section.miller
    ax.set_title(title or f"potential on ({h} {k} {l}) at offset {section.offset:g}"
                 + (f", ions smeared {section.smearing:g} Å" if section.smearing else ""), fontsize=9)
    try:
        fig.savefig(str(path), dpi=120, bbox_inches="tight")
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({exc.strerror or exc})") from None
    finally:
        plt.close(fig)
