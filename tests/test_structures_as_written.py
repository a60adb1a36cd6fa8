"""Structures as databases write them: mixed-valence rows, A-site mixing, several data blocks,
uncertainties, both symmetry-operator tags, charged type symbols; and the one loader that the
API, every command and the batch runner share.

Files are in tests/data/ (each names its sources in its header). Expected site charges are the
occupancy-weighted sums of the rows' charges (the definition of a virtual-crystal site).
"""

import io
import json
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import ase.io
import numpy as np
import pytest
from ase import Atoms

import madelung
from madelung import Crystal, InputError, MadelungWarning, ewald
from madelung.cli import main
from madelung.constants import madelung_constants
from madelung.io.cif import parse_typed_symbol
from madelung.io.read import load

DATA = Path(__file__).resolve().parent / "data"
STRUCTURES = Path(__file__).resolve().parent.parent / "structures"
ROCKSALT_M = 1.747565  # NaCl Madelung constant (handbook convention), CRC Handbook "Madelung constants"


def run(argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:
            code = exc.code
    return code, out.getvalue(), err.getvalue()


def errors_only(err):
    return [line for line in err.strip().splitlines() if "warning:" not in line]


def site(crystal, label):
    return crystal.labels.index(label)


# ---------------------------------------------------------------- rows sharing a site
def test_wustite_rows_of_two_valences_form_one_site():
    with pytest.warns(MadelungWarning, match="occupancy-weighted"):
        c = Crystal.from_file(DATA / "wustite-mixed-valence.cif")
    assert len(c) == 8                                 # 4 Fe sites (4a) + 4 O (4b) in the F cell
    i = site(c, "Fe1/Fe2")
    assert c.charges[i] == pytest.approx(0.85 * 2 + 0.10 * 3)
    assert c.species_label(i) == "Fe2+0.85Fe3+0.1"
    assert c.occupancies[i] == pytest.approx(0.95)
    assert c.net_charge == pytest.approx(0, abs=1e-12)
    assert c.cell[0, 0] == pytest.approx(4.3010)      # uncertainty "(5)" dropped


def test_manganite_mixed_valence_and_a_site_mixing():
    with pytest.warns(MadelungWarning):
        c = Crystal.from_file(DATA / "manganite-mixed-valence.cif")
    assert len(c) == 5
    b = site(c, "Mn1/Mn2")
    a = site(c, "La1/Sr1")
    assert c.charges[b] == pytest.approx(0.7 * 3 + 0.3 * 4)
    assert c.charges[a] == pytest.approx(0.7 * 3 + 0.3 * 2)
    assert c.species_label(b) == "Mn3+0.7Mn4+0.3"
    assert c.species_label(a) == "La0.7Sr0.3"
    assert c.net_charge == pytest.approx(0, abs=1e-12)


def test_the_site_table_shows_every_row():
    code, out, err = run(["sites", str(DATA / "manganite-mixed-valence.cif")])
    assert code == 0, err
    assert "Mn3+0.7Mn4+0.3" in out


def test_occupancies_above_one_name_the_site(tmp_path):
    text = (DATA / "wustite-mixed-valence.cif").read_text().replace("0.10(1) 0.0071(3)", "0.30 0.0071(3)")
    path = tmp_path / "over.cif"
    path.write_text(text)
    with pytest.raises(InputError, match=r"site Fe1/Fe2 holds Fe2\+ 0.85 \+ Fe3\+ 0.3: total occupancy 1.15"):
        Crystal.from_file(path)
    code, _, err = run(["energy", str(path)])
    assert code == 2 and len(errors_only(err)) == 1 and "Fe1/Fe2" in err


def test_a_cell_the_file_leaves_charged_is_refused_unless_asked():
    path = DATA / "wustite-vacancies-only.cif"
    with pytest.raises(InputError, match=r"net charge of -0.4 e per cell \(sites Fe1 \(Fe0.95\) \+1.9 e x4\)"):
        Crystal.from_file(path)
    code, _, err = run(["energy", str(path)])
    assert code == 2 and len(errors_only(err)) == 1 and "--allow-net-charge" in err
    with pytest.warns(MadelungWarning):
        c = Crystal.from_file(path, allow_net_charge=True)
    assert c.net_charge == pytest.approx(4 * 0.95 * 2 - 4 * 2)
    code, out, err = run(["energy", str(path), "--allow-net-charge", "--json"])
    assert code == 0 and json.loads(out)["neutralizing_background"] is True


def test_charged_type_symbols_in_both_orders():
    # fact of the trade: CIF type symbols carry the charge after the number (Fe3+) or, in some
    # database exports, sign first (Cs+1, Cl-1)
    assert parse_typed_symbol("Cs+1") == ("Cs", 1.0)
    assert parse_typed_symbol("Cl-1") == ("Cl", -1.0)
    assert parse_typed_symbol("Fe+3") == ("Fe", 3.0)
    assert parse_typed_symbol("Mn3.5+") == ("Mn", 3.5)
    assert parse_typed_symbol("O2-") == ("O", -2.0)
    assert parse_typed_symbol("FE3+") == ("Fe", 3.0)
    assert parse_typed_symbol("Fe") == ("Fe", None)


# ---------------------------------------------------------------- data blocks
def test_several_blocks_are_refused_with_their_names_or_chosen():
    path = DATA / "two-blocks-NaCl-KCl.cif"
    with pytest.raises(InputError, match=r"2 data blocks \(NaCl, KCl\).*--block"):
        Crystal.from_file(path)
    for block, a in (("NaCl", 5.6402), (1, 5.6402), ("KCl", 6.2917), ("2", 6.2917), ("data_KCl", 6.2917),
                     (-1, 6.2917)):
        c = Crystal.from_file(path, block=block)
        assert c.cell[0, 0] == pytest.approx(a)
        assert set(c.charges) == {1.0, -1.0}          # from "Na+1"/"K+1" and "Cl-1"
    with pytest.raises(InputError, match="no data block 'CsCl'; blocks: NaCl, KCl"):
        Crystal.from_file(path, block="CsCl")
    with pytest.raises(InputError, match="block number 3 out of range"):
        Crystal.from_file(path, block=3)
    code, _, err = run(["energy", str(path)])
    assert code == 2 and "NaCl, KCl" in err and len(errors_only(err)) == 1


def test_constant_reads_every_block():
    code, out, err = run(["constant", str(DATA / "two-blocks-NaCl-KCl.cif"), "--json"])
    assert code == 0, err
    rows = json.loads(out)["structures"]
    assert [row["file"].split("#")[-1] for row in rows] == ["NaCl", "KCl"]
    for row in rows:
        assert row["handbook"] == pytest.approx(ROCKSALT_M, abs=1e-5)
    code, out, _ = run(["constant", str(DATA / "two-blocks-NaCl-KCl.cif"), "--block", "KCl", "--json"])
    assert code == 0 and json.loads(out)["handbook"] == pytest.approx(ROCKSALT_M, abs=1e-5)


def test_screen_reads_every_block(tmp_path):
    out = tmp_path / "blocks.csv"
    code, printed, err = run(["screen", str(DATA / "two-blocks-NaCl-KCl.cif"), "--out", str(out), "--workers", "1",
                              "--no-progress"])
    assert code == 0, err
    text = out.read_text()
    assert "two-blocks-NaCl-KCl.cif#NaCl" in text and "two-blocks-NaCl-KCl.cif#KCl" in text
    assert "2 structures: 2 ok" in printed


# ---------------------------------------------------------------- one-line errors
NACL = (STRUCTURES / "rocksalt-NaCl.cif").read_text()
NA_LINE = "Na1   Na1+     4 a          0.0         0.0         0.0  1.0"


@pytest.mark.parametrize("name, text, message", [
    ("unknown_coordinate.cif", NACL.replace(NA_LINE, NA_LINE.replace("0.0         0.0  1.0", "?           0.0  1.0")),
     "coordinate y is '?'"),
])
def test_bad_files_are_one_line_errors(tmp_path, name, text, message):
    path = tmp_path / name
    path.write_text(text)
    code, _, err = run(["energy", str(path)])
    assert code == 2 and len(errors_only(err)) == 1 and message in err and str(path) in err


def test_a_byte_order_mark_is_read(tmp_path):
    path = tmp_path / "bom.cif"
    path.write_bytes(b"\xef\xbb\xbf" + NACL.encode())
    with_mark = Crystal.from_file(path)
    plain = Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif")
    assert np.allclose(with_mark.charges, plain.charges) and np.allclose(with_mark.positions, plain.positions)


def test_absurd_charges_are_refused_before_summing():
    path = str(STRUCTURES / "rocksalt-NaCl.cif")
    code, _, err = run(["energy", path, "--charge", "Na=1e308", "--charge", "Cl=-1e308"])
    assert code == 2 and len(errors_only(err)) == 1 and "1e+308" in err
    with pytest.raises(InputError, match="above"):
        Crystal(np.eye(3) * 4, [[0, 0, 0], [2, 2, 2]], [1e308, -1e308])


def test_common_factor_is_undefined_for_fractional_charges():
    with pytest.warns(MadelungWarning):
        c = Crystal.from_file(DATA / "manganite-mixed-valence.cif")
    constants = madelung_constants(c)
    assert constants.common_factor is None and "not whole numbers" in constants.common_factor_note
    code, out, _ = run(["constant", str(DATA / "manganite-mixed-valence.cif")])
    assert code == 0 and "undefined" in out


def test_large_cells_print_charges_per_kind_not_per_site(tmp_path):
    big = Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif").repeat(4).to_ase()   # 512 ions
    del big.arrays["labels"]
    path = tmp_path / "POSCAR"
    big.write(path, format="vasp")
    code, out, err = run(["energy", str(path), "--charge", "Na=1", "--charge", "Cl=-1"])
    assert code == 0, err
    line = next(line for line in out.splitlines() if line.strip().startswith("charges"))
    assert len(line) < 200 and "x256" in line


# ---------------------------------------------------------------- one loader
def _cli_sites(path, mode):
    code, out, err = run(["sites", str(path), "--charges-from", mode, "--json"])
    assert code == 0, err
    data = json.loads(out)
    return {o["label"]: o["charge_e"] for o in data["orbits"]}, data["energy_per_formula_unit_eV"]


def _api_sites(path, mode):
    c = Crystal.from_file(path, mode)
    result = ewald(c)
    return {label: float(q) for label, q in zip(c.labels, c.charges)}, result.energy / c.formula_units


@pytest.mark.parametrize("mode", ["file", "auto", "equilibrate"])
def test_api_and_command_line_agree_on_every_bundled_structure(mode):
    for path in sorted(STRUCTURES.glob("*.cif")):
        if mode == "file" and "Fe3O4" in path.name:
            # the bundled magnetite leaves the mixed 16d state to the assignment: both paths refuse alike
            code, _, err = run(["sites", str(path)])
            with pytest.raises(InputError) as caught:
                Crystal.from_file(path)
            assert code == 2 and str(caught.value) in err
            continue
        cli_charges, cli_energy = _cli_sites(path, mode)
        api_charges, api_energy = _api_sites(path, mode)
        for label, q in cli_charges.items():
            assert q == pytest.approx(api_charges[label], abs=1e-9), (path.name, label)
        assert cli_energy == pytest.approx(api_energy, rel=1e-8), path.name


def test_ase_initial_charges_mean_the_same_through_api_and_command_line(tmp_path):
    # MgO carrying initial charges +-1 (a user's partial charges): "file" and "auto" keep them on
    # both paths (they are what the file gives); before, the API gave +-2 and the CLI +-1
    atoms = Crystal.from_file(STRUCTURES / "rocksalt-MgO.cif").to_ase()
    atoms.set_initial_charges([1 if s == "Mg" else -1 for s in atoms.get_chemical_symbols()])
    path = tmp_path / "MgO.extxyz"
    atoms.write(path, format="extxyz")
    for mode in ("file", "auto"):
        api = ewald(Crystal.from_file(path, mode)).energy
        via_atoms = ewald(Crystal.from_ase(atoms, mode)).energy
        code, out, err = run(["energy", str(path), "--charges-from", mode, "--json"])
        assert code == 0, err
        assert json.loads(out)["energy_eV"] == pytest.approx(api, rel=1e-10) == via_atoms
    # MgO with charges +-1: -M k_e / r0 per pair, M = 1.747565 (CRC), r0 = 2.1056 Å (file), k_e = 14.3996 eV Å
    assert api / 4 == pytest.approx(-ROCKSALT_M * 14.399645 / 2.1056, rel=1e-5)


def test_loaded_result_and_top_level_names():
    loaded = load(STRUCTURES / "rocksalt-NaCl.cif", "auto")
    assert loaded.assignment is not None and loaded.charges_from == "auto"
    assert loaded.to_dict()["net_charge_e"] == pytest.approx(0)
    assert madelung.read_crystal(STRUCTURES / "rocksalt-NaCl.cif").net_charge == pytest.approx(0)
    assert isinstance(Crystal.from_ase(Atoms("NaCl", positions=[[0, 0, 0], [2.8, 0, 0]], cell=[5.6, 3, 3],
                                             pbc=True), {"Na": 1, "Cl": -1}), Crystal)


def test_frames_of_a_trajectory_are_structures_too(tmp_path):
    # an extended-XYZ file with two frames is refused by one-structure commands and read frame by
    # frame by constant (the NaCl handbook constant, CRC, for both frames)
    nacl = Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif").to_ase()
    bigger = nacl.copy()
    bigger.set_cell(nacl.cell * 1.1, scale_atoms=True)
    path = tmp_path / "two.extxyz"
    ase.io.write(path, [nacl, bigger], format="extxyz")
    with pytest.raises(InputError, match=r"2 structures \(frames\) \(1, 2\)"):
        Crystal.from_file(path)
    assert Crystal.from_file(path, block=2).volume == pytest.approx(nacl.get_volume() * 1.331)
    code, out, err = run(["constant", str(path), "--json"])
    assert code == 0, err
    rows = json.loads(out)["structures"]
    assert len(rows) == 2 and all(r["handbook"] == pytest.approx(ROCKSALT_M, abs=1e-5) for r in rows)
