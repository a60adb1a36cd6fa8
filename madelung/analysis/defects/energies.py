"""Vacancies, substitutions and interstitials in a supercell: unrelaxed electrostatic energy changes
and the change of neighbouring site potentials; defect series over growing supercells.

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
background, image energy q^2 alpha / 2 eps L; the correction itself is in :mod:`.corrections`).
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ...structure.crystal import Crystal
from ...structure.elements import common_oxidation_states, is_element
from ...errors import InputError, MadelungWarning
from ...sums.dispatch import ewald
from ...sums.geometry import wrapped_fractional
from ...sums.plan import NEUTRAL_TOLERANCE
from .corrections import _series_repeats, charged_cell_correction
from .interstitials import _distances_to_ions, _periodic_distance
from .points import _where, ON_ION_DISTANCE, potential_at
from ...structure.supercells import tile_supercell, Supercell
from ...defaults import SUM_TOL

@dataclass(frozen=True)
class DefectSite:
    """One defect of a defect calculation.

    Attributes
    ----------
    kind : "vacancy", "substitution" or "interstitial".
    spec : how the defect was asked for, as text (e.g. "O1", "O1@0.5,0.5,0.5", "#3", "Mg1=Al:+3",
        "0.5,0.5,0.5=Li").
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

    def to_dict(self) -> dict:
        """JSON-ready; charges e, position Å, potential V, estimate eV."""
        return {"kind": self.kind, "spec": self.spec, "label": self.label, "index": self.index,
                "element_before": self.element_before, "element_after": self.element_after,
                "charge_before_e": self.charge_before, "charge_after_e": self.charge_after,
                "delta_charge_e": self.delta_charge, "position_angstrom": np.asarray(self.position).tolist(),
                "potential_V": self.potential, "madelung_estimate_eV": self.madelung_estimate}


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

    def to_dict(self) -> dict:
        """JSON-ready; distance Å, potentials V."""
        return {"index": self.index, "label": self.label, "distance_angstrom": self.distance,
                "potential_before_V": self.potential_before, "potential_after_V": self.potential_after,
                "change_V": self.change}


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

    @property
    def compensation(self) -> str:
        """How the defects' charge is compensated, in words."""
        return ("uniform neutralizing background (the defects carry a net charge)" if self.background
                else "none needed (the defects are neutral overall)")

    def to_dict(self) -> dict:
        """JSON-ready: the supercell (its repeats in words, matrix, ions, volume Å^3), the defects,
        the energies eV, the charge e, the corrections eV, the neighbours' potential changes V."""
        sc = self.supercell
        return {
            "supercell": sc.describe(), "supercell_matrix": np.asarray(sc.matrix).tolist(),
            "supercell_ions": len(sc.crystal), "supercell_volume_angstrom3": sc.crystal.volume,
            "defects": [d.to_dict() for d in self.defects],
            "perfect_energy_eV": self.perfect_energy, "defective_energy_eV": self.defective_energy,
            "energy_change_eV": self.energy_change, "defect_charge_e": self.defect_charge,
            "charge_compensation": self.compensation, "madelung_estimate_eV": self.madelung_estimate,
            "defect_array_energy_eV": self.defect_array_energy, "identity_residual_eV": self.identity_residual,
            "image_correction_vacuum_eV": self.image_correction,
            "energy_change_plus_image_correction_eV": self.energy_change + self.image_correction,
            "dielectric_correction_eV": None if self.dielectric_correction is None
            else self.dielectric_correction.energy,
            "neighbours": [n.to_dict() for n in self.neighbours],
            "error_estimate_eV": self.error_estimate,
            "sign_convention": "energy change = E(defective supercell) - E(perfect supercell); removed ions go to "
                               "infinity, added ions come from infinity",
        }


def _fractional_point(value, what):
    try:
        point = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        point = np.zeros(0)
    if isinstance(value, str) or point.shape != (3,) or not np.all(np.isfinite(point)):
        raise InputError(f"{what} {value!r} must be three fractional coordinates, e.g. (0.5, 0.5, 0.5)")
    return point


def _site_text(site):
    """How a site is named in the output: ``O1``, ``O1@0.5,0.5,0.5`` or ``#INDEX``."""
    if isinstance(site, (int, np.integer)) and not isinstance(site, bool):
        return f"#{int(site)}"
    if isinstance(site, tuple):
        return f"{site[0]}@{','.join(f'{float(x):g}' for x in site[1])}"
    return str(site)


def _species_text(element, charge):
    return element if charge is None else f"{element}:{float(charge):+g}"


def _find_site(supercell: Supercell, site):
    """Supercell index of ``site``: an int (the supercell index), a site label or element (its copy
    in the first cell), or ``(label, fractional point)`` (the copy nearest that point, in fractional
    coordinates of the parent cell, as interstitial positions are: the same point in every
    supercell of a series)."""
    crystal = supercell.crystal
    if isinstance(site, (int, np.integer)) and not isinstance(site, bool):
        index = int(site)
        if not 0 <= index < len(crystal):
            raise InputError(f"site #{index}: the supercell has sites #0..#{len(crystal) - 1}")
        return index
    at = None
    if isinstance(site, tuple) and len(site) == 2 and isinstance(site[0], str):
        label, at = site[0].strip(), _fractional_point(site[1], f"site {site[0]!r}: position")
    elif isinstance(site, str) and site.strip():
        label = site.strip()
    else:
        raise InputError(f"site {site!r} not understood; give a site label, (label, fractional point) or an index")
    candidates = [i for i, lab in enumerate(crystal.labels) if lab == label]
    if not candidates:
        candidates = [i for i, sym in enumerate(crystal.symbols) if sym == label]
    if not candidates:
        known = ", ".join(dict.fromkeys(supercell.parent.labels))
        raise InputError(f"{_where(crystal)}site label {label!r} does not exist (labels: {known})")
    if at is None:
        return candidates[0]
    target = at @ supercell.parent.cell
    frac = wrapped_fractional(crystal.cell, crystal.positions[candidates])
    distance = _periodic_distance(crystal.cell, frac, wrapped_fractional(crystal.cell, target[None])[0])
    return candidates[int(np.argmin(distance))]


def _species(value, what):
    """``"Al"`` or ``("Al", 3)`` into (element, charge or None)."""
    element, charge = (value, None) if isinstance(value, str) else tuple(value) if \
        isinstance(value, (tuple, list)) and len(value) == 2 else (None, None)
    if not isinstance(element, str) or not element.strip():
        raise InputError(f"{what}: the new species {value!r} must be an element, or (element, charge)")
    if charge is not None:
        try:
            charge = float(charge)
        except (TypeError, ValueError):
            raise InputError(f"{what}: charge {charge!r} is not a number") from None
        if not math.isfinite(charge):
            raise InputError(f"{what}: charge {charge!r} is not a finite number")
    return element.strip(), charge


def _species_charge(element, charge, crystal, what):
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


def defect_energy(crystal, *, vacancy=(), substitute=(), interstitial=(), supercell=None, smallest_plane_spacing=None,
                  tol=SUM_TOL, neighbour_radius=3.5, dielectric=None) -> DefectResult:
    """Unrelaxed electrostatic energy of point defects in a supercell, and the change of the site
    potentials round them.

    Parameters
    ----------
    crystal : Crystal
        The perfect crystal (its cell is the parent cell).
    vacancy : sequence of sites
        Sites to empty. A site is a label or element (``"O1"``: its copy in the first cell),
        ``(label, (x, y, z))`` (the copy nearest a fractional point of the parent cell) or an int
        (supercell index). One site alone may be given without a list.
    substitute : mapping of site to species
        ``{site: element}`` or ``{site: (element, charge)}`` (e.g. ``{"Mg1": ("Al", 3)}``); without a
        charge the element's charge in the crystal, or its only common oxidation state, is used.
    interstitial : sequence of (fractional point, element) or (fractional point, element, charge)
        Ions to add at fractional coordinates of the parent cell, e.g. ``[((0.5, 0.5, 0.5), "Li")]``.
    supercell : int, three ints or (3, 3) ints, optional
        Repeats such as ``(3, 3, 3)`` or a matrix; or give ``smallest_plane_spacing`` (Å) for the smallest
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
    (e.g. a Schottky pair ``vacancy=["Mg1", ("O1", (0.5, 0.5, 0.5))]``). The energy change obeys
    Delta E = sum_d Dq_d phi(r_d) + E_Ewald(defect charges) exactly (module docstring); the
    result carries the residual of that identity as a check.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (charged supercells, image energy).
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    started = time.perf_counter()
    single = (str, int, np.integer)
    vacancy = [vacancy] if isinstance(vacancy, single) else list(vacancy or ())
    if substitute and not isinstance(substitute, Mapping):
        raise InputError("substitutions must be a mapping of site to new species, e.g. {\"Mg1\": (\"Al\", 3)}")
    substitute = dict(substitute or {})
    interstitial = list(interstitial or ())
    if not (vacancy or substitute or interstitial):
        raise InputError("no defect given: name a vacancy, a substitution or an interstitial")
    sc = tile_supercell(crystal, supercell, smallest_plane_spacing)
    big = sc.crystal
    where = _where(crystal)

    changes = []  # (kind, spec, index, new element, new charge, position)
    used = {}
    for site in vacancy:
        index = _find_site(sc, site)
        changes.append(("vacancy", _site_text(site), index, "", 0.0, big.positions[index]))
    for site, value in substitute.items():
        element, charge = _species(value, f"substitution of {_site_text(site)}")
        spec = f"{_site_text(site)}={_species_text(element, charge)}"
        index = _find_site(sc, site)
        charge = _species_charge(element, charge, crystal, f"substitution {spec!r}")
        changes.append(("substitution", spec, index, element, charge, big.positions[index]))
    for entry in interstitial:
        if not isinstance(entry, (tuple, list)) or len(entry) not in (2, 3):
            raise InputError(f"interstitial {entry!r} must be (fractional point, element) or "
                             "(fractional point, element, charge)")
        frac = _fractional_point(entry[0], "interstitial position")
        element, charge = _species(tuple(entry[1:]) if len(entry) == 3 else entry[1], "interstitial")
        spec = f"{','.join(f'{x:g}' for x in frac)}={_species_text(element, charge)}"
        charge = _species_charge(element, charge, crystal, f"interstitial {spec!r}")
        position = frac @ crystal.cell
        distances = _distances_to_ions(big.cell, big.positions, position)
        j = int(np.argmin(distances))
        if distances[j] < max(crystal.min_distance, ON_ION_DISTANCE):
            raise InputError(f"{where}interstitial {spec!r} lies {distances[j]:.3f} Å from ion {big.labels[j]}, "
                             "on top of an existing ion")
        changes.append(("interstitial", spec, -1, element, charge, position))
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
    """One vacancy (see :func:`defect_energy` for sites and options)."""
    return defect_energy(crystal, vacancy=[site], **options)


def substitution_energy(crystal, site, element, charge=None, **options) -> DefectResult:
    """One substitution of the ion on ``site`` by ``element`` (with ``charge``, e, or the default of
    :func:`defect_energy`)."""
    return defect_energy(crystal, substitute={site: (element, charge)}, **options)


def interstitial_energy(crystal, fractional, element, charge=None, **options) -> DefectResult:
    """One interstitial ``element`` (with ``charge``, e) at parent fractional coordinates; see
    :func:`defect_energy`."""
    return defect_energy(crystal, interstitial=[(fractional, element, charge)], **options)


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

    def to_dict(self) -> dict:
        """JSON-ready: repeats, lengths Å, energy changes and image-corrected values eV, the fit's
        dilute limit eV and slope eV Å, and the Madelung-site-potential estimate eV."""
        return {"repeats": list(self.repeats), "lengths_angstrom": np.asarray(self.lengths).tolist(),
                "energy_changes_eV": np.asarray(self.energy_changes).tolist(),
                "corrected_eV": np.asarray(self.corrected).tolist(), "fit_dilute_limit_eV": self.dilute_limit,
                "fit_slope_eV_angstrom": self.slope, "madelung_estimate_eV": self.madelung_estimate}


def defect_series(crystal, repeats=(1, 2, 3), *, supercell=None, smallest_plane_spacing=None, **defects) -> DefectSeries:
    """:func:`defect_energy` in the supercells n x base (base from ``supercell`` / ``smallest_plane_spacing``,
    default the cell), and the fit E(L) = E_dilute + a / L of the uncorrected energy changes.

    For a charged defect the supercell energy falls off as the image term, which is exactly a / L
    for supercells of one shape in this model (Makov & Payne); the fitted E_dilute must match the
    Madelung-site-potential estimate, and the image-corrected values must not depend on L.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014.
    """
    repeats = _series_repeats(repeats)
    base = tile_supercell(crystal, supercell, smallest_plane_spacing).matrix
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
