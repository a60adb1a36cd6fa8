"""Orderings of disordered sites: candidate energies per second, against a full Ewald sum per candidate.

Cases: ±1 charges on simple-cubic supercells (16, 64 and 100 sites), half-lithiated Li0.5CoO2
(24 Li/vacancy sites among 72 fixed ions) and half-inverse MgAl2O4 spinel (24 Mg/Al sites on two
sublattices among 32 fixed oxide ions), from the test structures.

For each case:
  enumeration  per second, the positions of the lexicographic walk covered (branches that hold
               no orbit minimum are skipped whole) and the orderings whose energy was computed
               (O(N) update, orbit-minimum test, recording), 1 and 2 workers. Small cases are
               enumerated completely; large ones for a stretch of 1e7 positions from the start of
               the walk (the stretch richest in orbit minima) and, for 100 sites, also from a
               random position.
  search       attempted swaps per second of the annealing search (every attempt computes the
               candidate's energy change), 2 restarts, 1 and 2 workers.
  recompute    candidates per second of a loop that builds each ordered crystal and runs a full
               ``madelung.ewald`` sum on it (tol 1e-10), measured in the same run.

Workers are started inside the timed runs. Targets (issue 15): at least 1e6 candidate energies per
second per core for up to 100 disordered sites, and at least 1000x the recompute loop. The machine
is shared; the load average is printed.
"""

import os
import random
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import print_table  # noqa: E402

import madelung  # noqa: E402
from madelung.analysis.ordering_search import run_enumeration, run_search  # noqa: E402
from madelung.analysis.orderings import ordering_problem  # noqa: E402

DATA = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "tests", "data")
PLUS_MINUS = {"Na": 1.0, "Cl": -1.0}


def simple_cubic():
    return madelung.Crystal(np.eye(3) * 2.82, [[0, 0, 0]], [0.0], ["Na"], species=[(("Na", 0.5), ("Cl", 0.5))])


def cases():
    licoo2 = madelung.Crystal.from_file(os.path.join(DATA, "Li0.5CoO2_half_lithiated.cif"))
    spinel = madelung.Crystal.from_file(os.path.join(DATA, "MgAl2O4_half_inverse.cif"))
    return [
        ("Li0.5CoO2 2x2x2", ordering_problem(licoo2, "2x2x2"), None),
        ("MgAl2O4 x=0.5 1x1x1", ordering_problem(spinel, 1, ion_charges={"Mg": 2, "Al": 3}), None),
        ("±1 sc 2x4x4", ordering_problem(simple_cubic(), "2x4x4", ion_charges=PLUS_MINUS), None),
        ("±1 sc 4x4x4", ordering_problem(simple_cubic(), "4x4x4", ion_charges=PLUS_MINUS), 0),
        ("±1 sc 5x5x4", ordering_problem(simple_cubic(), "5x5x4", ion_charges=PLUS_MINUS), 0),
        ("±1 sc 5x5x4 (random stretch)", ordering_problem(simple_cubic(), "5x5x4", ion_charges=PLUS_MINUS),
         random.Random(1).randrange(2**61)),
    ]


def enumeration_rate(problem, first, workers, stretch=10_000_000):
    """(walk positions covered per second, energies computed per second, orbit minima, positions)."""
    count = problem.total_orderings if first is None else stretch
    started = time.perf_counter()
    indices, _, _, computed = run_enumeration(problem, workers=workers, first=first or 0, count=count)
    seconds = time.perf_counter() - started
    return count / seconds, computed / seconds, len(indices), count


def search_rate(problem, workers, sweeps=1000):
    started = time.perf_counter()
    _, _, _, attempts = run_search(problem, keep=5, restarts=2, sweeps=sweeps, workers=workers)
    return attempts / (time.perf_counter() - started)


def recompute_rate(problem, candidates=10, seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(candidates):
        x = problem.first_ordering()
        for lo, hi in problem.segments:
            x[lo:hi] = rng.permutation(x[lo:hi])
        rows.append(x)
    started = time.perf_counter()
    for row in rows:
        madelung.ewald(problem.crystal_of(row), tol=1e-10)
    return candidates / (time.perf_counter() - started)


def main():
    # warm the kernels (Numba cache) outside the timings
    warm = ordering_problem(simple_cubic(), "2x2x2", ion_charges=PLUS_MINUS)
    run_enumeration(warm)
    run_search(warm, restarts=1, sweeps=1)
    madelung.ewald(warm.crystal_of(warm.first_ordering()))
    rows = []
    for name, problem, first in cases():
        c1, e1, found, visited = enumeration_rate(problem, first, 1)
        c2, e2, _, _ = enumeration_rate(problem, first, 2)
        s1 = search_rate(problem, 1)
        s2 = search_rate(problem, 2)
        base = recompute_rate(problem)
        what = "all" if first is None else f"{visited:.0e} from {'start' if first == 0 else 'random'}"
        rows.append([name, len(problem.sites), len(problem.inverse_ops), f"{problem.total_orderings:.3g}", what, found,
                     f"{c1:.3g}", f"{e1:.3g}", f"{c2:.3g}", f"{e2:.3g}", f"{s1:.3g}", f"{s2:.3g}", f"{base:.3g}",
                     f"{c1 / base:.3g}", f"{e1 / base:.3g}", f"{s1 / base:.3g}"])
        print(f"  done {name}", flush=True)
    print_table(["case", "sites", "ops", "orderings", "walked", "orbit minima", "covered/s 1w", "energies/s 1w",
                 "covered/s 2w", "energies/s 2w", "swaps/s 1w", "swaps/s 2w", "recompute/s", "covered ratio",
                 "energies ratio", "search ratio"], rows,
                title="Orderings: candidate energies per second (1 and 2 workers) vs a full Ewald sum per candidate")
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
