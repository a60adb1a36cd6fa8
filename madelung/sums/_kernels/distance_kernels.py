"""Numba kernel of the shortest interionic distance: one pass, its own bins, no sort.

The atoms are wrapped into the cell and put into bins at least ``cutoff`` thick by a counting
sort (O(N), no comparison sort), then every pair within one stencil of bins is measured once:
offsets after (0, 0, 0) in lexicographic order, and within a bin the later atoms only (the pair
(i, j, n) and (j, i, -n) are the same distance). The caller chooses a cutoff that is sure to
hold the closest pair (``geometry.shortest_distance``), so one pass is enough.

Arithmetic only; the bins and the stencil are chosen in Python.
"""

import math

import numpy as np
from numba import njit, prange

from .geometry_kernels import PRANGE_ONLY

#: Bins are split into this many chunks for the walk (each keeps its own minimum).
CHUNKS = 64


@njit(cache=True)
def _counting_sort(positions, inverse, cell, counts):
    """Wrapped Cartesian positions in bin order (xs, ys, zs) and the start of each bin in that
    order (n_bins + 1). ``inverse`` maps Cartesian to fractional: f = r @ inverse."""
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
    xs = np.empty(n)
    ys = np.empty(n)
    zs = np.empty(n)
    for i in range(n):
        key = flat[i]
        slot = fill[key]
        fill[key] += 1
        f0, f1, f2 = frac[i, 0], frac[i, 1], frac[i, 2]
        xs[slot] = f0 * cell[0, 0] + f1 * cell[1, 0] + f2 * cell[2, 0]
        ys[slot] = f0 * cell[0, 1] + f1 * cell[1, 1] + f2 * cell[2, 1]
        zs[slot] = f0 * cell[0, 2] + f1 * cell[1, 2] + f2 * cell[2, 2]
    return xs, ys, zs, start


@njit(cache=True, inline="always")
def _wrapped(c, k):
    """Bin c folded into 0 .. k-1 and the lattice shift taken (a loop: offsets are a few bins)."""
    s = 0
    while c < 0:
        c += k
        s -= 1
    while c >= k:
        c -= k
        s += 1
    return c, s


@njit(parallel=PRANGE_ONLY, cache=True, fastmath={"contract"})
def shortest_pair_distance(positions, inverse, cell, counts, offsets):
    """Shortest distance between two atoms, or an atom and an image of itself or another, over the
    pairs whose bins lie ``offsets`` apart (``inf`` if none).

    ``offsets`` (K, 3): the half stencil, each offset d with -d left out, (0, 0, 0) included (its
    pairs are taken with the later atoms of the same bin only). Bins are ``counts`` along the
    lattice vectors (rows of ``cell``); the walk goes bin by bin, so each neighbouring bin and its
    lattice shift are found once for all the atoms of a bin.
    """
    n = positions.shape[0]
    xs, ys, zs, start = _counting_sort(positions, inverse, cell, counts)
    k0, k1, k2 = counts[0], counts[1], counts[2]
    n_bins = k0 * k1 * k2
    n_chunks = min(n_bins, CHUNKS)
    chunk = (n_bins + n_chunks - 1) // n_chunks
    best = np.full(n_chunks, np.inf)
    for c in prange(n_chunks):
        lowest = np.inf
        for flat in range(c * chunk, min(n_bins, (c + 1) * chunk)):
            if start[flat] == start[flat + 1]:
                continue
            b0 = flat // (k1 * k2)
            b1 = (flat // k2) % k1
            b2 = flat % k2
            for o in range(offsets.shape[0]):
                c0, s0 = _wrapped(b0 + offsets[o, 0], k0)
                c1, s1 = _wrapped(b1 + offsets[o, 1], k1)
                c2, s2 = _wrapped(b2 + offsets[o, 2], k2)
                b = (c0 * k1 + c1) * k2 + c2
                tx = s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0]
                ty = s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1]
                tz = s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2]
                own = offsets[o, 0] == 0 and offsets[o, 1] == 0 and offsets[o, 2] == 0
                for i in range(start[flat], start[flat + 1]):
                    ox = xs[i] - tx
                    oy = ys[i] - ty
                    oz = zs[i] - tz
                    for j in range(i + 1 if own else start[b], start[b + 1]):
                        dx = ox - xs[j]
                        dy = oy - ys[j]
                        dz = oz - zs[j]
                        lowest = min(lowest, dx * dx + dy * dy + dz * dz)
        best[c] = lowest
    return math.sqrt(best.min())
