"""Hostile input: every bad file gives exit code 2 and one line naming the file (CLI), or an
InputError naming it (API); nothing escapes as a traceback."""

import re
import warnings
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from madelung import Crystal, InputError, MadelungWarning

from fuzz_corpus import run_command as run

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"
NACL = (STRUCTURES / "rocksalt-NaCl.cif").read_text()
NA_LINE = "Na1   Na1+     4 a          0.0         0.0         0.0  1.0"
CL_LINE = "Cl1   Cl1-     4 b          0.5         0.5         0.5  1.0"
assert NA_LINE in NACL and CL_LINE in NACL


def _without_cell(text):
    return "\n".join(line for line in text.splitlines() if not line.startswith("_cell_length"))


HOSTILE = {
    "malformed": ("this is not a crystallographic file {{}}\n", "not a CIF"),
    "truncated": (NACL[:3000], "cannot read structure"),
    "unknown_element": (NACL.replace(NA_LINE, NA_LINE.replace("Na1+", "Xx1+")), "unknown element"),
    "missing_cell": (_without_cell(NACL), "no unit cell"),
    "nan_coordinate": (NACL.replace(NA_LINE, NA_LINE.replace("0.0         0.0  1.0", "nan         0.0  1.0")),
                       "NaN"),
    "occupancy_above_one": (NACL.replace(CL_LINE, CL_LINE[:-3] + "1.2"), "occupancy 1.2"),
    "overlapping_atoms": (NACL.replace(CL_LINE, CL_LINE + "\nCl2   Cl1-     4 b          0.5         0.5         "
                                                          "0.52  1.0"), "apart"),
    "negative_cell": (NACL.replace("_cell_length_a                         5.6402",
                                   "_cell_length_a                         -5.6402"), "not a positive number"),
}


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile")
    paths = {}
    for name, (text, _) in HOSTILE.items():
        paths[name] = folder / f"{name}.cif"
        paths[name].write_text(text)
    return paths




def test_the_negative_cell_case_edits_the_file():
    assert HOSTILE["negative_cell"][0] != NACL


@pytest.mark.parametrize("name", sorted(HOSTILE))
@pytest.mark.parametrize("command", [["energy"], ["sites"], ["charges"]])
def test_cli_gives_exit_code_2_and_one_line(files, name, command):
    code, out, err = run([*command, str(files[name])])
    lines = [line for line in err.strip().splitlines() if "warning:" not in line]
    assert code == 2, (out, err)
    assert len(lines) == 1
    assert str(files[name]) in lines[0]
    assert HOSTILE[name][1] in lines[0]
    assert "Traceback" not in err


@pytest.mark.parametrize("name", sorted(HOSTILE))
def test_api_raises_input_error_naming_the_file(files, name):
    for charges in (None, "auto", "equilibrate"):
        with pytest.raises(InputError, match=re.escape(str(files[name]))):
            Crystal.from_file(files[name], charges=charges)


def test_missing_file_and_folder(tmp_path):
    for path in (tmp_path / "absent.cif", tmp_path):
        code, _, err = run(["energy", str(path)])
        assert code == 2 and str(path) in err and len(err.strip().splitlines()) == 1


def test_exact_duplicate_atoms_are_merged_with_a_warning(tmp_path):
    path = tmp_path / "duplicate.cif"
    path.write_text(NACL.replace(CL_LINE, CL_LINE + "\n" + CL_LINE.replace("Cl1 ", "Cl2 ")))
    with pytest.warns(MadelungWarning, match="duplicate"):
        crystal = Crystal.from_file(path)
    assert len(crystal) == 8                       # rock salt conventional cell: 4 Na + 4 Cl
    code, out, err = run(["energy", str(path)])
    assert code == 0 and "duplicate" in err and "-8.9231" in out   # NaCl: -M k_e / r0 = -8.923 eV


def test_enormous_structures_are_refused_by_the_atom_limit(tmp_path):
    path = STRUCTURES / "spinel-MgAl2O4.cif"           # 56 sites
    code, _, err = run(["energy", str(path), "--max-atoms", "50"])
    assert code == 2 and "56 sites" in err and "--max-atoms" in err and str(path) in err
    with pytest.raises(InputError, match="more than the limit of 50"):
        Crystal.from_file(path, max_atoms=50)
    crystal = Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif")
    with pytest.raises(InputError, match="limit"):
        Crystal.from_ase(crystal.repeat(3).to_ase(), max_atoms=100)


def test_bad_option_values_are_one_line_errors():
    for argv in (["sites", str(STRUCTURES / "rocksalt-NaCl.cif"), "--symmetry-tolerance", "-1"],
                 ["charges", str(STRUCTURES / "rocksalt-NaCl.cif"), "--method", "equilibrate", "--dielectric", "0"],
                 ["charges", str(STRUCTURES / "rocksalt-NaCl.cif"), "--mixing-denominator", "0"],
                 ["sites", str(STRUCTURES / "rocksalt-NaCl.cif"), "--max-atoms", "0"]):
        code, _, err = run(argv)
        assert code == 2 and len(err.strip().splitlines()) == 1, (argv, err)


# ------------------------------------------------------------------ corrupted text
PEROVSKITE = (STRUCTURES / "perovskite-SrTiO3.cif").read_text()
INSERTS = ["nan", "-", "9999", "'", "\n", "loop_\n", "_atom_site_label", "0.5", "Xx", "?", "1e308", "inf",
           "\x00", "é", "data_", ";", "#", "_cell_length_a 0"]


@st.composite
def corrupted(draw):
    text = PEROVSKITE
    for _ in range(draw(st.integers(1, 6))):
        if len(text) < 2:
            break
        i = draw(st.integers(0, len(text) - 1))
        kind = draw(st.sampled_from(["delete", "insert", "replace", "truncate"]))
        if kind == "delete":
            text = text[:i] + text[i + draw(st.integers(1, 60)):]
        elif kind == "insert":
            text = text[:i] + draw(st.sampled_from(INSERTS)) + text[i:]
        elif kind == "replace":
            text = text[:i] + draw(st.sampled_from(list("0123456789.-+ \n_abXYZ'\"#"))) + text[i + 1:]
        else:
            text = text[:i]
    return text


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=corrupted())
def test_corrupted_cif_gives_a_clean_error_or_a_valid_result(tmp_path, text):
    path = tmp_path / "corrupted.cif"
    path.write_text(text, encoding="utf-8")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        try:
            crystal = Crystal.from_file(path, charges="auto")
        except InputError as exc:
            assert str(path) in str(exc) or "charge" in str(exc)
        else:
            assert len(crystal) > 0 and crystal.volume > 0
    code, _, err = run(["energy", str(path), "--tol", "1e-6"])
    assert code in (0, 2), err
    if code == 2:
        assert len([line for line in err.strip().splitlines() if "warning:" not in line]) == 1


def _with_operators(operators):
    """A two-ion rock-salt-like P1 cell listing the given symmetry operators (after x,y,z)."""
    rows = "\n".join(f"'{op}'" for op in ("x,y,z",) + tuple(operators))
    return ("data_t\n_cell_length_a 5\n_cell_length_b 5\n_cell_length_c 5\n_cell_angle_alpha 90\n"
            "_cell_angle_beta 90\n_cell_angle_gamma 90\nloop_\n_space_group_symop_operation_xyz\n" + rows +
            "\nloop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            "_atom_site_fract_z\nNa1 Na+ 0 0 0\nCl1 Cl- 0.5 0.5 0.5\n")


def test_a_symmetry_operator_dividing_by_zero_is_refused_in_one_line(tmp_path):
    path = tmp_path / "zero.cif"
    path.write_text(_with_operators(["x+1/0,y,z"]))
    code, _, err = run(["energy", str(path)])
    assert code == 2
    assert err.strip().count("\n") == 0 and str(path) in err and "not understood" in err


def test_an_operator_that_is_no_lattice_operation_is_left_out_with_a_warning(tmp_path):
    # a space-group operation maps the lattice onto itself: integer rotation part, determinant +-1
    # (fact of the trade); '2x,y,z' is none, and must not make sites
    path = tmp_path / "scaled.cif"
    path.write_text(_with_operators(["2x,y,z"]))
    with pytest.warns(MadelungWarning, match="left out"):
        crystal = Crystal.from_file(path)
    assert len(crystal) == 2
