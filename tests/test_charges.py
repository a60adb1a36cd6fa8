"""Charges: oxidation-state assignment, bond-valence sums, charge equilibration, partial occupancy."""

import json
import math
import re
from functools import lru_cache
from pathlib import Path

import numpy as np
import pytest

from madelung import Crystal, InputError, MadelungWarning, ewald
from madelung.charges import assign_oxidation_states, bond_valence_sums, equilibrate
from madelung.charges.bond_valence import R0
from madelung.cli import main
from madelung.io.read import read_structure
from madelung.structure.symmetry import crystal_symmetry, standard_cell

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"


def strip_states(text):
    """CIF text without oxidation states: no _atom_type loop, plain element type symbols."""
    text = re.sub(r"loop_\s*\n_atom_type_symbol\s*\n_atom_type_oxidation_number\s*\n(?:[^\n]+\n)*", "", text)
    return re.sub(r"^(\S+\s+)([A-Z][a-z]?)\d*[+-](?=\s)", r"\1\2", text, flags=re.MULTILINE)


@pytest.fixture(scope="module")
def stripped(tmp_path_factory):
    folder = tmp_path_factory.mktemp("stripped")
    for path in STRUCTURES.glob("*.cif"):
        (folder / path.name).write_text(strip_states(path.read_text()))
    return folder


@lru_cache(maxsize=None)
def bare(name):
    """A prototype with every charge zero (nothing for the assignment to copy)."""
    crystal = read_structure(STRUCTURES / name)
    return Crystal(crystal.cell, crystal.positions, np.zeros(len(crystal)), crystal.symbols, crystal.labels,
                   source=name)


# Accepted formal oxidation states, by site label: facts of the trade (any inorganic chemistry
# text); magnetite above the Verwey transition: Fe3+ on tetrahedral 8a, Fe2+/Fe3+ in equal
# numbers on octahedral 16d, average +2.5 (fact of the trade).
FORMAL = {
    "rocksalt-NaCl.cif": {"Na1": 1, "Cl1": -1}, "rocksalt-KBr.cif": {"K1": 1, "Br1": -1},
    "rocksalt-LiF.cif": {"Li1": 1, "F1": -1}, "rocksalt-NaI.cif": {"Na1": 1, "I1": -1},
    "rocksalt-MgO.cif": {"Mg1": 2, "O1": -2}, "rocksalt-CaO.cif": {"Ca1": 2, "O1": -2},
    "rocksalt-ScN.cif": {"Sc1": 3, "N1": -3}, "caesium-chloride-CsCl.cif": {"Cs1": 1, "Cl1": -1},
    "zincblende-ZnS.cif": {"Zn1": 2, "S1": -2}, "wurtzite-ZnO-ideal.cif": {"Zn1": 2, "O1": -2},
    "fluorite-CaF2.cif": {"Ca1": 2, "F1": -1}, "rutile-TiO2.cif": {"Ti1": 4, "O1": -2},
    "corundum-Al2O3.cif": {"Al1": 3, "O1": -2}, "spinel-MgAl2O4.cif": {"Mg1": 2, "Al1": 3, "O1": -2},
    "inverse-spinel-Fe3O4.cif": {"Fe1": 3, "Fe2": 2.5, "O1": -2},
    "perovskite-SrTiO3.cif": {"Sr1": 2, "Ti1": 4, "O1": -2},
    "ilmenite-FeTiO3.cif": {"Fe1": 2, "Ti1": 4, "O1": -2},
    "layered-rocksalt-LiCoO2.cif": {"Li1": 1, "Co1": 3, "O1": -2},
    "rocksalt-NaBr.cif": {"Na1": 1, "Br1": -1}, "rocksalt-NaF.cif": {"Na1": 1, "F1": -1},
    "rocksalt-KCl.cif": {"K1": 1, "Cl1": -1}, "rocksalt-KF.cif": {"K1": 1, "F1": -1},
    "layered-perovskite-Sr2TiO4.cif": {"Sr1": 2, "Ti1": 4, "O1": -2, "O2": -2},
}


def test_every_prototype_is_listed():
    assert sorted(p.name for p in STRUCTURES.glob("*.cif")) == sorted(FORMAL)


# ------------------------------------------------------------------ oxidation states
@pytest.mark.parametrize("name", sorted(FORMAL))
def test_assigned_states_are_the_accepted_formal_states(name):
    result = assign_oxidation_states(bare(name))
    crystal = bare(name)
    for label, q in zip(crystal.labels, result.charges):
        assert q == pytest.approx(FORMAL[name][label], abs=1e-12)
    assert abs(result.charges.sum()) < 1e-9


@pytest.mark.parametrize("name", sorted(FORMAL))
def test_every_prototype_file_is_usable_with_auto_charges(name):
    crystal = Crystal.from_file(STRUCTURES / name, charges="auto")
    assert [FORMAL[name][label] for label in crystal.labels] == pytest.approx(list(crystal.charges))


@pytest.mark.parametrize("name", ["inverse-spinel-Fe3O4.cif", "spinel-MgAl2O4.cif", "ilmenite-FeTiO3.cif",
                                  "rocksalt-NaCl.cif", "layered-rocksalt-LiCoO2.cif"])
def test_charges_command_on_a_file_without_states_gives_the_accepted_assignment(stripped, name, capsys):
    assert main(["charges", str(stripped / name), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    best = data["candidates"][0]
    found = {row["label"]: row["species"][0]["state"] for row in best["states"]}
    assert found == pytest.approx(FORMAL[name])


def test_magnetite_mixed_valence_and_the_runner_up_is_explained(capsys):
    result = assign_oxidation_states(bare("inverse-spinel-Fe3O4.cif"))
    assert [g.wyckoff for g in result.groups] == ["8a", "16d", "32e"]
    assert result.best.states == ((3.0,), (2.5,), (-2.0,))
    # the normal-spinel arrangement Fe2+ (8a) / Fe3+ (16d) is the runner-up, beaten on bond valence
    assert result.runner_up.states == ((2.0,), (3.0,), (-2.0,))
    assert "bond-valence" in result.reason
    assert result.best.bond_valence_misfit < result.runner_up.bond_valence_misfit
    assert "Fe2+/Fe3+ average" in result.describe()
    # the file itself gives 8a as Fe3+ and leaves 16d open: neutrality alone fixes 16d at +2.5
    crystal = Crystal.from_file(STRUCTURES / "inverse-spinel-Fe3O4.cif", charges="auto")
    assert sorted(set(np.round(crystal.charges, 9))) == [-2.0, 2.5, 3.0]
    assert main(["charges", str(STRUCTURES / "inverse-spinel-Fe3O4.cif"), "--ignore-file-states"]) == 0
    out = capsys.readouterr().out
    assert "runner-up" in out and "why" in out and "16d" in out


def test_electronegativity_decides_which_halogen_is_the_anion():
    # rock salt with I on 4a and Br on 4b: both elements have +1 and -1 among their common states
    crystal = bare("rocksalt-NaBr.cif")
    crystal = crystal.replace(symbols=["I" if s == "Na" else s for s in crystal.symbols])
    result = assign_oxidation_states(crystal)
    states = {g.species[0][0]: s[0] for g, s in zip(result.groups, result.best.states)}
    # Pauling electronegativity Br 2.96 > I 2.66 (periodic-table library; fact of the trade)
    assert states == {"I": 1.0, "Br": -1.0}
    assert result.runner_up is not None and "electronegativity" in result.reason


def test_ranking_energies_and_potentials_agree_with_the_ewald_sum():
    crystal = bare("perovskite-SrTiO3.cif")
    result = assign_oxidation_states(crystal)
    charged = crystal.with_charges(result.charges)
    reference = ewald(charged, tol=1e-10)
    assert result.best.energy_per_formula_unit == pytest.approx(reference.energy / charged.formula_units, rel=1e-6)
    for group, phi in zip(result.groups, result.best.potentials):
        assert phi == pytest.approx(reference.potentials[group.sites[0]], rel=1e-6)
        # cations at negative potential, anions at positive (electrostatic plausibility)
        assert phi * result.charges[group.sites[0]] < 0


def test_no_neutral_assignment_is_an_error_that_suggests_charge():
    crystal = bare("rocksalt-NaCl.cif")
    # "MgLi": neither element has a negative state in any list (MgCl now finds the rare Mg+ / Cl-)
    crystal = crystal.replace(symbols=["Mg" if s == "Na" else "Li" for s in crystal.symbols])
    with pytest.raises(InputError, match="no charge-neutral assignment.*--charge"):
        assign_oxidation_states(crystal)


@pytest.mark.parametrize("symbol, message", [("He", "no known oxidation state"), ("Xx", "unknown element")])
def test_element_without_admissible_state_is_an_error(symbol, message):
    crystal = bare("rocksalt-NaCl.cif")
    crystal = crystal.replace(symbols=[symbol if s == "Na" else s for s in crystal.symbols])
    with pytest.raises(InputError, match=message):
        assign_oxidation_states(crystal)


def test_cli_reports_a_missing_neutral_assignment_in_one_line(tmp_path, capsys):
    path = tmp_path / "MgLi.cif"
    path.write_text(strip_states((STRUCTURES / "rocksalt-NaCl.cif").read_text()).replace(" Na ", " Mg ")
                    .replace(" Cl ", " Li "))
    assert main(["charges", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(path) in err[0] and "--charge" in err[0]


def test_charge_rules_fix_states_for_the_assignment(capsys):
    # force the normal-spinel arrangement on magnetite's 8a site: neutrality then gives 16d Fe3+
    assert main(["charges", str(STRUCTURES / "inverse-spinel-Fe3O4.cif"), "--ignore-file-states",
                 "--charge", "Fe1=2", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert len(data["candidates"]) == 1
    assert [row["species"][0]["state"] for row in data["candidates"][0]["states"]] == [2, 3, -2]


# ------------------------------------------------------------------ bond valence
@pytest.mark.parametrize("name", sorted(FORMAL))
def test_bond_valence_sums_of_the_assignment_are_near_the_formal_states(name):
    crystal = bare(name).with_charges(assign_oxidation_states(bare(name)).charges)
    sums = bond_valence_sums(crystal)
    assert np.all(np.isfinite(sums))
    deviation = np.abs(sums - np.abs(crystal.charges)) / np.abs(crystal.charges)
    # cations within 15 % of the formal state: common practice for ordinary ionic solids
    assert np.all(deviation[crystal.charges > 0] <= 0.15)
    # anions within 20 %: the equatorial oxide of the layered perovskite Sr2TiO4 is overbonded
    # (sum 2.33, 16 %), as in strained layered structures generally (common practice; from memory)
    assert np.all(deviation[crystal.charges < 0] <= 0.20)


def test_bond_valence_sum_of_rock_salt_by_hand():
    crystal = Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif")
    d = np.linalg.norm(crystal.cell[0]) / 2
    # six Cl at a/2 (the twelve next-nearest Na-Cl bonds at a*sqrt(5)/2 are beyond R0 + 1.5 Å)
    expected = 6 * math.exp((R0[("Na", 1, "Cl")] - d) / 0.37)  # V = sum exp((R0 - r)/b), Brown & Altermatt 1985
    assert bond_valence_sums(crystal) == pytest.approx(np.full(len(crystal), expected), rel=1e-12)


# ------------------------------------------------------------------ equilibration
BINARIES = ["rocksalt-NaCl.cif", "rocksalt-KBr.cif", "rocksalt-LiF.cif", "rocksalt-MgO.cif", "rocksalt-CaO.cif",
            "rocksalt-ScN.cif", "caesium-chloride-CsCl.cif", "zincblende-ZnS.cif", "wurtzite-ZnO-ideal.cif",
            "fluorite-CaF2.cif", "rutile-TiO2.cif", "corundum-Al2O3.cif"]


@lru_cache(maxsize=None)
def equilibrated(name):
    return equilibrate(bare(name))


@pytest.mark.parametrize("name", BINARIES)
def test_equilibrated_cation_is_positive_and_charges_sum_to_zero(name):
    crystal, result = bare(name), equilibrated(name)
    assert abs(result.charges.sum()) < 1e-10
    cations = [i for i, q in enumerate(FORMAL[name][label] for label in crystal.labels) if q > 0]
    assert np.all(result.charges[cations] > 0)
    assert np.all(np.abs(result.charges) < np.abs([FORMAL[name][label] for label in crystal.labels]))


@pytest.mark.parametrize("name", ["spinel-MgAl2O4.cif", "corundum-Al2O3.cif", "ilmenite-FeTiO3.cif"])
def test_symmetry_equivalent_sites_get_equal_equilibrated_charges(name):
    crystal, result = bare(name), equilibrated(name)
    info = crystal_symmetry(crystal, by_charge=False)
    assert len(info.orbits) >= 2
    for orbit in info.orbits:
        assert np.ptp(result.charges[list(orbit.sites)]) < 1e-9


def test_equilibration_with_a_net_charge_keeps_the_total():
    result = equilibrate(bare("rutile-TiO2.cif"), total_charge=1.0)
    assert result.charges.sum() == pytest.approx(1.0, abs=1e-10)


def test_equilibrated_charges_do_not_depend_on_the_cell_chosen():
    crystal = bare("spinel-MgAl2O4.cif")
    primitive = standard_cell(crystal, "primitive")
    by_label = lambda c, r: {l: q for l, q in zip(c.labels, r.charges)}  # noqa: E731
    first, second = by_label(primitive, equilibrate(primitive)), by_label(crystal, equilibrated("spinel-MgAl2O4.cif"))
    assert first.keys() == second.keys()
    # the same charges to the accuracy of the sums (tol 1e-10 of the energy scale), not bit for bit
    assert all(first[label] == pytest.approx(second[label], abs=1e-7) for label in first)


def test_charge_transfer_follows_the_electronegativity_difference():
    # Fact of the trade: within a homologous series the charge transfer grows with the
    # electronegativity difference (Pauling: Cl 3.16 > Br 2.96 > I 2.66; Na 0.93 > K 0.82; Mg 1.31 > Ca 1.00).
    q = {name: equilibrated(f"{name}.cif").charges.max() for name in
         ("rocksalt-NaCl", "rocksalt-NaBr", "rocksalt-NaI", "rocksalt-KCl", "rocksalt-KBr", "rocksalt-MgO",
          "rocksalt-CaO")}
    assert q["rocksalt-NaCl"] > q["rocksalt-NaBr"] > q["rocksalt-NaI"]
    assert q["rocksalt-KCl"] > q["rocksalt-KBr"]
    assert q["rocksalt-KCl"] > q["rocksalt-NaCl"]
    assert q["rocksalt-CaO"] > q["rocksalt-MgO"]


def test_shielded_kernel_tends_to_point_charges_when_ions_are_far_apart():
    crystal = bare("rocksalt-NaCl.cif")
    dilute = crystal.replace(cell=crystal.cell * 4, positions=crystal.positions * 4)
    gaussian = equilibrate(dilute, kernel="gaussian")
    point = equilibrate(dilute, kernel="point")
    # erf(r / s) -> 1 once r >> s (s about 2.8 Å here, nearest neighbours 11.3 Å apart)
    assert gaussian.charges == pytest.approx(point.charges, rel=1e-3)


def test_unscreened_point_kernel_is_refused_where_it_is_unstable():
    with pytest.raises(InputError, match="unstable"):
        equilibrate(bare("rocksalt-NaCl.cif"), kernel="point", dielectric=1.0)


def test_equilibration_satisfies_its_own_stationarity_condition():
    from madelung.sums.matrix import coulomb_matrix

    crystal = bare("zincblende-ZnS.cif")
    result = equilibrate(crystal, kernel="point")
    matrix = coulomb_matrix(crystal.cell, crystal.positions, tol=1e-10)
    mu = result.electronegativity + result.hardness * result.charges + matrix @ result.charges / result.dielectric
    assert np.ptp(mu) < 1e-6
    assert mu.mean() == pytest.approx(result.chemical_potential, abs=1e-6)


def test_sites_command_with_equilibrated_charges_lists_every_site(capsys):
    assert main(["sites", str(STRUCTURES / "rutile-TiO2.cif"), "--charges-from", "equilibrate", "--all",
                 "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    charges = [row["charge_e"] for row in data["sites"]]
    assert len(charges) == 6 and abs(sum(charges)) < 1e-10
    assert charges == pytest.approx(list(equilibrated("rutile-TiO2.cif").charges), abs=1e-9)


def test_charges_command_equilibrate_prints_one_row_per_orbit(capsys):
    assert main(["charges", str(STRUCTURES / "spinel-MgAl2O4.cif"), "--method", "equilibrate", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [(o["label"], o["multiplicity"], o["wyckoff"]) for o in data["orbits"]] == \
        [("Mg1", 8, "a"), ("Al1", 16, "d"), ("O1", 32, "e")]
    assert abs(sum(data["charges_e"])) < 1e-9


# ------------------------------------------------------------------ partial occupancy
MIXED = """data_mixed
_cell_length_a 4.30
_cell_length_b 4.30
_cell_length_c 4.30
_cell_angle_alpha 90
_cell_angle_beta 90
_cell_angle_gamma 90
_symmetry_space_group_name_H-M 'F m -3 m'
_space_group_IT_number 225
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_occupancy
M1 {a} 0 0 0 0.5
M2 {b} 0 0 0 0.5
O1 {o} 0.5 0.5 0.5 {occ}
"""


def write_mixed(tmp_path, a="Fe3+", b="Ti4+", o="O2-", occ="1.0", name="mixed.cif"):
    path = tmp_path / name
    path.write_text(MIXED.format(a=a, b=b, o=o, occ=occ))
    return path


def test_mixed_site_gets_the_mean_field_charge_with_a_warning(tmp_path):
    path = write_mixed(tmp_path, occ="0.8")
    # the file's states leave this cell charged (+7.6 e): refused unless a background is asked for
    with pytest.raises(InputError, match=r"net charge of \+7\.6 e.*M1/M2.*O1"):
        Crystal.from_file(path)
    with pytest.warns(MadelungWarning, match="occupancy-weighted mean"):
        crystal = Crystal.from_file(path, allow_net_charge=True)
    site = crystal.labels.index("M1/M2")
    assert crystal.species_label(site) == "Fe0.5Ti0.5"
    assert crystal.charges[site] == pytest.approx(0.5 * 3 + 0.5 * 4)
    oxygen = crystal.labels.index("O1")
    assert crystal.charges[oxygen] == pytest.approx(0.8 * -2)
    assert crystal.species_label(oxygen) == "O0.8"
    with pytest.raises(InputError, match="refused"):
        Crystal.from_file(path, occupancy="error", allow_net_charge=True)


def test_mixed_sites_appear_as_such_in_the_site_table(tmp_path, capsys):
    path = write_mixed(tmp_path, a="Mg2+", b="Ni2+")
    assert main(["sites", str(path)]) == 0
    captured = capsys.readouterr()
    assert "Mg0.5Ni0.5" in captured.out and "4a" in captured.out
    assert "mean" in captured.err
    assert main(["sites", str(path), "--occupancy", "error"]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_auto_assignment_on_a_mixed_site(tmp_path):
    # (Mg0.5Ni0.5)O solid solution without states: Mg2+, Ni2+ (facts of the trade)
    path = write_mixed(tmp_path, a="Mg", b="Ni", o="O")
    with pytest.warns(MadelungWarning):
        crystal = Crystal.from_file(path, charges="auto")
    assert sorted(set(np.round(crystal.charges, 9))) == [-2.0, 2.0]


def test_inverse_spinel_ferrite_with_a_mixed_octahedral_site(tmp_path):
    # NiFe2O4, inverse spinel: Fe3+ on 8a, Ni2+ and Fe3+ sharing 16d (fact of the trade).
    text = strip_states((STRUCTURES / "inverse-spinel-Fe3O4.cif").read_text())
    text = text.replace("Fe2   Fe      16 d          0.5         0.5         0.5  1.0",
                        "Fe2   Fe      16 d          0.5         0.5         0.5  0.5\n"
                        "Ni2   Ni      16 d          0.5         0.5         0.5  0.5")
    path = tmp_path / "NiFe2O4.cif"
    path.write_text(text)
    with pytest.warns(MadelungWarning):
        crystal = Crystal.from_file(path, charges="auto")
    by_label = dict(zip(crystal.labels, crystal.charges))
    assert by_label["Fe1"] == pytest.approx(3.0)
    assert by_label["Fe2/Ni2"] == pytest.approx(0.5 * 3 + 0.5 * 2)
    assert by_label["O1"] == pytest.approx(-2.0)
