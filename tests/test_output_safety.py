"""Nothing lost, nothing hung: every command that writes refuses to replace a file unasked or to
write over its input, checks its outputs before the work, and writes atomically; exit codes say
whether every input succeeded; numbers no sum can represent are refused before any work.

Each case runs through the command line and checks the exit code, the one line on stderr, and
that the files on disk are what they were.
"""

import errno
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

import madelung
from madelung.cli import COMMANDS

from conftest import ROOT, structure
from fuzz_corpus import run_command as run

NACL = structure("rocksalt-NaCl")


def one_line(err, *words):
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err and "internal error" not in err, err
    for word in words:
        assert word in lines[0], (word, lines[0])
    return lines[0]


def snapshot(folder):
    """Every file in a folder with its bytes (to show nothing changed, nothing was left behind)."""
    return {p: (folder / p).read_bytes() for p in sorted(os.listdir(folder)) if (folder / p).is_file()}


@pytest.fixture(scope="module")
def repulsion(tmp_path_factory):
    folder = tmp_path_factory.mktemp("params")
    path = folder / "nacl.json"
    code, _, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(path)])
    assert code == 0, err
    return path


@pytest.fixture
def strained(tmp_path):
    """NaCl with its cell stretched by 4 %: a relaxation has work to do."""
    crystal = madelung.Crystal.from_file(NACL)
    atoms = crystal.to_ase()
    atoms.set_cell(atoms.cell * 1.04, scale_atoms=True)
    text = madelung.report.files.cif_text(atoms.cell, atoms.get_positions(), crystal.symbols, crystal.charges,
                                          crystal.labels)
    path = tmp_path / "strained.cif"
    path.write_text(text)
    return path


# ---------------------------------------------------------------- nothing overwritten
def test_fit_refuses_an_existing_output_and_replaces_it_when_asked(tmp_path, repulsion):
    out = tmp_path / "params.json"
    out.write_text("precious\n")
    code, _, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(out)])
    assert code == 2
    one_line(err, str(out), "--overwrite")
    assert out.read_text() == "precious\n"
    code, _, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(out), "--overwrite"])
    assert code == 0, err
    assert out.read_text() == repulsion.read_text()
    assert sorted(os.listdir(tmp_path)) == ["params.json"]   # no temporary file left behind


def test_a_missing_output_folder_is_refused_before_the_work(tmp_path):
    missing = tmp_path / "missing" / "x.json"
    code, out, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(missing)])
    assert code == 2 and out == ""
    one_line(err, "does not exist")
    assert not missing.parent.exists()


def test_relax_never_writes_over_its_input(strained, repulsion):
    before = strained.read_bytes()
    for extra in ([], ["--overwrite"]):
        code, _, err = run(["relax", str(strained), "--repulsion", str(repulsion), "-o", str(strained), *extra])
        assert code == 2
        one_line(err, "is an input")
        assert strained.read_bytes() == before


def test_relaxed_cif_reads_back_with_the_same_charges(tmp_path, strained, repulsion):
    out = tmp_path / "relaxed.cif"
    code, _, err = run(["relax", str(strained), "--repulsion", str(repulsion), "-o", str(out)])
    assert code == 0, err
    relaxed = madelung.Crystal.from_file(out)   # charges from the file, no --charge needed
    original = madelung.Crystal.from_file(strained)
    assert list(relaxed.charges) == list(original.charges)
    # relaxed towards the observed NaCl cell the parameters were fitted to: 5.6402 Å (the bundled CIF)
    assert relaxed.volume ** (1 / 3) == pytest.approx(5.6402, rel=2e-3)


def test_unconverged_relaxation_writes_nothing_unless_asked(tmp_path, strained, repulsion):
    out = tmp_path / "relaxed.cif"
    argv = ["relax", str(strained), "--repulsion", str(repulsion), "-o", str(out), "--max-steps", "1"]
    code, _, err = run(argv)
    assert code == 2
    one_line(err, "did not converge", "nothing written")
    assert not out.exists()
    code, _, err = run(argv + ["--write-unconverged"])
    assert code == 2
    one_line(err, "did not converge", "written to")
    assert out.exists()


def test_eos_plot_and_map_outputs_are_checked_first(tmp_path, repulsion):
    plot = tmp_path / "eos.png"
    plot.write_bytes(b"old plot")
    code, _, err = run(["eos", NACL, "--repulsion", str(repulsion), "--plot", str(plot), "--points", "5"])
    assert code == 2
    one_line(err, "exists")
    assert plot.read_bytes() == b"old plot"
    code, _, err = run(["eos", NACL, "--repulsion", str(repulsion), "--plot", str(tmp_path / "no" / "x.png")])
    assert code == 2
    one_line(err, "does not exist")

    prefix = tmp_path / "nacl"
    (tmp_path / "nacl.png").write_bytes(b"old map")
    code, _, err = run(["map", NACL, "--charge", "Na=1", "--charge", "Cl=-1", "--output", str(prefix)])
    assert code == 2
    one_line(err, "nacl.png", "exists")
    assert not (tmp_path / "nacl.cube").exists() and (tmp_path / "nacl.png").read_bytes() == b"old map"


def test_an_output_that_is_a_folder_is_refused(tmp_path):
    folder = tmp_path / "out.json"
    folder.mkdir()
    code, _, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(folder), "--overwrite"])
    assert code == 2
    one_line(err, "is a folder")


def test_demo_creates_only_the_folder_it_was_given(tmp_path):
    target = tmp_path / "a" / "b" / "demo"
    code, _, err = run(["demo", "--out-dir", str(target)])
    assert code == 2
    one_line(err, "--parents")
    assert not (tmp_path / "a").exists()


def test_full_disk_leaves_the_old_file_and_no_partial_one(tmp_path, monkeypatch):
    out = tmp_path / "params.json"
    out.write_text("precious\n")

    def full(descriptor):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(madelung.report.files.os, "fsync", full)
    code, _, err = run(["fit", NACL, "--fix", "rho=0.32", "-o", str(out), "--overwrite"])
    assert code == 2
    one_line(err, str(out), "no space left", "old file is kept")
    assert snapshot(tmp_path) == {"params.json": b"precious\n"}


# ---------------------------------------------------------------- exit codes
def test_exit_code_two_when_any_input_failed_after_all_were_done(tmp_path):
    missing = str(tmp_path / "missing.cif")
    code, out, err = run(["constant", NACL, missing])
    assert code == 2
    assert "rocksalt-NaCl.cif" in out and "1 done, 1 failed" in out     # the good file is still reported
    one_line(err, "1 of 2 files failed")
    code, out, err = run(["constant", missing, str(tmp_path / "other.cif"), "--json"])
    assert code == 2
    one_line(err, "2 of 2 files failed")
    code, _, err = run(["constant", NACL, structure("rocksalt-KCl")])
    assert code == 0 and err == ""


def test_a_closed_output_pipe_ends_quietly(tmp_path):
    env = dict(os.environ, PYTHONPATH=ROOT)
    process = subprocess.Popen([sys.executable, "-m", "madelung.cli", "sites", NACL, "--all", "--json"],
                               stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env)
    process.stdout.close()          # like `| head -0`: the reader is gone before anything is written
    err = process.stderr.read().decode()
    code = process.wait(timeout=120)
    assert code == 141 and err == ""


def test_a_non_finite_result_is_an_internal_error_never_printed(monkeypatch):
    def broken(args):
        print(f"  energy  {float('nan'):16.8f} eV")
        return 0

    monkeypatch.setitem(COMMANDS, "energy", (COMMANDS["energy"][0], broken))
    code, out, err = run(["energy", NACL])
    assert code == 1 and out == ""
    assert "internal error" in err and "not a finite number" in err


# ---------------------------------------------------------------- bounds before work
def _nacl_text(**replace):
    text = open(NACL).read()
    for old, new in replace.items():
        assert old in text
        text = text.replace(old, new)
    return text


@pytest.mark.parametrize("argv_tail, words", [
    (["--charge", "Na=1e308", "--charge", "Cl=-1e308"], ["1e+308", "above"]),
    (["--charge", "Na=1e4", "--charge", "Cl=-1e4"], ["above"]),
])
def test_charges_beyond_what_the_sums_represent_are_refused(argv_tail, words):
    code, out, err = run(["energy", NACL, *argv_tail])
    assert code == 2 and out == ""
    one_line(err, *words)


@pytest.mark.parametrize("name, text, words", [
    ("huge-cell.cif", lambda: _nacl_text(**{"5.6402": "1e30"}), ["1e+30", "limit"]),
    ("overflow-cell.cif", lambda: _nacl_text(**{"5.6402": "1e308"}), ["limit"]),
    ("long-integer.cif", lambda: _nacl_text(**{"Na1+     4 a          0.0": "Na1+     4 a          " + "7" * 400}),
     ["400 digits"]),
    ("claims.xyz", lambda: "1000000000\nLattice=\"5 0 0 0 5 0 0 0 5\"\nNa 0 0 0\n", ["claims 1000000000 atoms"]),
    ("POSCAR", lambda: "NaCl\n-1e308\n5 0 0\n0 5 0\n0 0 5\nNa Cl\n1 1\nDirect\n0 0 0\n0.5 0.5 0.5\n",
     ["volume", "limit"]),
    ("skewed.vasp", lambda: "NaCl\n1.0\n0 9999.9 2.8201\n2.8201 0 0\n2.8201 2.8201 0\nNa Cl\n1 1\nDirect\n0 0 0\n"
                            "0.5 0.5 0.5\n", ["skewed", "reduced basis"]),
    ("columns.xyz", lambda: "2\nLattice=\"5 0 0 0 5 0 0 0 5\" Properties=species:S:1:pos:R:1000000000\n"
                           "Na 0 0 0\nCl 2.5 2.5 2.5\n", ["columns"]),
    ("needle.xyz", lambda: "2\nLattice=\"0.05 0 0 0 50 0 0 0 50\" Properties=species:S:1:pos:R:3\n"
                          "Na 0 0 0\nCl 0.025 25 25\n", ["lattice vector"]),
])
def test_hostile_numbers_in_files_are_refused_quickly(tmp_path, name, text, words):
    path = tmp_path / name
    path.write_text(text())
    code, out, err = run(["energy", str(path), "--max-atoms", "10", "--charge", "Na=1", "--charge", "Cl=-1"])
    assert code == 2 and out == ""
    one_line(err, str(path), *words)


def test_a_skewed_basis_of_a_valid_crystal_is_accepted(tmp_path):
    # the rock-salt primitive cell written in a basis with c' = c + 40 a: the same crystal
    crystal = madelung.Crystal.from_file(NACL)
    primitive = 0.5 * 5.6402 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0]])
    skewed = primitive.copy()
    skewed[2] += 40 * primitive[0]
    positions = np.array([[0, 0, 0], [0.5 * 5.6402, 0, 0]])
    a = madelung.Crystal(primitive, positions, [1, -1], ["Na", "Cl"])
    b = madelung.Crystal(skewed, positions, [1, -1], ["Na", "Cl"])
    assert madelung.ewald(b).energy == pytest.approx(madelung.ewald(a).energy, rel=1e-9)
    assert madelung.ewald(a).energy * 4 == pytest.approx(madelung.ewald(crystal).energy, rel=1e-9)


def test_min_distance_zero_switches_the_check_off_without_error():
    code, out, err = run(["energy", NACL, "--min-distance", "0"])
    assert code == 0 and "per formula unit" in out, err


# ---------------------------------------------------------------- screen tables
pd = pytest.importorskip("pandas")


@pytest.fixture
def table(tmp_path):
    """A finished one-structure table and its bytes."""
    out = tmp_path / "table.csv"
    code, _, err = run(["screen", NACL, "--out", str(out), "--workers", "1", "--no-progress"])
    assert code == 0, err
    return out


def test_screen_refuses_an_existing_table_without_resume_or_overwrite(tmp_path, table):
    before = snapshot(tmp_path)
    code, _, err = run(["screen", NACL, "--out", str(table), "--workers", "1", "--no-progress"])
    assert code == 2
    one_line(err, "--resume", "--overwrite")
    assert snapshot(tmp_path) == before


def test_screen_checks_its_workers_before_touching_the_table(tmp_path, table):
    before = snapshot(tmp_path)
    code, _, err = run(["screen", NACL, "--out", str(table), "--workers", "-1", "--overwrite", "--no-progress"])
    assert code == 2
    one_line(err, "workers")
    code, _, err = run(["screen", str(tmp_path / "none*.cif"), "--out", str(table), "--overwrite", "--no-progress"])
    assert code == 2
    one_line(err, "no file matches")
    assert snapshot(tmp_path) == before


def test_screen_resume_refuses_rows_made_with_other_settings(tmp_path, table):
    before = snapshot(tmp_path)
    code, _, err = run(["screen", NACL, "--out", str(table), "--resume", "--tol", "1e-10", "--workers", "1",
                        "--no-progress"])
    assert code == 2
    one_line(err, "other settings", "tol=1e-08", "tol=1e-10")
    assert snapshot(tmp_path) == before
    code, _, err = run(["screen", NACL, "--out", str(table), "--resume", "--workers", "1", "--no-progress"])
    assert code == 0, err


def test_a_second_writer_of_the_same_table_is_refused(tmp_path, table):
    from madelung.batch import TableLock

    before = snapshot(tmp_path)
    lock = TableLock(str(table))     # a run in progress
    try:
        code, _, err = run(["screen", NACL, "--out", str(table), "--overwrite", "--workers", "1", "--no-progress"])
    finally:
        lock.release()
    assert code == 2
    one_line(err, "another run")
    assert {k: v for k, v in snapshot(tmp_path).items() if not k.endswith(".lock")} == before
    assert not (tmp_path / "table.csv.lock").exists()


def test_screen_on_a_full_disk_keeps_the_old_table(tmp_path, table, monkeypatch):
    before = snapshot(tmp_path)

    def full(descriptor):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(madelung.report.files.os, "fsync", full)
    code, _, err = run(["screen", NACL, structure("rocksalt-KCl"), "--out", str(table), "--overwrite",
                        "--workers", "1", "--no-progress"])
    assert code == 2
    one_line(err, "no space left")
    assert snapshot(tmp_path) == before


def test_a_link_at_the_old_temporary_name_is_not_followed(tmp_path):
    victim = tmp_path / "victim.txt"
    victim.write_text("do not touch\n")
    out = tmp_path / "t.csv"
    os.symlink(victim, tmp_path / f"t.csv.part-{os.getpid()}")
    code, _, err = run(["screen", NACL, "--out", str(out), "--workers", "1", "--no-progress"])
    assert code == 0, err
    assert victim.read_text() == "do not touch\n"
    assert len(pd.read_csv(out)) == 1


def test_screen_out_that_is_a_folder_is_refused(tmp_path):
    folder = tmp_path / "t.csv"
    folder.mkdir()
    code, _, err = run(["screen", NACL, "--out", str(folder), "--overwrite", "--no-progress"])
    assert code == 2
    one_line(err, "is a folder")


def test_sigint_stops_cleanly_with_a_readable_table(tmp_path):
    demo = os.path.join(ROOT, "structures", "demo")
    out = tmp_path / "interrupted.csv"
    command = [sys.executable, "-m", "madelung.cli", "screen", demo, "--out", str(out), "--workers", "1",
               "--chunk", "2", "--no-progress"]
    env = {**os.environ, "PYTHONPATH": ROOT}
    process = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.time() + 90
    while time.time() < deadline and process.poll() is None and not out.exists():
        time.sleep(0.05)
    process.send_signal(signal.SIGINT)
    err = process.communicate(timeout=60)[1].decode()
    assert process.returncode in (130, 2), err   # 2 if it had already finished with failed demo rows
    assert "Traceback" not in err
    frame = pd.read_csv(out)
    assert frame["source"].is_unique
    assert not (tmp_path / "interrupted.csv.lock").exists()
    assert sorted(os.listdir(tmp_path)) == ["interrupted.csv"]


def test_a_temporary_left_by_a_killed_run_is_removed_by_the_next_but_links_are_not(tmp_path, table):
    stale = tmp_path / ".table.csv.k3j9x2.part.csv"
    stale.write_text("half a table")
    victim = tmp_path / "victim.txt"
    victim.write_text("do not touch\n")
    link = tmp_path / ".table.csv.zz.part.csv"
    os.symlink(victim, link)
    code, _, err = run(["screen", NACL, "--out", str(table), "--resume", "--workers", "1", "--no-progress"])
    assert code == 0, err
    assert not stale.exists() and link.is_symlink() and victim.read_text() == "do not touch\n"


def test_a_mesh_beyond_the_memory_limit_is_refused_before_it_is_allocated():
    # ions 0.01 Å apart with the distance check off: the planned mesh has about 7 x 10^9 points
    # (at 0.04 Å, 10^8 points: 1 GB since the mesh part takes 8 B per point, within the limit)
    primitive = 0.5 * 5.6402 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0]])
    crystal = madelung.Crystal(primitive, [[0, 0, 0], [0.01, 0, 0]], [1, -1], ["Na", "Cl"], min_distance=0)
    with pytest.raises(madelung.InputError, match="particle mesh .* above the limit"):
        madelung.plan_for(crystal, 1e-10, method="mesh")   # the plan only: nothing is allocated
    assert madelung.plan_for(crystal, 1e-10).method == "direct"   # auto takes the direct sum
