"""Orderings of disordered sites: candidate energies per second, against a full Ewald sum per candidate.

Cases: half-lithiated Li0.5CoO2 (24 Li/vacancy sites among 72 fixed ions) and half-inverse
MgAl2O4 spinel (24 Mg/Al sites on two sublattices among 32 fixed oxide ions), from the test
structures; ±1 charges on simple-cubic supercells (32 and 64 sites); MgO with 5 % Li+ and 5 % Al3+
on the cation sites (100 disordered sites, three species, among 100 fixed oxide ions).

For each case:
  enumeration  per second, the positions of the lexicographic walk covered (branches that hold
               no orbit minimum are skipped whole) and the orderings whose energy was computed
               (O(N) update, orbit-minimum test, recording), 1 and 2 workers. Small cases are
               enumerated completely; large ones for a stretch of 2e6 positions from the start of
               the walk (the stretch richest in orbit minima, each tested against every operation)
               and, for 100 sites, also from a position further on where minima are rarer.
  search       attempted swaps per second of the annealing search (every attempt computes the
               candidate's energy change), 2 restarts, 1 and 2 workers.
  recompute    candidates per second of a loop that builds each ordered crystal and runs a full
               ``madelung.ewald`` sum on it (tol 1e-10), measured in the same run.

Rates are per wall second; for 1 worker also per CPU second of the process ("per core", which a
loaded shared machine does not distort much), and the ratios use the per-CPU-second rates.
Workers are started inside the timed runs. Targets (issue 15): at least 1e6 candidate energies per
second per core for up to 100 disordered sites, and at least 1000x the recompute loop. The machine
is shared; the load average is printed.
"""

import os
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
DOPANTS = {"Mg": 2.0, "Li": 1.0, "Al": 3.0}
#: A position inside the part of the doped-MgO walk that holds orbit minima (past it, whole branches
#: are skipped and almost no energy is computed).
MID_WALK = 123_456_789_012_345


def simple_cubic():
    return madelung.Crystal(np.eye(3) * 2.82, [[0, 0, 0]], [0.0], ["Na"], species=[(("Na", 0.5), ("Cl", 0.5))])


def doped_magnesia(a=4.21):
    """Rock-salt MgO with Li+ and Al3+ replacing 5 % of the Mg2+ each (neutral): a conventional cell whose
    four cation sites hold Mg0.9Li0.05Al0.05."""
    cell = np.eye(3) * a
    frac = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0],
                     [.5, .5, .5], [.5, 0, 0], [0, .5, 0], [0, 0, .5]])
    mixture = (("Mg", 0.9), ("Li", 0.05), ("Al", 0.05))
    return madelung.Crystal(cell, frac @ cell, [2.0] * 4 + [-2.0] * 4, ["Mg"] * 4 + ["O"] * 4,
                            labels=["M1"] * 4 + ["O1"] * 4, species=[mixture] * 4 + [(("O", 1.0),)] * 4)


def cases():
    licoo2 = madelung.Crystal.from_file(os.path.join(DATA, "Li0.5CoO2_half_lithiated.cif"))
    spinel = madelung.Crystal.from_file(os.path.join(DATA, "MgAl2O4_half_inverse.cif"))
    return [
        ("Li0.5CoO2 2x2x2", ordering_problem(licoo2, (2, 2, 2)), None, None),
        ("MgAl2O4 x=0.5 1x1x1", ordering_problem(spinel, 1, ion_charges={"Mg": 2, "Al": 3}), None, None),
        ("±1 sc 2x4x4", ordering_problem(simple_cubic(), (2, 4, 4), ion_charges=PLUS_MINUS), None, None),
        ("±1 sc 4x4x4", ordering_problem(simple_cubic(), (4, 4, 4), ion_charges=PLUS_MINUS), 0, 200_000),
        ("Mg0.9Li0.05Al0.05O 5x5x1", ordering_problem(doped_magnesia(), (5, 5, 1), ion_charges=DOPANTS), 0, 200_000),
        ("Mg0.9Li0.05Al0.05O 5x5x1", ordering_problem(doped_magnesia(), (5, 5, 1), ion_charges=DOPANTS),
         MID_WALK, 2_000_000),
    ]


def enumeration_rate(problem, first, stretch, workers):
    """Per wall second: walk positions covered, energies computed; per CPU second of this process (1 worker)
    the same two; orbit minima found; positions walked."""
    count = problem.total_orderings if first is None else stretch
    wall, cpu = time.perf_counter(), time.process_time()
    indices, _, _, computed = run_enumeration(problem, workers=workers, first=first or 0, count=count)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return count / wall, computed / wall, count / cpu, computed / cpu, len(indices), count


def search_rate(problem, workers, sweeps=1000):
    """Attempted swaps per wall second and per CPU second of this process."""
    wall, cpu = time.perf_counter(), time.process_time()
    _, _, _, attempts = run_search(problem, keep=5, restarts=2, sweeps=sweeps, workers=workers)
    return attempts / (time.perf_counter() - wall), attempts / (time.process_time() - cpu)


def recompute_rate(problem, candidates=10, seed=0):
    rng = np.random.default_rng(seed)
    rows = []
    for _ in range(candidates):
        x = problem.first_ordering()
        for lo, hi in problem.segments:
            x[lo:hi] = rng.permutation(x[lo:hi])
        rows.append(x)
    wall, cpu = time.perf_counter(), time.process_time()
    for row in rows:
        madelung.ewald(problem.crystal_of(row), tol=1e-10)
    return candidates / (time.perf_counter() - wall), candidates / (time.process_time() - cpu)


def main():
    # warm the kernels (Numba cache) outside the timings
    warm = ordering_problem(simple_cubic(), (2, 2, 2), ion_charges=PLUS_MINUS)
    run_enumeration(warm)
    run_search(warm, restarts=1, sweeps=1)
    madelung.ewald(warm.crystal_of(warm.first_ordering()))
    rows = []
    for name, problem, first, stretch in cases():
        c1, e1, c1_cpu, e1_cpu, found, walked = enumeration_rate(problem, first, stretch, 1)
        c2, e2, _, _, _, _ = enumeration_rate(problem, first, stretch, 2)
        s1, s1_cpu = search_rate(problem, 1)
        s2, _ = search_rate(problem, 2)
        base, base_cpu = recompute_rate(problem)
        what = "all" if first is None else f"{walked:.0e} from {'start' if first == 0 else 'mid-walk'}"
        rows.append([name, len(problem.sites), len(problem.inverse_ops), f"{problem.total_orderings:.3g}", what, found,
                     f"{c1:.3g}", f"{e1:.3g}", f"{e1_cpu:.3g}", f"{c2:.3g}", f"{e2:.3g}", f"{s1:.3g}", f"{s1_cpu:.3g}",
                     f"{s2:.3g}", f"{base:.3g}", f"{base_cpu:.3g}", f"{c1_cpu / base_cpu:.3g}",
                     f"{e1_cpu / base_cpu:.3g}", f"{s1_cpu / base_cpu:.3g}"])
        print(f"  done {name}", flush=True)
    print_table(["case", "sites", "ops", "orderings", "walked", "orbit minima", "covered/s", "energies/s",
                 "energies/cpu-s", "covered/s 2w", "energies/s 2w", "swaps/s", "swaps/cpu-s", "swaps/s 2w",
                 "recompute/s", "recompute/cpu-s", "covered ratio", "energies ratio", "search ratio"], rows,
                title="Orderings: candidates per second (1 worker unless 2w) vs a full Ewald sum per candidate; "
                      "ratios per CPU second")
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()
