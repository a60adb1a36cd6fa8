"""Numba kernels for ranking site orderings: quadratic-form energies, single-site and swap updates,
lexicographic walks through multiset permutations, orbit-minimum tests and Metropolis annealing.

Arithmetic only. An ordering is an int64 array ``x`` of species codes on the disordered sites;
``charge_of[c]`` is the charge (e) of code ``c``. With ``J`` the Coulomb matrix of the disordered
sites (V per e) and ``phi_fixed`` the potential (V) of the fixed ions on them, the energy is::

    E(x) = E_fixed + q . phi_fixed + q . J q / 2,        q = charge_of[x]

and ``phi = phi_fixed + J q`` is kept up to date: changing ``q_p`` by ``d`` changes the energy by
``d phi_p + d^2 J_pp / 2`` and ``phi`` by ``d J[:, p]`` (O(N)); a swap of two sites is two such
changes. Segments ``[seg_start[s], seg_start[s + 1])`` are the sublattices: each keeps its multiset
of codes, and a walk visits its permutations in lexicographic order (the last segment fastest).

References
----------
D. E. Knuth, The Art of Computer Programming, Vol. 4A (2011), Algorithm 7.2.1.2L (lexicographic
permutations of a multiset).
N. Metropolis et al., J. Chem. Phys. 21 (1953) 1087; S. Kirkpatrick, C. D. Gelatt and
M. P. Vecchi, Science 220 (1983) 671 (Metropolis sampling, simulated annealing).
"""

import math

import numpy as np
from numba import njit

#: Steps between full recomputations of ``phi`` and the energy (bounds rounding drift).
REFRESH_STEPS = 1 << 16


@njit(cache=True)
def full_energy(coulomb, phi_fixed, energy_fixed, charges, phi):
    """Energy (eV) of the charges on the disordered sites; writes ``phi = phi_fixed + J q``."""
    n = charges.shape[0]
    energy = energy_fixed
    for i in range(n):
        acc = 0.0
        for j in range(n):
            acc += coulomb[i, j] * charges[j]
        energy += charges[i] * (phi_fixed[i] + 0.5 * acc)
        phi[i] = phi_fixed[i] + acc
    return energy


@njit(cache=True, inline="always")
def _change_site(coulomb, phi, p, d, energy):
    """Add ``d`` to the charge of site ``p``: new energy, ``phi`` updated in place."""
    energy += d * phi[p] + 0.5 * d * d * coulomb[p, p]
    n = phi.shape[0]
    for i in range(n):
        phi[i] += d * coulomb[i, p]
    return energy


@njit(cache=True, inline="always")
def _next_in_segment(x, lo, hi, old):
    """Next multiset permutation of ``x[lo:hi]`` in lexicographic order, in place; wraps round
    to the first (ascending) one. Returns (first changed position, wrapped); ``old`` receives the
    previous values of the positions from there on."""
    i = hi - 2
    while i >= lo and x[i] >= x[i + 1]:
        i -= 1
    start = lo if i < lo else i
    for k in range(start, hi):
        old[k] = x[k]
    if i < lo:
        a, b = lo, hi - 1
        while a < b:
            x[a], x[b] = x[b], x[a]
            a += 1
            b -= 1
        return lo, True
    j = hi - 1
    while x[j] <= x[i]:
        j -= 1
    x[i], x[j] = x[j], x[i]
    a, b = i + 1, hi - 1
    while a < b:
        x[a], x[b] = x[b], x[a]
        a += 1
        b -= 1
    return i, False


@njit(cache=True, inline="always")
def _orbit_test(x, inverse_ops):
    """Is x the lexicographic minimum of its orbit? Returns (yes, size of its stabilizer, an operation
    g that makes it smaller, the first position where g x is smaller). Row g of ``inverse_ops``
    lists g^-1: the moved ordering is ``x[inverse_ops[g]]``."""
    n_ops, n = inverse_ops.shape
    fixed = 0
    for g in range(n_ops):
        same = True
        for p in range(n):
            a = x[inverse_ops[g, p]]
            b = x[p]
            if a < b:
                return False, 0, g, p
            if a > b:
                same = False
                break
        if same:
            fixed += 1
    return True, fixed, -1, -1


@njit(cache=True)
def _segment_rank(x, lo, hi, counts, arrangements, work):
    """Position of x[lo:hi] among the lexicographically ordered arrangements of its multiset
    (``counts`` per code, ``arrangements`` of them in all)."""
    for c in range(counts.shape[0]):
        work[c] = counts[c]
    left = hi - lo
    m = arrangements
    rank = 0
    for i in range(lo, hi):
        xi = x[i]
        for c in range(xi):
            if work[c] > 0:
                rank += m * work[c] // left
        m = m * work[xi] // left
        work[xi] -= 1
        left -= 1
    return rank


@njit(cache=True)
def _is_before(x, end):
    for i in range(x.shape[0]):
        if x[i] != end[i]:
            return x[i] < end[i]
    return False


@njit(cache=True)
def enumerate_range(coulomb, phi_fixed, energy_fixed, charge_of, seg_start, seg_counts, seg_arrangements,
                    seg_below, inverse_ops, x, x_end, has_end, min_skip, out_rank, out_energy, out_fixed):
    """Walk the orderings from ``x`` (lexicographic, last segment fastest) up to ``x_end`` (excluded;
    to the last ordering if not ``has_end``) and record the orbit minima: their position in the walk,
    energy (eV) and stabilizer size. Returns (recorded, orderings whose energy was computed).

    When an operation g makes x smaller at position p, every ordering that agrees with x up to
    m = max(p, max_{q<=p} g^-1(q)) is made smaller by g as well; if at least ``min_skip`` positions
    follow m, the walk jumps past all of them (their energies are never computed)."""
    n = x.shape[0]
    n_seg = seg_start.shape[0] - 1
    charges = np.empty(n)
    for i in range(n):
        charges[i] = charge_of[x[i]]
    phi = np.empty(n)
    old = np.empty(n, dtype=x.dtype)
    work = np.empty(seg_counts.shape[1], dtype=np.int64)
    tally = np.empty(seg_counts.shape[1], dtype=np.int64)
    energy = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
    recorded = 0
    visited = 0
    while True:
        visited += 1
        canonical, fixed, g, p = _orbit_test(x, inverse_ops)
        if canonical:
            rank = 0
            for s in range(n_seg):
                rank += _segment_rank(x, seg_start[s], seg_start[s + 1], seg_counts[s], seg_arrangements[s],
                                      work) * seg_below[s]
            out_rank[recorded] = rank
            out_energy[recorded] = energy
            out_fixed[recorded] = fixed
            recorded += 1
        else:
            m = p
            for q in range(p + 1):
                if inverse_ops[g, q] > m:
                    m = inverse_ops[g, q]
            if n - 1 - m >= min_skip:
                # everything after m to its last (descending) arrangement: the next step leaves the subtree
                for k in range(m + 1, n):
                    old[k] = x[k]
                for s in range(n_seg):
                    lo, hi = seg_start[s], seg_start[s + 1]
                    if hi <= m + 1:
                        continue
                    first = max(lo, m + 1)
                    for c in range(tally.shape[0]):
                        tally[c] = 0
                    for k in range(first, hi):
                        tally[x[k]] += 1
                    k = first
                    for c in range(tally.shape[0] - 1, -1, -1):
                        for _ in range(tally[c]):
                            x[k] = c
                            k += 1
                changed = 0
                for k in range(m + 1, n):
                    if x[k] != old[k]:
                        changed += 1
                if 2 * changed > n:
                    for i in range(n):
                        charges[i] = charge_of[x[i]]
                    energy = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
                else:
                    for k in range(m + 1, n):
                        if x[k] != old[k]:
                            energy = _change_site(coulomb, phi, k, charge_of[x[k]] - charge_of[old[k]], energy)
        s = n_seg - 1
        while s >= 0:
            lo, hi = seg_start[s], seg_start[s + 1]
            first, wrapped = _next_in_segment(x, lo, hi, old)
            for k in range(first, hi):
                if x[k] != old[k]:
                    energy = _change_site(coulomb, phi, k, charge_of[x[k]] - charge_of[old[k]], energy)
            if not wrapped:
                break
            s -= 1
        if s < 0:          # past the last ordering
            break
        if has_end and not _is_before(x, x_end):
            break
        if visited % REFRESH_STEPS == 0:
            for i in range(n):
                charges[i] = charge_of[x[i]]
            energy = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
    return recorded, visited


@njit(cache=True)
def energies_of(coulomb, phi_fixed, energy_fixed, charge_of, orderings):
    """Energy (eV) of each row of ``orderings`` (species codes), by the full quadratic form."""
    m, n = orderings.shape
    out = np.empty(m)
    charges = np.empty(n)
    phi = np.empty(n)
    for r in range(m):
        for i in range(n):
            charges[i] = charge_of[orderings[r, i]]
        out[r] = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
    return out


@njit(cache=True)
def _remember(pool_x, pool_energy, x, energy):
    """Keep ``x`` in the pool of the lowest orderings if it belongs there, one per energy level
    (symmetry-equivalent orderings have the same energy; so, rarely, do distinct ones)."""
    size = pool_energy.shape[0]
    worst = 0
    for k in range(size):
        if pool_energy[k] > pool_energy[worst]:
            worst = k
    if energy >= pool_energy[worst]:
        return
    n = x.shape[0]
    for k in range(size):
        if abs(pool_energy[k] - energy) <= 1e-9 * (1.0 + abs(energy)):
            return
    for i in range(n):
        pool_x[worst, i] = x[i]
    pool_energy[worst] = energy


@njit(cache=True)
def anneal(coulomb, phi_fixed, energy_fixed, charge_of, segment_of, seg_start, x, temperatures,
           sweeps_per_temperature, seed, pool_x, pool_energy):
    """Simulated annealing with swap moves inside each segment, then a greedy quench.

    ``temperatures`` (eV, falling) are visited in turn, each for ``sweeps_per_temperature`` x N
    attempted swaps accepted with the Metropolis rule. The lowest distinct orderings visited are
    kept in ``pool_x`` / ``pool_energy`` (fill ``pool_energy`` with +inf first). ``x`` ends at the
    quenched ordering; returns (its energy, attempted swaps)."""
    np.random.seed(seed)
    n = x.shape[0]
    charges = np.empty(n)
    for i in range(n):
        charges[i] = charge_of[x[i]]
    phi = np.empty(n)
    energy = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
    _remember(pool_x, pool_energy, x, energy)
    attempts = 0
    for t in range(temperatures.shape[0]):
        beta = 1.0 / temperatures[t]
        for _ in range(sweeps_per_temperature * n):
            p = np.random.randint(n)
            s = segment_of[p]
            lo, hi = seg_start[s], seg_start[s + 1]
            r = lo + np.random.randint(hi - lo)
            attempts += 1
            if x[p] == x[r]:
                continue
            d = charge_of[x[r]] - charge_of[x[p]]
            delta = d * (phi[p] - phi[r]) + 0.5 * d * d * (coulomb[p, p] + coulomb[r, r] - 2.0 * coulomb[p, r])
            if delta <= 0.0 or np.random.random() < math.exp(-beta * delta):
                energy = _change_site(coulomb, phi, p, d, energy)
                energy = _change_site(coulomb, phi, r, -d, energy)
                x[p], x[r] = x[r], x[p]
                _remember(pool_x, pool_energy, x, energy)
        for i in range(n):
            charges[i] = charge_of[x[i]]
        energy = full_energy(coulomb, phi_fixed, energy_fixed, charges, phi)
    # quench: take the best improving swap until none is left
    while True:
        best, best_p, best_r = -1e-12, -1, -1
        for p in range(n):
            for r in range(p + 1, n):
                if segment_of[p] != segment_of[r] or x[p] == x[r]:
                    continue
                d = charge_of[x[r]] - charge_of[x[p]]
                delta = d * (phi[p] - phi[r]) + 0.5 * d * d * (coulomb[p, p] + coulomb[r, r] - 2.0 * coulomb[p, r])
                if delta < best:
                    best, best_p, best_r = delta, p, r
        if best_p < 0:
            break
        d = charge_of[x[best_r]] - charge_of[x[best_p]]
        energy = _change_site(coulomb, phi, best_p, d, energy)
        energy = _change_site(coulomb, phi, best_r, -d, energy)
        x[best_p], x[best_r] = x[best_r], x[best_p]
        _remember(pool_x, pool_energy, x, energy)
    return energy, attempts
