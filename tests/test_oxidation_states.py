"""Formal oxidation states of mixed-valence and low-valence oxides, assigned from the bare structure.

Each structure is built from literature lattice parameters and atomic coordinates with no
oxidation state given (element symbols only), then :func:`assign_oxidation_states` must find the
formal states every inorganic chemist knows (facts of the trade). Parameters are from memory of
the crystallographic literature (R. W. G. Wyckoff, "Crystal Structures", 2nd ed., Interscience,
1963-1971, and the papers named); they are close enough that bond lengths come out as the
literature has them (checked in ``test_bond_lengths_are_those_of_the_literature``).
"""

import numpy as np
import pytest
from ase.spacegroup import crystal

from madelung import Crystal
from madelung.charges import assign_oxidation_states
from madelung.charges.oxidation import mixed_note

CUBIC = [90, 90, 90]
HEXAGONAL = [90, 90, 120]

# name: (ase.spacegroup.crystal arguments, site labels in basis order, expected state per label)
STRUCTURES = {
    # cuprite Pn-3m, origin choice 1: O 2a, Cu 4b; a = 4.2696 Å (Wyckoff, from memory). Cu+ (fact of the trade)
    "Cu2O": (dict(symbols=["Cu", "O"], basis=[(0.25, 0.25, 0.25), (0, 0, 0)], spacegroup=224, setting=1,
                  cellpar=[4.2696] * 3 + CUBIC), {"Cu1": 1, "O1": -2}),
    # Ag2O, cuprite type, a = 4.736 Å (Wyckoff, from memory). Ag+
    "Ag2O": (dict(symbols=["Ag", "O"], basis=[(0.25, 0.25, 0.25), (0, 0, 0)], spacegroup=224, setting=1,
                  cellpar=[4.736] * 3 + CUBIC), {"Ag1": 1, "O1": -2}),
    # corundum-type R-3c (hexagonal axes): M 12c (0,0,z), O 18e (x,0,1/4); from memory of
    # Ti2O3: a 5.157, c 13.61, z 0.3446, x 0.3125; V2O3: a 4.952, c 14.003, z 0.3463, x 0.3121;
    # Cr2O3: a 4.959, c 13.594, z 0.3475, x 0.3058 (Wyckoff; Newnham & de Haan, Z. Kristallogr. 117 (1962) 235)
    "Ti2O3": (dict(symbols=["Ti", "O"], basis=[(0, 0, 0.3446), (0.3125, 0, 0.25)], spacegroup=167,
                   cellpar=[5.157, 5.157, 13.61] + HEXAGONAL), {"Ti1": 3, "O1": -2}),
    "V2O3": (dict(symbols=["V", "O"], basis=[(0, 0, 0.3463), (0.3121, 0, 0.25)], spacegroup=167,
                  cellpar=[4.952, 4.952, 14.003] + HEXAGONAL), {"V1": 3, "O1": -2}),
    "Cr2O3": (dict(symbols=["Cr", "O"], basis=[(0, 0, 0.3475), (0.3058, 0, 0.25)], spacegroup=167,
                   cellpar=[4.959, 4.959, 13.594] + HEXAGONAL), {"Cr1": 3, "O1": -2}),
    # rutile type P4_2/mnm: M 2a, O 4f (x,x,0). VO2 above 340 K: a 4.554, c 2.851, x 0.300;
    # pyrolusite MnO2: a 4.398, c 2.873, x 0.3053 (Wyckoff, from memory)
    "VO2": (dict(symbols=["V", "O"], basis=[(0, 0, 0), (0.300, 0.300, 0)], spacegroup=136,
                 cellpar=[4.554, 4.554, 2.851] + CUBIC), {"V1": 4, "O1": -2}),
    "MnO2": (dict(symbols=["Mn", "O"], basis=[(0, 0, 0), (0.3053, 0.3053, 0)], spacegroup=136,
                  cellpar=[4.398, 4.398, 2.873] + CUBIC), {"Mn1": 4, "O1": -2}),
    # hausmannite I4_1/amd, origin choice 2: Mn2+ tetrahedral 4a, Mn3+ octahedral 8d, O 16h (0,y,z);
    # a 5.765, c 9.442, y 0.4716, z 0.2584 (from memory of Jarosch, Mineral. Petrol. 37 (1987) 15)
    "Mn3O4": (dict(symbols=["Mn", "Mn", "O"], basis=[(0, 0.75, 0.125), (0, 0, 0.5), (0, 0.4716, 0.2584)],
                   spacegroup=141, setting=2, cellpar=[5.765, 5.765, 9.442] + CUBIC),
              {"Mn1": 2, "Mn2": 3, "O1": -2}),
    # spinels Fd-3m, origin choice 2: A 8a, B 16d, O 32e (x,x,x).
    # LiMn2O4: a 8.245, x 0.2635 (Thackeray et al., Mater. Res. Bull. 18 (1983) 461, from memory): Mn +3.5
    "LiMn2O4": (dict(symbols=["Li", "Mn", "O"], basis=[(0.125,) * 3, (0.5,) * 3, (0.2635,) * 3], spacegroup=227,
                     setting=2, cellpar=[8.245] * 3 + CUBIC), {"Li1": 1, "Mn1": 3.5, "O1": -2}),
    # magnetite above the Verwey transition: a 8.396, x 0.2549 (Wyckoff, from memory): Fe3+ on 8a,
    # Fe2+/Fe3+ on 16d (average +2.5)
    "Fe3O4": (dict(symbols=["Fe", "Fe", "O"], basis=[(0.125,) * 3, (0.5,) * 3, (0.2549,) * 3], spacegroup=227,
                   setting=2, cellpar=[8.396] * 3 + CUBIC), {"Fe1": 3, "Fe2": 2.5, "O1": -2}),
    # Co3O4 normal spinel: a 8.084, x 0.2631 (Wyckoff, from memory): Co2+ 8a, Co3+ 16d
    "Co3O4": (dict(symbols=["Co", "Co", "O"], basis=[(0.125,) * 3, (0.5,) * 3, (0.2631,) * 3], spacegroup=227,
                   setting=2, cellpar=[8.084] * 3 + CUBIC), {"Co1": 2, "Co2": 3, "O1": -2}),
    # LiNiO2 (alpha-NaFeO2 type) R-3m: Ni 3a, Li 3b, O 6c (0,0,z); a 2.878, c 14.19, z 0.2584 (from memory): Ni3+
    "LiNiO2": (dict(symbols=["Li", "Ni", "O"], basis=[(0, 0, 0.5), (0, 0, 0), (0, 0, 0.2584)], spacegroup=166,
                    cellpar=[2.878, 2.878, 14.19] + HEXAGONAL), {"Li1": 1, "Ni1": 3, "O1": -2}),
    # rock salt: NiO a 4.177 Å, FeO a 4.332 Å (stoichiometric limit) (Wyckoff, from memory)
    "NiO": (dict(symbols=["Ni", "O"], basis=[(0, 0, 0), (0.5, 0.5, 0.5)], spacegroup=225,
                 cellpar=[4.177] * 3 + CUBIC), {"Ni1": 2, "O1": -2}),
    "FeO": (dict(symbols=["Fe", "O"], basis=[(0, 0, 0), (0.5, 0.5, 0.5)], spacegroup=225,
                 cellpar=[4.332] * 3 + CUBIC), {"Fe1": 2, "O1": -2}),
    # minium Pb3O4 P4_2/mbc: Pb(IV) 4d, Pb(II) 8h (x,y,0), O1 8g (x,x+1/2,1/4), O2 8h; a 8.815, c 6.565
    # (from memory of Gavarri & Weigel, J. Solid State Chem. 13 (1975) 252)
    "Pb3O4": (dict(symbols=["Pb", "Pb", "O", "O"],
                   basis=[(0, 0.5, 0.25), (0.1418, 0.1677, 0), (0.6705, 0.1705, 0.25), (0.0977, 0.6264, 0)],
                   spacegroup=135, cellpar=[8.815, 8.815, 6.565] + CUBIC),
              {"Pb1": 4, "Pb2": 2, "O1": -2, "O2": -2}),
}

# Shortest cation-oxygen distances, Å, of the literature structures (from memory): what the
# parameters above must reproduce within 0.03 Å for the test to mean anything.
BONDS = {"Cu2O": ("Cu1", 1.849), "Ag2O": ("Ag1", 2.05), "Ti2O3": ("Ti1", 2.03), "V2O3": ("V1", 1.97),
         "Cr2O3": ("Cr1", 1.965), "VO2": ("V1", 1.92), "MnO2": ("Mn1", 1.88), "Mn3O4": ("Mn1", 2.04),
         "LiMn2O4": ("Mn1", 1.96), "Fe3O4": ("Fe1", 1.89), "Co3O4": ("Co1", 1.93), "LiNiO2": ("Ni1", 1.97),
         "NiO": ("Ni1", 2.0885), "FeO": ("Fe1", 2.166), "Pb3O4": ("Pb1", 2.14)}


def bare(name):
    """The structure with every charge zero and labels Element1, Element2, ... in basis order."""
    arguments, _ = STRUCTURES[name]
    atoms = crystal(**arguments, primitive_cell=False)
    counts, names = {}, []
    for symbol in arguments["symbols"]:
        counts[symbol] = counts.get(symbol, 0) + 1
        names.append(f"{symbol}{counts[symbol]}")
    labels = [names[t] for t in atoms.arrays["spacegroup_kinds"]]
    return Crystal(atoms.cell[:], atoms.positions, np.zeros(len(atoms)), atoms.get_chemical_symbols(), labels,
                   source=name)


@pytest.mark.parametrize("name", sorted(STRUCTURES))
def test_bond_lengths_are_those_of_the_literature(name):
    c = bare(name)
    label, expected = BONDS[name]
    i = c.labels.index(label)
    d = c.positions - c.positions[i]
    frac = np.linalg.solve(c.cell.T, d.T).T
    frac -= np.round(frac)
    lengths = np.linalg.norm(frac @ c.cell, axis=1)
    oxygen = np.array([s == "O" for s in c.symbols])
    assert lengths[oxygen].min() == pytest.approx(expected, abs=0.03)


@pytest.mark.parametrize("name", sorted(STRUCTURES))
def test_formal_states_of_the_bare_structure(name):
    crystal_ = bare(name)
    assignment = assign_oxidation_states(crystal_)
    expected = STRUCTURES[name][1]
    got = {g.label: assignment.best.states[g.index][0] for g in assignment.groups}
    assert got == pytest.approx(expected), assignment.describe()
    assert "misfit" in assignment.reason          # the evidence is always shown


def test_mixed_valence_is_named_by_the_two_neighbouring_states():
    assignment = assign_oxidation_states(bare("LiMn2O4"))
    assert "Mn+3.5 (Mn3+/Mn4+ average)" in assignment.describe()
    assert mixed_note("Fe", 2.5) == " (Fe2+/Fe3+ average)"
    assert mixed_note("Mn", 3.0) == ""


def test_integer_only_hausmannite_shows_the_wrong_alternative_with_its_misfit():
    # integer states only: Mn2+ tetrahedral / Mn3+ octahedral must beat Mn4+ tetrahedral / Mn2+
    # octahedral, and the reason must show both misfits, not call either "the only" one
    assignment = assign_oxidation_states(bare("Mn3O4"), mixing_denominator=1)
    got = {g.label: assignment.best.states[g.index][0] for g in assignment.groups}
    assert got == {"Mn1": 2, "Mn2": 3, "O1": -2}
    assert len(assignment.candidates) >= 2 and "the only" not in assignment.reason
    assert "misfit" in assignment.reason
    worse = assignment.candidates[1]
    assert worse.bond_valence_misfit > 3 * assignment.best.bond_valence_misfit


def test_rare_states_are_searched_when_the_common_ones_cannot_be_neutral():
    # CrO2, rutile type: a 4.421, c 2.916, O x 0.301 (Wyckoff, from memory). Cr4+ (fact of the trade)
    # is not among chromium's common states (2, 3, 6), so the search must widen and say so.
    atoms = crystal(["Cr", "O"], basis=[(0, 0, 0), (0.301, 0.301, 0)], spacegroup=136,
                    cellpar=[4.421, 4.421, 2.916] + CUBIC, primitive_cell=False)
    c = Crystal(atoms.cell[:], atoms.positions, np.zeros(len(atoms)), atoms.get_chemical_symbols())
    assignment = assign_oxidation_states(c)
    assert assignment.searched_rare_states
    assert assignment.best.states[0][0] == 4 and assignment.best.rare_sites == 2
    common = assign_oxidation_states(bare("Cu2O"))
    assert not common.searched_rare_states and common.best.rare_sites == 0
