"""Measure the two cost constants the tuner uses (madelung/ewald/tuning.py): nanoseconds per
real-space term inside the cutoff (both orders counted) and per (atom, half-space k-vector) term,
forces included, on one thread, for rattled rock-salt supercells at fixed splitting parameters.

Uses process time on one thread, which is less disturbed by other work on the machine than
wall time; still, run it on an otherwise idle machine.
"""

import os
import sys
import time

import numba
import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import print_table, rattled_rock_salt  # noqa: E402


def cpu_time(function, repeat=3):
    best = np.inf
    for _ in range(repeat):
        started = time.process_time()
        result = function()
        best = min(best, time.process_time() - started)
    return best, result


def main():
    from madelung.ewald import kernels, tuning
    from madelung.ewald.plan import reciprocal_vectors
    from madelung.geometry import build_bins, wrapped_fractional

    numba.set_num_threads(1)
    rows, real_costs, recip_costs = [], [], []
    for reps in (4, 8):
        crystal = rattled_rock_salt(reps)
        charges = np.ascontiguousarray(crystal.charges)
        n = len(crystal)
        for alpha, r_cut, k_cut in ((0.3, 12.0, 2.2), (0.22, 18.0, 2.8)):
            bins = build_bins(crystal.cell, crystal.positions, r_cut)
            args = (bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.offsets, bins.bin_of,
                    bins.bin_start, alpha, r_cut, True, False)
            kernels.real_space_terms(*args)
            real_seconds, out = cpu_time(lambda: kernels.real_space_terms(*args))
            pairs = out[3]
            hkl, kvec, hmax = reciprocal_vectors(crystal.cell, k_cut)
            frac = wrapped_fractional(crystal.cell, crystal.positions)
            weights = np.ones(len(hkl))

            def reciprocal():
                s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
                return kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvec, weights, s_re, s_im, True)

            reciprocal()
            recip_seconds, _ = cpu_time(reciprocal)
            per_pair = real_seconds / pairs * 1e9
            per_term = recip_seconds / (n * len(hkl)) * 1e9
            real_costs.append(per_pair)
            recip_costs.append(per_term)
            rows.append([n, r_cut, pairs, f"{per_pair:.2f}", len(hkl), f"{per_term:.2f}"])
    print_table(["N", "r_cut / Å", "real terms", "ns / real term", "k-vectors", "ns / (atom, k)"], rows,
                title="Cost of the two halves of the Ewald sum, one thread, forces on")
    print(f"\nmedian: {np.median(real_costs):.2f} ns per real term, {np.median(recip_costs):.2f} ns per (atom, k)")
    print(f"tuning.py uses: {tuning.REAL_PAIR_COST:.2f} and {tuning.RECIPROCAL_TERM_COST:.2f}")


if __name__ == "__main__":
    main()
