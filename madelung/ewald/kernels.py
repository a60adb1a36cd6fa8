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
from .erfc_coefficients import ERFCX_TABLE
from .erfc_table import DEGREE, N_INTERVALS, X_MAX

_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)
_PIECE = X_MAX / N_INTERVALS


@njit(cache=True, inline="always")
def erfc_and_gaussian(x):
    """(erfc(x), exp(-x^2)) for x >= 0 from one exponential and the erfcx table (see erfc_table.py)."""
    gaussian = math.exp(-x * x)
    if x >= X_MAX:
        return math.erfc(x), gaussian
    k = int(x * (1.0 / _PIECE))
    u = (x - (k + 0.5) * _PIECE) * (2.0 / _PIECE)
    value = ERFCX_TABLE[k, DEGREE]
    for d in range(DEGREE - 1, -1, -1):
        value = value * u + ERFCX_TABLE[k, d]
    return value * gaussian, gaussian


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
def real_space_terms(positions, charges, cell, counts, offsets, bin_of, bin_start,
                     alpha, r_cut, want_forces, want_virial):
    """Real-space potentials, forces and per-atom virial of the screened Coulomb sum.

    Atoms must be sorted by bin and ``offsets`` is the bin stencil (see ``geometry.build_bins``).
    Distances to a bin's atoms are computed first in a unit-stride loop over coordinate columns
    (which the compiler vectorises), then the pairs inside the cutoff are evaluated. Each pair is once and
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
    chunk = (n + n_chunks - 1) // n_chunks
    xs = positions[:, 0].copy()
    ys = positions[:, 1].copy()
    zs = positions[:, 2].copy()
    largest_bin = 0
    for b in range(len(bin_start) - 1):
        largest_bin = max(largest_bin, bin_start[b + 1] - bin_start[b])
    for c in prange(n_chunks):
        phi = potential_part[c]
        force = force_part[c]
        virial = virial_part[c]
        r2_of = np.empty(largest_bin)
        count = 0
        for i in range(c * chunk, min(n, (c + 1) * chunk)):
            xi = xs[i]
            yi = ys[i]
            zi = zs[i]
            qi = charges[i]
            for o in range(offsets.shape[0]):
                b, s0, s1, s2 = neighbour_bin(bin_of[i, 0], bin_of[i, 1], bin_of[i, 2],
                                              offsets[o, 0], offsets[o, 1], offsets[o, 2], counts)
                sx, sy, sz = image_shift(cell, s0, s1, s2)
                first = bin_start[b]
                size = bin_start[b + 1] - first
                ox = xi - sx
                oy = yi - sy
                oz = zi - sz
                for t in range(size):
                    dx = ox - xs[first + t]
                    dy = oy - ys[first + t]
                    dz = oz - zs[first + t]
                    r2_of[t] = dx * dx + dy * dy + dz * dz
                for t in range(size):
                    r2 = r2_of[t]
                    j = first + t
                    if r2 >= cut2 or not _take_pair(i, j, s0, s1, s2):
                        continue
                    dx = ox - xs[j]
                    dy = oy - ys[j]
                    dz = oz - zs[j]
                    inv_r = 1.0 / math.sqrt(r2)
                    erfc_ar, gaussian = erfc_and_gaussian(alpha * r2 * inv_r)
                    screened = erfc_ar * inv_r
                    phi[i] += charges[j] * screened
                    phi[j] += qi * screened
                    count += 2
                    if want_forces or want_virial:
                        # g = -(1/r) d/dr [erfc(alpha r)/r]
                        g = (screened + _TWO_OVER_SQRT_PI * alpha * gaussian) * inv_r * inv_r
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


@njit(cache=True)
def miller_rows(hkl):
    """Runs of consecutive Miller triples sharing h and k with l rising by one.

    Returns ``(start, l_first)``: run r covers triples ``start[r]`` to ``start[r + 1] - 1`` with
    l = ``l_first[r]``, ``l_first[r] + 1``, ... Reciprocal loops walk a run with unit stride, which
    the compiler turns into vector instructions.
    """
    m_count = hkl.shape[0]
    start = np.empty(m_count + 1, dtype=np.int64)
    l_first = np.empty(m_count, dtype=np.int64)
    runs = 0
    for m in range(m_count):
        if m == 0 or hkl[m, 0] != hkl[m - 1, 0] or hkl[m, 1] != hkl[m - 1, 1] or hkl[m, 2] != hkl[m - 1, 2] + 1:
            start[runs] = m
            l_first[runs] = hkl[m, 2]
            runs += 1
    start[runs] = m_count
    return start[:runs + 1].copy(), l_first[:runs].copy()


@njit(parallel=True, cache=True, fastmath={"reassoc", "contract"})
def structure_factors(frac, charges, hkl, hmax, n_chunks):
    """S(k) = sum_j q_j exp(2 pi i (h f1 + k f2 + l f3)) for each Miller triple in ``hkl`` (M, 3).

    Atoms are split into ``n_chunks`` chunks; each chunk sums into its own row, rows are added
    at the end (pass a fixed number for results independent of the thread count). Along a run of
    consecutive l the product q exp(2 pi i (h f1 + k f2)) is fixed and the loop has unit stride.
    Returns ``(real, imaginary)`` arrays of length M.
    """
    n = frac.shape[0]
    m_count = hkl.shape[0]
    start, l_first = miller_rows(hkl)
    n_runs = len(l_first)
    n_chunks = max(1, min(n_chunks, n))
    part_re = np.zeros((n_chunks, m_count))
    part_im = np.zeros((n_chunks, m_count))
    chunk = (n + n_chunks - 1) // n_chunks
    for c in prange(n_chunks):
        t0 = np.empty(2 * hmax[0] + 1, dtype=np.complex128)
        t1 = np.empty(2 * hmax[1] + 1, dtype=np.complex128)
        t2 = np.empty(2 * hmax[2] + 1, dtype=np.complex128)
        t2_re = np.empty(2 * hmax[2] + 1)
        t2_im = np.empty(2 * hmax[2] + 1)
        out_re = part_re[c]
        out_im = part_im[c]
        for j in range(c * chunk, min(n, (c + 1) * chunk)):
            _phase_tables(frac[j, 0], frac[j, 1], frac[j, 2], hmax, t0, t1, t2)
            for l in range(2 * hmax[2] + 1):
                t2_re[l] = t2[l].real
                t2_im[l] = t2[l].imag
            q = charges[j]
            for r in range(n_runs):
                m0 = start[r]
                length = start[r + 1] - m0
                qhk = q * t0[hkl[m0, 0] + hmax[0]] * t1[hkl[m0, 1] + hmax[1]]
                a = qhk.real
                b = qhk.imag
                l0 = l_first[r] + hmax[2]
                for x in range(length):
                    out_re[m0 + x] += a * t2_re[l0 + x] - b * t2_im[l0 + x]
                    out_im[m0 + x] += a * t2_im[l0 + x] + b * t2_re[l0 + x]
    total_re = np.zeros(m_count)
    total_im = np.zeros(m_count)
    for c in range(n_chunks):
        total_re += part_re[c]
        total_im += part_im[c]
    return total_re, total_im


@njit(parallel=True, cache=True, fastmath={"reassoc", "contract"})
def reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_real, s_imag, want_forces):
    """Reciprocal-space potential (N,) in e/Å and forces (N, 3) in e^2/Å^2 from S(k).

    ``weights`` are 2 w(k) for the half-space k-vectors (the factor 2 counts -k).
    With p = exp(i k.r_i): potential sum_k weight Re[S conj(p)], force q_i sum_k weight k Im[conj(S) p].
    ``frac`` may be any points, not only the ions: with unit ``charges`` the "forces" are the
    reciprocal-space field in e/Å^2 (``madelung.defects`` uses it so).
    """
    n = frac.shape[0]
    start, l_first = miller_rows(hkl)
    n_runs = len(l_first)
    # per k-vector products with the weights, shared by every atom
    ws_re = weights * s_real
    ws_im = weights * s_imag
    potential = np.zeros(n)
    forces = np.zeros((n, 3))
    for i in prange(n):
        t0 = np.empty(2 * hmax[0] + 1, dtype=np.complex128)
        t1 = np.empty(2 * hmax[1] + 1, dtype=np.complex128)
        t2 = np.empty(2 * hmax[2] + 1, dtype=np.complex128)
        t2_re = np.empty(2 * hmax[2] + 1)
        t2_im = np.empty(2 * hmax[2] + 1)
        _phase_tables(frac[i, 0], frac[i, 1], frac[i, 2], hmax, t0, t1, t2)
        for l in range(2 * hmax[2] + 1):
            t2_re[l] = t2[l].real
            t2_im[l] = t2[l].imag
        phi = 0.0
        fx = 0.0
        fy = 0.0
        fz = 0.0
        for r in range(n_runs):
            m0 = start[r]
            length = start[r + 1] - m0
            phk = t0[hkl[m0, 0] + hmax[0]] * t1[hkl[m0, 1] + hmax[1]]
            a = phk.real
            b = phk.imag
            l0 = l_first[r] + hmax[2]
            for x in range(length):
                m = m0 + x
                p_re = a * t2_re[l0 + x] - b * t2_im[l0 + x]
                p_im = a * t2_im[l0 + x] + b * t2_re[l0 + x]
                phi += ws_re[m] * p_re + ws_im[m] * p_im
                if want_forces:
                    im = ws_re[m] * p_im - ws_im[m] * p_re
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
