"""Numba kernels of the periodic neighbour machinery: sorting atoms into bins, nearest neighbours,
pair lists and the closest pair.

Atoms are sorted into a grid of bins over the cell in fractional coordinates.
A pair (i, j + image) within a cutoff always lies in a bin at most ``reach[a]``
bins away along axis a, for any triclinic cell; the kernels walk a list of such bin
offsets (the stencil, pruned of bins too far away) with the shared neighbour walk of
``walker.py``; bins beyond the cell edge wrap round with a lattice shift. When the cell is
thinner than the cutoff, one bin per axis and a reach of several bins enumerates the periodic images.

Kernels here do arithmetic only; the Python side (``geometry.py``) builds the bins.
"""

import math
import numpy as np
from numba import njit, prange

from .variants import parallel_kernel
from .walker import shared_atom_partners, chunk_bounds, range_capacity, stencil_ranges, walk_context, walk_workspace


#: Parallel options of kernels whose explicit ``prange`` loops are the only parallel work: array
#: set-up (zeros, sums of a few rows) stays serial instead of becoming parallel regions of its
#: own, each of which wakes the thread team (costly when the threads sleep between regions, see
#: ``geometry._choose_threading``, and for small cells).
PRANGE_ONLY = {"prange": True, "reduction": True, "numpy": False, "setitem": False, "inplace_binop": False,
               "comprehension": False, "stencil": False, "fusion": False}


@njit(cache=True)
def sort_into_bins(positions, inverse, cell, counts):
    """Atoms wrapped into the cell and sorted by bin with a counting sort (stable: atoms keep their
    input order within a bin; O(N), and no general sort to compile).

    ``inverse`` maps Cartesian to fractional coordinates (f = r @ inverse), ``counts`` the bins
    along each lattice vector (rows of ``cell``). Returns ``(wrapped Cartesian positions in bin
    order (N, 3), the bin of each sorted atom (N, 3), the original index of each sorted atom (N,),
    the start of each bin in that order (n_bins + 1))``, bins in the order (b0 * k1 + b1) * k2 + b2.
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
    order = np.empty(n, dtype=np.int64)
    for i in range(n):
        key = flat[i]
        slot = fill[key]
        fill[key] += 1
        order[slot] = i
        for c in range(3):
            wrapped[slot, c] = frac[i, 0] * cell[0, c] + frac[i, 1] * cell[1, c] + frac[i, 2] * cell[2, c]
        bin_of[slot, 0] = key // (k1 * k2)
        bin_of[slot, 1] = (key // k2) % k1
        bin_of[slot, 2] = key % k2
    return wrapped, bin_of, order, start


@parallel_kernel(parallel=True, cache=True)
def nearest_neighbours(positions, charges, cell, counts, offsets, bin_of, bin_start, cutoff):
    """For every atom (sorted by bin): distance to the nearest other atom or image, the index of
    that atom, and the distance to the nearest atom of opposite charge sign, all within ``cutoff``
    (``inf`` and -1 where there is none). Each atom walks the whole stencil
    (``walker.gather_partners``); the first of equally near partners in walking order is kept."""
    n = positions.shape[0]
    nearest = np.full(n, np.inf)
    partner = np.full(n, -1, dtype=np.int64)
    nearest_opposite = np.full(n, np.inf)
    walk = walk_context(positions, offsets, False, cell, counts, bin_start)
    n_chunks = min(n, 64)
    for c in prange(n_chunks):
        work = walk_workspace(walk)
        _, _, _, found, qs, _, _, _, r2s = work
        start, stop = chunk_bounds(c, n, n_chunks)
        for i in range(start, stop):
            m = shared_atom_partners(i, bin_of, walk, charges, cutoff * cutoff, work)
            best = np.inf
            best_j = -1
            best_opp = np.inf
            for t in range(m):
                r2 = r2s[t]
                if r2 < best:
                    best = r2
                    best_j = found[t]
                if charges[i] * qs[t] < 0.0 and r2 < best_opp:
                    best_opp = r2
            nearest[i] = np.sqrt(best)
            partner[i] = best_j
            nearest_opposite[i] = np.sqrt(best_opp)
    return nearest, partner, nearest_opposite


@njit(cache=True)
def pairs_from(sites, positions, cell, counts, offsets, bin_of, bin_start, r_cut):
    """All partners (images included) within ``r_cut`` of each sorted site in ``sites``.

    Returns ``(owner, partner, distance)``: ``owner[p]`` is the position in ``sites``,
    ``partner[p]`` the sorted index of the partner, ``distance[p]`` in Å, in the order of the
    walk (``walker.gather_partners`` over the whole stencil). Two passes: count, fill.
    """
    walk = walk_context(positions, offsets, False, cell, counts, bin_start)
    work = walk_workspace(walk)
    found = work[3]
    r2s = work[8]
    total = 0
    for s in range(sites.shape[0]):
        total += shared_atom_partners(sites[s], bin_of, walk, walk[0], r_cut * r_cut, work)
    owner = np.empty(total, dtype=np.int64)
    partner = np.empty(total, dtype=np.int64)
    distance = np.empty(total)
    p = 0
    for s in range(sites.shape[0]):
        m = shared_atom_partners(sites[s], bin_of, walk, walk[0], r_cut * r_cut, work)
        for t in range(m):
            owner[p] = s
            partner[p] = found[t]
            distance[p] = math.sqrt(r2s[t])
            p += 1
    return owner, partner, distance


@parallel_kernel(parallel=True, cache=True, fastmath={"contract"})
def closest_distance(positions, cell, counts, offsets, bin_of, bin_start):
    """Shortest distance between two atoms, or an atom and another's or its own image, among the
    pairs the stencil reaches (``inf`` if none), walking each pair once over the half stencil
    (``walker.stencil_ranges``).

    Atoms must be sorted by bin; the inner loop is a plain minimum over an index range (no
    compaction: there is no cutoff to apply).
    """
    n = positions.shape[0]
    xs, ys, zs, rows, _, _, _, _ = walk_context(positions, offsets, True, cell, counts, bin_start)
    capacity = range_capacity(rows, counts)
    n_chunks = min(n, 64)
    best = np.full(n_chunks, np.inf)
    for c in prange(n_chunks):
        first = np.empty(capacity, dtype=np.int64)
        end = np.empty(capacity, dtype=np.int64)
        shift = np.empty((capacity, 3))
        lowest = np.inf
        start, stop = chunk_bounds(c, n, n_chunks)
        for i in range(start, stop):
            n_ranges = stencil_ranges(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], i, True, rows, cell, counts,
                                      bin_start, first, end, shift)
            for g in range(n_ranges):
                ox = xs[i] - shift[g, 0]
                oy = ys[i] - shift[g, 1]
                oz = zs[i] - shift[g, 2]
                for j in range(first[g], end[g]):
                    dx = ox - xs[j]
                    dy = oy - ys[j]
                    dz = oz - zs[j]
                    lowest = min(lowest, dx * dx + dy * dy + dz * dz)
        best[c] = lowest
    return math.sqrt(best.min())
