"""Symmetry: space groups, Wyckoff orbits and standardized cells of the prototypes."""

import re
from functools import lru_cache
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from madelung import Crystal, InputError, ewald
from madelung.cli import main
from madelung.structure.symmetry import analyse, crystal_symmetry, standard_cell

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"

# Space-group numbers and Wyckoff positions (multiplicity + letter) of each site, in the
# settings the files use. Source: International Tables for Crystallography, Vol. A, the
# space-group tables of the groups named (these site assignments of the structure types are
# facts of the trade; written down from memory).
ITA = {
    "rocksalt-NaCl.cif": (225, "Fm-3m", {"Na1": "4a", "Cl1": "4b"}),
    "rocksalt-MgO.cif": (225, "Fm-3m", {"Mg1": "4a", "O1": "4b"}),
    "caesium-chloride-CsCl.cif": (221, "Pm-3m", {"Cs1": "1a", "Cl1": "1b"}),
    "zincblende-ZnS.cif": (216, "F-43m", {"Zn1": "4a", "S1": "4c"}),
    "wurtzite-ZnO-ideal.cif": (186, "P6_3mc", {"Zn1": "2b", "O1": "2b"}),
    "fluorite-CaF2.cif": (225, "Fm-3m", {"Ca1": "4a", "F1": "8c"}),
    "rutile-TiO2.cif": (136, "P4_2/mnm", {"Ti1": "2a", "O1": "4f"}),
    "corundum-Al2O3.cif": (167, "R-3c", {"Al1": "12c", "O1": "18e"}),
    "spinel-MgAl2O4.cif": (227, "Fd-3m", {"Mg1": "8a", "Al1": "16d", "O1": "32e"}),
    "inverse-spinel-Fe3O4.cif": (227, "Fd-3m", {"Fe1": "8a", "Fe2": "16d", "O1": "32e"}),
    "perovskite-SrTiO3.cif": (221, "Pm-3m", {"Sr1": "1a", "Ti1": "1b", "O1": "3c"}),
    "ilmenite-FeTiO3.cif": (148, "R-3", {"Fe1": "6c", "Ti1": "6c", "O1": "18f"}),
    "layered-rocksalt-LiCoO2.cif": (166, "R-3m", {"Li1": "3a", "Co1": "3b", "O1": "6c"}),
    "layered-perovskite-Sr2TiO4.cif": (139, "I4/mmm", {"Sr1": "4e", "Ti1": "2a", "O1": "4c", "O2": "4e"}),
}


@lru_cache(maxsize=None)
def load(name):
    """The prototype with its charges (magnetite's 16d site has none in the file: assigned)."""
    return Crystal.from_file(STRUCTURES / name, charges="auto" if "Fe3O4" in name else None)


@pytest.mark.parametrize("name", sorted(ITA))
def test_space_group_and_wyckoff_positions_match_international_tables(name):
    number, symbol, sites = ITA[name]
    crystal = load(name)
    info = crystal_symmetry(crystal)
    assert info.number == number
    assert info.symbol == symbol
    found = {crystal.labels[o.representative]: o.wyckoff_label for o in info.orbits}
    assert found == sites
    # every site of an orbit has the same label, and the orbits partition the cell
    assert sum(len(o.sites) for o in info.orbits) == len(crystal)
    for orbit in info.orbits:
        assert len({crystal.labels[i] for i in orbit.sites}) == 1


def test_multiplicity_is_per_conventional_cell_whatever_cell_is_analysed():
    crystal = load("rocksalt-NaCl.cif")
    for cell in (crystal.repeat(2), standard_cell(crystal, "primitive")):
        info = crystal_symmetry(cell)
        assert sorted(o.wyckoff_label for o in info.orbits) == ["4a", "4b"]  # ITA Vol. A, Fm-3m


@pytest.mark.parametrize("name, primitive_sites", [
    ("rocksalt-NaCl.cif", 2),          # F centring: 8 / 4 (fact of the trade)
    ("spinel-MgAl2O4.cif", 14),        # 56 / 4
    ("corundum-Al2O3.cif", 10),        # R centring on hexagonal axes: 30 / 3
    ("layered-rocksalt-LiCoO2.cif", 4),  # 12 / 3
    ("rutile-TiO2.cif", 6),            # primitive already
    ("layered-perovskite-Sr2TiO4.cif", 7),  # I centring: 14 / 2
])
def test_primitive_and_conventional_cells_give_the_same_energy_per_formula_unit(name, primitive_sites):
    crystal = load(name)
    energies = {}
    for kind in ("input", "conventional", "primitive"):
        cell = standard_cell(crystal, kind)
        if kind == "primitive":
            assert len(cell) == primitive_sites
        assert abs(cell.net_charge) < 1e-12
        energies[kind] = ewald(cell, tol=1e-10).energy / cell.formula_units
    # the prototypes are exactly symmetric, so idealization moves nothing measurable
    assert energies["primitive"] == pytest.approx(energies["conventional"], rel=1e-9)
    assert energies["input"] == pytest.approx(energies["conventional"], rel=1e-7)


def test_tolerance_decides_whether_a_slightly_displaced_ion_keeps_the_symmetry():
    crystal = load("rocksalt-NaCl.cif")
    positions = np.array(crystal.positions)
    positions[0] += [0.003, 0.0, 0.0]          # 0.003 Å: below a CIF's usual precision
    moved = crystal.replace(positions=positions)
    assert crystal_symmetry(moved, symmetry_tolerance=1e-2).number == 225
    assert crystal_symmetry(moved, symmetry_tolerance=1e-4).number != 225
    with pytest.raises(InputError):
        crystal_symmetry(moved, symmetry_tolerance=-1.0)


@settings(max_examples=10, deadline=None)
@given(st.tuples(*[st.floats(-1, 1)] * 3))
def test_space_group_and_orbits_do_not_depend_on_the_origin(shift):
    crystal = load("perovskite-SrTiO3.cif")
    info = crystal_symmetry(crystal)
    moved = analyse(crystal.cell, crystal.fractional_positions + np.array(shift), [1, 2, 3, 3, 3])
    assert moved.number == info.number == 221
    assert sorted(o.wyckoff_label for o in moved.orbits) == ["1a", "1b", "3c"]  # ITA Vol. A, Pm-3m


def test_sites_command_prints_one_row_per_orbit_with_wyckoff_letters(capsys):
    assert main(["sites", str(STRUCTURES / "spinel-MgAl2O4.cif")]) == 0
    out = capsys.readouterr().out
    rows = [line.split() for line in out.splitlines() if re.match(r"^\s+\d+\s+\S+\s+\S+\s+\d+[a-z]\s", line)]
    assert [(r[1], r[3]) for r in rows] == [("Mg1", "8a"), ("Al1", "16d"), ("O1", "32e")]
    assert "Fd-3m (No. 227)" in out
    assert main(["sites", str(STRUCTURES / "spinel-MgAl2O4.cif"), "--all"]) == 0
    out = capsys.readouterr().out
    assert len([line for line in out.splitlines() if re.match(r"^\s+\d+\s+\S+\s+\S+\s+\d+[a-z]\s", line)]) == 56


def test_sites_command_cells_agree_on_energy_per_formula_unit(capsys):
    import json

    values = []
    for cell in ("input", "primitive", "conventional"):
        assert main(["sites", str(STRUCTURES / "corundum-Al2O3.cif"), "--cell", cell, "--json"]) == 0
        data = json.loads(capsys.readouterr().out)
        values.append(data["energy_per_formula_unit_eV"])
        assert {o["wyckoff"] for o in data["orbits"]} == {"c", "e"}  # ITA Vol. A, R-3c: 12c, 18e
    assert values[1] == pytest.approx(values[2], rel=1e-9)
    assert values[0] == pytest.approx(values[2], rel=1e-7)
