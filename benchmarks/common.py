"""Shared pieces of the benchmarks: test crystals, timing, table printing, exponent fits."""

from __future__ import annotations

import os
import time

import numpy as np

RESULTS = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results")
STRUCTURES = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "structures")


def rattled_rock_salt(repeats, displacement=0.05, seed=0, a=5.64):
    """A cubic rock-salt supercell (8 repeats^3 ions, charges +-1) with Gaussian displacements (Å)."""
    import madelung
    from ase.build import bulk

    atoms = bulk("NaCl", "rocksalt", a=a, cubic=True).repeat(repeats)
    rng = np.random.default_rng(seed)
    atoms.positions += rng.normal(scale=displacement, size=atoms.positions.shape)
    charges = np.where(np.array(atoms.get_chemical_symbols()) == "Na", 1.0, -1.0)
    return madelung.Crystal.from_ase(atoms, charges)


def best_time(function, repeat=3, clock=time.perf_counter):
    """Best time of ``repeat`` calls (s, wall clock by default) and the last result."""
    best = np.inf
    result = None
    for _ in range(repeat):
        started = clock()
        result = function()
        best = min(best, clock() - started)
    return best, result


def best_cpu(function, repeat=3):
    """Best process (CPU) time of ``repeat`` calls (s) and the last result: less disturbed than
    wall time by other work on a shared machine."""
    return best_time(function, repeat, clock=time.process_time)


def fit_exponent(sizes, times):
    """Slope of log(time) against log(N) by least squares."""
    sizes = np.asarray(sizes, float)
    times = np.asarray(times, float)
    keep = np.isfinite(times) & (times > 0)
    if keep.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(sizes[keep]), np.log(times[keep]), 1)[0])


def print_table(headers, rows, title=None):
    """Print a plain aligned table."""
    text = [[str(h) for h in headers]] + [[str(c) for c in row] for row in rows]
    widths = [max(len(r[i]) for r in text) for i in range(len(headers))]
    if title:
        print(title)
    for k, row in enumerate(text):
        print("  " + "  ".join(cell.rjust(w) for cell, w in zip(row, widths)))
        if k == 0:
            print("  " + "  ".join("-" * w for w in widths))


def verdict(ok):
    return "met" if ok else "NOT met"
