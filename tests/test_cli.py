"""The command line: reports, JSON and one-line errors with exit code 2 for bad input."""

import json
import os
import subprocess
import sys

import pytest

from madelung.cli import main

from conftest import ROOT, structure

NACL_CIF = open(structure("rocksalt-NaCl")).read()


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def assert_input_error(argv, capsys, *fragments):
    code, out, err = run(argv, capsys)
    assert code == 2, (out, err)
    lines = [line for line in err.splitlines() if not line.startswith("madelung: warning")]
    assert len(lines) == 1, err
    for fragment in fragments:
        assert fragment in lines[0], lines[0]
    assert "Traceback" not in err


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def test_energy_report_and_json(capsys):
    code, out, _ = run(["energy", structure("rocksalt-NaCl")], capsys)
    assert code == 0
    assert "per formula unit" in out and "kJ/mol" in out and "Point-charge model" in out
    code, out, _ = run(["energy", structure("rocksalt-NaCl"), "--json", "--forces", "--stress"], capsys)
    data = json.loads(out)
    assert data["formula_units"] == 4 and len(data["forces_eV_per_angstrom"]) == 8
    # 4 NaCl formula units; rock-salt constant of OEIS A085469 with r0 = a/2 = 2.8201 Å
    assert data["energy_eV"] == pytest.approx(-4 * 1.747564594633 * 14.399645478 / 2.8201, rel=1e-8)


def test_sites_table(capsys):
    code, out, _ = run(["sites", structure("rocksalt-NaCl"), "--json"], capsys)
    rows = json.loads(out)["sites"]
    assert len(rows) == 8
    # every rock-salt site has the rock-salt constant, OEIS A085469
    assert all(abs(r["site_constant"] - 1.747564594633) < 1e-8 for r in rows)


def test_charge_rules_override_the_file(capsys):
    code, out, _ = run(["energy", structure("rocksalt-MgO"), "--charge", "Mg=1", "--charge", "O=-1", "--json"],
                       capsys)
    plain = json.loads(out)["energy_eV"]
    code, out, _ = run(["energy", structure("rocksalt-MgO"), "--json"], capsys)
    formal = json.loads(out)["energy_eV"]
    assert formal == pytest.approx(4 * plain, rel=1e-9)  # E scales as q^2


def test_net_charge_warns_and_says_so(capsys):
    code, out, err = run(["energy", structure("rocksalt-NaCl"), "--charge", "Na=2"], capsys)
    assert code == 0
    assert "neutralizing background" in err and "background" in out


def test_missing_file(capsys):
    assert_input_error(["energy", "no-such-file.cif"], capsys, "no-such-file.cif", "no such file")


def test_garbage_file(tmp_path, capsys):
    path = write(tmp_path, "broken.cif", "data_x\n_cell_length_a 5\nloop_\n_atom_site_label\n?? nonsense ((\n")
    assert_input_error(["energy", path], capsys, "broken.cif")


def test_truncated_cif(tmp_path, capsys):
    path = write(tmp_path, "truncated.cif", NACL_CIF[: len(NACL_CIF) // 2])
    assert_input_error(["energy", path], capsys, "truncated.cif")


def test_no_charges_anywhere(tmp_path, capsys):
    path = write(tmp_path, "plain.xyz", '2\nLattice="3 0 0 0 3 0 0 0 3" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
                                       "Na 0 0 0\nCl 1.5 1.5 1.5\n")
    assert_input_error(["energy", path], capsys, "plain.xyz", "no charges", "--charge")


def test_element_without_a_charge(tmp_path, capsys):
    path = write(tmp_path, "plain.xyz", '2\nLattice="3 0 0 0 3 0 0 0 3" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
                                       "Na 0 0 0\nCl 1.5 1.5 1.5\n")
    assert_input_error(["energy", path, "--charge", "Na=1"], capsys, "plain.xyz", "Cl", "no charge")


def test_charge_for_an_absent_element(capsys):
    assert_input_error(["energy", structure("rocksalt-NaCl"), "--charge", "K=1"], capsys, "K", "neither")


def test_charge_rule_not_a_number(capsys):
    assert_input_error(["energy", structure("rocksalt-NaCl"), "--charge", "Na=plus"], capsys, "Na=plus")


def test_nan_coordinate(tmp_path, capsys):
    path = write(tmp_path, "nan.xyz", '2\nLattice="3 0 0 0 3 0 0 0 3" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
                                     "Na 0 0 0\nCl nan 1.5 1.5\n")
    assert_input_error(["energy", path, "--charge", "Na=1", "--charge", "Cl=-1"], capsys, "nan.xyz", "non-finite")


def test_degenerate_cell(tmp_path, capsys):
    path = write(tmp_path, "flat.xyz", '2\nLattice="3 0 0 0 3 0 3 3 0" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
                                      "Na 0 0 0\nCl 1.5 1.5 0\n")
    assert_input_error(["energy", path, "--charge", "Na=1", "--charge", "Cl=-1"], capsys, "flat.xyz", "degenerate")


def test_overlapping_ions(tmp_path, capsys):
    path = write(tmp_path, "close.xyz", '2\nLattice="3 0 0 0 3 0 0 0 3" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
                                       "Na 0 0 0\nCl 0.2 0 0\n")
    assert_input_error(["energy", path, "--charge", "Na=1", "--charge", "Cl=-1"], capsys, "close.xyz", "0.200 Å apart")


def test_not_periodic(tmp_path, capsys):
    path = write(tmp_path, "molecule.xyz", "2\n\nNa 0 0 0\nCl 2.4 0 0\n")
    assert_input_error(["energy", path, "--charge", "Na=1", "--charge", "Cl=-1"], capsys, "molecule.xyz")


def test_bad_tolerance(capsys):
    # refused while the arguments are parsed, before the structure is read
    for value in ("-1", "nan", "1e-20"):
        code, _, err = run_usage(["energy", structure("rocksalt-NaCl"), "--tol", value], capsys)
        assert code == 2 and "--tol" in err and len(err.strip().splitlines()) == 1


def test_all_charges_zero(capsys):
    assert_input_error(["energy", structure("rocksalt-NaCl"), "--charge", "Na=0", "--charge", "Cl=0"], capsys,
                       "zero")


def test_usage_error_is_exit_code_2(capsys):
    code, _, err = run_usage(["energy"], capsys)
    assert code == 2 and ("FILE" in err or "file" in err)


def run_usage(argv, capsys):
    with pytest.raises(SystemExit) as stop:
        main(argv)
    _, err = capsys.readouterr()
    return stop.value.code, None, err


def test_console_script_exit_codes(tmp_path):
    # the installed entry point, as a user runs it
    env = dict(os.environ, PYTHONPATH=ROOT)
    ok = subprocess.run([sys.executable, "-m", "madelung.cli", "constant", structure("rocksalt-NaCl"), "--json"],
                        capture_output=True, text=True, env=env)
    assert ok.returncode == 0 and json.loads(ok.stdout)["handbook"] == pytest.approx(1.747564594633, abs=1e-9)
    bad = subprocess.run([sys.executable, "-m", "madelung.cli", "energy", str(tmp_path / "missing.cif")],
                         capture_output=True, text=True, env=env)
    assert bad.returncode == 2 and bad.stderr.count("\n") == 1 and "missing.cif" in bad.stderr


def test_compile_runs_every_engine(capsys):
    assert main(["compile", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    # seven engines and searches, then the parallel variants of their kernels
    assert len(data["steps"]) == len(data["seconds"]) == 8
    assert all(s >= 0 for s in data["seconds"])
    # every kernel of the sums and the neighbour walk that Python calls is compiled (and so in the
    # cache) afterwards, parallel kernels with their one-thread twins (kernels called only from
    # other kernels are compiled into their callers)
    from madelung.sums._kernels import geometry_kernels, kernels, variants
    for module in (kernels, geometry_kernels):
        for name, kernel in vars(module).items():
            if isinstance(kernel, variants.SerialOnOneThread):
                assert kernel.serial.signatures and kernel.parallel.signatures, name
    for kernel in (geometry_kernels.sort_into_bins, geometry_kernels.pairs_from, kernels.k_vector_table):
        assert kernel.signatures, kernel
