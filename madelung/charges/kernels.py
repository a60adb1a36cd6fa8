"""Numba kernel for the charge modules: neighbour distances from chosen sites.

Arithmetic only; walks pairs through the shared bins (``geometry.build_bins``,
``geometry_kernels.neighbour_bin``).
"""

import math

import numpy as np
from numba import njit

from ..geometry_kernels import neighbour_bin


@njit(cache=True)
def neighbours_of(sites, positions, cell, counts, reach, bin_of, bin_start, r_cut):
    """All partners (images included) within ``r_cut`` of each sorted site in ``sites``.

    Returns ``(owner, partner, distance)``: ``owner[p]`` is the position in ``sites``,
    ``partner[p]`` the sorted index of the partner, ``distance[p]`` in Å. Two passes: count, fill.
    """
    cut2 = r_cut * r_cut
    total = 0
    for pass_number in range(2):
        if pass_number == 1:
            owner = np.empty(total, dtype=np.int64)
            partner = np.empty(total, dtype=np.int64)
            distance = np.empty(total)
        p = 0
        for s in range(sites.shape[0]):
            i = sites[s]
            for d0 in range(-reach[0], reach[0] + 1):
                for d1 in range(-reach[1], reach[1] + 1):
                    for d2 in range(-reach[2], reach[2] + 1):
                        b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], d0, d1, d2, counts)
                        sx = s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0]
                        sy = s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1]
                        sz = s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2]
                        for j in range(bin_start[b], bin_start[b + 1]):
                            dx = positions[i, 0] - positions[j, 0] - sx
                            dy = positions[i, 1] - positions[j, 1] - sy
                            dz = positions[i, 2] - positions[j, 2] - sz
                            r2 = dx * dx + dy * dy + dz * dz
                            if r2 >= cut2 or (j == i and s0 == 0 and s1 == 0 and s2 == 0):
                                continue
                            if pass_number == 1:
                                owner[p] = s
                                partner[p] = j
                                distance[p] = math.sqrt(r2)
                            p += 1
        total = p
    return owner, partner, distance
