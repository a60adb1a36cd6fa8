"""Per-call time of small cells: madelung.ewald and madelung.describe against the NumPy baseline.

Energy, potentials and forces at tol 1e-8, one thread (Numba and BLAS), best CPU time of many
calls. The sums of small cells are dominated by what happens around the kernels (planning, bins,
k-vectors), and the plan keeps what it can, so three times are given for ours: the same crystal
again (its whole plan kept), its ions moved ~0.01 Å in the same cell (a relaxation or a
trajectory: the tuning and the k-vectors of the cell kept, the shortest distance and the bins
found anew) and a cell strained by ~1 % as well (a screening run: everything planned anew). The baseline is the vectorised NumPy/SciPy Ewald sum of
benchmarks/baseline_numpy.py, measured in the same run; both results are checked against each
other. A second table splits one call on a new cell into its stages, a third gives
describe, and the last the 4096-ion rattled rock salt with the default method (where the time
goes: the plan, and the engine's own functions by CPU time).

    python benchmarks/per_call.py                 # about a minute on a quiet machine
    python benchmarks/per_call.py --no-large      # small cells only
"""

import argparse
import cProfile
import os
import pstats
import sys
import time

import numba
import numpy as np
from threadpoolctl import threadpool_limits

sys.path.insert(0, ".")
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import madelung  # noqa: E402
from madelung.sums.direct import run_direct  # noqa: E402
from madelung.sums.plan import plan_for  # noqa: E402
from baseline_numpy import numpy_ewald  # noqa: E402
from common import STRUCTURES, best_cpu, print_table, rattled_rock_salt  # noqa: E402

TOL = 1e-8


def cases():
    salt = madelung.Crystal.from_file(os.path.join(STRUCTURES, "rocksalt-NaCl.cif"))
    primitive = madelung.Crystal(0.5 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0]]) * 5.6402,
                                 [[0, 0, 0], [2.8201, 0, 0]], [1.0, -1.0], symbols=["Na", "Cl"])
    perovskite = madelung.Crystal.from_file(os.path.join(STRUCTURES, "perovskite-SrTiO3.cif")).repeat((2, 2, 2))
    return {"NaCl primitive (2 ions)": primitive, "NaCl conventional (8 ions)": salt,
            "SrTiO3 2x2x2 (40 ions)": perovskite}


def moved_copies(crystal, count, seed=0, displacement=0.01, strain=0.0):
    """``count`` copies of the crystal with every ion moved at random (Å) and, with ``strain``, the
    cell (and the ions with it) strained at random by about that much: new plans each time."""
    rng = np.random.default_rng(seed)
    copies = []
    for _ in range(count):
        deformation = np.eye(3) + strain * rng.normal(size=(3, 3))
        copies.append(crystal.replace(
            cell=crystal.cell @ deformation,
            positions=(crystal.positions + rng.normal(0.0, displacement, crystal.positions.shape)) @ deformation))
    return copies


def setup_time(crystal, count, seed=4, strain=0.01):
    """Best CPU time (s) of building (and so checking) a crystal from a new cell and positions:
    the validation, including the shortest interionic distance that every later sum reuses."""
    rng = np.random.default_rng(seed)
    best = np.inf
    for _ in range(count):
        deformation = np.eye(3) + strain * rng.normal(size=(3, 3))
        cell = crystal.cell @ deformation
        positions = (crystal.positions + rng.normal(0.0, 0.01, crystal.positions.shape)) @ deformation
        started = time.process_time()
        madelung.Crystal(cell, positions, crystal.charges, symbols=crystal.symbols)
        best = min(best, time.process_time() - started)
    return best


def best_over(function, crystals):
    """Best CPU time (s) of ``function(crystal)`` over the crystals, one call each."""
    best = np.inf
    for crystal in crystals:
        started = time.process_time()
        function(crystal)
        best = min(best, time.process_time() - started)
    return best


def stages(crystals):
    """Best CPU time (s) of each stage of one call on a new crystal (each stage's best over the crystals)."""
    best = {"reduced cell, tuning, plan": np.inf, "bins": np.inf, "k-vectors": np.inf,
            "sums (kernels, assembly)": np.inf}
    clock = time.process_time
    for crystal in crystals:
        t1 = clock()
        plan = plan_for(crystal, TOL)
        t2 = clock()
        plan.bins
        t3 = clock()
        plan.kspace
        t4 = clock()
        run_direct(crystal, plan, forces=True)
        t5 = clock()
        for name, seconds in zip(best, (t2 - t1, t3 - t2, t4 - t3, t5 - t4)):
            best[name] = min(best[name], seconds)
    return best


def small_cells():
    rows, stage_rows, describe_rows = [], [], []
    for name, crystal in cases().items():
        ours = madelung.ewald(crystal, tol=TOL, forces=True)
        base = numpy_ewald(crystal.cell, crystal.positions, crystal.charges, tol=TOL, forces=True)
        agree = abs(ours.energy - base["energy"]) / ours.energy_scale
        t_same, _ = best_cpu(lambda: madelung.ewald(crystal, tol=TOL, forces=True), repeat=200)
        t_moved = best_over(lambda c: madelung.ewald(c, tol=TOL, forces=True), moved_copies(crystal, 200))
        t_new = best_over(lambda c: madelung.ewald(c, tol=TOL, forces=True),
                          moved_copies(crystal, 200, seed=1, strain=0.01))
        t_base, _ = best_cpu(lambda: numpy_ewald(crystal.cell, crystal.positions, crystal.charges, tol=TOL,
                                                 forces=True), repeat=20)
        t_setup = setup_time(crystal, 200)
        rows.append([name, ours.params.k_vectors, f"{1e3 * t_same:.3f}", f"{1e3 * t_moved:.3f}", f"{1e3 * t_new:.3f}",
                     f"{1e3 * t_setup:.3f}", f"{1e3 * t_base:.3f}", f"{t_base / t_same:.1f}x",
                     f"{t_base / t_moved:.1f}x", f"{t_base / t_new:.1f}x", f"{t_base / (t_new + t_setup):.1f}x",
                     f"{agree:.1e}"])
        split = stages(moved_copies(crystal, 200, seed=2, strain=0.01))
        stage_rows.append([name] + [f"{1e6 * s:.0f}" for s in split.values()] + [f"{1e6 * sum(split.values()):.0f}"])
        madelung.describe(crystal)
        d_same, _ = best_cpu(lambda: madelung.describe(crystal), repeat=30)
        d_new = best_over(madelung.describe, moved_copies(crystal, 30, seed=3, strain=0.01))
        describe_rows.append([name, f"{1e3 * d_same:.2f}", f"{1e3 * d_new:.2f}", f"{1e3 * t_base:.3f}",
                              f"{t_base / d_new:.2f}x"])
    print_table(["case", "k-vectors", "same ms", "moved ms", "new cell ms", "set-up ms", "NumPy ms", "NumPy/same",
                 "NumPy/moved", "NumPy/new cell", "NumPy/(set-up + new cell)", "|dE|/E_scale"], rows,
                title=f"madelung.ewald per call, one thread, CPU time, tol {TOL:g}, energy + potentials + forces. "
                      "same: the same crystal again (its plan kept); moved: ions moved ~0.01 Å in the same cell "
                      "(tuning and k-vectors of the cell kept); new cell: cell strained ~1 % too (all planned anew); set-up: "
                      "building the Crystal of a new cell (its checks, with the shortest distance every sum reuses), "
                      "which the NumPy baseline, taking bare arrays, does not do")
    print()
    print_table(["case"] + list(split) + ["sum"], stage_rows,
                title="one call on a new cell by stage, µs of CPU (each the best of 200 new cells)")
    print()
    print_table(["case", "describe same ms", "describe new cell ms", "NumPy energy ms", "NumPy/describe new cell"],
                describe_rows, title="madelung.describe per structure (energy, Madelung constants, site "
                                     "potentials, Coulomb-matrix spectrum) against the baseline's bare energy")


def large_cell():
    crystal = rattled_rock_salt(8)
    n = len(crystal)
    result = madelung.ewald(crystal, tol=TOL, forces=True)
    t_ours, result = best_cpu(lambda: madelung.ewald(crystal, tol=TOL, forces=True), repeat=3)
    t_plan, plan = best_cpu(lambda: plan_for(crystal, TOL), repeat=3)
    started = time.process_time()
    base = numpy_ewald(crystal.cell, crystal.positions, crystal.charges, tol=TOL, forces=True)
    t_base = time.process_time() - started
    reference = madelung.ewald(crystal, tol=1e-12, method="direct").energy
    print_table(["case", "method ran", "ours s", "plan s", "NumPy s", "NumPy/ours", "ours |dE|/E_scale",
                 "NumPy |dE|/E_scale"],
                [[f"rattled rock salt ({n} ions)", result.params.method, f"{t_ours:.4f}", f"{t_plan:.4f}",
                  f"{t_base:.3f}", f"{t_base / t_ours:.1f}x",
                  f"{abs(result.energy - reference) / result.energy_scale:.1e}",
                  f"{abs(base['energy'] - reference) / result.energy_scale:.1e}"]],
                title=f"default method, one thread, CPU time, tol {TOL:g}, energy + potentials + forces "
                      "(reference: the direct engine at tol 1e-12)")
    profile = cProfile.Profile(time.process_time)   # CPU time: less disturbed by other work
    profile.enable()
    madelung.ewald(crystal, tol=TOL, forces=True)
    profile.disable()
    stats = pstats.Stats(profile).stats
    top = sorted(((tottime, func) for func, (_, _, tottime, _, _) in stats.items()), reverse=True)[:8]
    total = sum(tottime for _, _, tottime, _, _ in stats.values())
    print()
    print_table(["function (own time)", "ms", "share"],
                [[f"{os.path.basename(f[0])}:{f[2]}", f"{1e3 * t:.1f}", f"{100 * t / total:.0f} %"] for t, f in top],
                title=f"where one call of {n} ions spends its time (cProfile, CPU, {1e3 * total:.1f} ms in all)")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--no-large", action="store_true", help="leave out the 4096-ion case")
    args = parser.parse_args()
    numba.set_num_threads(1)
    with threadpool_limits(1):
        small_cells()
        if not args.no_large:
            print()
            large_cell()


if __name__ == "__main__":
    main()
