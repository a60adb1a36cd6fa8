"""What the mesh engine's check costs: the same sum with and without it (one thread, CPU time).

The check (madelung/sums/mesh.py) is a subsample of the crystal's ions against the direct
reciprocal sum where that is cheap, and a proxy cell otherwise. The target is under about 10 % of
the sum. Rattled rock salt in an oblique basis (rows a, 3a+b, 3a+3b+c), energy + forces.

    python benchmarks/mesh_check_cost.py
"""

import sys

import numba

sys.path.insert(0, ".")
from madelung.sums.mesh import ewald_mesh  # noqa: E402

sys.path.insert(0, "benchmarks")
from common import best_cpu, rattled_rock_salt  # noqa: E402


def main():
    numba.set_num_threads(1)
    print(f"{'N':>7s} {'tol':>6s} {'check':>11s} {'no check s':>10s} {'check s':>8s} {'share':>6s}")
    for repeat in (6, 10, 16):
        crystal = rattled_rock_salt(repeat).in_basis([[1, 0, 0], [3, 1, 0], [3, 3, 1]])
        for tol in (1e-6, 1e-8):
            ewald_mesh(crystal, tol=tol, forces=True)  # compile and warm
            plain, _ = best_cpu(lambda: ewald_mesh(crystal, tol=tol, forces=True, check=False))
            checked, result = best_cpu(lambda: ewald_mesh(crystal, tol=tol, forces=True))
            kind = result.params.extra["check"]["kind"]
            print(f"{len(crystal):7d} {tol:6.0e} {kind:>11s} {plain:10.3f} {checked:8.3f} "
                  f"{(checked - plain) / plain:6.1%}")


if __name__ == "__main__":
    main()
