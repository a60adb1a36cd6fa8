"""Numba kernel for pair-resolved screened Coulomb sums (the real-space part of a Coulomb matrix).

Arithmetic only, Gaussian units (no Coulomb constant). For sites sorted by bin
(``geometry.build_bins``), entry (i, j) is the sum over the images n of site j within the
cutoff of ``erfc(alpha_ij r) / r``, r = |r_i - r_j - n|, the site itself (n = 0, j = i) left out.
``alpha_ij = alpha_by_type[type_i, type_j]``: one value for the Ewald real-space sum
(Ewald, Ann. Phys. 369 (1921) 253), a pair-dependent value for the Gaussian-shielding
correction of charge equilibration.
"""

import math

import numpy as np
from numba import njit, prange

from ..geometry_kernels import neighbour_bin


@njit(parallel=True, cache=True)
def screened_pair_matrix(positions, types, alpha_by_type, cell, counts, reach, bin_of, bin_start, r_cut):
    """(N, N) matrix of sum_n erfc(alpha_ij r) / r over images within ``r_cut``, in bin order.

    Each row is filled by the thread that owns its site; no two threads write one place.
    """
    n = positions.shape[0]
    out = np.zeros((n, n))
    cut2 = r_cut * r_cut
    for i in prange(n):
        xi = positions[i, 0]
        yi = positions[i, 1]
        zi = positions[i, 2]
        ti = types[i]
        for d0 in range(-reach[0], reach[0] + 1):
            for d1 in range(-reach[1], reach[1] + 1):
                for d2 in range(-reach[2], reach[2] + 1):
                    b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], d0, d1, d2, counts)
                    sx = s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0]
                    sy = s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1]
                    sz = s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2]
                    for j in range(bin_start[b], bin_start[b + 1]):
                        dx = xi - positions[j, 0] - sx
                        dy = yi - positions[j, 1] - sy
                        dz = zi - positions[j, 2] - sz
                        r2 = dx * dx + dy * dy + dz * dz
                        if r2 >= cut2 or (j == i and s0 == 0 and s1 == 0 and s2 == 0):
                            continue
                        r = math.sqrt(r2)
                        out[i, j] += math.erfc(alpha_by_type[ti, types[j]] * r) / r
    return out
