"""Candidate interstitial positions for a probe charge: grid minima of electrostatics plus a contact term, refined."""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass

import numpy as np

from ...structure.elements import shannon_radius
from ...errors import InputError
from ...sums._kernels import point_kernels
from ...sums.geometry import build_bins, EXAMINED_PAIR_NS, thread_budget, wrapped_fractional
from .grids import grid_fractional, grid_shape
from .points import _point_bins, _PointSum, _where
from ...defaults import SCREENING_TOL, SYMMETRY_TOLERANCE

#: Born–Mayer contact term of the interstitial probe: E = b exp((R_ion + R_probe - d) / rho).
#: b = 0.338e-19 J = 0.211 eV and rho = 0.33 Å are the Tosi–Fumi values for the alkali halides
#: (M. P. Tosi and F. G. Fumi, J. Phys. Chem. Solids 25 (1964) 45; from memory).
CONTACT_PREFACTOR = 0.211


CONTACT_SOFTNESS = 0.33


#: Grid points nearer than this to an ion (Å) are not evaluated in the interstitial search.
NEAR_ION_GRID_DISTANCE = 0.1


#: Default probe radius, Å (about a small monovalent cation; Shannon's Li+ in VI is 0.76 Å).
DEFAULT_PROBE_RADIUS = 0.76


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


def _spglib_cell(crystal):
    kinds = {}
    types = [kinds.setdefault((s, round(float(q), 6)), len(kinds) + 1)
             for s, q in zip(crystal.symbols, crystal.charges)]
    return (np.asarray(crystal.cell, float), wrapped_fractional(crystal.cell, crystal.positions),
            np.array(types, dtype=int))


def _symmetry_operations(crystal, symmetry_tolerance):
    import spglib

    with warnings.catch_warnings():  # spglib 2.x warns about its error-handling switch on every call
        warnings.simplefilter("ignore", DeprecationWarning)
        data = spglib.get_symmetry(_spglib_cell(crystal), symprec=symmetry_tolerance)
    if data is None:
        return np.eye(3, dtype=int)[None], np.zeros((1, 3))
    return np.asarray(data["rotations"]), np.asarray(data["translations"])


def equivalent_sites(crystal, symmetry_tolerance=SYMMETRY_TOLERANCE):
    """For each ion, the index of the first ion symmetry-equivalent to it (spglib)."""
    import spglib

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        dataset = spglib.get_symmetry_dataset(_spglib_cell(crystal), symprec=symmetry_tolerance)
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

    def to_dict(self) -> dict:
        """JSON-ready; position Å, potential V, energies eV, distance Å."""
        return {"fractional": np.asarray(self.fractional).tolist(),
                "position_angstrom": np.asarray(self.position).tolist(),
                "potential_V": self.potential, "electrostatic_energy_eV": self.electrostatic_energy,
                "contact_energy_eV": self.contact_energy, "total_energy_eV": self.total_energy,
                "nearest_ion": self.nearest_label, "nearest_distance_angstrom": self.nearest_distance,
                "multiplicity": self.multiplicity}


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

    def to_dict(self) -> dict:
        """JSON-ready: the probe (charge e, radius Å), the ion radii Å, the search's counts, the
        candidate sites and the potentials' error estimate V."""
        return {"probe_charge_e": self.probe, "probe_radius_angstrom": self.probe_radius,
                "radii_angstrom": dict(self.radii), "clearance": self.clearance, "grid_shape": list(self.grid_shape),
                "grid_minima": self.grid_minima, "rejected": self.rejected,
                "sites": [site.to_dict() for site in self.sites], "error_estimate_V": self.error_estimate}


def ion_radii(crystal, radii=None):
    """Radius of every ion (Å): from ``radii`` (map by site label or element), else Shannon's
    effective ionic radius for the element and its (integer) charge."""
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
                       clearance=0.75, tol=SCREENING_TOL, symmetry_tolerance=SYMMETRY_TOLERANCE, merge_distance=0.25, box=0.6):
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
    symmetry_tolerance : float
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
    rotations, translations = _symmetry_operations(crystal, symmetry_tolerance)
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
