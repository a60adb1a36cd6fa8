"""Numba kernel that sorts atoms into bins by counting (O(N), no comparison sort).

Used by the shortest-distance search (``geometry.shortest_distance``), which needs its bins
once, before any sum is planned: the atoms are wrapped into the cell and counted into bins, and
the shared half-stencil walk (``geometry_kernels.closest_distance``) measures each pair once.

Arithmetic only; the bins are chosen in Python.
"""

import math

import numpy as np
from numba import njit


@njit(cache=True)
def counting_sort_into_bins(positions, inverse, cell, counts):
    """Atoms wrapped into the cell and sorted by bin with a counting sort.

    ``inverse`` maps Cartesian to fractional coordinates (f = r @ inverse), ``counts`` the bins
    along each lattice vector (rows of ``cell``). Returns ``(wrapped Cartesian positions in bin
    order (N, 3), the bin of each sorted atom (N, 3), the start of each bin in that order
    (n_bins + 1))``, bins in the order (b0 * k1 + b1) * k2 + b2.
    """
    n = positions.shape[0]
    k0, k1, k2 = counts[0], counts[1], counts[2]
    flat = np.empty(n, dtype=np.int64)
    frac = np.empty((n, 3))
    start = np.zeros(k0 * k1 * k2 + 1, dtype=np.int64)
    for i in range(n):
        key = 0
        for a in range(3):
            f = positions[i, 0] * inverse[0, a] + positions[i, 1] * inverse[1, a] + positions[i, 2] * inverse[2, a]
            f -= math.floor(f)
            if f >= 1.0:
                f = 0.0
            frac[i, a] = f
            b = int(f * counts[a])
            if b >= counts[a]:
                b = counts[a] - 1
            key = key * counts[a] + b
        flat[i] = key
        start[key + 1] += 1
    for b in range(k0 * k1 * k2):
        start[b + 1] += start[b]
    fill = start[:-1].copy()
    wrapped = np.empty((n, 3))
    bin_of = np.empty((n, 3), dtype=np.int64)
    for i in range(n):
        key = flat[i]
        slot = fill[key]
        fill[key] += 1
        for c in range(3):
            wrapped[slot, c] = frac[i, 0] * cell[0, c] + frac[i, 1] * cell[1, c] + frac[i, 2] * cell[2, c]
        bin_of[slot, 0] = key // (k1 * k2)
        bin_of[slot, 1] = (key // k2) % k1
        bin_of[slot, 2] = key % k2
    return wrapped, bin_of, start
