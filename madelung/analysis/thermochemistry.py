"""The Born–Haber cycle: a lattice energy from measured enthalpies.

For a binary ionic solid M_a X_b with ions M^(z+) and X^(z-), per mole of formula units (kJ/mol)::

    U_cycle = -dH_f(M_a X_b, s)                 the solid back to its elements
              + a dH_atom(M) + b dH_atom(X)     elements to gaseous atoms
              + a sum_{k<=z+} IE_k(M)           atoms to cations
              + b sum_{k<=|z-|} EA_k(X)         atoms to anions

with ``dH_atom`` the enthalpy of atomisation per mole of gaseous atoms (the sublimation
enthalpy of a metal; half the dissociation enthalpy of a diatomic gas, plus half the
vaporisation or sublimation enthalpy of Br2(l) or I2(s)), ``IE_k`` the successive
ionisation energies, and ``EA_k`` the *electron-attachment* enthalpies X^(k-1)- + e -> X^k-,
negative when energy is released (Cl: about -349 kJ/mol). Note the sign: the element
library lists electron affinities as positive energies released (in eV); they are converted
here to attachment enthalpies in kJ/mol.

The result is the handbook lattice energy: the positive energy to separate the solid into
gaseous ions. Handbooks mix 0 K ionisation energies and electron affinities with 298 K
enthalpies; the few kJ/mol this costs are far below the differences the comparison looks for.
A cycle value well above the ionic-model value (more than about 8 %) says the solid holds
binding the point-charge model lacks: covalent character (silver halides are the classic case).
The default threshold is 8 % (``COVALENT_THRESHOLD``), a rule of thumb, not a sharp criterion.

Inputs as a TOML file::

    compound = "NaCl"
    charges = { Na = 1, Cl = -1 }        # optional when the common oxidation states settle it
    formation = -411.2                   # kJ/mol, standard enthalpy of formation of the solid
    [atomisation]                        # kJ/mol of gaseous atoms (sublimation for metals)
    Na = 107.3
    [dissociation]                       # kJ/mol of X2 molecules; half is taken per atom
    Cl = 242.6
    [ionisation]                         # optional, kJ/mol; a list gives IE_1, IE_2, ...
    [electron_affinity]                  # optional, attachment enthalpies kJ/mol, list for X2-, X3-

References
----------
M. Born, Verh. Dtsch. Phys. Ges. 21 (1919) 13; F. Haber, Verh. Dtsch. Phys. Ges. 21 (1919) 750.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass

from ..errors import InputError
from ..units import EV_TO_KJ_PER_MOL
from .lattice_energy import LATTICE_SIGN
from ..structure.elements import common_oxidation_states, electron_affinity as library_affinity, ionisation_energies

#: A model lattice energy this far below the cycle value (fraction) is flagged as covalent character.
#: A rule of thumb: rigid-ion and Kapustinskii values of clearly ionic alkali halides fall within
#: about 3-7 % of the cycle, silver halides 10-20 % short of it.
COVALENT_THRESHOLD = 0.08

_FORMULA_TOKEN = re.compile(r"([A-Z][a-z]?)(\d*)")


def parse_formula(formula) -> dict:
    """``"CaF2"`` -> ``{"Ca": 1, "F": 2}`` (element symbols and counts, order kept)."""
    text = str(formula).strip()
    if not text or "".join(m.group(0) for m in _FORMULA_TOKEN.finditer(text)) != text:
        raise InputError(f"compound {formula!r} is not a simple formula such as NaCl or CaF2")
    counts = {}
    for element, count in _FORMULA_TOKEN.findall(text):
        counts[element] = counts.get(element, 0) + (int(count) if count else 1)
    return counts


@dataclass(frozen=True)
class CycleStep:
    """One step of the cycle: ``text``, enthalpy ``value`` in kJ/mol (per mole of formula units,
    counts included), and ``source`` ("given" or "element library")."""

    text: str
    value: float
    source: str

    def to_dict(self) -> dict:
        """JSON-ready: the step in words, its enthalpy kJ/mol, where the value came from."""
        return {"step": self.text, "kJ_per_mol": self.value, "source": self.source}


@dataclass(frozen=True)
class CycleComparison:
    """A model's lattice energy beside the Born–Haber cycle's (:meth:`BornHaberCycle.compare`).

    Attributes
    ----------
    model : the model's lattice energy, kJ/mol (positive).
    difference : cycle - model, kJ/mol.  fraction : difference / cycle value.
    covalent_character : True when the model falls more than ``threshold`` (a fraction) below the
        cycle: binding beyond point charges.
    """

    model: float
    difference: float
    fraction: float
    covalent_character: bool
    threshold: float

    def to_dict(self) -> dict:
        """JSON-ready, kJ/mol per formula unit."""
        return {"lattice_energy_kJ_per_mol": self.model, "cycle_minus_model_kJ_per_mol": self.difference,
                "relative": self.fraction, "covalent_character": self.covalent_character}


@dataclass(frozen=True)
class BornHaberCycle:
    """A Born–Haber cycle.

    Attributes
    ----------
    compound : formula.
    cation, anion : (symbol, charge, count per formula unit).
    steps : the steps in order; their sum is the lattice energy.
    lattice_energy : positive energy to separate the solid into gaseous ions, kJ/mol.
    electron_transfer : sum of the ionisation and electron-attachment steps, kJ/mol (the gas-phase
        transfer of electrons from cations to anions; positive: it costs energy).
    """

    compound: str
    cation: tuple
    anion: tuple
    steps: tuple
    lattice_energy: float
    electron_transfer: float

    def compare(self, model_lattice_energy, threshold=COVALENT_THRESHOLD) -> "CycleComparison":
        """The cycle beside a model's lattice energy (kJ/mol): their difference, its fraction of the
        cycle value, and whether it flags covalent character (model more than ``threshold``, default
        8 %, below the cycle)."""
        model = float(model_lattice_energy)
        difference = self.lattice_energy - model
        fraction = difference / self.lattice_energy
        return CycleComparison(model, difference, fraction, bool(fraction > threshold), float(threshold))

    def to_dict(self) -> dict:
        """JSON-ready: the compound, the steps, the cycle's lattice energy and the gas-phase electron
        transfer (kJ/mol per formula unit) and the sign convention."""
        return {"compound": self.compound, "steps": [step.to_dict() for step in self.steps],
                "lattice_energy_kJ_per_mol": self.lattice_energy,
                "electron_transfer_kJ_per_mol": self.electron_transfer, "sign_convention": LATTICE_SIGN}


def _as_list(value, name):
    values = value if isinstance(value, (list, tuple)) else [value]
    out = []
    for v in values:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise InputError(f"{name} must be a number (or a list of numbers) in kJ/mol, got {v!r}")
        out.append(float(v))
    return out


def _infer_charges(counts):
    (m, a), (x, b) = counts.items()
    anion_states = [s for s in common_oxidation_states(x) if s < 0]
    cation_states = [s for s in common_oxidation_states(m) if s > 0]
    for zx in sorted(anion_states):
        total = -zx * b
        if total % a == 0 and total // a in cation_states:
            return {m: total // a, x: zx}
    raise InputError(f"cannot settle the ion charges of {m}{a if a > 1 else ''}{x}{b if b > 1 else ''} from the "
                     f"common oxidation states; give them, e.g. charges = {{ {m} = 2, {x} = -1 }}")


def born_haber_cycle(compound, formation, atomisation=None, dissociation=None, charges=None,
                     ionisation=None, electron_affinity=None) -> BornHaberCycle:
    """Lattice energy of a binary ionic solid from the Born–Haber cycle.

    Parameters
    ----------
    compound : str
        Formula of a binary compound, cation first (``"NaCl"``, ``"MgO"``, ``"CaF2"``).
    formation : float
        Standard enthalpy of formation of the solid, kJ/mol (negative for a stable salt).
    atomisation : dict, optional
        Enthalpy of atomisation per mole of gaseous atoms, kJ/mol, by element.
    dissociation : dict, optional
        Dissociation enthalpy of the X2 molecule, kJ/mol, by element; half is taken per atom
        (used for elements not in ``atomisation``).
    charges : dict, optional
        Ion charges by element; by default from the common oxidation states.
    ionisation : dict, optional
        Ionisation energies, kJ/mol, by element (a number for IE_1, a list for IE_1, IE_2, ...);
        missing ones come from the element library.
    electron_affinity : dict, optional
        Electron-attachment enthalpies, kJ/mol (negative when released), by element (list for
        multiply charged anions). The first comes from the element library if not given; later
        ones (O2-, N3-) have no library value and must be given.

    Returns
    -------
    BornHaberCycle

    References
    ----------
    M. Born, Verh. Dtsch. Phys. Ges. 21 (1919) 13; F. Haber, Verh. Dtsch. Phys. Ges. 21 (1919) 750.
    """
    counts = parse_formula(compound)
    if len(counts) != 2:
        raise InputError(f"compound {compound}: the cycle is written for binary compounds (two elements), "
                         f"got {len(counts)}")
    charges = _infer_charges(counts) if charges is None else {str(k): v for k, v in charges.items()}
    for element in counts:
        if element not in charges:
            raise InputError(f"compound {compound}: no charge given for {element}")
    (m, a), (x, b) = counts.items()
    zm, zx = charges[m], charges[x]
    if not (zm > 0 > zx) or zm != int(zm) or zx != int(zx):
        raise InputError(f"compound {compound}: need a whole positive charge on {m} and a whole negative one "
                         f"on {x}, got {zm:+g} and {zx:+g}")
    zm, zx = int(zm), int(zx)
    if zm * a + zx * b != 0:
        raise InputError(f"compound {compound}: charges {m}{zm:+d} and {x}{zx:+d} do not add up to zero")
    formation = _as_list(formation, "formation")[0]
    atomisation = dict(atomisation or {})
    dissociation = dict(dissociation or {})
    ionisation = dict(ionisation or {})
    affinity = dict(electron_affinity or {})
    missing = []

    steps = [CycleStep(f"{compound}(s) -> elements in their standard states (-formation enthalpy)", -formation,
                       "given")]
    for element, count in ((m, a), (x, b)):
        if element in atomisation:
            value = _as_list(atomisation[element], f"atomisation of {element}")[0]
            steps.append(CycleStep(f"{count} x atomisation of {element}", count * value, "given"))
        elif element in dissociation:
            value = _as_list(dissociation[element], f"dissociation of {element}2")[0]
            steps.append(CycleStep(f"{count} x 1/2 dissociation of {element}2", count * value / 2.0, "given"))
        else:
            missing.append(f"atomisation (or dissociation) enthalpy of {element}")

    given = _as_list(ionisation[m], f"ionisation of {m}") if m in ionisation else []
    library = ionisation_energies(m)
    transfer = 0.0
    for k in range(1, zm + 1):
        if k <= len(given):
            value, source = given[k - 1], "given"
        elif k in library:
            value, source = library[k] * EV_TO_KJ_PER_MOL, "element library"
        else:
            missing.append(f"ionisation energy {k} of {m}")
            continue
        before = m if k == 1 else f"{m}{'' if k == 2 else k - 1}+"
        after = f"{m}{'' if k == 1 else k}+"
        steps.append(CycleStep(f"{a} x ionisation {before} -> {after}", a * value, source))
        transfer += a * value

    given = _as_list(affinity[x], f"electron affinity of {x}") if x in affinity else []
    for k in range(1, -zx + 1):
        if k <= len(given):
            value, source = given[k - 1], "given"
        elif k == 1 and library_affinity(x) is not None:
            value, source = -library_affinity(x) * EV_TO_KJ_PER_MOL, "element library"
        else:
            missing.append(f"electron-attachment enthalpy {k} of {x} ({x}{'' if k == 2 else k - 1}- + e -> {x}{k}-; "
                           "the element library has first affinities only)" if k > 1 else f"electron affinity of {x}")
            continue
        before = x if k == 1 else f"{x}{'' if k == 2 else k - 1}-"
        after = f"{x}{'' if k == 1 else k}-"
        steps.append(CycleStep(f"{b} x electron attachment {before} -> {after}", b * value, source))
        transfer += b * value

    if missing:
        raise InputError(f"compound {compound}: missing " + "; ".join(missing))
    total = sum(s.value for s in steps)
    return BornHaberCycle(compound, (m, zm, a), (x, zx, b), tuple(steps), total, transfer)


def read_cycle_file(path) -> dict:
    """Read a cycle input file (TOML, see the module docstring) into keyword arguments of
    :func:`born_haber_cycle`."""
    import tomllib

    path = os.fspath(path)
    if not os.path.isfile(path):
        raise InputError(f"{path}: no such cycle input file")
    try:
        with open(path, "rb") as handle:
            data = tomllib.load(handle)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None
    allowed = {"compound", "formation", "atomisation", "dissociation", "charges", "ionisation",
               "electron_affinity", "comment", "source"}
    unknown = sorted(set(data) - allowed)
    if unknown:
        raise InputError(f"{path}: unknown key {unknown[0]!r} (known: {', '.join(sorted(allowed - {'comment', 'source'}))})")
    for key in ("compound", "formation"):
        if key not in data:
            raise InputError(f"{path}: missing {key!r}" + (" (standard enthalpy of formation, kJ/mol)"
                                                           if key == "formation" else ""))
    for key in ("atomisation", "dissociation", "charges", "ionisation", "electron_affinity"):
        if key in data and not isinstance(data[key], dict):
            raise InputError(f"{path}: {key!r} must be a table of element = value")
    data.pop("comment", None)
    data.pop("source", None)
    return data
