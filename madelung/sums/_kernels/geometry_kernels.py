"""Numba kernels for the periodic neighbour machinery shared by every pair sum.

Atoms are sorted into a grid of bins over the cell in fractional coordinates.
A pair (i, j + image) within a cutoff always lies in a bin at most ``reach[a]``
bins away along axis a, for any triclinic cell; the kernels walk a list of such bin
offsets (the stencil, pruned of bins too far away); bins beyond the cell edge wrap
round with a lattice shift. When the cell is thinner than the cutoff, one bin per
axis and a reach of several bins enumerates the periodic images.

Kernels here do arithmetic only; the Python side (``geometry.py``) builds the bins.
"""

import math
import numpy as np
from numba import njit, prange

from .variants import parallel_kernel


#: Parallel options of kernels whose explicit ``prange`` loops are the only parallel work: array
#: set-up (zeros, sums of a few rows) stays serial instead of becoming parallel regions of its
#: own, each of which wakes the thread team (costly when the threads sleep between regions, see
#: ``geometry._choose_threading``, and for small cells).
PRANGE_ONLY = {"prange": True, "reduction": True, "numpy": False, "setitem": False, "inplace_binop": False,
               "comprehension": False, "stencil": False, "fusion": False}


@njit(cache=True, inline="always")
def neighbour_bin(b0, b1, b2, d0, d1, d2, counts):
    """Bin reached from bin (b0, b1, b2) by the offset (d0, d1, d2), and the lattice shift taken.

    Returns ``(flat_bin_index, s0, s1, s2)``: the neighbour's atoms are at their stored positions
    plus ``s0*a + s1*b + s2*c``.
    """
    c0 = b0 + d0
    c1 = b1 + d1
    c2 = b2 + d2
    s0 = c0 // counts[0]
    s1 = c1 // counts[1]
    s2 = c2 // counts[2]
    c0 -= s0 * counts[0]
    c1 -= s1 * counts[1]
    c2 -= s2 * counts[2]
    return (c0 * counts[1] + c1) * counts[2] + c2, s0, s1, s2


@njit(cache=True, inline="always")
def image_shift(cell, s0, s1, s2):
    """Cartesian vector s0*a + s1*b + s2*c of a lattice shift."""
    return (s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0],
            s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1],
            s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2])


@njit(cache=True)
def sort_into_bins(frac, counts):
    """Bin index of each atom (fractional coordinates in [0, 1)), the order that sorts atoms by bin,
    and the start of each bin in that order (length n_bins + 1)."""
    n = frac.shape[0]
    n_bins = counts[0] * counts[1] * counts[2]
    bin_of = np.empty((n, 3), dtype=np.int64)
    flat = np.empty(n, dtype=np.int64)
    for i in range(n):
        for a in range(3):
            b = int(frac[i, a] * counts[a])
            if b >= counts[a]:
                b = counts[a] - 1
            if b < 0:
                b = 0
            bin_of[i, a] = b
        flat[i] = (bin_of[i, 0] * counts[1] + bin_of[i, 1]) * counts[2] + bin_of[i, 2]
    order = np.argsort(flat, kind="mergesort")
    start = np.zeros(n_bins + 1, dtype=np.int64)
    for i in range(n):
        start[flat[i] + 1] += 1
    for b in range(n_bins):
        start[b + 1] += start[b]
    return bin_of[order], order, start


@parallel_kernel(parallel=True, cache=True)
def nearest_neighbours(positions, charges, cell, counts, offsets, bin_of, bin_start, cutoff):
    """For every atom (sorted by bin): distance to the nearest other atom or image, the index of
    that atom, and the distance to the nearest atom of opposite charge sign, all within ``cutoff``
    (``inf`` and -1 where there is none)."""
    n = positions.shape[0]
    nearest = np.full(n, np.inf)
    partner = np.full(n, -1, dtype=np.int64)
    nearest_opposite = np.full(n, np.inf)
    cut2 = cutoff * cutoff
    for i in prange(n):
        xi = positions[i, 0]
        yi = positions[i, 1]
        zi = positions[i, 2]
        best = np.inf
        best_j = -1
        best_opp = np.inf
        for o in range(offsets.shape[0]):
            b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2],
                                          offsets[o, 0], offsets[o, 1], offsets[o, 2], counts)
            sx, sy, sz = image_shift(cell, s0, s1, s2)
            for j in range(bin_start[b], bin_start[b + 1]):
                if j == i and s0 == 0 and s1 == 0 and s2 == 0:
                    continue
                dx = xi - positions[j, 0] - sx
                dy = yi - positions[j, 1] - sy
                dz = zi - positions[j, 2] - sz
                r2 = dx * dx + dy * dy + dz * dz
                if r2 < cut2:
                    if r2 < best:
                        best = r2
                        best_j = j
                    if charges[i] * charges[j] < 0.0 and r2 < best_opp:
                        best_opp = r2
        nearest[i] = np.sqrt(best)
        partner[i] = best_j
        nearest_opposite[i] = np.sqrt(best_opp)
    return nearest, partner, nearest_opposite


@njit(cache=True)
def pairs_from(sites, positions, cell, counts, offsets, bin_of, bin_start, r_cut):
    """All partners (images included) within ``r_cut`` of each sorted site in ``sites``.

    Returns ``(owner, partner, distance)``: ``owner[p]`` is the position in ``sites``,
    ``partner[p]`` the sorted index of the partner, ``distance[p]`` in Å. Two passes: count, fill.
    """
    cut2 = r_cut * r_cut
    total = 0
    owner = np.empty(0, dtype=np.int64)
    partner = np.empty(0, dtype=np.int64)
    distance = np.empty(0)
    for pass_number in range(2):
        if pass_number == 1:
            owner = np.empty(total, dtype=np.int64)
            partner = np.empty(total, dtype=np.int64)
            distance = np.empty(total)
        p = 0
        for s in range(sites.shape[0]):
            i = sites[s]
            for o in range(offsets.shape[0]):
                b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2],
                                              offsets[o, 0], offsets[o, 1], offsets[o, 2], counts)
                sx, sy, sz = image_shift(cell, s0, s1, s2)
                for j in range(bin_start[b], bin_start[b + 1]):
                    if j == i and s0 == 0 and s1 == 0 and s2 == 0:
                        continue
                    dx = positions[i, 0] - positions[j, 0] - sx
                    dy = positions[i, 1] - positions[j, 1] - sy
                    dz = positions[i, 2] - positions[j, 2] - sz
                    r2 = dx * dx + dy * dy + dz * dz
                    if r2 >= cut2:
                        continue
                    if pass_number == 1:
                        owner[p] = s
                        partner[p] = j
                        distance[p] = math.sqrt(r2)
                    p += 1
        total = p
    return owner, partner, distance


@njit(cache=True)
def half_stencil_rows(offsets):
    """The half of a symmetric stencil that finds each pair once, as rows along the last axis.

    Returns (R, 4) int64 rows ``(d0, d1, lo, hi)``: the offsets (d0, d1, d2) with lo <= d2 <= hi.
    Kept are the offsets after (0, 0, 0) in lexicographic order and (0, 0, 0) itself, whose
    pairs (same bin, same image) are taken only with a later atom. An offset and its negative
    reach the same pairs from the two ends, so the other half adds nothing. The stencil's offsets
    with a given (d0, d1) must be a contiguous range of d2 (true of ``geometry.stencil_offsets``).
    """
    k = offsets.shape[0]
    low = offsets.min()
    width = offsets.max() - low + 1
    key = np.empty(k, dtype=np.int64)
    for o in range(k):
        key[o] = ((offsets[o, 0] - low) * width + offsets[o, 1] - low) * width + offsets[o, 2] - low
    order = np.argsort(key)
    rows = np.empty((k, 4), dtype=np.int64)
    n_rows = 0
    for p in range(k):
        o = order[p]
        d0 = offsets[o, 0]
        d1 = offsets[o, 1]
        d2 = offsets[o, 2]
        if d0 < 0 or (d0 == 0 and (d1 < 0 or (d1 == 0 and d2 < 0))):
            continue
        if n_rows > 0 and rows[n_rows - 1, 0] == d0 and rows[n_rows - 1, 1] == d1:
            rows[n_rows - 1, 3] = d2
        else:
            rows[n_rows, 0] = d0
            rows[n_rows, 1] = d1
            rows[n_rows, 2] = d2
            rows[n_rows, 3] = d2
            n_rows += 1
    return rows[:n_rows].copy()


@njit(cache=True)
def range_capacity(rows, counts):
    """Most index ranges ``half_stencil_ranges`` can return for one atom."""
    total = 0
    for r in range(rows.shape[0]):
        total += (rows[r, 3] - rows[r, 2]) // counts[2] + 2
    return total


@njit(cache=True, inline="always")
def half_stencil_ranges(i, rows, cell, counts, bin_of, bin_start, first, end, shift):
    """The partners of atom i over the half stencil ``rows``, as index ranges of the sorted atoms:
    range g is ``first[g]`` to ``end[g] - 1``, its atoms seen shifted by the lattice vector
    ``shift[g]``. Returns the number of ranges (at most ``range_capacity(rows, counts)``).

    Each row (d0, d1, lo, hi) of bins is contiguous in bin order along the last axis, so its atoms
    are one index range, or a few when the row crosses the cell edge (one per periodic image).
    The row (0, 0) starts after atom i in its own bin, so with ``half_stencil_rows`` each pair
    (i, j, image) is found exactly once. This is the neighbour walk every pair kernel shares.
    """
    k0 = counts[0]
    k1 = counts[1]
    k2 = counts[2]
    b2 = bin_of[i, 2]
    g = 0
    for r in range(rows.shape[0]):
        c0 = bin_of[i, 0] + rows[r, 0]
        c1 = bin_of[i, 1] + rows[r, 1]
        s0 = c0 // k0
        s1 = c1 // k1
        base = ((c0 - s0 * k0) * k1 + (c1 - s1 * k1)) * k2
        own_row = rows[r, 0] == 0 and rows[r, 1] == 0
        c2 = b2 + rows[r, 2]
        last = b2 + rows[r, 3]
        s2 = c2 // k2
        while c2 <= last:
            stop = min(last, (s2 + 1) * k2 - 1)
            first[g] = i + 1 if (own_row and c2 == b2) else bin_start[base + c2 - s2 * k2]
            end[g] = bin_start[base + stop - s2 * k2 + 1]
            for a in range(3):
                shift[g, a] = s0 * cell[0, a] + s1 * cell[1, a] + s2 * cell[2, a]
            g += 1
            c2 = stop + 1
            s2 += 1
    return g


@njit(cache=True, inline="always")
def range_origin(i, g, xs, ys, zs, shift):
    """Position of atom i less the lattice shift of range g: r_i - r_j - shift = origin - r_j."""
    return xs[i] - shift[g, 0], ys[i] - shift[g, 1], zs[i] - shift[g, 2]


@parallel_kernel(parallel=True, cache=True, fastmath={"contract"})
def closest_distance(positions, cell, counts, offsets, bin_of, bin_start):
    """Shortest distance between two atoms, or an atom and another's or its own image, among the
    pairs the stencil reaches (``inf`` if none), walking each pair once (``half_stencil_ranges``).

    Atoms must be sorted by bin; the inner loop is a plain minimum over an index range.
    """
    n = positions.shape[0]
    rows = half_stencil_rows(offsets)
    capacity = range_capacity(rows, counts)
    xs = positions[:, 0].copy()
    ys = positions[:, 1].copy()
    zs = positions[:, 2].copy()
    n_chunks = min(n, 64)
    chunk = (n + n_chunks - 1) // n_chunks
    best = np.full(n_chunks, np.inf)
    for c in prange(n_chunks):
        first = np.empty(capacity, dtype=np.int64)
        end = np.empty(capacity, dtype=np.int64)
        shift = np.empty((capacity, 3))
        lowest = np.inf
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            n_ranges = half_stencil_ranges(i, rows, cell, counts, bin_of, bin_start, first, end, shift)
            for g in range(n_ranges):
                ox, oy, oz = range_origin(i, g, xs, ys, zs, shift)
                for j in range(first[g], end[g]):
                    dx = ox - xs[j]
                    dy = oy - ys[j]
                    dz = oz - zs[j]
                    lowest = min(lowest, dx * dx + dy * dy + dz * dz)
        best[c] = lowest
    return math.sqrt(best.min())
