"""Polyatomic ions: find covalently bonded groups, recognise the common molecular ions, and give the
energies a chemist means for salts of them.

What counts as an ion
---------------------
Sites are joined by covalent bonds (:mod:`madelung.charges.bonds`: covalent radii of Cordero et al.
plus 0.40 Å, between non-metals and metalloids, hydrogen with one bond). A finite group whose
composition is a row of :data:`madelung.charges.ion_table.ION_TABLE` (carbonate, sulfate, nitrate,
ammonium, hydroxide, ...) is a polyatomic ion with the table's charge. Groups that match no row,
that hold a partly occupied site, or that are bonded to their own periodic image (chains, layers,
frameworks such as SiO2) are reported with a note and keep the charges of their atoms.

Charges inside an ion (``rule``)
--------------------------------
``"centre"``
    the whole charge of the ion sits at its centre: the member with the most bonds inside the ion
    where there is one (C of CO3, S of SO4, N of NH4, O of OH), else the centre of mass (CN, O2, C2);
``"formal"``
    each atom carries its formal oxidation state from the table (C +4, O -2 in carbonate);
``"equilibrated"``
    charge equilibration of the isolated ion at the table's total charge
    (:func:`madelung.charges.equilibrate.equilibrate_group`), with a warning when a sign contradicts
    the chemistry.

Energies
--------
The electrostatic energy of a salt of polyatomic ions is reported as an *inter-ion* energy: the
Ewald energy of the charges as placed minus each ion's internal Coulomb energy (the sum over pairs
of atoms inside the same ion, at their bonded distances, with the atoms' charges; zero for the
"centre" rule). The lattice energy (energy to separate the solid into gaseous ions) does not hold
the energy that binds an ion itself. Madelung constants take every ion as one charge at its centre
(:func:`centred_crystal`), so r0 is the shortest cation–anion-centre distance (Ca–C in calcite).

Limits: the ions are point charges or rigid sets of point charges; with formal charges inside an
ion the inter-ion energy carries large, model-dependent multipole terms. Metal-centred complex ions
(ferrocyanide, PtCl6) are not in the table. Results are model estimates.

References
----------
B. Cordero et al., Dalton Trans. (2008) 2832 (covalent radii).
P. P. Ewald, Ann. Phys. 369 (1921) 253.
H. D. B. Jenkins, H. K. Roobottom, J. Passmore and L. Glasser, Inorg. Chem. 38 (1999) 3609 (lattice
energies of salts of complex ions as inter-ion energies).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from ase.data import atomic_masses, atomic_numbers

from ..sums.dispatch import ewald
from ..errors import InputError, MadelungWarning
from ..units import COULOMB_CONSTANT, EV_TO_KJ_PER_MOL
from .bonds import DEFAULT_BOND_TOLERANCE, bonded_groups, bonded_pairs
from .equilibrate import equilibrate_group, sign_warnings
from .ion_table import METAL_LIGANDS, composition_of, match
from ..defaults import SUM_TOL

#: Ways of placing an ion's charge (see the module docstring).
CHARGE_RULES = ("centre", "formal", "equilibrated")

INTER_ION_NOTE = ("energies are inter-ion energies: each polyatomic ion's internal Coulomb energy "
                  "(pairs of atoms inside the same ion) is removed")


@dataclass(frozen=True)
class PolyatomicIon:
    """One polyatomic ion found in the cell.

    Attributes
    ----------
    formula, name : from the ion table, e.g. ``"CO3"``, ``"carbonate"``.
    charge : e.
    members : site indices of its atoms.
    positions : (k, 3) Cartesian positions of the members as one connected piece, Å.
    centre : (3,) Cartesian position of its centre, Å.
    central_site : the member taken as centre, or None (centre of mass).
    bonds : bonded pairs as positions in ``members``.
    formal_states : formal oxidation state of each member, e.
    """

    formula: str
    name: str
    charge: float
    members: tuple
    positions: np.ndarray
    centre: np.ndarray
    central_site: int | None
    bonds: tuple
    formal_states: tuple


@dataclass(frozen=True)
class UnrecognisedGroup:
    """A bonded group that is not treated as an ion: ``formula`` of its atoms, ``members`` (site
    indices), and a ``note`` saying why (unknown composition, extended network, partly occupied)."""

    formula: str
    members: tuple
    note: str


@dataclass(frozen=True)
class PolyatomicIons:
    """Result of :func:`find_polyatomic_ions`.

    Attributes
    ----------
    ions : tuple of :class:`PolyatomicIon`.
    unrecognised : tuple of :class:`UnrecognisedGroup`; their atoms keep their own charges.
    tolerance : allowance over the covalent-radius sum used for bonds, Å.
    notes : further remarks (e.g. a file's atom charges that disagree with an ion's charge).
    """

    ions: tuple
    unrecognised: tuple
    tolerance: float
    notes: tuple = ()

    @property
    def found(self) -> bool:
        return bool(self.ions)

    def kinds(self) -> tuple:
        """``((formula, name, charge, count), ...)`` in order of first appearance."""
        counts = {}
        for ion in self.ions:
            key = (ion.formula, ion.name, ion.charge)
            counts[key] = counts.get(key, 0) + 1
        return tuple((*key, n) for key, n in counts.items())

    def summary(self) -> str:
        """E.g. ``"6 CO3 (carbonate, -2)"``; ``"none"`` without ions."""
        return ", ".join(f"{n} {f} ({name}, {q:+g})" for f, name, q, n in self.kinds()) or "none"

    def to_dict(self):
        return {
            "ions": [{"formula": f, "name": name, "charge_e": q, "count": n} for f, name, q, n in self.kinds()],
            "members": [{"formula": ion.formula, "sites": list(ion.members), "centre_angstrom": ion.centre.tolist(),
                         "central_site": ion.central_site} for ion in self.ions],
            "unrecognised_groups": [{"formula": g.formula, "sites": list(g.members), "note": g.note}
                                    for g in self.unrecognised],
            "bond_tolerance_angstrom": self.tolerance,
            "bond_rule": "covalent radii (Cordero et al. 2008) summed plus the tolerance; non-metals and "
                         "metalloids only (and Al-Cl); hydrogen keeps its nearest partner",
            "notes": list(self.notes),
        }


def _formula(symbols):
    counts = {}
    for s in symbols:
        counts[s] = counts.get(s, 0) + 1
    return "".join(f"{el}{'' if n == 1 else n}" for el, n in counts.items())


def _centre(group, symbols, positions):
    """(centre, index in members or None): the unique most-bonded member, else the centre of mass."""
    counts = group.bond_counts()
    most = max(counts)
    if counts.count(most) == 1:
        k = counts.index(most)
        return positions[k].copy(), k
    masses = np.array([atomic_masses[atomic_numbers[s]] for s in symbols])
    return masses @ positions / masses.sum(), None


def find_polyatomic_ions(crystal, tolerance=DEFAULT_BOND_TOLERANCE) -> PolyatomicIons:
    """Polyatomic ions of ``crystal`` (see the module docstring for the rules).

    Parameters
    ----------
    crystal : Crystal
    tolerance : float
        Allowance over the sum of covalent radii for a bond, Å (default 0.40).

    Returns
    -------
    PolyatomicIons

    References
    ----------
    B. Cordero et al., Dalton Trans. (2008) 2832.
    """
    bonds = bonded_pairs(crystal, tolerance, METAL_LIGANDS)
    ions, unrecognised, notes = [], [], []
    for group in bonded_groups(crystal, bonds):
        symbols = [crystal.symbols[i] for i in group.members]
        formula = _formula(symbols)
        if group.extended:
            unrecognised.append(UnrecognisedGroup(formula, group.members,
                                                  "bonded to its own periodic image (chain, layer or framework): "
                                                  "not a molecular ion; its atoms keep their own charges"))
            continue
        if any(crystal.is_averaged(i) for i in group.members):
            unrecognised.append(UnrecognisedGroup(formula, group.members,
                                                  "holds a mixed or partly occupied site: not treated as an ion; "
                                                  "its atoms keep their own (averaged) charges"))
            continue
        kind = match(composition_of(formula), group.bond_lengths)
        if kind is None:
            unrecognised.append(UnrecognisedGroup(formula, group.members,
                                                  "bonded group not in the table of polyatomic ions; its atoms "
                                                  "keep their own charges"))
            continue
        positions = group.positions(crystal)
        centre, k = _centre(group, symbols, positions)
        states = dict(kind.formal_states)
        ion = PolyatomicIon(kind.formula, kind.name, float(kind.charge), group.members, positions, centre,
                            None if k is None else group.members[k], group.bonds,
                            tuple(float(states[s]) for s in symbols))
        ions.append(ion)
        given = float(sum(crystal.charges[i] for i in group.members))
        if abs(given - kind.charge) > 1e-6:
            notes.append(f"the charges of the atoms of {kind.formula} ({', '.join(crystal.labels[i] for i in group.members)}) "
                         f"add up to {given:+.4g} e; the ion's charge {kind.charge:+d} e is used")
    unique_notes = tuple(dict.fromkeys(notes))
    return PolyatomicIons(tuple(ions), tuple(unrecognised), float(tolerance), unique_notes)


def _rule(rule):
    if rule not in CHARGE_RULES:
        raise InputError(f"charge rule for polyatomic ions must be one of {', '.join(CHARGE_RULES)}, got {rule!r}")
    return rule


def _check_neutral(crystal, net, found):
    if abs(net) > 1e-6 * max(1.0, float(np.abs(crystal.charges).sum())):
        where = f"{crystal.source}: " if crystal.source else ""
        raise InputError(f"{where}with the polyatomic ions {found.summary()} the cell carries {net:+.6g} e; "
                         "the charges of the other sites do not balance them; give those sites formal charges "
                         "(--charge) or sum every atom as a point charge (--polyatomic-ions atoms)")


def centred_crystal(crystal, found=None):
    """The crystal with every polyatomic ion replaced by one charge at its centre.

    The other sites keep their charges, labels and occupancies. An ion site has the ion's formula in
    parentheses as its symbol (``"(CO3)"``) and a label naming its central atom (``"CO3(C1)"``), so
    formulas read ``Ca(CO3)``, ``Mg(OH)2``, and r0 is the shortest cation–anion-centre distance.
    """
    found = find_polyatomic_ions(crystal) if found is None else found
    if not found.ions:
        return crystal
    # one entry per site outside ions and per ion, in the order of the sites (an ion where its first atom was)
    first = {min(ion.members): ion for ion in found.ions}
    taken = {i for ion in found.ions for i in ion.members}
    order = [i for i in range(len(crystal)) if i not in taken or i in first]
    positions, charges, symbols, labels, occupancies, species = [], [], [], [], [], []
    for i in order:
        ion = first.get(i)
        if ion is None:
            positions.append(crystal.positions[i])
            charges.append(crystal.charges[i])
            symbols.append(crystal.symbols[i])
            labels.append(crystal.labels[i])
            occupancies.append(crystal.occupancies[i])
            species.append(crystal.species_of(i))
            continue
        positions.append(ion.centre)
        charges.append(ion.charge)
        symbols.append(f"({ion.formula})")
        labels.append(ion.formula + (f"({crystal.labels[ion.central_site]})" if ion.central_site is not None else ""))
        occupancies.append(1.0)
        species.append(((f"({ion.formula})", 1.0),))
    species = None if crystal.species is None else species
    _check_neutral(crystal, float(np.sum(charges)), found)
    return crystal.replace(positions=np.array(positions), charges=np.array(charges, dtype=float), symbols=symbols,
                           labels=labels, occupancies=np.array(occupancies, dtype=float), species=species)


def spread_charges(crystal, found, rule) -> np.ndarray:
    """Site charges with each ion's charge spread over its atoms by ``rule`` ("formal" or
    "equilibrated"); other sites keep their charges."""
    if _rule(rule) == "centre":
        raise InputError("the 'centre' rule puts one charge per ion; use centred_crystal()")
    charges = np.array(crystal.charges, dtype=float)
    where = f"{crystal.source}: " if crystal.source else ""
    messages = {}
    for ion in found.ions:
        members = list(ion.members)
        if rule == "formal":
            charges[members] = ion.formal_states
            continue
        symbols = [crystal.symbols[i] for i in members]
        q = equilibrate_group(symbols, ion.positions, ion.charge)
        charges[members] = q
        for message in sign_warnings(symbols, [crystal.labels[i] for i in members], q, ion.bonds):
            # one warning per ion kind and kind of wrong sign, not one per ion
            messages.setdefault((ion.formula, message.split("(")[0]), f"{ion.formula}: {message}")
    for message in messages.values():
        warnings.warn(f"{where}{message}", MadelungWarning, stacklevel=2)
    _check_neutral(crystal, float(charges.sum()), found)
    return charges


def internal_energy(ion, charges) -> float:
    """Coulomb energy of the pairs of atoms inside one ion, eV: sum_{a<b} k_e q_a q_b / r_ab with the
    members' charges ``charges`` (one per member) at their bonded positions."""
    q = np.asarray(charges, dtype=float)
    r = np.linalg.norm(ion.positions[:, None, :] - ion.positions[None, :, :], axis=2)
    upper = np.triu_indices(len(q), 1)
    return float(COULOMB_CONSTANT * np.sum(q[upper[0]] * q[upper[1]] / r[upper]))


@dataclass(frozen=True)
class InterionicEnergy:
    """Electrostatic energy of a crystal of polyatomic ions, between ions only.

    Attributes
    ----------
    rule : how each ion's charge is placed ("centre", "formal", "equilibrated").
    formula : formula unit with ions as units (e.g. ``"Ca(CO3)"``).
    formula_units : Z, formula units in the cell.
    total : Ewald energy of the charges as placed, eV per cell (signed).
    internal : sum of the ions' internal Coulomb energies, eV per cell (zero for "centre").
    charges : (N,) site charges used, e (per atom; for "centre" the charges of :func:`centred_crystal`).
    ions : the :class:`PolyatomicIons` found.
    error_estimate : estimated error of ``total``, eV.
    note : what the numbers are.
    """

    rule: str
    formula: str
    formula_units: int
    total: float
    internal: float
    charges: np.ndarray
    ions: PolyatomicIons
    error_estimate: float
    note: str = INTER_ION_NOTE

    @property
    def interionic(self) -> float:
        """Inter-ion electrostatic energy, eV per cell (signed): ``total - internal``."""
        return self.total - self.internal

    @property
    def per_formula_unit(self) -> float:
        """Inter-ion electrostatic energy per formula unit, eV (signed)."""
        return self.interionic / self.formula_units

    @property
    def electrostatic_lattice_energy_kj_per_mol(self) -> float:
        """Positive energy to separate the point-charge solid into its ions (no repulsion), kJ/mol."""
        return -self.per_formula_unit * EV_TO_KJ_PER_MOL

    def to_dict(self):
        return {
            "rule": self.rule, "formula": self.formula, "formula_units": self.formula_units,
            "total_energy_eV": self.total, "internal_energy_eV": self.internal,
            "interionic_energy_eV": self.interionic, "interionic_per_formula_unit_eV": self.per_formula_unit,
            "interionic_per_formula_unit_kJ_per_mol": self.per_formula_unit * EV_TO_KJ_PER_MOL,
            "error_estimate_eV": self.error_estimate, "ions": self.ions.to_dict(), "note": self.note,
            "sign_convention": "signed electrostatic energies per cell unless named per formula unit",
        }


def interionic_energy(crystal, rule="centre", tol=SUM_TOL, method="auto", found=None,
                      tolerance=DEFAULT_BOND_TOLERANCE) -> InterionicEnergy:
    """Inter-ion electrostatic energy of a crystal holding polyatomic ions.

    Parameters
    ----------
    crystal : Crystal
        Atoms with charges; the charges of atoms outside ions are used as given.
    rule : {"centre", "formal", "equilibrated"}
        How each ion's charge is placed (see the module docstring).
    tol, method : accuracy and engine of the Ewald sum (see :func:`madelung.ewald`).
    found : PolyatomicIons, optional
        Ions already found (default: :func:`find_polyatomic_ions` with ``tolerance``).

    Returns
    -------
    InterionicEnergy

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253; H. D. B. Jenkins et al., Inorg. Chem. 38 (1999) 3609.
    """
    _rule(rule)
    found = find_polyatomic_ions(crystal, tolerance) if found is None else found
    centred = centred_crystal(crystal, found)
    if rule == "centre":
        placed, internal = centred, 0.0
    else:
        charges = spread_charges(crystal, found, rule)
        placed = crystal.with_charges(charges)
        internal = sum(internal_energy(ion, charges[list(ion.members)]) for ion in found.ions)
    result = ewald(placed, tol=tol, method=method)
    return InterionicEnergy(rule, centred.reduced_formula, centred.formula_units, float(result.energy),
                            float(internal), np.array(placed.charges), found, float(result.error_estimate))
