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

from ..geometry_kernels import neighbour_bin

_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)


@njit(parallel=True, cache=True)
def real_space_terms(positions, charges, cell, counts, reach, bin_of, bin_start,
                     alpha, r_cut, want_forces, want_virial):
    """Real-space potentials, forces and per-atom virial of the screened Coulomb sum.

    Atoms must be sorted by bin (see ``geometry.build_bins``). Returns ``(potential, forces,
    virial, pairs)``: potential (N,) in e/Å; forces (N, 3) in e^2/Å^2 (zeros unless asked);
    virial (N, 6) as xx, yy, zz, yz, xz, xy of dE/d(strain) per atom in e^2/Å (zeros unless asked);
    pairs, the number of (i, j, image) terms inside the cutoff.
    """
    n = positions.shape[0]
    potential = np.zeros(n)
    forces = np.zeros((n, 3))
    virial = np.zeros((n, 6))
    pair_count = np.zeros(n, dtype=np.int64)
    cut2 = r_cut * r_cut
    a2 = alpha * alpha
    for i in prange(n):
        xi = positions[i, 0]
        yi = positions[i, 1]
        zi = positions[i, 2]
        qi = charges[i]
        phi = 0.0
        fx = 0.0
        fy = 0.0
        fz = 0.0
        wxx = 0.0
        wyy = 0.0
        wzz = 0.0
        wyz = 0.0
        wxz = 0.0
        wxy = 0.0
        count = 0
        for d0 in range(-reach[0], reach[0] + 1):
            for d1 in range(-reach[1], reach[1] + 1):
                for d2 in range(-reach[2], reach[2] + 1):
                    b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2], d0, d1, d2, counts)
                    sx = s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0]
                    sy = s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1]
                    sz = s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2]
                    for j in range(bin_start[b], bin_start[b + 1]):
                        dx = xi - positions[j, 0] - sx
                        dy = yi - positions[j, 1] - sy
                        dz = zi - positions[j, 2] - sz
                        r2 = dx * dx + dy * dy + dz * dz
                        if r2 >= cut2 or (j == i and s0 == 0 and s1 == 0 and s2 == 0):
                            continue
                        r = math.sqrt(r2)
                        screened = math.erfc(alpha * r) / r
                        phi += charges[j] * screened
                        count += 1
                        if want_forces or want_virial:
                            # g = -(1/r) d/dr [erfc(alpha r)/r]
                            g = (screened + _TWO_OVER_SQRT_PI * alpha * math.exp(-a2 * r2)) / r2
                            qq = qi * charges[j]
                            if want_forces:
                                fx += qq * g * dx
                                fy += qq * g * dy
                                fz += qq * g * dz
                            if want_virial:
                                h = -0.5 * qq * g
                                wxx += h * dx * dx
                                wyy += h * dy * dy
                                wzz += h * dz * dz
                                wyz += h * dy * dz
                                wxz += h * dx * dz
                                wxy += h * dx * dy
        potential[i] = phi
        pair_count[i] = count
        if want_forces:
            forces[i, 0] = fx
            forces[i, 1] = fy
            forces[i, 2] = fz
        if want_virial:
            virial[i, 0] = wxx
            virial[i, 1] = wyy
            virial[i, 2] = wzz
            virial[i, 3] = wyz
            virial[i, 4] = wxz
            virial[i, 5] = wxy
    return potential, forces, virial, pair_count.sum()


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

    Atoms are split into ``n_chunks`` chunks (one per thread); each chunk sums into its own row,
    rows are added at the end. Returns ``(real, imaginary)`` arrays of length M.
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
            for m in range(m_count):
                row[m] += q * (t0[hkl[m, 0] + hmax[0]] * t1[hkl[m, 1] + hmax[1]] * t2[hkl[m, 2] + hmax[2]])
    total = partial.sum(axis=0)
    return total.real.copy(), total.imag.copy()


@njit(parallel=True, cache=True)
def reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_real, s_imag, want_forces):
    """Reciprocal-space potential (N,) in e/Å and forces (N, 3) in e^2/Å^2 from S(k).

    ``weights`` are 2 w(k) for the half-space k-vectors (the factor 2 counts -k).
    ``frac`` may be any points, not only the ions: with unit ``charges`` the "forces" are the
    reciprocal-space field in e/Å^2 (``madelung.defects`` uses it so).
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
        for m in range(m_count):
            p = t0[hkl[m, 0] + hmax[0]] * t1[hkl[m, 1] + hmax[1]] * t2[hkl[m, 2] + hmax[2]]
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
