"""Numba kernels of the Ewald sum: real-space and reciprocal-space terms and their derivatives.

Arithmetic only, in Gaussian units (charges in e, lengths in Å, no Coulomb constant):
the driver multiplies by ``COULOMB_CONSTANT`` and adds the self and background terms.

Real space (Ewald, Ann. Phys. 369 (1921) 253), for each atom i over partners j and images n::

    phi_i = sum_j,n' q_j erfc(alpha r) / r,    r = |r_i - r_j - n| < r_cut

Reciprocal space, over half of k-space (k and -k give equal terms)::

    S(k)  = sum_j q_j exp(i k.r_j)
    phi_i = sum_k 2 w(k) Re[S(k) exp(-i k.r_i)],   w(k) = (4 pi / V) exp(-k^2 / 4 alpha^2) / k^2

Phases exp(i k.r) come from tables along each reciprocal axis for a block of atoms, built by
recurrence (exp(2 pi i h f) = exp(2 pi i f)^h), so a k-vector costs one complex product per atom
along a run of consecutive l; the loops run over the block's atoms (vector instructions).
Real space walks half of the bin stencil with the shared neighbour walk (``walker.py``: rows
of bins contiguous in memory, partners inside the cutoff compacted without branches) and
evaluates erfc with a branch-free polynomial (``erfc.py``). Every result is accumulated in a
fixed order whatever the number of threads.
"""

import math

import numpy as np
from numba import njit, prange

from .erfc import erfc_and_gaussian
from .geometry_kernels import PRANGE_ONLY
from .variants import parallel_kernel
from .walker import CHUNKS  # noqa: F401  (callers of structure_factors pass kernels.CHUNKS)
from .walker import atom_partners, chunk_bounds, chunk_parts, chunk_totals, walk_context, walk_workspace

_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)

@parallel_kernel(parallel=PRANGE_ONLY, cache=True, fastmath={"contract"}, error_model="numpy")
def real_space_terms(positions, charges, cell, counts, offsets, bin_of, bin_start,
                     alpha, r_cut, want_forces, want_virial):
    """Real-space potentials, forces and per-atom virial of the screened Coulomb sum.

    Atoms must be sorted by bin and ``offsets`` is the bin stencil (see ``geometry.build_bins``).
    Each pair (i, j, image) is found once, on the half stencil, by ``walker.gather_partners``; the
    pair function over the compacted partners is one branch-free loop (vector instructions,
    ``erfc.erfc_and_gaussian``); a second loop adds each pair to atom j. Atoms are split into
    ``CHUNKS`` chunks, each accumulating into its own rows, which are summed at the end in a fixed
    order (no two threads write one place, and the result does not depend on the number of threads).

    Returns ``(potential, forces, virial, pairs)``: potential (N,) in e/Å; forces (N, 3) in
    e^2/Å^2 (zeros unless asked); virial (N, 6) as xx, yy, zz, yz, xz, xy of dE/d(strain) in e^2/Å,
    each pair's whole share in the row of one of its atoms (zeros unless asked; the sum over
    atoms is the virial); pairs, the number of (i, j, image) terms inside the cutoff counting
    both orders, as in the double sum.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    n = positions.shape[0]
    walk = walk_context(positions, offsets, True, cell, counts, bin_start)
    potential_part, force_part, virial_part, pair_part = chunk_parts(n, want_forces, want_virial)
    derivatives = want_forces or want_virial
    for c in prange(len(pair_part)):
        phi = potential_part[c]
        force = force_part[c]
        virial = virial_part[c]
        work = walk_workspace(walk)
        _, _, _, partner, qs, dxs, dys, dzs, r2s = work
        screened = np.empty(len(r2s))
        slope = np.empty(len(r2s))
        count = 0
        start, stop = chunk_bounds(c, n, len(pair_part))
        for i in range(start, stop):
            m = atom_partners(i, bin_of, walk, charges, r_cut * r_cut, work)
            count += 2 * m
            qi = charges[i]
            # the pair function, one vectorised loop: erfc(a r)/r and g = -(1/r) d/dr [erfc(a r)/r]
            if derivatives:
                for t in range(m):
                    inv_r = 1.0 / math.sqrt(r2s[t])
                    erfc_ar, gaussian = erfc_and_gaussian(alpha * r2s[t] * inv_r)
                    value = erfc_ar * inv_r
                    screened[t] = value
                    slope[t] = (value + _TWO_OVER_SQRT_PI * alpha * gaussian) * inv_r * inv_r * qs[t]
            else:
                for t in range(m):
                    inv_r = 1.0 / math.sqrt(r2s[t])
                    erfc_ar, _ = erfc_and_gaussian(alpha * r2s[t] * inv_r)
                    screened[t] = erfc_ar * inv_r
            phi_i = 0.0
            for t in range(m):
                phi_i += qs[t] * screened[t]
                phi[partner[t]] += qi * screened[t]
            phi[i] += phi_i
            if want_forces:
                fx = 0.0
                fy = 0.0
                fz = 0.0
                for t in range(m):
                    gx = slope[t] * dxs[t]
                    gy = slope[t] * dys[t]
                    gz = slope[t] * dzs[t]
                    fx += gx
                    fy += gy
                    fz += gz
                    j = partner[t]
                    force[j, 0] -= qi * gx
                    force[j, 1] -= qi * gy
                    force[j, 2] -= qi * gz
                force[i, 0] += qi * fx
                force[i, 1] += qi * fy
                force[i, 2] += qi * fz
            if want_virial:
                wxx = 0.0
                wyy = 0.0
                wzz = 0.0
                wyz = 0.0
                wxz = 0.0
                wxy = 0.0
                for t in range(m):
                    wxx += slope[t] * dxs[t] * dxs[t]
                    wyy += slope[t] * dys[t] * dys[t]
                    wzz += slope[t] * dzs[t] * dzs[t]
                    wyz += slope[t] * dys[t] * dzs[t]
                    wxz += slope[t] * dxs[t] * dzs[t]
                    wxy += slope[t] * dxs[t] * dys[t]
                virial[i, 0] -= qi * wxx
                virial[i, 1] -= qi * wyy
                virial[i, 2] -= qi * wzz
                virial[i, 3] -= qi * wyz
                virial[i, 4] -= qi * wxz
                virial[i, 5] -= qi * wxy
        pair_part[c] = count
    return chunk_totals(potential_part, force_part, virial_part, pair_part, want_forces, want_virial)


#: Atoms per block of the reciprocal kernels: their phase tables stay in the fast caches and
#: the loops over a block's atoms are long enough for vector instructions.
BLOCK = 64


@njit(cache=True, inline="always")
def _phase_rows(f, first, count, m, cos_rows, sin_rows):
    """cos_rows[m + h, a] + i sin_rows[m + h, a] = exp(2 pi i h f[first + a]) for |h| <= m, by
    recurrence in h, each step one complex product for every atom of the block at once."""
    for a in range(count):
        cos_rows[m, a] = 1.0
        sin_rows[m, a] = 0.0
    if m == 0:
        return
    for a in range(count):
        angle = 2.0 * math.pi * f[first + a]
        cos_rows[m + 1, a] = math.cos(angle)
        sin_rows[m + 1, a] = math.sin(angle)
    for h in range(2, m + 1):
        for a in range(count):
            c = cos_rows[m + h - 1, a]
            s = sin_rows[m + h - 1, a]
            cos_rows[m + h, a] = c * cos_rows[m + 1, a] - s * sin_rows[m + 1, a]
            sin_rows[m + h, a] = s * cos_rows[m + 1, a] + c * sin_rows[m + 1, a]
    for h in range(1, m + 1):
        for a in range(count):
            cos_rows[m - h, a] = cos_rows[m + h, a]
            sin_rows[m - h, a] = -sin_rows[m + h, a]


@njit(cache=True, inline="always")
def _block_tables(hmax):
    """Work space of one block: cos and sin tables along the three axes, and a run's factor."""
    return (np.empty((2 * hmax[0] + 1, BLOCK)), np.empty((2 * hmax[0] + 1, BLOCK)),
            np.empty((2 * hmax[1] + 1, BLOCK)), np.empty((2 * hmax[1] + 1, BLOCK)),
            np.empty((2 * hmax[2] + 1, BLOCK)), np.empty((2 * hmax[2] + 1, BLOCK)),
            np.empty(BLOCK), np.empty(BLOCK))


@njit(cache=True, inline="always")
def _block_phases(frac, first, count, hmax, cos0, sin0, cos1, sin1, cos2, sin2):
    """Phase tables of atoms ``first`` .. ``first + count - 1`` along the three axes."""
    _phase_rows(frac[:, 0], first, count, hmax[0], cos0, sin0)
    _phase_rows(frac[:, 1], first, count, hmax[1], cos1, sin1)
    _phase_rows(frac[:, 2], first, count, hmax[2], cos2, sin2)


@njit(cache=True, inline="always")
def _run_factor(cos0, sin0, cos1, sin1, ia, ib, count, pre_re, pre_im):
    """exp(2 pi i (h f1 + k f2)) of each atom of the block, for the run with table rows ia, ib."""
    for a in range(count):
        pre_re[a] = cos0[ia, a] * cos1[ib, a] - sin0[ia, a] * sin1[ib, a]
        pre_im[a] = cos0[ia, a] * sin1[ib, a] + sin0[ia, a] * cos1[ib, a]


@njit(cache=True)
def k_vector_table(box, recip, k_cut, alpha, volume):
    """The k-vectors of a Miller-index box within ``k_cut`` and their Ewald weights, in one pass.

    ``box`` (M, 3) Miller indices (one of each pair h, -h), ``recip`` (3, 3) reciprocal vectors as
    rows (2 pi inv(cell).T), 1/Å. Returns ``(hkl, k (1/Å), k^2 (1/Å^2), weights)`` of the indices
    with 0 < |k| <= k_cut, in box order; weight ``2 (4 pi / V) exp(-k^2 / 4 alpha^2) / k^2`` (the
    factor 2 counts -k).

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    m = box.shape[0]
    kept = np.empty(m, dtype=np.int64)
    count = 0
    cut2 = k_cut * k_cut
    for i in range(m):
        h0 = float(box[i, 0])
        h1 = float(box[i, 1])
        h2 = float(box[i, 2])
        kx = h0 * recip[0, 0] + h1 * recip[1, 0] + h2 * recip[2, 0]
        ky = h0 * recip[0, 1] + h1 * recip[1, 1] + h2 * recip[2, 1]
        kz = h0 * recip[0, 2] + h1 * recip[1, 2] + h2 * recip[2, 2]
        if kx * kx + ky * ky + kz * kz <= cut2:
            kept[count] = i
            count += 1
    hkl = np.empty((count, 3), dtype=np.int64)
    kvectors = np.empty((count, 3))
    k2 = np.empty(count)
    weights = np.empty(count)
    prefactor = 2.0 * 4.0 * math.pi / volume
    for t in range(count):
        i = kept[t]
        for a in range(3):
            hkl[t, a] = box[i, a]
        h0 = float(box[i, 0])
        h1 = float(box[i, 1])
        h2 = float(box[i, 2])
        for a in range(3):
            kvectors[t, a] = h0 * recip[0, a] + h1 * recip[1, a] + h2 * recip[2, a]
        q = kvectors[t, 0] ** 2 + kvectors[t, 1] ** 2 + kvectors[t, 2] ** 2
        k2[t] = q
        weights[t] = prefactor * math.exp(-q / (4.0 * alpha * alpha)) / q
    return hkl, kvectors, k2, weights


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


@parallel_kernel(parallel=PRANGE_ONLY, cache=True, fastmath={"reassoc", "contract"}, error_model="numpy")
def structure_factors(frac, charges, hkl, hmax, n_chunks):
    """S(k) = sum_j q_j exp(2 pi i (h f1 + k f2 + l f3)) for each Miller triple in ``hkl`` (M, 3).

    Atoms are split into at most ``n_chunks`` chunks of at least ``BLOCK`` atoms (fewer for small
    cells); each chunk sums into its own row, rows are added at the end (pass a fixed number for
    results independent of the thread count). A chunk's
    atoms go in blocks of ``BLOCK``: for each run of consecutive l (``miller_rows``) the factor
    q exp(2 pi i (h f1 + k f2)) of every atom of the block is formed once, and each k-vector of
    the run is one loop over the block's atoms (vector instructions).
    Returns ``(real, imaginary)`` arrays of length M.
    """
    n = frac.shape[0]
    m_count = hkl.shape[0]
    start, l_first = miller_rows(hkl)
    n_runs = len(l_first)
    n_chunks = max(1, min(n_chunks, (n + BLOCK - 1) // BLOCK))   # whole blocks: no chunk of a few atoms
    part_re = np.zeros((n_chunks, m_count))
    part_im = np.zeros((n_chunks, m_count))
    chunk = (n + n_chunks - 1) // n_chunks
    h0 = hmax[0]
    h1 = hmax[1]
    h2 = hmax[2]
    for c in prange(n_chunks):
        cos0, sin0, cos1, sin1, cos2, sin2, pre_re, pre_im = _block_tables(hmax)
        out_re = part_re[c]
        out_im = part_im[c]
        stop = min(n, (c + 1) * chunk)
        for first in range(c * chunk, stop, BLOCK):
            count = min(BLOCK, stop - first)
            _block_phases(frac, first, count, hmax, cos0, sin0, cos1, sin1, cos2, sin2)
            for r in range(n_runs):
                m0 = start[r]
                length = start[r + 1] - m0
                _run_factor(cos0, sin0, cos1, sin1, hkl[m0, 0] + h0, hkl[m0, 1] + h1, count, pre_re, pre_im)
                for a in range(count):
                    pre_re[a] *= charges[first + a]
                    pre_im[a] *= charges[first + a]
                l0 = l_first[r] + h2
                for x in range(length):
                    sr = 0.0
                    si = 0.0
                    for a in range(count):
                        sr += pre_re[a] * cos2[l0 + x, a] - pre_im[a] * sin2[l0 + x, a]
                        si += pre_re[a] * sin2[l0 + x, a] + pre_im[a] * cos2[l0 + x, a]
                    out_re[m0 + x] += sr
                    out_im[m0 + x] += si
    total_re = np.zeros(m_count)
    total_im = np.zeros(m_count)
    for c in range(n_chunks):
        total_re += part_re[c]
        total_im += part_im[c]
    return total_re, total_im


@parallel_kernel(parallel=PRANGE_ONLY, cache=True, fastmath={"reassoc", "contract"}, error_model="numpy")
def reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_real, s_imag, want_forces):
    """Reciprocal-space potential (N,) in e/Å and forces (N, 3) in e^2/Å^2 from S(k).

    ``weights`` are 2 w(k) for the half-space k-vectors (the factor 2 counts -k).
    With p = exp(i k.r_i): potential sum_k weight Re[S conj(p)], force q_i sum_k weight k Im[conj(S) p].
    ``frac`` may be any points, not only the ions: with unit ``charges`` the "forces" are the
    reciprocal-space field in e/Å^2 (``madelung.analysis.defects`` uses it so).

    Atoms go in blocks of ``BLOCK`` (one thread each); each k-vector is one loop over the block's
    atoms. Along a run of consecutive l the k-vector is k_0 + x b_3, so the force needs only
    sum_x Im and sum_x x Im per atom, folded into the three components once per run.
    """
    n = frac.shape[0]
    start, l_first = miller_rows(hkl)
    n_runs = len(l_first)
    ws_re = weights * s_real
    ws_im = weights * s_imag
    potential = np.zeros(n)
    forces = np.zeros((n, 3))
    h0 = hmax[0]
    h1 = hmax[1]
    h2 = hmax[2]
    n_blocks = (n + BLOCK - 1) // BLOCK
    for blk in prange(n_blocks):
        first = blk * BLOCK
        count = min(BLOCK, n - first)
        cos0, sin0, cos1, sin1, cos2, sin2, pre_re, pre_im = _block_tables(hmax)
        phi = np.zeros(BLOCK)
        run_sum = np.empty(BLOCK)
        run_moment = np.empty(BLOCK)
        fx = np.zeros(BLOCK)
        fy = np.zeros(BLOCK)
        fz = np.zeros(BLOCK)
        _block_phases(frac, first, count, hmax, cos0, sin0, cos1, sin1, cos2, sin2)
        for r in range(n_runs):
            m0 = start[r]
            length = start[r + 1] - m0
            _run_factor(cos0, sin0, cos1, sin1, hkl[m0, 0] + h0, hkl[m0, 1] + h1, count, pre_re, pre_im)
            l0 = l_first[r] + h2
            for a in range(count):
                run_sum[a] = 0.0
                run_moment[a] = 0.0
            for x in range(length):
                wr = ws_re[m0 + x]
                wi = ws_im[m0 + x]
                for a in range(count):
                    p_re = pre_re[a] * cos2[l0 + x, a] - pre_im[a] * sin2[l0 + x, a]
                    p_im = pre_re[a] * sin2[l0 + x, a] + pre_im[a] * cos2[l0 + x, a]
                    phi[a] += wr * p_re + wi * p_im
                    im = wr * p_im - wi * p_re
                    run_sum[a] += im
                    run_moment[a] += x * im
            if want_forces:
                kx = kvectors[m0, 0]
                ky = kvectors[m0, 1]
                kz = kvectors[m0, 2]
                bx = 0.0
                by = 0.0
                bz = 0.0
                if length > 1:
                    m_last = m0 + length - 1
                    bx = (kvectors[m_last, 0] - kx) / (length - 1)
                    by = (kvectors[m_last, 1] - ky) / (length - 1)
                    bz = (kvectors[m_last, 2] - kz) / (length - 1)
                for a in range(count):
                    fx[a] += kx * run_sum[a] + bx * run_moment[a]
                    fy[a] += ky * run_sum[a] + by * run_moment[a]
                    fz[a] += kz * run_sum[a] + bz * run_moment[a]
        for a in range(count):
            potential[first + a] = phi[a]
            if want_forces:
                q = charges[first + a]
                forces[first + a, 0] = q * fx[a]
                forces[first + a, 1] = q * fy[a]
                forces[first + a, 2] = q * fz[a]
    return potential, forces

