"""Numba kernels of the Ewald sum: real-space and reciprocal-space terms and their derivatives.

Arithmetic only, in Gaussian units (charges in e, lengths in Å, no Coulomb constant):
the driver multiplies by ``COULOMB_CONSTANT`` and adds the self and background terms.

Real space (Ewald, Ann. Phys. 369 (1921) 253), for each atom i over partners j and images n::

    phi_i = sum_j,n' q_j erfc(alpha r) / r,    r = |r_i - r_j - n| < r_cut

Reciprocal space, over half of k-space (k and -k give equal terms)::

    S(k)  = sum_j q_j exp(i k.r_j)
    phi_i = sum_k 2 w(k) Re[S(k) exp(-i k.r_i)],   w(k) = (4 pi / V) exp(-k^2 / 4 alpha^2) / k^2

Phases exp(i k.r) come from per-atom tables along each reciprocal axis, built by recurrence
(exp(2 pi i h f) = exp(2 pi i f)^h), so a k-vector costs two complex products per atom.
Each atom's terms are accumulated by the thread that owns it: no two threads write one place.
"""

import math

import numpy as np
from numba import njit, prange

from ..geometry_kernels import image_shift, neighbour_bin

_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)


#: Work is split into this many chunks whatever the number of threads, so that the order of
#: floating-point additions, and with it every digit of the result, does not depend on the machine.
CHUNKS = 8


@njit(cache=True, inline="always")
def _take_pair(i, j, s0, s1, s2):
    """Whether atom i's walk takes the pair (i, j, image s): each pair is taken exactly once.

    Pairs of distinct atoms go to the lower or the higher index by the parity of i + j, which
    splits every atom's partners about evenly; an atom and its own image go to the positive image.
    """
    if i == j:
        return s0 > 0 or (s0 == 0 and (s1 > 0 or (s1 == 0 and s2 > 0)))
    if (i + j) % 2 == 0:
        return i < j
    return i > j


@njit(parallel=True, cache=True)
def real_space_terms(positions, charges, cell, counts, reach, bin_of, bin_start,
                     alpha, r_cut, want_forces, want_virial):
    """Real-space potentials, forces and per-atom virial of the screened Coulomb sum.

    Atoms must be sorted by bin (see ``geometry.build_bins``). Each pair is evaluated once and
    added to both atoms; atoms are split into ``CHUNKS`` chunks, each accumulating into its own
    rows, which are summed at the end (no two threads write one place).

    Returns ``(potential, forces, virial, pairs)``: potential (N,) in e/Å; forces (N, 3) in
    e^2/Å^2 (zeros unless asked); virial (N, 6) as xx, yy, zz, yz, xz, xy of dE/d(strain) in e^2/Å
    (zeros unless asked); pairs, the number of (i, j, image) terms inside the cutoff counting
    both orders, as in the double sum.
    """
    n = positions.shape[0]
    n_chunks = min(CHUNKS, n)
    n_force = n if want_forces else 1
    n_virial = n if want_virial else 1
    potential_part = np.zeros((n_chunks, n))
    force_part = np.zeros((n_chunks, n_force, 3))
    virial_part = np.zeros((n_chunks, n_virial, 6))
    pair_part = np.zeros(n_chunks, dtype=np.int64)
    cut2 = r_cut * r_cut
    a2 = alpha * alpha
    chunk = (n + n_chunks - 1) // n_chunks
    for c in prange(n_chunks):
        phi = potential_part[c]
        force = force_part[c]
        virial = virial_part[c]
        count = 0
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            xi = positions[i, 0]
            yi = positions[i, 1]
            zi = positions[i, 2]
            qi = charges[i]
            for d0 in range(-reach[0], reach[0] + 1):
                for d1 in range(-reach[1], reach[1] + 1):
                    for d2 in range(-reach[2], reach[2] + 1):
                        b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], d0, d1, d2, counts)
                        sx, sy, sz = image_shift(cell, s0, s1, s2)
                        for j in range(bin_start[b], bin_start[b + 1]):
                            dx = xi - positions[j, 0] - sx
                            dy = yi - positions[j, 1] - sy
                            dz = zi - positions[j, 2] - sz
                            r2 = dx * dx + dy * dy + dz * dz
                            if r2 >= cut2 or not _take_pair(i, j, s0, s1, s2):
                                continue
                            r = math.sqrt(r2)
                            screened = math.erfc(alpha * r) / r
                            phi[i] += charges[j] * screened
                            phi[j] += qi * screened
                            count += 2
                            if want_forces or want_virial:
                                # g = -(1/r) d/dr [erfc(alpha r)/r]
                                g = (screened + _TWO_OVER_SQRT_PI * alpha * math.exp(-a2 * r2)) / r2
                                qq = qi * charges[j]
                                if want_forces:
                                    fx = qq * g * dx
                                    fy = qq * g * dy
                                    fz = qq * g * dz
                                    force[i, 0] += fx
                                    force[i, 1] += fy
                                    force[i, 2] += fz
                                    force[j, 0] -= fx
                                    force[j, 1] -= fy
                                    force[j, 2] -= fz
                                if want_virial:
                                    h = -qq * g
                                    virial[i, 0] += h * dx * dx
                                    virial[i, 1] += h * dy * dy
                                    virial[i, 2] += h * dz * dz
                                    virial[i, 3] += h * dy * dz
                                    virial[i, 4] += h * dx * dz
                                    virial[i, 5] += h * dx * dy
        pair_part[c] = count
    potential = np.zeros(n)
    forces = np.zeros((n, 3))
    virial_total = np.zeros((n, 6))
    for c in range(n_chunks):
        potential += potential_part[c]
        if want_forces:
            forces += force_part[c]
        if want_virial:
            virial_total += virial_part[c]
    return potential, forces, virial_total, pair_part.sum()


@njit(cache=True, inline="always")
def _phase_tables(f0, f1, f2, hmax, t0, t1, t2):
    """Fill t_a[h + hmax_a] = exp(2 pi i h f_a) for |h| <= hmax_a by recurrence."""
    ts = (t0, t1, t2)
    fs = (f0, f1, f2)
    for a in range(3):
        t = ts[a]
        m = hmax[a]
        step = complex(math.cos(2.0 * math.pi * fs[a]), math.sin(2.0 * math.pi * fs[a]))
        t[m] = 1.0 + 0.0j
        value = 1.0 + 0.0j
        for h in range(1, m + 1):
            value = value * step
            t[m + h] = value
            t[m - h] = value.conjugate()


@njit(parallel=True, cache=True)
def structure_factors(frac, charges, hkl, hmax, n_chunks):
    """S(k) = sum_j q_j exp(2 pi i (h f1 + k f2 + l f3)) for each Miller triple in ``hkl`` (M, 3).

    Atoms are split into ``n_chunks`` chunks; each chunk sums into its own row, rows are added
    at the end (pass a fixed number for results independent of the thread count). Triples that
    share h and k with the one before reuse its product exp(2 pi i (h f1 + k f2)).
    Returns ``(real, imaginary)`` arrays of length M.
    """
    n = frac.shape[0]
    m_count = hkl.shape[0]
    n_chunks = max(1, min(n_chunks, n))
    partial = np.zeros((n_chunks, m_count), dtype=np.complex128)
    chunk = (n + n_chunks - 1) // n_chunks
    for c in prange(n_chunks):
        t0 = np.empty(2 * hmax[0] + 1, dtype=np.complex128)
        t1 = np.empty(2 * hmax[1] + 1, dtype=np.complex128)
        t2 = np.empty(2 * hmax[2] + 1, dtype=np.complex128)
        row = partial[c]
        for j in range(c * chunk, min(n, (c + 1) * chunk)):
            _phase_tables(frac[j, 0], frac[j, 1], frac[j, 2], hmax, t0, t1, t2)
            q = charges[j]
            last_h = -(1 << 40)
            last_k = 0
            qhk = 0.0j
            for m in range(m_count):
                h = hkl[m, 0]
                k = hkl[m, 1]
                if h != last_h or k != last_k:
                    qhk = q * t0[h + hmax[0]] * t1[k + hmax[1]]
                    last_h = h
                    last_k = k
                row[m] += qhk * t2[hkl[m, 2] + hmax[2]]
    total = np.zeros(m_count, dtype=np.complex128)
    for c in range(n_chunks):
        total += partial[c]
    return total.real.copy(), total.imag.copy()


@njit(parallel=True, cache=True)
def reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_real, s_imag, want_forces):
    """Reciprocal-space potential (N,) in e/Å and forces (N, 3) in e^2/Å^2 from S(k).

    ``weights`` are 2 w(k) for the half-space k-vectors (the factor 2 counts -k).
    """
    n = frac.shape[0]
    m_count = hkl.shape[0]
    potential = np.zeros(n)
    forces = np.zeros((n, 3))
    for i in prange(n):
        t0 = np.empty(2 * hmax[0] + 1, dtype=np.complex128)
        t1 = np.empty(2 * hmax[1] + 1, dtype=np.complex128)
        t2 = np.empty(2 * hmax[2] + 1, dtype=np.complex128)
        _phase_tables(frac[i, 0], frac[i, 1], frac[i, 2], hmax, t0, t1, t2)
        phi = 0.0
        fx = 0.0
        fy = 0.0
        fz = 0.0
        last_h = -(1 << 40)
        last_k = 0
        phk = 0.0j
        for m in range(m_count):
            h = hkl[m, 0]
            k = hkl[m, 1]
            if h != last_h or k != last_k:
                phk = t0[h + hmax[0]] * t1[k + hmax[1]]
                last_h = h
                last_k = k
            p = phk * t2[hkl[m, 2] + hmax[2]]
            # Re[S conj(p)] and Im[conj(S) p]
            phi += weights[m] * (s_real[m] * p.real + s_imag[m] * p.imag)
            if want_forces:
                im = weights[m] * (s_real[m] * p.imag - s_imag[m] * p.real)
                fx += im * kvectors[m, 0]
                fy += im * kvectors[m, 1]
                fz += im * kvectors[m, 2]
        potential[i] = phi
        if want_forces:
            q = charges[i]
            forces[i, 0] = q * fx
            forces[i, 1] = q * fy
            forces[i, 2] = q * fz
    return potential, forces
