"""Lattice energies: Coulomb plus short-range terms, and the classic closed forms
(Born–Landé, Born–Mayer, Kapustinskii).

Sign convention (the handbook one): the *lattice energy* is the positive energy needed to
separate the solid into gaseous ions at infinite distance, per formula unit,
``U = -(E_coulomb + E_short_range) / Z``. The Coulomb and short-range energies themselves are
reported as signed sums per cell (Coulomb negative, repulsion positive).

The model is a rigid-ion model with point charges (formal charges unless told otherwise):
it leaves out polarisation, covalency, zero-point and thermal energy, so a lattice energy
from it is a model estimate. Handbook lattice energies from the Born–Haber cycle include
all of those; the difference is what the comparison is for.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..structure.elements import shannon_radius
from ..errors import InputError
from ..sums.dispatch import ewald
from ..sums.shortrange import load_repulsion, shortrange
from ..units import COULOMB_CONSTANT, EV_PER_A3_TO_GPA, EV_TO_KJ_PER_MOL, kj_per_mol_to_ev
from ..units import pressure_from_stress  # noqa: F401  (defined with the units; part of this module's API)
from .madelung_constants import madelung_constants
from ..defaults import SUM_TOL

#: Kapustinskii's constant, 1.2025e-4 J m mol^-1, in kJ/mol Å; and his d = 0.345 Å
#: (A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283).
KAPUSTINSKII_CONSTANT_KJ_ANGSTROM = 1202.5


KAPUSTINSKII_D = 0.345


#: The sign convention of every lattice-energy output, in words.
LATTICE_SIGN = ("lattice energy = positive energy to separate the solid into gaseous ions (handbook sign); "
                "Coulomb and short-range energies are signed sums")


#: rho used in the Born–Mayer closed form when the model has no exponential term (Å);
#: the same 0.345 Å Kapustinskii adopted (common practice).
DEFAULT_BORN_MAYER_RHO = 0.345


#: Born exponents by the noble-gas (or d10) core of the ion, keyed by its electron count
#: (L. Pauling, The Nature of the Chemical Bond, 3rd ed. (1960), the Born-exponent table that
#: handbooks reproduce: He 5, Ne 7, Ar and Cu+ 9, Kr and Ag+ 10, Xe and Au+ 12; from memory).
BORN_EXPONENTS = {2: 5.0, 10: 7.0, 18: 9.0, 28: 9.0, 36: 10.0, 46: 10.0, 54: 12.0, 78: 12.0}


def _atomic_number(symbol):
    from ase.data import atomic_numbers

    if symbol not in atomic_numbers:
        raise InputError(f"unknown element symbol {symbol!r}")
    return atomic_numbers[symbol]


def born_exponent(symbol, charge) -> float:
    """Born exponent n of an ion from the electron configuration of its core.

    Parameters
    ----------
    symbol : str
        Element symbol.
    charge : float
        Ion charge in e (whole number).

    Returns
    -------
    float
        5 (He core), 7 (Ne), 9 (Ar, Cu+ type), 10 (Kr, Ag+ type), 12 (Xe, Au+ type).

    References
    ----------
    L. Pauling, The Nature of the Chemical Bond, 3rd ed. (Cornell, 1960), table of Born exponents.
    """
    electrons = _atomic_number(symbol) - int(round(charge))
    if electrons not in BORN_EXPONENTS:
        raise InputError(f"no Born exponent is tabulated for {symbol}{int(round(charge)):+d} ({electrons} electrons: "
                         "not a closed noble-gas or d10 shell); give n yourself")
    return BORN_EXPONENTS[electrons]


def born_lande_energy(madelung_constant, z_cation, z_anion, r0, n) -> float:
    """Born–Landé lattice energy per formula unit, eV (positive):
    ``U = M z+ |z-| k_e / r0 (1 - 1/n)``.

    Parameters
    ----------
    madelung_constant : float
        Madelung constant in the handbook convention (E_fu = -M z+ |z-| k_e / r0).
    z_cation, z_anion : float
        Ion charges (the sign of ``z_anion`` is ignored).
    r0 : float
        Shortest cation–anion distance, Å.
    n : float
        Born exponent.

    References
    ----------
    M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210.
    """
    return madelung_constant * abs(z_cation * z_anion) * COULOMB_CONSTANT / r0 * (1.0 - 1.0 / n)


def born_mayer_energy(madelung_constant, z_cation, z_anion, r0, rho) -> float:
    """Born–Mayer lattice energy per formula unit, eV (positive):
    ``U = M z+ |z-| k_e / r0 (1 - rho/r0)``.

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1.
    """
    return madelung_constant * abs(z_cation * z_anion) * COULOMB_CONSTANT / r0 * (1.0 - rho / r0)


def kapustinskii_energy(ions_per_formula_unit, z_cation, z_anion, r_cation, r_anion) -> float:
    """Kapustinskii estimate of the lattice energy per formula unit, eV (positive):
    ``U = K nu z+ |z-| / (r+ + r-) (1 - d / (r+ + r-))`` with K = 1.2025e-4 J m/mol, d = 0.345 Å.

    Parameters
    ----------
    ions_per_formula_unit : int
        nu, the number of ions in the formula unit (2 for NaCl, 3 for CaF2).
    z_cation, z_anion : float
        Ion charges (sign ignored).
    r_cation, r_anion : float
        Ionic radii, Å (Shannon's effective ionic radii are used by :func:`lattice_energy`).

    References
    ----------
    A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283.
    R. D. Shannon, Acta Cryst. A32 (1976) 751 (the radii).
    """
    d = r_cation + r_anion
    kj = KAPUSTINSKII_CONSTANT_KJ_ANGSTROM * ions_per_formula_unit * abs(z_cation * z_anion) / d * \
        (1.0 - KAPUSTINSKII_D / d)
    return kj_per_mol_to_ev(kj)


def kapustinskii_of_ions(cation, z_cation, cation_count, anion, z_anion, anion_count) -> float | None:
    """Kapustinskii estimate (eV per formula unit, positive) of a binary salt from its ions alone,
    with Shannon's six-coordinate effective ionic radii; None when a radius is not tabulated for
    an ion in that charge state.

    Parameters
    ----------
    cation, anion : str
        Element symbols.
    z_cation, z_anion : int
        Ion charges (signs ignored).
    cation_count, anion_count : int
        Ions of each kind in the formula unit (nu is their sum).

    References
    ----------
    A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283; R. D. Shannon, Acta Cryst. A32 (1976) 751.
    """
    try:
        radii = shannon_radius(cation, abs(int(z_cation))), shannon_radius(anion, -abs(int(z_anion)))
    except InputError:
        return None
    return kapustinskii_energy(cation_count + anion_count, z_cation, z_anion, *radii)


@dataclass(frozen=True)
class ClosedForms:
    """The classic closed-form lattice energies beside the model's, eV per formula unit (positive).

    Attributes
    ----------
    madelung_constant : handbook convention (E_fu = -M z+ |z-| k_e / r0), or None.
    r0 : shortest cation–anion distance, Å.
    charges : (z+, |z-|) or None.
    born_lande, born_exponent : the Born–Landé energy and the n used (from the model's
        Born–Landé pair, else the mean of the ions' tabulated Born exponents), or None.
    born_mayer, rho : the Born–Mayer energy and the rho used (from the model's exponential pair,
        else 0.345 Å), or None.
    kapustinskii, radii : the Kapustinskii estimate and the Shannon radii (r+, r-) used, or None.
    notes : why a closed form is missing, by name.
    """

    madelung_constant: float | None
    r0: float
    charges: tuple | None
    born_lande: float | None
    born_exponent: float | None
    born_exponent_source: str
    born_mayer: float | None
    rho: float | None
    rho_source: str
    kapustinskii: float | None
    radii: tuple | None
    notes: dict

    def to_dict(self) -> dict:
        """JSON-ready, energies in kJ/mol per formula unit (positive), distances Å; None where a
        closed form does not apply (``notes`` says why)."""
        def kj(value):
            return None if value is None else value * EV_TO_KJ_PER_MOL

        return {"madelung_constant_handbook": self.madelung_constant, "r0_angstrom": self.r0,
                "born_lande_kJ_per_mol": kj(self.born_lande), "born_exponent": self.born_exponent,
                "born_exponent_source": self.born_exponent_source,
                "born_mayer_kJ_per_mol": kj(self.born_mayer), "rho_angstrom": self.rho, "rho_source": self.rho_source,
                "kapustinskii_kJ_per_mol": kj(self.kapustinskii),
                "shannon_radii_angstrom": None if self.radii is None else list(self.radii), "notes": dict(self.notes)}


@dataclass(frozen=True)
class LatticeEnergy:
    """Lattice energy of a crystal in the rigid-ion model.

    Attributes
    ----------
    formula : reduced formula (the formula unit).
    formula_units : Z, formula units per cell.
    n_atoms : ions per cell.
    coulomb : signed electrostatic energy per cell, eV.
    short_range : signed short-range energy per cell, eV (positive for net repulsion).
    total : coulomb + short_range per cell, eV.
    pressure : GPa (positive when the model wants to expand), or None.
    closed_forms : :class:`ClosedForms`, or None.
    """

    formula: str
    formula_units: int
    n_atoms: int
    coulomb: float
    short_range: float
    pressure: float | None
    closed_forms: ClosedForms | None

    @property
    def total(self) -> float:
        return self.coulomb + self.short_range

    @property
    def lattice_energy(self) -> float:
        """Positive energy to separate the solid into gaseous ions, eV per formula unit."""
        return -self.total / self.formula_units

    @property
    def lattice_energy_kj_per_mol(self) -> float:
        return self.lattice_energy * EV_TO_KJ_PER_MOL

    def per_cell(self):
        return {"coulomb": self.coulomb, "short_range": self.short_range, "total": self.total}

    def per_atom(self):
        return {k: v / self.n_atoms for k, v in self.per_cell().items()}

    def per_formula_unit(self):
        return {k: v / self.formula_units for k, v in self.per_cell().items()}

    def to_dict(self) -> dict:
        """JSON-ready: signed energies per cell, per atom and per formula unit (eV), the lattice
        energy (eV and kJ/mol per formula unit, positive), the pressure GPa, the closed forms."""
        data = {"formula": self.formula, "formula_units": self.formula_units, "n_atoms": self.n_atoms,
                "per_cell_eV": self.per_cell(), "per_atom_eV": self.per_atom(),
                "per_formula_unit_eV": self.per_formula_unit(),
                "lattice_energy_eV": self.lattice_energy, "lattice_energy_kJ_per_mol": self.lattice_energy_kj_per_mol,
                "pressure_GPa": self.pressure, "sign_convention": LATTICE_SIGN}
        if self.closed_forms is not None:
            data["closed_forms"] = self.closed_forms.to_dict()
        return data


def closed_forms(crystal, model=None, tol=SUM_TOL, ewald_result=None) -> ClosedForms:
    """Born–Landé, Born–Mayer and Kapustinskii lattice energies of a crystal with one cation and
    one anion kind, using the computed Madelung constant (handbook convention) and r0.
    ``ewald_result``: the crystal's Ewald sum if already done.

    References
    ----------
    M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210; M. Born and J. E. Mayer,
    Z. Phys. 75 (1932) 1; A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283;
    R. D. Shannon, Acta Cryst. A32 (1976) 751.
    """
    constants = madelung_constants(crystal, tol=tol, ewald_result=ewald_result)
    notes = {}
    m = constants.handbook
    if m is None:
        note = constants.handbook_note.removeprefix("undefined: ")
        return ClosedForms(None, constants.r0, None, None, None, "", None, None, "", None, None,
                           {"born_lande": note, "born_mayer": note, "kapustinskii": note})
    zp, zm = constants.handbook_charges
    cation = next(s for s, q in zip(crystal.symbols, crystal.charges) if q > 0)
    anion = next(s for s, q in zip(crystal.symbols, crystal.charges) if q < 0)
    pair = model.pair(cation, anion) if model is not None else None

    n = None
    n_source = ""
    if pair is not None and pair.form == "born-lande":
        n, n_source = pair.params["n"], "the model's Born–Landé pair"
    else:
        try:
            n = 0.5 * (born_exponent(cation, zp) + born_exponent(anion, -zm))
            n_source = "mean of the tabulated Born exponents of the two ions"
        except InputError as exc:
            notes["born_lande"] = str(exc)
    if pair is not None and pair.form in ("born-mayer", "buckingham"):
        rho, rho_source = pair.params["rho"], "the model's exponential pair"
    else:
        rho, rho_source = DEFAULT_BORN_MAYER_RHO, "0.345 Å (common practice)"

    kap = radii = None
    counts = crystal.element_counts()
    z = crystal.formula_units
    nu = (counts[cation] + counts[anion]) // z
    try:
        radii = (shannon_radius(cation, int(round(zp))), shannon_radius(anion, -int(round(zm))))
        kap = kapustinskii_energy(nu, zp, zm, *radii)
    except InputError as exc:
        notes["kapustinskii"] = str(exc)
    r0 = constants.r0
    return ClosedForms(
        madelung_constant=m, r0=r0, charges=(zp, zm),
        born_lande=None if n is None else born_lande_energy(m, zp, zm, r0, n), born_exponent=n,
        born_exponent_source=n_source, born_mayer=born_mayer_energy(m, zp, zm, r0, rho), rho=rho,
        rho_source=rho_source, kapustinskii=kap, radii=radii, notes=notes)


def total_terms(crystal, model, tol=SUM_TOL, forces=False, stress=False):
    """Coulomb (Ewald) and short-range results of one crystal: ``(EwaldResult, ShortRangeResult)``."""
    return ewald(crystal, tol=tol, forces=forces, stress=stress), shortrange(crystal, model, forces, stress)


def lattice_energy(crystal, repulsion, tol=SUM_TOL, with_closed_forms=True) -> LatticeEnergy:
    """Lattice energy of a crystal: Coulomb (Ewald) plus the short-range terms of ``repulsion``.

    Parameters
    ----------
    crystal : Crystal
        A neutral crystal with charges.
    repulsion : RepulsionModel or path of a parameter file
    tol : float
        Relative accuracy of the Ewald sum.
    with_closed_forms : bool
        Also evaluate the Born–Landé, Born–Mayer and Kapustinskii closed forms where they apply.

    Returns
    -------
    LatticeEnergy

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1; P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    model = load_repulsion(repulsion)
    coulomb, short = total_terms(crystal, model, tol, stress=True)
    if coulomb.background:
        raise InputError(f"{crystal.source or 'structure'}: net charge {coulomb.net_charge:+.6g} e; "
                         "a lattice energy needs a neutral crystal")
    pressure = pressure_from_stress(coulomb.stress + short.stress)
    forms = None
    if with_closed_forms and np.any(crystal.charges > 0) and np.any(crystal.charges < 0):
        forms = closed_forms(crystal, model, tol, ewald_result=coulomb)
    return LatticeEnergy(crystal.reduced_formula, crystal.formula_units, len(crystal), coulomb.energy,
                         short.energy, float(pressure), forms)


def scaled(crystal, factor):
    """The crystal with cell and positions scaled by ``factor`` (fractional coordinates kept)."""
    return crystal.replace(cell=crystal.cell * factor, positions=crystal.positions * factor)


def bulk_modulus(crystal, repulsion, tol=SUM_TOL, step=0.002) -> float:
    """Bulk modulus of the model at the given structure under homogeneous strain, GPa:
    ``B = -dP / d ln V`` by central differences of the pressure (ions kept at fixed fractional
    coordinates, which is exact for structures without free coordinates such as rock salt).

    References
    ----------
    M. Born and K. Huang, Dynamical Theory of Crystal Lattices (Oxford, 1954), ch. III.
    """
    model = load_repulsion(repulsion)
    pressures = []
    for sign in (-1.0, 1.0):
        c, s = total_terms(scaled(crystal, 1.0 + sign * step), model, tol, stress=True)
        pressures.append(-np.trace(c.stress + s.stress) / 3.0)
    d_ln_v = 3.0 * (math.log1p(step) - math.log1p(-step))
    return float(-(pressures[1] - pressures[0]) / d_ln_v * EV_PER_A3_TO_GPA)
