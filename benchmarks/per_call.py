"""Per-call time of small cells: madelung.ewald and madelung.describe against the NumPy baseline.

Energy, potentials and forces at tol 1e-8, one thread, best CPU time of many calls (the sums
of small cells are dominated by what happens around the kernels: planning, bins, k-vectors).
The baseline is the vectorised NumPy/SciPy Ewald sum of benchmarks/baseline_numpy.py, measured
in the same run; both results are checked against each other.

    python benchmarks/per_call.py
"""

import os
import sys

import numba
import numpy as np

sys.path.insert(0, ".")
sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import madelung  # noqa: E402
from baseline_numpy import numpy_ewald  # noqa: E402
from common import STRUCTURES, best_cpu, print_table  # noqa: E402


def cases():
    salt = madelung.Crystal.from_file(os.path.join(STRUCTURES, "rocksalt-NaCl.cif"))
    primitive = madelung.Crystal(0.5 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0]]) * 5.6402,
                                 [[0, 0, 0], [2.8201, 0, 0]], [1.0, -1.0], symbols=["Na", "Cl"])
    perovskite = madelung.Crystal.from_file(os.path.join(STRUCTURES, "perovskite-SrTiO3.cif")).repeat((2, 2, 2))
    return {"NaCl primitive (2 ions)": primitive, "NaCl conventional (8 ions)": salt,
            "SrTiO3 2x2x2 (40 ions)": perovskite}


def main():
    numba.set_num_threads(1)
    rows = []
    for name, crystal in cases().items():
        ours = madelung.ewald(crystal, tol=1e-8, forces=True)
        base = numpy_ewald(crystal.cell, crystal.positions, crystal.charges, tol=1e-8, forces=True)
        energy = base[0] if isinstance(base, tuple) else base["energy"]
        agree = abs(ours.energy - energy) / ours.energy_scale
        t_ours, _ = best_cpu(lambda: madelung.ewald(crystal, tol=1e-8, forces=True), repeat=30)
        t_base, _ = best_cpu(lambda: numpy_ewald(crystal.cell, crystal.positions, crystal.charges, tol=1e-8,
                                              forces=True), repeat=10)
        madelung.describe(crystal)
        t_describe, _ = best_cpu(lambda: madelung.describe(crystal), repeat=10)
        rows.append([name, f"{1e3 * t_ours:.3f}", f"{1e3 * t_base:.3f}", f"{t_base / t_ours:.1f}x",
                     f"{1e3 * t_describe:.2f}", f"{t_base / t_describe:.2f}x", f"{agree:.1e}"])
    print_table(["case", "ewald ms", "NumPy ms", "speed-up", "describe ms", "NumPy/describe", "|dE|/E_scale"],
                rows, title="per call, one thread, CPU time, tol 1e-8, with forces")


if __name__ == "__main__":
    main()
