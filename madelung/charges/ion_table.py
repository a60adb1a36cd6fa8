"""The polyatomic ions madelung recognises: formula, name, charge and the formal oxidation states
of their atoms. Every row is a fact of the trade (standard inorganic nomenclature; formal states
by the usual rules: O -2, H +1, F and Cl -1 as ligands).

A group of bonded atoms is recognised when its composition matches a row; the two dioxygen ions
are told apart by their O–O bond length (peroxide about 1.49 Å, superoxide about 1.33 Å, molecular
O2 1.21 Å; facts of the trade, values from memory), with the boundaries given in the rows.
"""

from __future__ import annotations

import re
from dataclasses import dataclass


@dataclass(frozen=True)
class IonKind:
    """One row of the table.

    Attributes
    ----------
    formula : e.g. ``"CO3"`` (the way chemists write it).
    name : e.g. ``"carbonate"``.
    charge : e.g. -2 (e).
    formal_states : element -> formal oxidation state inside the ion; they add up to ``charge``.
    bond_range : (shortest, longest) bond length in Å this row accepts, or None for any.
    """

    formula: str
    name: str
    charge: int
    formal_states: tuple
    bond_range: tuple | None = None

    @property
    def composition(self) -> dict:
        return composition_of(self.formula)


def composition_of(formula) -> dict:
    """``"H2PO4"`` -> ``{"H": 2, "P": 1, "O": 4}``."""
    counts = {}
    for element, number in re.findall(r"([A-Z][a-z]?)(\d*)", formula):
        counts[element] = counts.get(element, 0) + (int(number) if number else 1)
    return counts


def _row(formula, name, charge, states, bond_range=None):
    return IonKind(formula, name, charge, tuple(sorted(states.items())), bond_range)


#: Facts of the trade (names and charges: IUPAC nomenclature of inorganic chemistry; formal states
#: by the usual counting rules).
ION_TABLE = (
    _row("CO3", "carbonate", -2, {"C": 4, "O": -2}),
    _row("NO3", "nitrate", -1, {"N": 5, "O": -2}),
    _row("NO2", "nitrite", -1, {"N": 3, "O": -2}),
    _row("SO4", "sulfate", -2, {"S": 6, "O": -2}),
    _row("SO3", "sulfite", -2, {"S": 4, "O": -2}),
    _row("PO4", "phosphate", -3, {"P": 5, "O": -2}),
    _row("HPO4", "hydrogen phosphate", -2, {"H": 1, "P": 5, "O": -2}),
    _row("H2PO4", "dihydrogen phosphate", -1, {"H": 1, "P": 5, "O": -2}),
    _row("SiO4", "orthosilicate (isolated tetrahedron)", -4, {"Si": 4, "O": -2}),
    _row("BO3", "borate (orthoborate)", -3, {"B": 3, "O": -2}),
    _row("ClO4", "perchlorate", -1, {"Cl": 7, "O": -2}),
    _row("ClO3", "chlorate", -1, {"Cl": 5, "O": -2}),
    _row("BF4", "tetrafluoroborate", -1, {"B": 3, "F": -1}),
    _row("PF6", "hexafluorophosphate", -1, {"P": 5, "F": -1}),
    _row("AlCl4", "tetrachloroaluminate", -1, {"Al": 3, "Cl": -1}),
    _row("CN", "cyanide", -1, {"C": 2, "N": -3}),
    _row("N3", "azide", -1, {"N": -1 / 3}),
    _row("O2", "peroxide", -2, {"O": -1}, (1.40, 1.60)),
    _row("O2", "superoxide", -1, {"O": -0.5}, (1.24, 1.40)),
    _row("OH", "hydroxide", -1, {"O": -2, "H": 1}),
    _row("NH4", "ammonium", 1, {"N": -3, "H": 1}),
    _row("H3O", "oxonium (hydronium)", 1, {"O": -2, "H": 1}),
    _row("C2", "carbide (acetylide)", -2, {"C": -1}),
    _row("H2O", "water (neutral molecule of crystallisation)", 0, {"O": -2, "H": 1}),
)

#: Metal–ligand pairs that bond although one partner is a metal (from the rows above).
METAL_LIGANDS = (("Al", "Cl"),)


def match(composition, bond_lengths) -> IonKind | None:
    """The table row with this composition whose bond range holds every bond, or None."""
    for kind in ION_TABLE:
        if kind.composition != composition:
            continue
        if kind.bond_range is not None and not all(kind.bond_range[0] <= d < kind.bond_range[1]
                                                   for d in bond_lengths):
            continue
        return kind
    return None
