"""Partial charges by charge equilibration (electronegativity equalization) in the periodic cell.

The energy of the charges q_i is modelled as

    E(q) = sum_i (chi_i q_i + 1/2 J_i q_i^2) + 1/2 sum_{i, j} q_i C_ij q_j,

with chi_i the electronegativity and J_i the hardness (the self-Coulomb term) of the atom, and
C the periodic interaction between different sites and between a site and its own images.
Minimising E at fixed total charge Q makes every site's chemical potential
chi_i + J_i q_i + sum_j C_ij q_j equal to one value mu: one linear system,

    [ H    -1 ] [ q  ]   [ -chi ]
    [ 1^T   0 ] [ mu ] = [  Q   ],    H = C + diag(J).

Element parameters (Mulliken): chi = (I + A) / 2 and J = I - A from the first ionisation energy
I and the electron affinity A (R. S. Mulliken, J. Chem. Phys. 2 (1934) 782; the pair chi, J is
the one Rappé and Goddard start from). I and A come from the periodic-table library
(:mod:`madelung.structure.elements`); an element without a bound anion gets A = 0.

Interaction kernels
-------------------
``"gaussian"`` (default): each charge is a spherical Gaussian whose self-energy equals its
hardness, width sigma_i = k_e / (sqrt(pi) J_i); two such charges interact as
k_e erf(r / sqrt(2 (sigma_i^2 + sigma_j^2))) / r, which tends to k_e / r at long range and
stays finite at short range (the role of Rappé and Goddard's Slater-orbital shielding). In the
periodic cell, C = (Ewald point-charge matrix) - k_e sum_n erfc(r / s_ij) / r, the correction
being short-ranged and summed over images in real space.
``"point"``: C is the Ewald point-charge matrix itself (Mortier's form). With Mulliken
hardnesses it is often unstable for compact ionic crystals (the attraction of neighbouring
point charges grows faster than the hardness); we detect that and refuse.

Dielectric screening
--------------------
With unscreened Mulliken parameters the periodic problem sits at or past its stability limit in
compact ionic solids (rock salt, fluorite, corundum): the curvature of E on the charge-transfer
mode nearly vanishes and the charges run far beyond the formal ones. As in the EQeq variant of
charge equilibration (C. E. Wilmer, K. C. Kim and R. Q. Snurr, J. Phys. Chem. Lett. 3 (2012)
2506; cited from memory), the inter-site interaction C is divided by a dielectric constant,
``dielectric`` (default :data:`DEFAULT_DIELECTRIC` = 2, our choice, not a fit). Give 1 for the
unscreened model; instabilities are detected and refused, and charges beyond an element's largest
formal state are warned about.

Limits: equilibrated charges are a model of charge transfer, typically smaller than formal
charges; they depend on the parameter set and kernel, and are not measured quantities.

References
----------
A. K. Rappé and W. A. Goddard III, J. Phys. Chem. 95 (1991) 3358 (charge equilibration).
W. J. Mortier, S. K. Ghosh and S. Shankar, J. Am. Chem. Soc. 108 (1986) 4315 (electronegativity
equalization).
R. S. Mulliken, J. Chem. Phys. 2 (1934) 782 (electronegativity from I and A).
D. M. York and W. Yang, J. Chem. Phys. 104 (1996) 159 (Gaussian charge densities in chemical-
potential equalization; cited from memory).
P. P. Ewald, Ann. Phys. 369 (1921) 253.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..structure import elements
from ..errors import InputError, MadelungWarning
from ..units import COULOMB_CONSTANT
from .bonds import bonded_pairs
from ..sums.matrix import coulomb_matrix, screened_pairs
from ..defaults import SCREENING_TOL

KERNELS = ("gaussian", "point")

#: Inter-site interaction divided by this relative permittivity (see the module docstring).
DEFAULT_DIELECTRIC = 2.0

#: The Gaussian-shielding correction erfc(r / s) / r is summed out to where erfc < 1e-15.
_ERFC_REACH = 5.9


@dataclass(frozen=True)
class EquilibrationResult:
    """Equilibrated charges of one crystal.

    Attributes
    ----------
    charges : (N,) site charges, e; they add up to ``total_charge``.
    total_charge : the fixed total, e.
    chemical_potential : the equalized electronegativity mu, eV.
    energy : model energy E(q) of the cell at the solution, eV (relative to neutral atoms).
    electronegativity : (N,) chi_i used, eV.
    hardness : (N,) J_i used, eV.
    kernel : ``"gaussian"`` or ``"point"``.
    dielectric : relative permittivity dividing the inter-site interaction.
    parameter_source : where chi and J came from.
    """

    charges: np.ndarray
    total_charge: float
    chemical_potential: float
    energy: float
    electronegativity: np.ndarray
    hardness: np.ndarray
    kernel: str
    dielectric: float
    parameter_source: str

    def to_dict(self) -> dict:
        """JSON-ready: the model (kernel, dielectric, parameters), the total charge e, the chemical
        potential and model energy eV, and per site the charges e, electronegativities and hardnesses eV."""
        return {"method": "charge equilibration", "kernel": self.kernel, "dielectric": self.dielectric,
                "total_charge_e": self.total_charge, "chemical_potential_eV": self.chemical_potential,
                "model_energy_eV": self.energy, "parameters": self.parameter_source,
                "charges_e": np.asarray(self.charges).tolist(),
                "electronegativity_eV": np.asarray(self.electronegativity).tolist(),
                "hardness_eV": np.asarray(self.hardness).tolist(),
                "note": "equilibrated charges are model estimates of charge transfer"}


def mulliken_parameters(element):
    """(chi, J) in eV from the first ionisation energy I and electron affinity A:
    chi = (I + A) / 2, J = I - A (Mulliken, J. Chem. Phys. 2 (1934) 782). A missing A counts as 0."""
    energies = elements.ionisation_energies(element)
    if 1 not in energies:
        raise InputError(f"no ionisation energy is tabulated for {element}; give equilibration parameters")
    ionisation = energies[1]
    affinity = elements.electron_affinity(element) or 0.0
    return 0.5 * (ionisation + affinity), ionisation - affinity


def equilibrate(crystal, total_charge=0.0, kernel="gaussian", parameters=None, dielectric=DEFAULT_DIELECTRIC,
                tol=SCREENING_TOL):
    """Charge equilibration in the periodic cell.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and species (its charges are ignored).
    total_charge : float
        Net charge of the cell, e (default 0).
    kernel : ``"gaussian"`` or ``"point"``
        Interaction between charges (see the module docstring).
    parameters : mapping, optional
        ``{element: (chi_eV, J_eV)}`` overriding the Mulliken values.
    dielectric : float
        Relative permittivity dividing the inter-site interaction (default 2; 1: unscreened).
    tol : float
        Accuracy of the Ewald matrix (relative, as in :func:`madelung.ewald`).

    Returns
    -------
    EquilibrationResult

    Notes
    -----
    Mixed or partly occupied sites take the occupancy-weighted mean of their species' chi and J
    (a virtual-crystal average). Builds the full N x N Coulomb matrix, so it is meant for cells
    of up to a few hundred sites (:data:`madelung.sums.matrix.MAX_MATRIX_SITES`).

    References
    ----------
    A. K. Rappé and W. A. Goddard III, J. Phys. Chem. 95 (1991) 3358.
    W. J. Mortier, S. K. Ghosh and S. Shankar, J. Am. Chem. Soc. 108 (1986) 4315.
    """
    where = f"{crystal.source}: " if crystal.source else ""
    if kernel not in KERNELS:
        raise InputError(f"equilibration kernel must be one of {', '.join(KERNELS)}, got {kernel!r}")
    try:
        total_charge = float(total_charge)
    except (TypeError, ValueError):
        raise InputError(f"total charge must be a number, got {total_charge!r}") from None
    if not math.isfinite(total_charge):
        raise InputError("total charge must be finite")
    try:
        dielectric = float(dielectric)
    except (TypeError, ValueError):
        raise InputError(f"dielectric constant must be a number, got {dielectric!r}") from None
    if not (math.isfinite(dielectric) and dielectric >= 1):
        raise InputError(f"dielectric constant must be at least 1, got {dielectric!r}")
    overrides = {}
    for key, value in (parameters or {}).items():
        try:
            chi, hard = (float(x) for x in value)
        except (TypeError, ValueError):
            raise InputError(f"equilibration parameters for {key} must be (chi, J) in eV") from None
        if not (math.isfinite(chi) and math.isfinite(hard) and hard > 0):
            raise InputError(f"equilibration parameters for {key}: J must be positive and both finite")
        overrides[str(key)] = (chi, hard)

    def params(element):
        if element in overrides:
            return overrides[element]
        try:
            return mulliken_parameters(element)
        except InputError as exc:
            raise InputError(f"{where}{exc}") from None

    n = len(crystal)
    chi = np.empty(n)
    hardness = np.empty(n)
    for i in range(n):
        parts = crystal.species_of(i)
        weight = sum(occ for _, occ in parts)
        values = [(occ, *params(el)) for el, occ in parts]
        chi[i] = sum(o * c for o, c, _ in values) / weight
        hardness[i] = sum(o * h for o, _, h in values) / weight
    if np.any(hardness <= 0):
        bad = int(np.flatnonzero(hardness <= 0)[0])
        raise InputError(f"{where}site {crystal.labels[bad]} has a non-positive hardness; give parameters")

    interaction = coulomb_matrix(crystal.cell, crystal.positions, tol=tol)
    if kernel == "gaussian":
        width = COULOMB_CONSTANT / (math.sqrt(math.pi) * hardness)
        kinds, site_kind = np.unique(np.round(width, 12), return_inverse=True)
        pair_scale = np.sqrt(2.0 * (kinds[:, None] ** 2 + kinds[None, :] ** 2))
        correction = screened_pairs(crystal.cell, crystal.positions, site_kind, 1.0 / pair_scale,
                                    _ERFC_REACH * float(pair_scale.max()))
        interaction = interaction - COULOMB_CONSTANT * 0.5 * (correction + correction.T)
    h = interaction / dielectric + np.diag(hardness)

    # a minimum needs H positive definite on neutral charge changes
    basis = np.linalg.qr(np.vstack([np.ones(n), np.eye(n)[: n - 1]]).T)[0][:, 1:] if n > 1 else np.zeros((1, 0))
    if basis.shape[1]:
        lowest = float(np.linalg.eigvalsh(basis.T @ h @ basis).min())
        if lowest <= 1e-9 * float(np.abs(h).max()):
            raise InputError(f"{where}charge equilibration with the {kernel} kernel is unstable here "
                             f"(lowest curvature {lowest:.3g} eV/e^2: the Coulomb attraction outgrows the "
                             "hardness); use the gaussian kernel or other parameters")
    charges, mu = _equal_potentials(h, chi, total_charge)
    energy = float(chi @ charges + 0.5 * charges @ h @ charges)
    _warn_beyond_formal(crystal, charges, where)
    bonds = bonded_pairs(crystal)
    for message in sign_warnings(crystal.symbols, crystal.labels, charges, zip(bonds.first, bonds.second)):
        warnings.warn(f"{where}{message}", MadelungWarning, stacklevel=2)
    for array in (charges, chi, hardness):
        array.setflags(write=False)
    return EquilibrationResult(charges=charges, total_charge=total_charge, chemical_potential=mu, energy=energy,
                               electronegativity=chi, hardness=hardness, kernel=kernel, dielectric=dielectric,
                               parameter_source="Mulliken chi = (I + A)/2, J = I - A from the periodic-table "
                                                "library" + (" (with user overrides)" if overrides else ""))


def _warn_beyond_formal(crystal, charges, where):
    """Warn when a charge exceeds the largest formal state of its element (model near its limit)."""
    for i, q in enumerate(charges):
        if crystal.is_averaged(i):
            continue
        states = [abs(s) for s in elements.common_oxidation_states(crystal.symbols[i]) if s * q > 0]
        if states and abs(q) > max(states) + 1e-6:
            warnings.warn(f"{where}equilibrated charge {q:+.3f} e of {crystal.labels[i]} is beyond the largest "
                          f"formal state of {crystal.symbols[i]}; the model is near its stability limit "
                          "(raise the dielectric constant)", MadelungWarning, stacklevel=3)
            return


def sign_warnings(symbols, labels, charges, pairs):
    """Messages for equilibrated charges whose sign contradicts the chemistry: a hydrogen bonded to
    oxygen with a negative charge, or a carbon bonded to oxygen (an oxoanion such as carbonate)
    with a negative charge. ``pairs``: bonded site pairs ``(i, j)``. One message per kind."""
    oxygen_partners = {}
    for i, j in pairs:
        for a, b in ((int(i), int(j)), (int(j), int(i))):
            if symbols[b] == "O":
                oxygen_partners.setdefault(a, True)
    messages = []
    for element, what in (("H", "hydrogen bonded to oxygen"), ("C", "carbon bonded to oxygen (an oxoanion)")):
        wrong = [i for i in oxygen_partners if symbols[i] == element and charges[i] < 0]
        if wrong:
            i = wrong[0]
            messages.append(f"charge equilibration gives {what} a negative charge ({labels[i]} {charges[i]:+.3f} e"
                            f"{f' and {len(wrong) - 1} more' if len(wrong) > 1 else ''}): the sign contradicts "
                            "the chemistry; the Mulliken parameters misjudge such bonds, so treat these charges "
                            "with care (or use formal charges)")
    return messages


def equilibrate_group(symbols, positions, total_charge, parameters=None):
    """Charge equilibration of one isolated group of atoms (e.g. a polyatomic ion) with the Gaussian
    kernel and no periodic images or screening: the charges that equalise chi_i + J_i q_i +
    sum_j k_e erf(r_ij / s_ij) / r_ij q_j at fixed total charge.

    Parameters
    ----------
    symbols : sequence of element symbols.
    positions : (n, 3) Cartesian positions of the connected group, Å.
    total_charge : charge of the group, e.
    parameters : mapping, optional
        ``{element: (chi_eV, J_eV)}`` overriding the Mulliken values.

    Returns
    -------
    (n,) charges, e.

    References
    ----------
    A. K. Rappé and W. A. Goddard III, J. Phys. Chem. 95 (1991) 3358; R. S. Mulliken,
    J. Chem. Phys. 2 (1934) 782; D. M. York and W. Yang, J. Chem. Phys. 104 (1996) 159.
    """
    from scipy.special import erf   # here: scipy.special takes ~0.1 s to import, and only this function needs it
    positions = np.asarray(positions, dtype=float).reshape(-1, 3)
    values = [tuple(parameters[el]) if parameters and el in parameters else mulliken_parameters(el) for el in symbols]
    chi = np.array([v[0] for v in values])
    hardness = np.array([v[1] for v in values])
    width = COULOMB_CONSTANT / (math.sqrt(math.pi) * hardness)
    r = np.linalg.norm(positions[:, None, :] - positions[None, :, :], axis=2)
    scale = np.sqrt(2.0 * (width[:, None] ** 2 + width[None, :] ** 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.where(r > 0, COULOMB_CONSTANT * erf(r / scale) / r, 0.0)
    h += np.diag(hardness)
    return _equal_potentials(h, chi, float(total_charge))[0]


def _equal_potentials(h, chi, total_charge):
    """Charges q and chemical potential mu with chi + H q = mu everywhere and sum q = total_charge."""
    n = len(chi)
    system = np.zeros((n + 1, n + 1))
    system[:n, :n] = h
    system[:n, n] = -1.0
    system[n, :n] = 1.0
    solution = np.linalg.solve(system, np.concatenate([-chi, [total_charge]]))
    return solution[:n].copy(), float(solution[n])
