"""Periodic geometry written once: wrapping, plane spacings, bins, nearest neighbours.

The Coulomb real-space sum, the short-range pair terms and the structure checks all
walk pairs through the same :class:`CellBins`; only their kernels differ.
"""

from __future__ import annotations

import math
import os
import threading
from contextlib import contextmanager
from dataclasses import dataclass

import numba
import numpy as np

from ..caches import remember
from ..structure.lattice import plane_spacings, reduced_basis, reduced_cell, wrapped_fractional  # noqa: F401  (re-exported for the walkers)
from ._kernels import geometry_kernels as gk

def _choose_threading():
    """Threading layer and OpenMP waiting, unless the user has chosen them.

    Numba's "threadsafe" layers (TBB when its library is installed, else OpenMP): kernels may be
    launched from several Python threads at once (ASE calculators, Dask workers), which Numba's
    own workqueue layer answers by aborting the process. Idle OpenMP threads sleep at once
    (``OMP_WAIT_POLICY=PASSIVE``) instead of spinning for some hundred microseconds (GNU OpenMP's
    default), which on a machine shared with other work takes cores from it and from our own
    threads that still have work; waking a sleeping thread costs some microseconds, and parallel
    kernels run only for work of milliseconds (``thread_budget``). Measured in
    benchmarks/threads.py. Both must be set before the first parallel kernel runs: the layer is
    fixed then, and OpenMP reads its environment once, when it is loaded.
    """
    if "NUMBA_THREADING_LAYER" not in os.environ and numba.config.THREADING_LAYER == "default":
        os.environ["NUMBA_THREADING_LAYER"] = "threadsafe"
        numba.config.THREADING_LAYER = "threadsafe"
    if not any(name in os.environ for name in ("OMP_WAIT_POLICY", "GOMP_SPINCOUNT", "KMP_BLOCKTIME")):
        os.environ["OMP_WAIT_POLICY"] = "PASSIVE"


_choose_threading()


#: Work predicted to take less than this (ns of one thread) runs on one thread: waking a thread
#: team costs more than it saves for a small cell, and far more when other processes compete
#: for the cores.
SERIAL_BELOW_NS = 2e6

#: Rough cost of examining one candidate pair in a neighbour search, ns.
EXAMINED_PAIR_NS = 2.5


class thread_budget:
    """Run the kernels inside on one thread when the work is small, else on all of Numba's threads
    (a context manager; Numba's thread count is touched only when it must change)."""

    __slots__ = ("serial", "previous")

    def __init__(self, predicted_ns):
        self.serial = predicted_ns < SERIAL_BELOW_NS
        self.previous = None

    def __enter__(self):
        if self.serial:
            previous = numba.get_num_threads()
            if previous != 1:
                self.previous = previous
                numba.set_num_threads(1)
        return self

    def __exit__(self, *exc):
        if self.previous is not None:
            numba.set_num_threads(self.previous)
        return False


@dataclass(frozen=True)
class CellBins:
    """Atoms sorted into bins for pair loops within ``cutoff``.

    Attributes
    ----------
    cell : (3, 3) lattice vectors, Å.
    positions : (N, 3) wrapped Cartesian positions in bin order, Å.
    order : (N,) original index of each sorted atom (``sorted = original[order]``).
    counts : (3,) bins along each lattice vector.
    reach : (3,) how many bins away a partner within the cutoff can be.
    offsets : (K, 3) the bin offsets to search: those within ``reach`` whose bins can hold a pair
        closer than the cutoff.
    bin_of : (N, 3) bin of each sorted atom.
    bin_start : (n_bins + 1,) where each bin's atoms start in sorted order.
    cutoff : the cutoff the bins were built for, Å.
    """

    cell: np.ndarray
    positions: np.ndarray
    order: np.ndarray
    counts: np.ndarray
    reach: np.ndarray
    offsets: np.ndarray
    bin_of: np.ndarray
    bin_start: np.ndarray
    cutoff: float

    def sorted_values(self, values):
        """Per-atom values in bin order, contiguous float64."""
        return np.ascontiguousarray(np.asarray(values, dtype=np.float64)[self.order])

    def unsorted(self, values):
        """Per-atom values in bin order back to the original order."""
        out = np.empty_like(values)
        out[self.order] = values
        return out

    @property
    def examined_volume(self) -> float:
        """Volume of the bin stencil searched around each atom, Å^3 (for cost models)."""
        volume = abs(np.linalg.det(self.cell))
        return volume * len(self.offsets) / float(np.prod(self.counts))


#: Bin-offset grids by reach (reach -> (offsets, squared gaps)), kept: a stencil is the grid
#: filtered by the cell's metric, and the grid itself depends on the reach alone.
_OFFSET_GRIDS = {}
_OFFSET_GRIDS_KEEP = 64


def _offset_grid(reach):
    """Every bin offset within ``reach`` and its squared gap ``sum_a max(|d_a| - 1, 0)^2`` (read-only)."""
    key = tuple(int(r) for r in reach)
    found = _OFFSET_GRIDS.get(key)
    if found is None:
        grids = np.meshgrid(*[np.arange(-r, r + 1) for r in key], indexing="ij")
        offsets = np.stack([g.ravel() for g in grids], axis=1).astype(np.int64)
        gap = np.maximum(np.abs(offsets) - 1, 0).astype(float)
        found = (offsets, np.einsum("ij,ij->i", gap, gap))
        for array in found:
            array.setflags(write=False)
        remember(_OFFSET_GRIDS, _OFFSET_GRIDS_KEEP, key, found)
    return found


def stencil_offsets(cell, counts, reach, cutoff):
    """Bin offsets within ``reach`` whose bins may hold two points closer than ``cutoff``.

    Two points in bins d apart differ by sum_a (d_a + t_a) e_a with |t_a| < 1 and e_a the bin edge
    vectors, so their distance is at least sqrt(lambda_min(G)) |max(|d| - 1, 0)|, with G the
    metric of the edge vectors. Offsets beyond that bound are left out; the bound is exact for
    rectangular bins and only less sharp for oblique ones.
    """
    e = [[x / float(k) for x in row] for row, k in zip(np.asarray(cell, float).tolist(), np.asarray(counts).tolist())]
    metric = [[e[a][0] * e[b][0] + e[a][1] * e[b][1] + e[a][2] * e[b][2] for b in range(3)] for a in range(3)]
    smallest = _smallest_eigenvalue(metric)
    # the squared gaps are whole numbers, so the stencil depends on the largest one kept only
    reach = tuple(int(r) for r in reach)
    limit = cutoff * cutoff * (1 + 1e-12)
    level = math.inf if smallest <= 0.0 or limit / smallest > 3 * max(reach) ** 2 else math.floor(limit / smallest)
    key = (reach, level)
    found = _STENCILS.get(key)
    if found is None:
        offsets, gap2 = _offset_grid(reach)
        found = np.ascontiguousarray(offsets[gap2 <= level])
        remember(_STENCILS, _OFFSET_GRIDS_KEEP, key, found)
    return found


#: Stencils by reach and the largest squared gap kept (see :func:`stencil_offsets`).
_STENCILS = {}


def _smallest_eigenvalue(g):
    """Smallest eigenvalue of a symmetric 3x3 matrix (nested lists), in closed form, a little low
    rather than high (a lower bound is what the stencil needs).

    References
    ----------
    O. K. Smith, Commun. ACM 4 (1961) 168 (eigenvalues of a symmetric 3x3 matrix by the
    trigonometric solution of its characteristic cubic).
    """
    off = g[0][1] ** 2 + g[0][2] ** 2 + g[1][2] ** 2
    trace = (g[0][0] + g[1][1] + g[2][2]) / 3.0
    a, b, c = g[0][0] - trace, g[1][1] - trace, g[2][2] - trace
    p2 = a * a + b * b + c * c + 2.0 * off
    scale = abs(trace) + math.sqrt(p2)
    if p2 <= (1e-15 * scale) ** 2:
        return trace - 1e-12 * scale
    p = math.sqrt(p2 / 6.0)
    # det((g - trace I) / p) / 2, clipped to [-1, 1] against rounding
    det = (a * (b * c - g[1][2] ** 2) - g[0][1] * (g[0][1] * c - g[1][2] * g[0][2])
           + g[0][2] * (g[0][1] * g[1][2] - b * g[0][2])) / (2.0 * p ** 3)
    phi = math.acos(min(1.0, max(-1.0, det))) / 3.0
    return trace + 2.0 * p * math.cos(phi + 2.0 * math.pi / 3.0) - 1e-12 * scale


def build_bins(cell, positions, cutoff, bins_per_cutoff=3, max_bins_per_atom=2.0, reduced=None) -> CellBins:
    """Sort atoms into bins about ``cutoff / bins_per_cutoff`` thick along each lattice direction.

    The bins are laid on the reduced basis of the lattice (``CellBins.cell``), so the walk visits a
    compact stencil whatever basis the cell is written in; positions and results are Cartesian.
    ``reduced``: the :class:`~madelung.structure.lattice.ReducedCell` of ``cell``, if at hand.
    """
    facts = reduced_cell(cell) if reduced is None else reduced
    cell = facts.cell.copy()    # writeable: Numba compiles kernels again for read-only arrays
    positions = np.ascontiguousarray(positions, dtype=np.float64)
    n = len(positions)
    spacing = facts.spacings.tolist()
    counts = [max(1, math.floor(bins_per_cutoff * s / cutoff)) for s in spacing]
    limit = max(1.0, max_bins_per_atom * n)
    while float(counts[0]) * counts[1] * counts[2] > limit:
        counts = [max(1, k // 2) for k in counts]
    reach = [max(math.ceil(cutoff * k / s - 1e-12), 0) for k, s in zip(counts, spacing)]
    offsets = stencil_offsets(cell, counts, reach, cutoff)
    counts = np.array(counts, dtype=np.int64)
    wrapped, bin_of, order, start = gk.sort_into_bins(positions, facts.inverse.copy(), cell, counts)
    return CellBins(cell, wrapped, order, counts, np.array(reach, dtype=np.int64), offsets, bin_of, start,
                    float(cutoff))


#: Bins kept by :func:`shared_bins` for the current thread (a list while a scope is open).
_SHARED = threading.local()

#: A neighbour search inside :func:`shared_bins` walks bins kept for a longer cutoff when they
#: examine at most this many candidate pairs (about the cost of sorting a small cell anew).
SHARED_BINS_PAIRS = 4e4


@contextmanager
def shared_bins():
    """Let the neighbour searches inside reuse each other's bins for the same cell and positions.

    The bins that a neighbour search (:func:`neighbour_pairs`, :func:`nearest_neighbour_distances`,
    :func:`closest_pair_within`) builds inside are kept until the scope closes; a later search of
    the same reduced cell and positions walks kept bins built for the same cutoff, or a longer one
    when the walk stays small (:data:`SHARED_BINS_PAIRS`), instead of sorting the atoms again. The
    searches find the same pairs and distances (pairs possibly in another order). Only the
    searches inside the scope share, and scopes nest (the outermost one keeps), so a result never
    depends on what ran before the scope opened. Kept bins are never written to (they stay
    writeable: Numba would compile every kernel again for read-only arrays).
    """
    if getattr(_SHARED, "bins", None) is not None:
        yield
        return
    _SHARED.bins = []
    try:
        yield
    finally:
        _SHARED.bins = None


def _search_bins(cell, positions, cutoff, reduced=None) -> CellBins:
    """Bins for a neighbour search within ``cutoff``: kept ones inside :func:`shared_bins` where
    they serve, else new ones (``reduced``: the cell's ReducedCell, if at hand)."""
    kept = getattr(_SHARED, "bins", None)
    if kept:
        reduced_basis_cell = (reduced_cell(cell) if reduced is None else reduced).cell
        positions = np.ascontiguousarray(positions, dtype=np.float64)
        key = (reduced_basis_cell.tobytes(), positions.tobytes())
        n = len(positions)
        best = None
        for cell_key, positions_key, bins in kept:
            if (cell_key, positions_key) != key or bins.cutoff < cutoff:
                continue
            examined = float(n) * n * len(bins.offsets) / float(np.prod(bins.counts))
            if bins.cutoff <= cutoff * (1 + 1e-12) or examined <= SHARED_BINS_PAIRS:
                if best is None or bins.cutoff < best.cutoff:
                    best = bins
        if best is not None:
            return best
    bins = build_bins(cell, positions, cutoff, reduced=reduced)
    if kept is not None:
        kept.append((bins.cell.tobytes(), np.ascontiguousarray(positions, dtype=np.float64).tobytes(), bins))
    return bins


#: Up to this many atoms the nearest-neighbour and shortest-distance searches take the pair list
#: of the shared walk (``pairs_from``, which bonds and Madelung constants need anyway) and reduce
#: it with NumPy; larger cells use the kernels that keep only the nearest partner or the closest
#: pair, in parallel. The two give the same distances and partners (the shortest distance to
#: rounding). A first command on a small cell then compiles one search kernel instead of three
#: (about 2 s less on a new machine); the kernels are faster, by 16 µs at 8 atoms, 60 µs at 64 and
#: 0.4 ms at 512 for the shortest distance (benchmarks/per_call.py measures the set-up).
PAIR_LIST_MAX_ATOMS = 64


def _nearest(cell, positions, charges, cutoff, reduced=None):
    bins = _search_bins(cell, positions, cutoff, reduced)
    if len(positions) <= PAIR_LIST_MAX_ATOMS:
        owner, partner, distance = neighbour_pairs(cell, positions, cutoff, bins=bins)
        return _nearest_in_pairs(len(positions), owner, partner, distance, charges)
    examined = len(positions) ** 2 * bins.examined_volume / abs(np.linalg.det(bins.cell))
    with thread_budget(examined * EXAMINED_PAIR_NS):
        nearest, partner, opposite = gk.nearest_neighbours(
            bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.offsets,
            bins.bin_of, bins.bin_start, float(cutoff))
    partner = np.where(partner >= 0, bins.order[np.maximum(partner, 0)], -1)
    return bins.unsorted(nearest), bins.unsorted(partner), bins.unsorted(opposite)


def _nearest_in_pairs(n, owner, partner, distance, charges, partners=True):
    """What the nearest-neighbour kernel returns, from a pair list in walking order with the pairs
    of each atom together and the atoms in ascending order (as :func:`neighbour_pairs` gives them
    for all sites): the nearest partner's distance and index (the first of equally near ones) and
    the nearest of opposite charge sign, per atom (``inf`` and -1 where there is none)."""
    nearest = np.full(n, np.inf)
    opposite = np.full(n, np.inf)
    closest = np.full(n, -1, dtype=np.int64)
    if len(owner) == 0:
        return nearest, closest, opposite
    counts = np.bincount(owner, minlength=n)
    atoms = np.flatnonzero(counts)
    starts = (np.cumsum(counts) - counts)[atoms]
    nearest[atoms] = np.minimum.reduceat(distance, starts)
    charges = np.asarray(charges, dtype=np.float64)
    unlike = charges[owner] * charges[partner] < 0.0
    opposite[atoms] = np.minimum.reduceat(np.where(unlike, distance, np.inf), starts)
    if partners:
        hits = np.flatnonzero(distance == nearest[owner])
        first = np.ones(len(hits), dtype=bool)      # the first hit of each atom
        first[1:] = owner[hits[1:]] != owner[hits[:-1]]
        closest[owner[hits[first]]] = partner[hits[first]]
    return nearest, closest, opposite


def _has_opposite(charges):
    """Which atoms have an atom of opposite charge sign somewhere in the structure."""
    has_opposite = np.zeros(len(charges), bool)
    if np.any(charges > 0):
        has_opposite |= charges < 0
    if np.any(charges < 0):
        has_opposite |= charges > 0
    return has_opposite


def _missing(to_any, to_opposite, has_opposite):
    """Atoms whose nearest neighbour, or nearest one of opposite sign where there is one, a search
    did not reach."""
    return np.isinf(to_any) | (has_opposite & np.isinf(to_opposite))


def nearest_from_pairs(owner, partner, distance, charges, partners=True):
    """:func:`nearest_neighbour_distances` from a pair list already at hand: every pair within some
    cutoff of every atom, as :func:`neighbour_pairs` gives it for all sites (e.g. the real-space
    pairs of a sum). Returns ``(to_any, to_opposite, partner)``, the same distances, or None when
    the cutoff left some atom without its nearest neighbour or its nearest one of opposite sign
    (then search with :func:`nearest_neighbour_distances`). Of equally near partners the first in
    this list's order is named; with ``partners=False`` none is (``partner`` all -1), which is cheaper."""
    charges = np.asarray(charges, dtype=np.float64)
    to_any, closest, to_opposite = _nearest_in_pairs(len(charges), owner, partner, distance, charges, partners)
    if _missing(to_any, to_opposite, _has_opposite(charges)).any():
        return None
    return to_any, to_opposite, closest


def nearest_neighbour_distances(cell, positions, charges, reduced=None):
    """Distance from each atom to its nearest neighbour (any; periodic images count) and to its
    nearest neighbour of opposite charge sign (``inf`` if the structure has none).

    Returns ``(to_any, to_opposite, partner)`` with ``partner`` the index of the nearest atom.
    ``reduced``: the cell's :class:`~madelung.structure.lattice.ReducedCell`, if at hand.
    """
    cell = np.asarray(cell, float)
    positions = np.asarray(positions, float)
    charges = np.asarray(charges, float)
    n = len(positions)
    volume = abs(np.linalg.det(cell))
    has_opposite = _has_opposite(charges)
    cutoff = 2.0 * (volume / n) ** (1.0 / 3.0)
    longest = np.linalg.norm(cell, axis=1).sum()
    while True:
        to_any, partner, to_opposite = _nearest(cell, positions, charges, cutoff, reduced)
        if not _missing(to_any, to_opposite, has_opposite).any() or cutoff > 2 * longest:
            return to_any, to_opposite, partner
        cutoff *= 2.0


#: The closest pair of N points in a periodic cell of volume V is at most (sqrt(2) V / N)^(1/3)
#: apart: spheres of that diameter round every point would otherwise fill more than pi / sqrt(18)
#: of space, the densest packing of equal spheres (Hales 2005). A search to this distance, times a
#: margin for rounding, always holds the closest pair.
PACKING_DISTANCE_FACTOR = 2.0 ** 0.5
PACKING_MARGIN = 1.0 + 1e-9


def shortest_distance(cell, positions) -> float:
    """Shortest interionic distance, periodic images included, Å (one pass over each pair once).

    The same value as the minimum of :func:`nearest_neighbour_distances`, without the per-atom
    bookkeeping. The search reaches :data:`PACKING_DISTANCE_FACTOR` ^ (1/3) times the mean spacing
    (V / N)^(1/3), which always holds the closest pair, so one pass over bins at least that thick
    does it (the bins of :func:`build_bins`, one cutoff thick, and the shared half-stencil
    walk); the search would widen if rounding ever left the closest pair outside.

    References
    ----------
    T. C. Hales, Ann. Math. 162 (2005) 1065 (the densest packing of equal spheres, pi / sqrt(18)).
    """
    cell, _ = reduced_basis(np.ascontiguousarray(cell, dtype=np.float64))
    cell = np.ascontiguousarray(cell)
    positions = np.ascontiguousarray(positions, dtype=np.float64)
    n = len(positions)
    key = (cell.tobytes(), positions.tobytes()) if n <= SHORTEST_KEEP_MAX_ATOMS else None
    found = _SHORTEST.get(key)
    if found is None:
        found = _shortest_distance(cell, positions)
        if key is not None:
            remember(_SHORTEST, _SHORTEST_KEEP, key, found)
    return found


#: Recent shortest distances (bytes of the reduced cell and the positions -> Å) of cells up to
#: this many atoms: a crystal's overlap check finds it, and the plan of its first sum needs it.
SHORTEST_KEEP_MAX_ATOMS = 1000
_SHORTEST = {}
_SHORTEST_KEEP = 64


def _shortest_distance(cell, positions) -> float:
    n = len(positions)
    volume = reduced_cell(cell).volume
    cutoff = (PACKING_DISTANCE_FACTOR * volume / n) ** (1.0 / 3.0) * PACKING_MARGIN
    while True:
        bins = build_bins(cell, positions, cutoff, bins_per_cutoff=1)
        if n <= PAIR_LIST_MAX_ATOMS:
            distance = neighbour_pairs(cell, positions, cutoff, bins=bins)[2]
            found = float(distance.min()) if len(distance) else math.inf
        else:
            k0, k1, k2 = bins.counts.tolist()
            examined = n * len(bins.offsets) * n / float(k0 * k1 * k2) / 2
            with thread_budget(examined * EXAMINED_PAIR_NS):
                found = float(gk.closest_distance(bins.positions, bins.cell, bins.counts, bins.offsets, bins.bin_of,
                                                  bins.bin_start))
        if found <= cutoff:
            return found
        cutoff *= 2.0


def closest_pair_within(cell, positions, limit):
    """The closest pair ``(i, j, distance)`` nearer than ``limit``, or None if there is none."""
    charges = np.zeros(len(positions))
    to_any, partner, _ = _nearest(cell, positions, charges, float(limit))
    i = int(np.argmin(to_any))
    if to_any[i] < limit:
        return i, int(partner[i]), float(to_any[i])
    return None


def neighbour_pairs(cell, positions, cutoff, sites=None, bins=None):
    """Every partner within ``cutoff`` of each site in ``sites`` (default: all), images included.

    ``bins``: bins of these positions (:func:`build_bins`) built for ``cutoff`` or a longer one,
    if at hand (e.g. a sum plan's); else they are built, or taken from :func:`shared_bins`.

    Returns ``(owner, partner, distance)`` arrays, one entry per pair: ``owner`` indexes ``sites``,
    ``partner`` is the original index of the partner atom, ``distance`` is in Å. A site is not
    its own partner; its periodic images are.
    """
    n = len(positions)
    sites = np.arange(n) if sites is None else np.asarray(sites, dtype=np.int64)
    if bins is None:
        bins = _search_bins(cell, positions, cutoff)
    elif bins.cutoff < cutoff * (1 - 1e-12) or len(bins.order) != n:
        raise ValueError(f"bins built for {len(bins.order)} atoms within {bins.cutoff:g} Å cannot serve a search "
                         f"of {n} atoms within {cutoff:g} Å")
    rank = np.empty(n, dtype=np.int64)
    rank[bins.order] = np.arange(n)
    owner, partner, distance = gk.pairs_from(np.ascontiguousarray(rank[sites]), bins.positions, bins.cell,
                                             bins.counts, bins.offsets, bins.bin_of, bins.bin_start, float(cutoff))
    return owner, bins.order[partner], distance
