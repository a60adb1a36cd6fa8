"""Measure the cost ratio the tuner uses: one examined real-space pair against one
(atom, k-vector) reciprocal term, on rattled rock-salt supercells at fixed splitting parameters.

Prints the seconds per unit of each and the ratio to put into madelung/ewald/tuning.py
(REAL_PAIR_COST / RECIPROCAL_TERM_COST). Run on an otherwise idle machine.
"""

import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import print_table, rattled_rock_salt  # noqa: E402


def main():
    from madelung.ewald import kernels, tuning
    from madelung.ewald.direct import reciprocal_vectors
    from madelung.geometry import build_bins, wrapped_fractional

    rows = []
    ratios = []
    for reps in (4, 8):
        crystal = rattled_rock_salt(reps)
        cell, positions, charges = crystal.cell, crystal.positions, np.ascontiguousarray(crystal.charges)
        n = len(crystal)
        for r_cut, k_cut in ((10.0, 1.5), (14.0, 2.5)):
            bins = build_bins(cell, positions, r_cut)
            args = (bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.reach, bins.bin_of,
                    bins.bin_start, 0.3, r_cut, True, False)
            kernels.real_space_terms(*args)
            started = time.perf_counter()
            kernels.real_space_terms(*args)
            real_seconds = time.perf_counter() - started
            examined = n * bins.examined_volume * n / crystal.volume
            hkl, kvec, hmax = reciprocal_vectors(cell, k_cut)
            frac = wrapped_fractional(cell, positions)
            weights = np.ones(len(hkl))
            s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
            started = time.perf_counter()
            s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
            kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvec, weights, s_re, s_im, True)
            recip_seconds = time.perf_counter() - started
            terms = n * len(hkl)
            per_pair = real_seconds / examined
            per_term = recip_seconds / terms
            ratios.append(per_pair / per_term)
            rows.append([n, r_cut, k_cut, f"{per_pair * 1e9:.2f}", f"{per_term * 1e9:.2f}", f"{per_pair / per_term:.2f}"])
    print_table(["N", "r_cut", "k_cut", "ns / examined pair", "ns / (atom, k)", "ratio"], rows,
                title="Cost of the two halves of the Ewald sum (forces on)")
    print(f"\nmedian ratio {np.median(ratios):.2f}; tuning.py uses "
          f"{tuning.REAL_PAIR_COST / tuning.RECIPROCAL_TERM_COST:.2f}")


if __name__ == "__main__":
    main()
