"""Accuracy in every basis: the same crystal written in oblique but equivalent bases.

A rattled rock-salt supercell (and random triclinic crystals) is rewritten with unimodular changes
of lattice vectors (rows a, 3a+b, 3a+3b+c and random integer matrices with entries up to ±3). Each
engine sums every basis; the reference is the direct engine in the original (cubic or reduced)
basis at a tolerance 1000x tighter. The table gives, per engine and tol, the worst achieved error
relative to the contract (|E - E_ref| / (tol E_scale)) and the worst ratio of achieved error to the
engine's own error estimate. Both must stay below 1.

    python benchmarks/accuracy_bases.py            # a few minutes on 2 cores
    python benchmarks/accuracy_bases.py --quick    # one tol, fewer bases
"""

import argparse
import sys
import time

import numpy as np

sys.path.insert(0, ".")
sys.path.insert(0, "benchmarks")
import madelung  # noqa: E402
from common import rattled_rock_salt  # noqa: E402

NAMED = {"a, 3a+b, 3a+3b+c": [[1, 0, 0], [3, 1, 0], [3, 3, 1]],
         "a+b, b, a+b+c": [[1, 1, 0], [0, 1, 0], [1, 1, 1]],
         "a, b-2a, c+3b-a": [[1, 0, 0], [-2, 1, 0], [-1, 3, 1]]}


def unimodular(rng, reach=3):
    while True:
        m = rng.integers(-reach, reach + 1, (3, 3))
        if round(abs(np.linalg.det(m))) == 1:
            return m


def random_triclinic(rng, n=24):
    from ase.geometry import cellpar_to_cell
    while True:
        cell = cellpar_to_cell(np.concatenate([rng.uniform(4, 8, 3), rng.uniform(60, 120, 3)]))
        if abs(np.linalg.det(cell)) < 0.3 * np.prod(np.linalg.norm(cell, axis=1)):
            continue
        q = rng.choice([-2.0, -1.0, 1.0, 2.0], n)
        q -= q.mean()
        try:
            return madelung.Crystal(cell * (n / 0.04 / abs(np.linalg.det(cell))) ** (1 / 3),
                                    rng.random((n, 3)) @ (cell * (n / 0.04 / abs(np.linalg.det(cell))) ** (1 / 3)),
                                    q, min_distance=0.9)
        except madelung.InputError:
            continue


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    rng = np.random.default_rng(11)
    tols = (1e-6,) if args.quick else (1e-4, 1e-6, 1e-8)
    crystals = {"rattled rock salt 1728": rattled_rock_salt(6, seed=3)}
    if not args.quick:
        crystals["random triclinic 24"] = random_triclinic(rng)
        crystals["random triclinic 24 x 4x4x4"] = random_triclinic(np.random.default_rng(5)).repeat((4, 4, 4))
    bases = dict(NAMED)
    for i in range(2 if args.quick else 9):
        bases[f"random #{i}"] = unimodular(rng).tolist()
    worst = {}
    print(f"{'crystal':30s} {'tol':>6s} {'method':>6s} {'ran':>6s} {'worst err/contract':>18s} "
          f"{'worst err/estimate':>18s} {'seconds':>8s}")
    for name, crystal in crystals.items():
        for tol in tols:
            reference = madelung.ewald(crystal, tol=tol * 1e-3, method="direct").energy
            for method in ("direct", "mesh", "auto"):
                contract = estimate = 0.0
                ran = set()
                started = time.perf_counter()
                for matrix in bases.values():
                    result = madelung.ewald(crystal.in_basis(matrix), tol=tol, method=method)
                    error = abs(result.energy - reference)
                    contract = max(contract, error / (tol * result.energy_scale))
                    estimate = max(estimate, error / result.error_estimate)
                    ran.add(result.params.method)
                seconds = (time.perf_counter() - started) / len(bases)
                worst[method] = max(worst.get(method, 0.0), contract)
                print(f"{name:30s} {tol:6.0e} {method:>6s} {'/'.join(sorted(ran)):>6s} {contract:18.3g} "
                      f"{estimate:18.3g} {seconds:8.3f}")
    print("worst achieved/tol per engine:", {k: float(f"{v:.3g}") for k, v in worst.items()})


if __name__ == "__main__":
    main()
