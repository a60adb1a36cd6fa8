"""The one neighbour walk shared by every pair kernel: bin -> stencil row -> index range ->
separation -> cutoff.

Atoms are sorted into a grid of bins over the cell in fractional coordinates (``geometry.build_bins``);
a partner within the cutoff lies in one of the bins of the stencil ``CellBins.offsets`` around the
bin of the origin (an atom or any point). The walk goes in three steps, inline functions
(``inline="always"``) that the real-space Coulomb kernel takes into its own body (its hot loop);
the kernels whose pair physics costs more than a call per atom call ``shared_atom_partners``
instead, one compiled copy for all of them (a shorter cold compile). Every entry kernel is
compiled with its pair physics written in it and cached on disk (``cache=True``): no function is
passed at run time that Numba would have to compile anew in each process.

1. ``stencil_rows``: the stencil as rows of bins along the last axis, the whole stencil (every
   partner of a point, or of an atom, from its own side) or the half that finds each pair of
   atoms once.
2. ``stencil_ranges``: a row of bins is contiguous in bin order, so its atoms are one index range
   of the sorted atoms, or a few where the row crosses the cell edge (one per periodic image),
   each with the lattice shift of its image. The origin atom itself (same bin, no shift) is left
   out; on the half stencil so are the atoms of its own bin before it.
3. ``gather_partners`` (``atom_partners`` around an atom): every candidate of the ranges with
   its separation and squared distance, compacted without a branch to those inside the cutoff,
   so that the pair physics after it is a plain loop over contiguous arrays (vector instructions).

The pair physics (Coulomb erfc, short-range forms, nearest-neighbour minima, pair lists) then
runs over the first ``m`` entries of the work arrays in the entry kernels of ``kernels.py``,
``point_kernels.py``, ``shortrange_kernels.py`` and ``geometry_kernels.py``. Work split into
``CHUNKS`` chunks, each accumulating into its own rows (``chunk_parts``) summed in a fixed order
(``chunk_totals``), gives results that do not depend on the number of threads.

References
----------
M. P. Allen and D. J. Tildesley, Computer Simulation of Liquids, 2nd ed., Oxford University
Press (2017), chapter 5 (neighbour lists and cell structures) — the binning; the rows, ranges
and compaction are ours.
"""

import numpy as np
from numba import njit

#: Work is split into this many chunks whatever the number of threads, so that the order of
#: floating-point additions, and with it every digit of the result, does not depend on the machine.
CHUNKS = 8
#: ... and no chunk of fewer atoms than this (a small cell is one chunk: each chunk has its own
#: work space and rows to zero and add, which cost more than a few atoms' pairs).
CHUNK_MIN_ATOMS = 32


@njit(cache=True)
def stencil_rows(offsets, half):
    """The stencil as rows along the last axis, the whole of it or the half that finds each pair once.

    Returns (R, 4) int64 rows ``(d0, d1, lo, hi)``: the offsets (d0, d1, d2) with lo <= d2 <= hi,
    in lexicographic order. With ``half`` only the offsets after (0, 0, 0) in lexicographic order
    and (0, 0, 0) itself are kept, whose pairs (same bin, same image) are taken only with a later
    atom: an offset and its negative reach the same pairs from the two ends, so the other half adds
    nothing. The stencil's offsets with a given (d0, d1) must be a contiguous range of d2 (true of
    ``geometry.stencil_offsets``).
    """
    k = offsets.shape[0]
    low = offsets.min()
    width = offsets.max() - low + 1
    key = np.empty(k, dtype=np.int64)
    for o in range(k):
        key[o] = ((offsets[o, 0] - low) * width + offsets[o, 1] - low) * width + offsets[o, 2] - low
    # insertion sort of the (distinct) keys: linear for the stencils built in lexicographic order,
    # and no general sort to compile
    order = np.arange(k)
    for p in range(1, k):
        o = order[p]
        q = p - 1
        while q >= 0 and key[order[q]] > key[o]:
            order[q + 1] = order[q]
            q -= 1
        order[q + 1] = o
    rows = np.empty((k, 4), dtype=np.int64)
    n_rows = 0
    for p in range(k):
        o = order[p]
        d0 = offsets[o, 0]
        d1 = offsets[o, 1]
        d2 = offsets[o, 2]
        if half and (d0 < 0 or (d0 == 0 and (d1 < 0 or (d1 == 0 and d2 < 0)))):
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
    """Most index ranges ``stencil_ranges`` can return for one origin (the row of the origin's own
    bin may be cut in two round the origin atom)."""
    total = 1
    for r in range(rows.shape[0]):
        total += (rows[r, 3] - rows[r, 2]) // counts[2] + 2
    return total


@njit(cache=True)
def partner_capacity(rows, bin_start):
    """Room for the candidates of any origin over the stencil rows, plus one spare slot."""
    largest = 0
    for b in range(len(bin_start) - 1):
        largest = max(largest, bin_start[b + 1] - bin_start[b])
    width = 0
    for r in range(rows.shape[0]):
        width += rows[r, 3] - rows[r, 2] + 1
    return width * largest + 1


@njit(cache=True, inline="always")
def _add_range(g, lo, hi, s0, s1, s2, cell, first, end, shift):
    """Record range g: atoms lo .. hi - 1 seen shifted by s0 a + s1 b + s2 c."""
    first[g] = lo
    end[g] = hi
    for a in range(3):
        shift[g, a] = s0 * cell[0, a] + s1 * cell[1, a] + s2 * cell[2, a]


@njit(cache=True, inline="always")
def stencil_ranges(b0, b1, b2, i, half, rows, cell, counts, bin_start, first, end, shift):
    """The atoms over the stencil ``rows`` around bin (b0, b1, b2), as index ranges of the sorted
    atoms: range g is ``first[g]`` to ``end[g] - 1``, its atoms seen shifted by the lattice vector
    ``shift[g]``. Returns the number of ranges (at most ``range_capacity(rows, counts)``).

    ``i`` is the sorted index of the origin atom (in bin (b0, b1, b2)), left out of its own image;
    -1 for a point that is no atom. With ``half`` (rows from ``stencil_rows(offsets, True)``) the
    atoms of its own bin before it are left out too, so each pair (i, j, image) is found exactly once.
    """
    k0 = counts[0]
    k1 = counts[1]
    k2 = counts[2]
    g = 0
    for r in range(rows.shape[0]):
        c0 = b0 + rows[r, 0]
        c1 = b1 + rows[r, 1]
        s0 = c0 // k0
        s1 = c1 // k1
        base = ((c0 - s0 * k0) * k1 + (c1 - s1 * k1)) * k2
        own_row = i >= 0 and rows[r, 0] == 0 and rows[r, 1] == 0
        c2 = b2 + rows[r, 2]
        last = b2 + rows[r, 3]
        s2 = c2 // k2
        while c2 <= last:
            stop = min(last, (s2 + 1) * k2 - 1)
            lo = bin_start[base + c2 - s2 * k2]
            if own_row and s2 == 0:
                # the range holding atom i at its own place: i leaves it (and, on the half
                # stencil, so do the atoms before it, whose pairs with i their own walk finds)
                if not half:
                    _add_range(g, lo, i, s0, s1, s2, cell, first, end, shift)
                    g += 1
                lo = i + 1
            _add_range(g, lo, bin_start[base + stop - s2 * k2 + 1], s0, s1, s2, cell, first, end, shift)
            g += 1
            c2 = stop + 1
            s2 += 1
    return g


@njit(cache=True, inline="always")
def walk_context(positions, offsets, half, cell, counts, bin_start):
    """What every walk over the sorted atoms needs, in one tuple: ``(xs, ys, zs, rows, half,
    cell, counts, bin_start)``, with the coordinates as contiguous columns and the stencil rows
    (``stencil_rows``) of the whole stencil or of its half."""
    # "... and half": a bool known only at run time, so that stencil_rows is compiled once, not
    # once for each of the constants True and False the kernels pass
    rows = stencil_rows(offsets, offsets.shape[1] == 3 and half)
    return (positions[:, 0].copy(), positions[:, 1].copy(), positions[:, 2].copy(), rows, half, cell, counts,
            bin_start)


@njit(cache=True, inline="always")
def walk_workspace(walk):
    """Work arrays of one thread for ``gather_partners``: ``(first, end, shift, partner, values,
    dxs, dys, dzs, r2s)``."""
    rows = walk[3]
    n_range = range_capacity(rows, walk[6])
    capacity = partner_capacity(rows, walk[7])
    return (np.empty(n_range, dtype=np.int64), np.empty(n_range, dtype=np.int64), np.empty((n_range, 3)),
            np.empty(capacity, dtype=np.int64), np.empty(capacity), np.empty(capacity), np.empty(capacity),
            np.empty(capacity), np.empty(capacity))


@njit(cache=True, inline="always")
def gather_partners(x, y, z, b0, b1, b2, i, walk, values, cut2, work):
    """Partners within the cutoff of the origin (x, y, z) in bin (b0, b1, b2), compacted.

    The origin is atom ``i`` (sorted index) or a point (-1); ``walk`` is a ``walk_context`` (whole
    or half stencil, see ``stencil_ranges``), ``values`` a per-atom number carried along (a charge,
    a radius). Returns how many partners lie within the cutoff; the first entries of ``work``
    (``walk_workspace``) hold, in walking order, their sorted index, value, separation
    origin - r_j - shift and squared distance.

    Every candidate is written and the count advances only inside the cutoff: no branch per pair.
    """
    xs, ys, zs, rows, half, cell, counts, bin_start = walk
    first, end, shift, partner, vs, dxs, dys, dzs, r2s = work
    n_ranges = stencil_ranges(b0, b1, b2, i, half, rows, cell, counts, bin_start, first, end, shift)
    m = 0
    for g in range(n_ranges):
        ox = x - shift[g, 0]
        oy = y - shift[g, 1]
        oz = z - shift[g, 2]
        for j in range(first[g], end[g]):
            dx = ox - xs[j]
            dy = oy - ys[j]
            dz = oz - zs[j]
            r2 = dx * dx + dy * dy + dz * dz
            partner[m] = j
            vs[m] = values[j]
            dxs[m] = dx
            dys[m] = dy
            dzs[m] = dz
            r2s[m] = r2
            m += r2 < cut2
    return m


@njit(cache=True, inline="always")
def atom_partners(i, bin_of, walk, values, cut2, work):
    """``gather_partners`` around sorted atom i."""
    return gather_partners(walk[0][i], walk[1][i], walk[2][i], bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], i, walk,
                           values, cut2, work)


@njit(cache=True)
def shared_atom_partners(i, bin_of, walk, values, cut2, work):
    """``atom_partners`` compiled once as an ordinary function for the kernels whose pair physics
    costs more than a call per atom (short range, neighbours): they share its compiled code."""
    return atom_partners(i, bin_of, walk, values, cut2, work)


@njit(cache=True)
def chunk_bounds(c, n, n_chunks):
    """First and one-past-last item of chunk c when n items are split into n_chunks chunks of equal
    size (the last shorter)."""
    size = (n + n_chunks - 1) // n_chunks
    return c * size, min(n, (c + 1) * size)


@njit(cache=True)
def chunk_parts(n, want_forces, want_virial):
    """Zeroed rows of each of min(``CHUNKS``, n // ``CHUNK_MIN_ATOMS``) chunks (at least one): a number per atom (N), forces (N, 3) and
    virial (N, 6) (one row unless asked) and a pair count."""
    n_chunks = max(1, min(CHUNKS, n // CHUNK_MIN_ATOMS))
    n_force = n if want_forces else 1
    n_virial = n if want_virial else 1
    return (np.zeros((n_chunks, n)), np.zeros((n_chunks, n_force, 3)), np.zeros((n_chunks, n_virial, 6)),
            np.zeros(n_chunks, dtype=np.int64))


@njit(cache=True)
def chunk_totals(per_atom_part, force_part, virial_part, pair_part, want_forces, want_virial):
    """The rows of ``chunk_parts`` summed over chunks in a fixed order: ``(per_atom, forces,
    virial, pairs)``, forces and virial zeros unless asked.

    Pass the four arrays, not the tuple ``chunk_parts`` returned: read through a tuple built before
    a ``prange`` loop, a one-dimensional array written inside the loop (``pair_part[c] = ...``)
    still shows the values it had before the loop (seen with Numba 0.68).
    """
    n = per_atom_part.shape[1]
    per_atom = np.zeros(n)
    forces = np.zeros((n, 3))
    virial = np.zeros((n, 6))
    for c in range(per_atom_part.shape[0]):
        per_atom += per_atom_part[c]
        if want_forces:
            forces += force_part[c]
        if want_virial:
            virial += virial_part[c]
    return per_atom, forces, virial, pair_part.sum()
