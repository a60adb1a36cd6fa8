"""What a one-structure command loads, and the all-pairs site gathering that lets it skip scipy.spatial.

Source of the expectations: project convention (the warm one-structure command should load only
what its work needs: no FFTs without a mesh sum, no ASE file machinery when the fast CIF reader
reads the file, no sums for an argument error). No timing is asserted; benchmarks/startup.py
prints the times. The site counts are facts of the trade (conventional cells: rock salt 4 + 4,
spinel MgAl2O4 8 Mg + 16 Al + 32 O, fluorite 4 Ca + 8 F).
"""

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import madelung.io.cif as cif
from madelung.io.read import read_sites

STRUCTURES = Path(__file__).resolve().parents[1] / "structures"
NACL = STRUCTURES / "rocksalt-NaCl.cif"


def _modules_after(code, *names):
    """Which of ``names`` a fresh interpreter has imported after running ``code``."""
    probe = (f"{code}\nimport sys\n"
             f"print('loaded:', *[m for m in {names!r} if m in sys.modules])")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout.splitlines()[-1].split()[1:]


def test_the_constant_command_on_a_plain_cif_loads_no_fft_no_ase_io_no_kd_tree():
    code = ("import contextlib, io\nfrom madelung.cli import main\n"
            f"with contextlib.redirect_stdout(io.StringIO()):\n    assert main(['constant', {str(NACL)!r}]) == 0")
    heavy = ("scipy.fft", "scipy.special", "scipy.spatial", "scipy.sparse", "scipy.integrate", "ase.io")
    assert _modules_after(code, "madelung.sums.direct", *heavy) == ["madelung.sums.direct"]


@pytest.mark.parametrize("argv", [["constant", "missing.cif"], ["constant", str(NACL), "--tol", "abc"]])
def test_an_argument_error_loads_no_sums_no_numba_no_structure_libraries(argv):
    code = ("from madelung.cli import main\ntry:\n"
            f"    code = main({argv!r})\nexcept SystemExit as exc:\n    code = exc.code\nassert code == 2, code")
    loaded = _modules_after(code, "madelung.cli.energy", "madelung.sums.direct", "madelung.structure.crystal", "numba",
                            "spglib", "ase")
    assert loaded == ["madelung.cli.energy"]


@pytest.mark.parametrize("name, counts", [("rocksalt-NaCl.cif", {"Na": 4, "Cl": 4}),
                                          ("spinel-MgAl2O4.cif", {"Mg": 8, "Al": 16, "O": 32}),
                                          ("fluorite-CaF2.cif", {"Ca": 4, "F": 8})])
def test_every_pair_and_the_kd_tree_gather_the_same_sites(monkeypatch, name, counts):
    path = STRUCTURES / name
    monkeypatch.setattr(cif, "_by_all_pairs", lambda n: True)
    by_all_pairs = read_sites(path)
    monkeypatch.setattr(cif, "_by_all_pairs", lambda n: False)     # every set of points takes the k-d tree
    by_tree = read_sites(path)
    found = {}
    for parts in by_all_pairs.species:
        found[parts[0][0]] = found.get(parts[0][0], 0) + 1
    assert found == counts
    assert by_tree.labels == by_all_pairs.labels
    assert np.allclose(by_tree.positions, by_all_pairs.positions, rtol=0, atol=1e-12)


@pytest.mark.parametrize("all_pairs", [True, False])
def test_gathering_links_chains_of_close_points(monkeypatch, all_pairs):
    monkeypatch.setattr(cif, "_by_all_pairs", lambda n: all_pairs)
    # three points 0.04 Å apart in a row (0 and 2 are 0.08 Å apart) are one site at a tolerance of
    # 0.05 Å; a point across the periodic boundary joins its neighbour too
    cell = 10.0 * np.eye(3)
    frac = np.array([[0.5, 0.5, 0.5], [0.504, 0.5, 0.5], [0.508, 0.5, 0.5], [0.9999, 0.2, 0.2],
                     [0.0003, 0.2, 0.2], [0.3, 0.3, 0.3]])
    assert cif._gather(frac, cell, 0.05) == [[0, 1, 2], [3, 4], [5]]
