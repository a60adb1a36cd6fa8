"""Symmetry of site orderings: the supercell's space-group operations as permutations of its sites,
Burnside's count of symmetry-distinct orderings, and the canonical (orbit-minimum) representative.

Two orderings are the same crystal when an operation of the disordered supercell (rotations,
screw axes, glides and the pure translations of the parent lattice inside the supercell) maps
one onto the other. The operations come from spglib (:func:`madelung.structure.symmetry.symmetry_operations`)
with the sites typed by what they hold, so an operation never mixes sublattices.

References
----------
W. Burnside, Theory of Groups of Finite Order (Cambridge, 1897), the orbit-counting lemma (also
called the Cauchy-Frobenius lemma).
G. Pólya, Acta Math. 68 (1937) 145 (counting colourings with fixed numbers of each colour
through cycle structures).
A. Togo and I. Tanaka, arXiv:1808.01590 (2018) (spglib).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
from scipy.spatial import cKDTree

from ..errors import InputError
from ..structure.symmetry import symmetry_operations


def site_permutations(cell, frac_positions, types, symmetry_tolerance):
    """The distinct site permutations induced by the structure's symmetry operations.

    Returns an (M, N) int64 array: row g maps site p to site ``perms[g, p]`` (the identity among
    them). Operations acting alike on the sites are kept once.
    """
    cell = np.asarray(cell, dtype=np.float64)
    frac = np.asarray(frac_positions, dtype=np.float64)
    rotations, translations = symmetry_operations(cell, frac, types, symmetry_tolerance)
    wrapped = frac - np.floor(frac)
    wrapped[wrapped >= 1.0] = 0.0
    tree = cKDTree(wrapped, boxsize=1.0 + 1e-12)
    # a fractional tolerance no smaller than symmetry_tolerance along the longest axis
    tolerance = 2.0 * symmetry_tolerance / float(np.min(np.linalg.norm(cell, axis=1)))
    images = np.einsum("mij,nj->mni", rotations, frac) + translations[:, None, :]
    images = images - np.floor(images)
    images[images >= 1.0] = 0.0
    distance, index = tree.query(images.reshape(-1, 3), distance_upper_bound=tolerance)
    if not np.all(np.isfinite(distance)):
        raise InputError(f"a symmetry operation found by spglib at tolerance {symmetry_tolerance:g} Å maps a site onto no "
                         "site; try a smaller symmetry tolerance")
    perms = index.reshape(len(rotations), len(frac)).astype(np.int64)
    types = np.asarray(types)
    for row in perms:
        if len(np.unique(row)) != len(row) or np.any(types[row] != types):
            raise InputError(f"symmetry operations at tolerance {symmetry_tolerance:g} Å do not permute the sites cleanly; "
                             "try a smaller symmetry tolerance")
    perms = np.unique(perms, axis=0)
    return np.ascontiguousarray(perms)


def inverse_permutations(perms):
    """Row-wise inverses of permutations (so that ``x[inverse[g]]`` is ordering x moved by g)."""
    perms = np.asarray(perms, dtype=np.int64)
    inverse = np.empty_like(perms)
    rows = np.arange(len(perms))[:, None]
    inverse[rows, perms] = np.arange(perms.shape[1])[None, :]
    return np.ascontiguousarray(inverse)


def _cycle_lengths(perm):
    seen = np.zeros(len(perm), dtype=bool)
    lengths = []
    for start in range(len(perm)):
        if seen[start]:
            continue
        length, p = 0, start
        while not seen[p]:
            seen[p] = True
            p = perm[p]
            length += 1
        lengths.append(length)
    return lengths


@lru_cache(maxsize=4096)
def _fixed_colourings(cycle_lengths, counts):
    """Ways to colour cycles (sorted tuple of lengths) with exactly ``counts`` sites of each colour,
    one colour per cycle: the coefficient of prod x_c^counts[c] in prod_cycles (sum_c x_c^length)."""
    table = {tuple(0 for _ in counts): 1}
    for length in cycle_lengths:
        new = {}
        for used, ways in table.items():
            for c in range(len(counts)):
                if used[c] + length <= counts[c]:
                    key = used[:c] + (used[c] + length,) + used[c + 1:]
                    new[key] = new.get(key, 0) + ways
        table = new
    return table.get(tuple(counts), 0)


def multinomial(counts):
    """Number of distinct arrangements of a multiset with these multiplicities (exact integer)."""
    total, result = 0, 1
    for c in counts:
        total += c
        result *= math.comb(total, c)
    return result


def burnside_count(perms, segments, counts):
    """Number of symmetry-distinct orderings by Burnside's lemma.

    Parameters
    ----------
    perms : (M, N) permutations of the disordered sites (each maps every segment onto itself).
    segments : list of (lo, hi) site ranges, the sublattices.
    counts : per segment, the number of sites of each species (tuple of ints).

    Returns
    -------
    int, exact: (1/M) sum_g prod_segments fix_segment(g).
    """
    total = 0
    for perm in np.asarray(perms):
        term = 1
        for (lo, hi), count in zip(segments, counts):
            local = perm[lo:hi] - lo
            term *= _fixed_colourings(tuple(sorted(_cycle_lengths(local))), tuple(int(c) for c in count))
            if term == 0:
                break
        total += term
    if total % len(perms):
        raise InputError("the symmetry operations do not form a group on these sites (Burnside's sum "
                         f"{total} is not a multiple of {len(perms)}); try another symmetry tolerance")
    return total // len(perms)


def canonical_form(x, inverse_ops):
    """(lexicographically smallest ordering symmetry-equivalent to x, size of x's stabilizer)."""
    x = np.asarray(x)
    images = x[inverse_ops]
    order = np.lexsort(images.T[::-1])
    smallest = images[order[0]]
    stabilizer = int(np.count_nonzero(np.all(images == x[None, :], axis=1)))
    return smallest, stabilizer
