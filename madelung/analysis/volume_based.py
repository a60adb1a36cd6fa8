"""Volume-based lattice energies (Glasser–Jenkins) and the Kapustinskii equation with thermochemical
radii, for simple salts and salts of polyatomic ions.

Volume-based thermodynamics (VBT)
---------------------------------
The lattice potential energy of an ionic salt follows from its formula-unit volume V_m alone:

    U_POT = 2 I (alpha / V_m^(1/3) + beta)              (Jenkins et al. 1999)

with I = 1/2 sum_i n_i z_i^2 the ionic strength of the formula unit, V_m in nm^3 and (alpha, beta)
fitted per salt type (:data:`VBT_COEFFICIENTS`; the general fit for other types). Above 5000 kJ/mol
the fit changes to

    U_POT = A I (2 I / V_m)^(1/3),  A = 121.39 kJ mol^-1 nm    (Glasser and Jenkins 2000).

V_m is the cell volume divided by the formula units, the formula unit counted with each polyatomic
ion as one unit (:func:`madelung.charges.polyatomic.centred_crystal`).

Kapustinskii with thermochemical radii
--------------------------------------
Kapustinskii's equation (:func:`madelung.analysis.lattice_energy.kapustinskii_energy`, nu z+ |z-| = 2 I for a binary
salt) with the thermochemical radius of each polyatomic ion (:data:`THERMOCHEMICAL_RADII`) and
Shannon's effective ionic radius (coordination VI) for monatomic ions. Defined for one cation kind
and one anion kind.

Both are empirical estimates of the lattice energy (positive, kJ/mol per formula unit), calibrated
on formal charges; the papers quote typical errors of a few per cent for simple salts and more for
salts of large or strongly polarising ions. Values marked "from memory" should be checked against
the print.

References
----------
H. D. B. Jenkins, H. K. Roobottom, J. Passmore and L. Glasser, Inorg. Chem. 38 (1999) 3609.
L. Glasser and H. D. B. Jenkins, J. Am. Chem. Soc. 122 (2000) 632.
H. K. Roobottom, H. D. B. Jenkins, J. Passmore and L. Glasser, J. Chem. Educ. 76 (1999) 1570
(thermochemical radii).
A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283.
R. D. Shannon, Acta Cryst. A32 (1976) 751.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..charges.polyatomic import centred_crystal, find_polyatomic_ions
from ..structure.elements import shannon_radius
from ..errors import InputError
from .lattice_energy import kapustinskii_energy
from ..units import EV_TO_KJ_PER_MOL

#: (alpha / kJ mol^-1 nm, beta / kJ mol^-1) by salt type, Jenkins et al., Inorg. Chem. 38 (1999)
#: 3609, Table of VBT coefficients (from memory). Types: (cation charge : anion charge).
VBT_COEFFICIENTS = {
    "MX (1:1)": (117.3, 51.9),
    "MX2 (2:1)": (133.5, 60.9),
    "M2X (1:2)": (165.3, -29.8),
}

#: The same paper's general fit over all salt types (from memory); used for the other types
#: (2:2 salts such as CaCO3 among them).
GENERAL_COEFFICIENTS = (138.7, 27.6)

#: Glasser and Jenkins, J. Am. Chem. Soc. 122 (2000) 632: U_POT = A I (2I/V_m)^(1/3) above
#: 5000 kJ/mol, A in kJ mol^-1 nm (from memory).
HIGH_ENERGY_A = 121.39
HIGH_ENERGY_LIMIT = 5000.0

#: Thermochemical radii of polyatomic ions, Å, keyed by (formula, charge): H. K. Roobottom,
#: H. D. B. Jenkins, J. Passmore and L. Glasser, J. Chem. Educ. 76 (1999) 1570 (from memory; check
#: before relying on them).
THERMOCHEMICAL_RADII = {
    ("CO3", -2): 1.78,
    ("NO3", -1): 1.79,
    ("NO2", -1): 1.92,
    ("SO4", -2): 2.58,
    ("ClO4", -1): 2.40,
    ("PO4", -3): 2.38,
    ("BF4", -1): 2.32,
    ("OH", -1): 1.33,
    ("NH4", 1): 1.36,
    ("CN", -1): 1.91,
    ("N3", -1): 1.95,
    ("O2", -2): 1.73,
    ("O2", -1): 1.58,
}


@dataclass(frozen=True)
class VolumeBasedEnergies:
    """Volume-based (VBT) and Kapustinskii lattice-energy estimates of one salt.

    Attributes
    ----------
    formula : formula unit, each polyatomic ion one unit (e.g. ``"Ca(CO3)"``).
    formula_units : Z in the cell.
    volume_per_formula_unit : V_m, Å^3.
    ionic_strength : I = 1/2 sum n_i z_i^2 per formula unit.
    salt_type : e.g. ``"MX2 (2:1)"``, or ``"general"``.
    coefficients : (alpha / kJ mol^-1 nm, beta / kJ mol^-1) used, or (A, None) for the high-energy form.
    volume_based : U_POT by VBT, kJ/mol per formula unit (positive).
    kapustinskii : Kapustinskii estimate with thermochemical radii, kJ/mol, or None (see ``notes``).
    radii : {ion: radius in Å} used by Kapustinskii.
    radius_sources : {ion: where the radius came from}.
    ions : summary of the polyatomic ions (``"none"`` for a simple salt).
    notes : remarks (coefficients used, why Kapustinskii is missing, non-integer charges).
    """

    formula: str
    formula_units: int
    volume_per_formula_unit: float
    ionic_strength: float
    salt_type: str
    coefficients: tuple
    volume_based: float
    kapustinskii: float | None
    radii: dict
    radius_sources: dict
    ions: str
    notes: tuple

    def to_dict(self):
        return {
            "formula": self.formula, "formula_units": self.formula_units,
            "volume_per_formula_unit_angstrom3": self.volume_per_formula_unit,
            "ionic_strength": self.ionic_strength, "salt_type": self.salt_type,
            "coefficients": list(self.coefficients),
            "volume_based_kJ_per_mol": self.volume_based, "kapustinskii_kJ_per_mol": self.kapustinskii,
            "radii_angstrom": self.radii, "radius_sources": self.radius_sources,
            "polyatomic_ions": self.ions, "notes": list(self.notes),
            "sign_convention": "lattice energies: positive energy to separate the solid into gaseous ions, "
                               "per formula unit",
        }


def _kinds(crystal):
    """{(symbol, charge): count per formula unit} of cations and of anions."""
    z = crystal.formula_units
    cations, anions = {}, {}
    for symbol, q in zip(crystal.symbols, crystal.charges):
        if q == 0:
            continue
        table = cations if q > 0 else anions
        key = (symbol, float(q))
        table[key] = table.get(key, 0) + 1
    return ({k: n / z for k, n in cations.items()}, {k: n / z for k, n in anions.items()})


def _salt_type(cations, anions):
    if len(cations) != 1 or len(anions) != 1:
        return "general"
    ((_, zp), p), = cations.items()
    ((_, zm), q), = anions.items()
    shapes = {(1, 1, 1, 1): "MX (1:1)", (1, 2, 2, 1): "MX2 (2:1)", (2, 1, 1, 2): "M2X (1:2)"}
    return shapes.get((round(p), round(q), round(zp), round(-zm)), "general")


def _radius(symbol, charge):
    key = (symbol.strip("()"), int(round(charge)))
    if key in THERMOCHEMICAL_RADII:
        return THERMOCHEMICAL_RADII[key], "thermochemical radius (Roobottom et al. 1999, from memory)"
    return shannon_radius(symbol, int(round(charge))), "Shannon effective ionic radius, coordination VI"


def volume_based_energies(crystal, found=None) -> VolumeBasedEnergies:
    """VBT and Kapustinskii lattice energies of ``crystal`` (see the module docstring).

    Parameters
    ----------
    crystal : Crystal
        A neutral salt with charges; polyatomic ions are found (or taken from ``found``) and count
        as one ion each.
    found : PolyatomicIons, optional

    Returns
    -------
    VolumeBasedEnergies

    References
    ----------
    H. D. B. Jenkins, H. K. Roobottom, J. Passmore and L. Glasser, Inorg. Chem. 38 (1999) 3609;
    L. Glasser and H. D. B. Jenkins, J. Am. Chem. Soc. 122 (2000) 632; H. K. Roobottom et al.,
    J. Chem. Educ. 76 (1999) 1570; A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283.
    """
    found = find_polyatomic_ions(crystal) if found is None else found
    salt = centred_crystal(crystal, found)
    where = f"{crystal.source}: " if crystal.source else ""
    if not (np.any(salt.charges > 0) and np.any(salt.charges < 0)):
        raise InputError(f"{where}a lattice energy needs cations and anions")
    if abs(salt.net_charge) > 1e-6:
        raise InputError(f"{where}net charge {salt.net_charge:+.6g} e; a lattice energy needs a neutral salt")
    notes = []
    if np.any(np.abs(salt.charges - np.round(salt.charges)) > 1e-6):
        notes.append("charges are not whole numbers: the volume-based fits are calibrated on formal charges")
    z = salt.formula_units
    volume = salt.volume / z
    cations, anions = _kinds(salt)
    strength = 0.5 * sum(n * q * q for table in (cations, anions) for (_, q), n in table.items())
    salt_type = _salt_type(cations, anions)
    alpha, beta = VBT_COEFFICIENTS.get(salt_type, GENERAL_COEFFICIENTS)
    if salt_type == "general":
        notes.append("no salt-type coefficients for this stoichiometry: the general fit "
                     f"(alpha {alpha} kJ/mol nm, beta {beta} kJ/mol) is used")
    cube_root = (volume / 1000.0) ** (1.0 / 3.0)  # Å^3 -> nm^3
    energy = 2.0 * strength * (alpha / cube_root + beta)
    coefficients = (alpha, beta)
    if energy > HIGH_ENERGY_LIMIT:
        energy = HIGH_ENERGY_A * strength * (2.0 * strength / (volume / 1000.0)) ** (1.0 / 3.0)
        coefficients = (HIGH_ENERGY_A, None)
        notes.append("above 5000 kJ/mol: Glasser and Jenkins' form A I (2I/V_m)^(1/3) is used")

    kapustinskii, radii, sources = None, {}, {}
    if len(cations) == 1 and len(anions) == 1:
        ((cation, zp), p), = cations.items()
        ((anion, zm), q), = anions.items()
        try:
            for symbol, charge in ((cation, zp), (anion, zm)):
                radii[symbol.strip("()")], sources[symbol.strip("()")] = _radius(symbol, charge)
            kapustinskii = kapustinskii_energy(p + q, zp, zm, radii[cation.strip("()")],
                                               radii[anion.strip("()")]) * EV_TO_KJ_PER_MOL
        except InputError as exc:
            notes.append(f"Kapustinskii not evaluated: {exc}")
    else:
        notes.append("Kapustinskii not evaluated: it needs one cation kind and one anion kind")
    return VolumeBasedEnergies(salt.reduced_formula, z, float(volume), float(strength), salt_type, coefficients,
                               float(energy), None if kapustinskii is None else float(kapustinskii), radii, sources,
                               found.summary(), tuple(notes))
