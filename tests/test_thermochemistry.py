"""The Born–Haber cycle: element-library data, the NaCl cycle against the handbook, errors that name
what is missing, and the covalent-character flag."""

import json
from pathlib import Path

import pytest

from madelung import InputError
from madelung.analysis.thermochemistry import born_haber_cycle, parse_formula

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"

# NaCl enthalpies, kJ/mol at 298 K, from the NBS/CRC thermochemical tables (CRC Handbook of Chemistry and
# Physics, 84th ed.), from memory: formation of NaCl(s) -411.2, sublimation of Na 107.5,
# dissociation of Cl2 242.6.
NACL = {"compound": "NaCl", "formation": -411.2, "atomisation": {"Na": 107.5}, "dissociation": {"Cl": 242.6}}


def test_gas_phase_electron_transfer_for_nacl():
    # IE(Na) about 495 kJ/mol and EA(Cl) about -349 kJ/mol give about +146 kJ/mol (fact of the trade)
    cycle = born_haber_cycle(**NACL)
    steps = {s.text: s for s in cycle.steps}
    ionisation = next(s for s in cycle.steps if "ionisation" in s.text)
    attachment = next(s for s in cycle.steps if "attachment" in s.text)
    assert ionisation.source == attachment.source == "element library"
    assert ionisation.value == pytest.approx(495, abs=2)
    assert attachment.value == pytest.approx(-349, abs=2)
    assert cycle.electron_transfer == pytest.approx(146, abs=2)
    assert len(steps) == 5


def test_nacl_cycle_lands_near_handbook_value():
    # CRC Handbook "Lattice Energies", 84th ed.: NaCl 786 kJ/mol (from memory)
    cycle = born_haber_cycle(**NACL)
    assert cycle.lattice_energy == pytest.approx(786, rel=0.01)


def test_given_values_override_the_library():
    cycle = born_haber_cycle(**NACL, ionisation={"Na": 500.0}, electron_affinity={"Cl": -350.0})
    assert cycle.electron_transfer == pytest.approx(150.0)
    assert {s.source for s in cycle.steps} == {"given"}


def test_missing_inputs_are_named():
    with pytest.raises(InputError, match="atomisation .*Cl"):
        born_haber_cycle("NaCl", -411.2, {"Na": 107.5})
    # the element library has first electron affinities only: O- + e -> O2- must be given
    with pytest.raises(InputError, match="electron-attachment enthalpy 2 of O"):
        born_haber_cycle("MgO", -601.6, {"Mg": 147.1}, {"O": 498.4})
    with pytest.raises(InputError, match="binary"):
        born_haber_cycle("NaClO", -100, {})
    with pytest.raises(InputError, match="simple formula"):
        parse_formula("na cl")


def test_mgo_cycle_with_second_attachment():
    # MgO, kJ/mol, CRC / NBS tables from memory: formation -601.6, sublimation of Mg 147.1, dissociation of
    # O2 498.4, attachment O -> O- -141 and O- -> O2- +798 (textbook values); handbook lattice energy 3795
    cycle = born_haber_cycle("MgO", -601.6, {"Mg": 147.1}, {"O": 498.4}, electron_affinity={"O": [-141, 798]})
    assert cycle.lattice_energy == pytest.approx(3795, rel=0.02)


def test_covalent_character_flag():
    # AgCl, kJ/mol, from memory (NBS/CRC tables): formation -127.0, atomisation of Ag 284.9; the silver
    # halides are the classic case where the cycle exceeds the ionic model (fact of the trade)
    agcl = born_haber_cycle("AgCl", -127.0, {"Ag": 284.9}, {"Cl": 242.6})
    from madelung.structure.elements import shannon_radius
    from madelung.analysis.lattice_energy import kapustinskii_energy
    from madelung.units import EV_TO_KJ_PER_MOL

    model = kapustinskii_energy(2, 1, -1, shannon_radius("Ag", 1), shannon_radius("Cl", -1)) * EV_TO_KJ_PER_MOL
    assert agcl.compare(model).covalent_character is True
    nacl = born_haber_cycle(**NACL)
    model = kapustinskii_energy(2, 1, -1, shannon_radius("Na", 1), shannon_radius("Cl", -1)) * EV_TO_KJ_PER_MOL
    assert nacl.compare(model).covalent_character is False


def test_cli_cycle_from_file_prints_the_table(tmp_path, capsys):
    from madelung.cli import main

    path = tmp_path / "nacl.toml"
    path.write_text('compound = "NaCl"\nformation = -411.2\n[atomisation]\nNa = 107.5\n[dissociation]\nCl = 242.6\n')
    code = main(["cycle", str(path), "--structure", str(STRUCTURES / "rocksalt-NaCl.cif")])
    out = capsys.readouterr().out
    assert code == 0
    for text in ("ionisation Na -> Na+", "electron attachment Cl -> Cl-", "cycle lattice energy", "Kapustinskii"):
        assert text in out
    code = main(["cycle", "--compound", "NaCl", "--formation", "-411.2", "--atomisation", "Na=107.5",
                 "--dissociation", "Cl=242.6", "--json"])
    data = json.loads(capsys.readouterr().out)
    assert code == 0 and data["lattice_energy_kJ_per_mol"] == pytest.approx(786, rel=0.01)
    # without a structure Kapustinskii's estimate comes from the ions alone: 1202.5 * 2 / 2.83 * (1 - 0.345 / 2.83)
    # = 746.2 kJ/mol with Shannon's VI radii Na+ 1.02, Cl- 1.81 Å (worked by hand from Kapustinskii 1956)
    kapustinskii = data["comparisons"]["Kapustinskii"]
    assert kapustinskii["lattice_energy_kJ_per_mol"] == pytest.approx(746.2, abs=0.2)
    assert kapustinskii["cycle_minus_model_kJ_per_mol"] == pytest.approx(
        data["lattice_energy_kJ_per_mol"] - kapustinskii["lattice_energy_kJ_per_mol"])
    assert kapustinskii["covalent_character"] is False


def test_cli_cycle_errors_exit_2(tmp_path, capsys):
    from madelung.cli import main

    code = main(["cycle", "--compound", "NaCl", "--atomisation", "Na=107.5"])
    assert code == 2 and "--formation" in capsys.readouterr().err
    path = tmp_path / "bad.toml"
    path.write_text('compound = "NaCl"\nformation = -411.2\nsublimation = 3\n')
    code = main(["cycle", str(path)])
    assert code == 2 and "sublimation" in capsys.readouterr().err
    code = main(["cycle", "--compound", "MgO", "--formation", "-601.6", "--atomisation", "Mg=147.1",
                 "--dissociation", "O=498.4"])
    assert code == 2 and "enthalpy 2 of O" in capsys.readouterr().err
