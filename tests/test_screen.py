"""Batch screening: executors agree row for row, broken inputs become rows, interrupted runs resume."""

import math
import os
import random
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

import madelung
from madelung.cli import main
from madelung.batch import TIMING_COLUMNS, TableWriter, screen, table_columns

from conftest import ROOT, structure

pd = pytest.importorskip("pandas")
pytest.importorskip("pyarrow")

PROTOTYPES = ["rocksalt-NaCl", "caesium-chloride-CsCl", "fluorite-CaF2", "perovskite-SrTiO3", "rutile-TiO2",
              "zincblende-ZnS", "wurtzite-ZnO-ideal", "layered-rocksalt-LiCoO2"]


def _folder(tmp_path, names=PROTOTYPES, name="in"):
    folder = tmp_path / name
    folder.mkdir()
    for n in names:
        shutil.copy(structure(n), folder / f"{n}.cif")
    return folder


def _p1_cif(a, sites, states):
    """A cubic P1 CIF with oxidation numbers (our own minimal writer for test inputs)."""
    lines = ["data_test", *(f"_cell_length_{x} {a}" for x in "abc"), *(f"_cell_angle_{x} 90" for x in
             ("alpha", "beta", "gamma")), "_symmetry_space_group_name_H-M 'P 1'", "loop_",
             "_symmetry_equiv_pos_as_xyz", "  'x, y, z'", "loop_", "_atom_type_symbol", "_atom_type_oxidation_number"]
    lines += [f"  {t} {q:+g}" for t, q in states.items()]
    lines += ["loop_", "_atom_site_label", "_atom_site_type_symbol", "_atom_site_fract_x", "_atom_site_fract_y",
              "_atom_site_fract_z"]
    lines += [f"  {t.rstrip('+-0123456789')}{k} {t} {x} {y} {z}" for k, (t, (x, y, z)) in enumerate(sites)]
    return "\n".join(lines) + "\n"


def _rocksalt_sites(cation, anion):
    fcc = [(0, 0, 0), (0.5, 0.5, 0), (0.5, 0, 0.5), (0, 0.5, 0.5)]
    return [(cation, p) for p in fcc] + [(anion, tuple((np.array(p) + 0.5) % 1)) for p in fcc]


def _values(path):
    """The table without its timing columns, for comparing runs."""
    frame = pd.read_parquet(path) if str(path).endswith(".parquet") else None
    return frame.drop(columns=list(TIMING_COLUMNS))


def _assert_same(a, b):
    pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True), check_exact=True)


@pytest.fixture(scope="module")
def dask_cluster():
    distributed = pytest.importorskip("dask.distributed")
    # two single-threaded worker processes on the loopback interface
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                       dashboard_address=None, silence_logs=50)
    yield cluster
    cluster.close()


def test_one_worker_two_workers_and_dask_give_identical_rows(tmp_path, dask_cluster):
    folder = _folder(tmp_path)
    one = screen([str(folder)], str(tmp_path / "one.parquet"), workers=1, progress=False, chunk_size=3)
    two = screen([str(folder)], str(tmp_path / "two.parquet"), workers=2, progress=False, chunk_size=3)
    dask = screen([str(folder)], str(tmp_path / "dask.parquet"), scheduler=dask_cluster.scheduler_address,
                  progress=False, chunk_size=3)
    assert one.ok == two.ok == dask.ok == len(PROTOTYPES) and one.failed == 0
    assert dask.executor.startswith("dask")
    a, b, c = (_values(tmp_path / f"{n}.parquet") for n in ("one", "two", "dask"))
    _assert_same(a, b)
    _assert_same(a, c)
    # deterministic order: the sorted file names of the folder
    assert list(a["source"]) == sorted(str(folder / f"{n}.cif") for n in PROTOTYPES)
    assert list(a["index"]) == list(range(len(PROTOTYPES)))
    # the descriptor values are the engine's own
    row = a[a["source"].str.endswith("rocksalt-NaCl.cif")].iloc[0]
    energy = madelung.ewald(madelung.Crystal.from_file(structure("rocksalt-NaCl")), tol=1e-10).energy
    assert row["energy_eV"] == pytest.approx(energy, rel=1e-7)
    # rock salt 1.747564594633, OEIS A085469 (handbook convention)
    assert row["madelung_handbook"] == pytest.approx(1.747564594633, abs=1e-7)
    assert row["space_group"] == "Fm-3m" and row["space_group_number"] == 225


def test_broken_inputs_become_rows_and_the_job_finishes(tmp_path, capsys):
    folder = tmp_path / "mixed"
    folder.mkdir()
    good = _p1_cif(5.64, _rocksalt_sites("Na+", "Cl-"), {"Na+": 1, "Cl-": -1})
    (folder / "a_good.cif").write_text(good)
    (folder / "b_truncated.cif").write_text(good[: good.index("_atom_site_fract_z") + 30])
    (folder / "c_charged.cif").write_text(_p1_cif(5.64, _rocksalt_sites("Na+", "Cl2-"), {"Na+": 1, "Cl2-": -2}))
    (folder / "d_unknown.cif").write_text(_p1_cif(5.64, _rocksalt_sites("Na+", "Qx-"), {"Na+": 1, "Qx-": -1}))
    out = tmp_path / "mixed.csv"
    code = main(["screen", str(folder), "--out", str(out), "--workers", "2", "--no-progress"])
    printed, errors = capsys.readouterr()
    assert code == 2   # some inputs failed; the table is still written
    assert "4 structures: 1 ok, 3 failed" in printed
    assert errors.strip().splitlines()[-1].startswith("madelung: 3 of 4 structures")
    frame = pd.read_csv(out, keep_default_na=False)
    assert list(frame["source"].map(os.path.basename)) == ["a_good.cif", "b_truncated.cif", "c_charged.cif",
                                                            "d_unknown.cif"]
    status = dict(zip(frame["source"].map(os.path.basename), frame["status"]))
    assert status["a_good.cif"] == "ok"
    assert "cannot read" in status["b_truncated.cif"]
    assert "net charge" in status["c_charged.cif"]
    assert "unknown element" in status["d_unknown.cif"] or "Qx" in status["d_unknown.cif"]
    # every failed row names its file
    for name in ("b_truncated.cif", "c_charged.cif", "d_unknown.cif"):
        assert name in status[name]
    # the same non-neutral structure is fine once the user gives the charges
    fixed = screen([str(folder / "c_charged.cif")], str(tmp_path / "fixed.jsonl"), workers=1, progress=False,
                   charge_rules={"Na": 1, "Cl": -1})
    assert fixed.ok == 1
    rows = TableWriter(str(tmp_path / "fixed.jsonl"), table_columns()).read()
    assert rows[0]["madelung_handbook"] == pytest.approx(1.747564594633, abs=1e-7)  # OEIS A085469


def test_timeout_is_recorded_not_fatal(tmp_path):
    folder = _folder(tmp_path, PROTOTYPES[:2])
    summary = screen([str(folder)], str(tmp_path / "t.parquet"), workers=1, timeout=1e-4, progress=False)
    assert summary.failed == 2 and summary.ok == 0
    frame = pd.read_parquet(tmp_path / "t.parquet")
    assert all(s.startswith("timed out") for s in frame["status"])
    assert frame["energy_eV"].isna().all()


def test_ase_database_in_and_out(tmp_path):
    import ase.db

    path = str(tmp_path / "candidates.db")
    with ase.db.connect(path) as db:
        for name in PROTOTYPES[:4]:
            crystal = madelung.Crystal.from_file(structure(name))
            db.write(crystal.to_ase(), name=name)
    out = tmp_path / "db.parquet"
    code = main(["screen", "--db", path, "--select", "natoms<9", "--out", str(out), "--workers", "1",
                 "--write-db", "--no-progress", "--sites", str(tmp_path / "db_sites.parquet")])
    assert code == 0
    frame = pd.read_parquet(out)
    db = ase.db.connect(path)
    small = [row.id for row in db.select("natoms<9")]
    assert list(frame["db_id"]) == small and (frame["status"] == "ok").all()
    assert list(frame["source"]) == [f"{os.path.normpath(path)}@{i}" for i in small]
    for row in frame.itertuples():
        stored = db.get(id=row.db_id)
        assert stored.madelung_status == "ok"
        assert stored.madelung_energy_per_atom_eV == pytest.approx(row.energy_per_atom_eV, rel=1e-12)
    sites = pd.read_parquet(tmp_path / "db_sites.parquet")
    assert set(sites["source"]) == set(frame["source"])
    assert len(sites) == int(frame["n_atoms"].sum())


def test_csv_and_json_lines_hold_the_same_values(tmp_path):
    folder = _folder(tmp_path, PROTOTYPES[:3])
    for ending in ("parquet", "csv", "jsonl"):
        screen([str(folder)], str(tmp_path / f"r.{ending}"), workers=1, progress=False)
    columns = table_columns()
    tables = [TableWriter(str(tmp_path / f"r.{e}"), columns).read() for e in ("parquet", "csv", "jsonl")]
    for rows in tables[1:]:
        for mine, reference in zip(rows, tables[0]):
            for key, value in reference.items():
                if key in TIMING_COLUMNS:
                    continue
                if isinstance(value, float) and math.isnan(value):
                    assert math.isnan(mine[key]), key
                else:
                    assert mine[key] == value, key
    assert len(pd.read_json(tmp_path / "r.jsonl", lines=True)) == 3


def _demo_copy(tmp_path, count=None):
    """The good demo candidates (49: a run of a few seconds on one worker), or the first ``count``."""
    demo = os.path.join(ROOT, "structures", "demo")
    names = sorted(f for f in os.listdir(demo) if f.endswith(".cif") and "truncated" not in f)[:count]
    folder = tmp_path / "many"
    folder.mkdir()
    for n in names:
        shutil.copy(os.path.join(demo, n), folder / n)
    return folder, names


def test_kill_midway_then_resume(tmp_path):
    folder, names = _demo_copy(tmp_path)
    reference = tmp_path / "reference.parquet"
    screen([str(folder)], str(reference), workers=1, progress=False)

    out = tmp_path / "interrupted.parquet"
    command = [sys.executable, "-m", "madelung.cli", "screen", str(folder), "--out", str(out), "--workers", "1",
               "--chunk", "2", "--no-progress"]
    env = {**os.environ, "PYTHONPATH": ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}
    process = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    written = 0
    deadline = time.time() + 60
    while time.time() < deadline and process.poll() is None:
        if out.exists():
            try:
                written = len(pd.read_parquet(out))   # readable whenever we look
            except Exception as exc:  # pragma: no cover - a torn file would be the bug under test
                pytest.fail(f"table not readable during the run: {exc}")
            if written >= 4:
                break
        time.sleep(0.05)
    process.send_signal(signal.SIGKILL)
    process.wait()
    partial = pd.read_parquet(out)
    assert 0 < len(partial) < len(names), "the run should have been stopped midway"

    summary = screen([str(folder)], str(out), workers=1, resume=True, progress=False)
    assert summary.skipped == len(partial) and summary.ok == len(names) - len(partial)
    resumed = _values(out)
    assert resumed["source"].is_unique and len(resumed) == len(names)
    _assert_same(resumed, _values(reference))


def test_a_killed_worker_is_recorded_and_replaced(tmp_path):
    import ase.db

    from madelung.batch import LocalPool, ScreenOptions, Task

    path = str(tmp_path / "big.db")
    crystal = madelung.Crystal.from_file(structure("rocksalt-NaCl"))
    with ase.db.connect(path) as db:
        big = db.write(crystal.repeat((4, 4, 4)).to_ase())     # 512 sites: a second or more of work
        small = db.write(crystal.to_ase())
    pool = LocalPool(1, ScreenOptions())
    try:
        pool.submit(Task(0, f"{path}@{big}", path, big))
        time.sleep(0.2)
        os.kill(pool.workers[0].process.pid, signal.SIGKILL)
        done = []
        deadline = time.time() + 30
        while not done and time.time() < deadline:
            done = pool.collect()
        (task, (row, _)), = done
        assert task.index == 0 and row["status"].startswith("worker crashed (exit code -9)")
        assert math.isnan(row["energy_eV"])
        pool.submit(Task(1, f"{path}@{small}", path, small))   # the replacement worker goes on
        done = []
        while not done and time.time() < deadline:
            done = pool.collect()
        assert done[0][1][0]["status"] == "ok"
    finally:
        pool.close(kill=True)


_POOL_THEN_DIE = """
import os, signal, sys
from madelung.batch import LocalPool, ScreenOptions
pool = LocalPool(2, ScreenOptions())
print(" ".join(str(w.process.pid) for w in pool.workers), flush=True)
sys.stdout.close()
os.kill(os.getpid(), signal.SIGKILL)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="workers are forked on Linux only")
def test_workers_of_a_killed_run_stop():
    # a worker forked from the run holds copies of the run's pipe ends; it must close them, or it
    # would wait for its next task for ever once the run is killed (SIGKILL: no clean-up runs)
    process = subprocess.Popen([sys.executable, "-c", _POOL_THEN_DIE], stdout=subprocess.PIPE, text=True,
                               env=dict(os.environ, PYTHONPATH=str(ROOT)))
    pids = [int(p) for p in process.stdout.readline().split()]
    process.wait(timeout=60)
    assert len(pids) == 2
    deadline = time.time() + 30
    alive = list(pids)
    try:
        while alive and time.time() < deadline:
            time.sleep(0.1)
            alive = [pid for pid in alive if _running(pid)]
        assert not alive, f"workers {alive} outlived their killed run"
    finally:
        for pid in alive:
            os.kill(pid, signal.SIGKILL)


def _running(pid):
    try:
        with open(f"/proc/{pid}/stat") as handle:
            return handle.read().split(") ")[-1][:1] != "Z"    # a zombie has exited
    except FileNotFoundError:
        return False


def test_sigkill_at_random_moments_then_resume_gives_the_rows_of_an_uninterrupted_run(tmp_path):
    folder, names = _demo_copy(tmp_path, 24)
    reference = tmp_path / "reference.csv"
    screen([str(folder)], str(reference), workers=1, progress=False)

    out = tmp_path / "killed.csv"
    command = [sys.executable, "-m", "madelung.cli", "screen", str(folder), "--out", str(out), "--workers", "1",
               "--chunk", "1", "--resume", "--no-progress"]
    env = {**os.environ, "PYTHONPATH": ROOT}
    rng = random.Random(14)
    for _ in range(3):
        process = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        time.sleep(rng.uniform(0.5, 4.0))
        process.send_signal(signal.SIGKILL)
        process.wait()
        if out.exists():
            frame = pd.read_csv(out)          # readable whenever the run was killed
            assert frame["source"].is_unique
    summary = screen([str(folder)], str(out), workers=1, resume=True, progress=False)
    assert summary.ok + summary.skipped == len(names)
    drop = list(TIMING_COLUMNS)
    resumed = pd.read_csv(out).drop(columns=drop)
    expected = pd.read_csv(reference).drop(columns=drop)
    pd.testing.assert_frame_equal(resumed, expected)
    assert sorted(os.listdir(tmp_path)) == ["killed.csv", "many", "reference.csv"]   # no lock or temporary left

