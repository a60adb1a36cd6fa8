"""Numba kernels of smooth particle-mesh Ewald (SPME): B-spline spreading, influence function
with mesh energy and virial, interpolation of potentials and forces.

Arithmetic only, in Gaussian units (charges in e, lengths in Å, no Coulomb constant).
An ion at fractional position f has scaled coordinates u_a = K_a f_a on a K0 x K1 x K2 mesh;
it puts weight ``M_n(u_0 - g_0) M_n(u_1 - g_1) M_n(u_2 - g_2)`` on mesh point g, with M_n the
cardinal B-spline of order n (support [0, n]). With w = u - floor(u) the n points reached along
an axis are ``floor(u) - j`` (j = 0 .. n-1, wrapped) with weights ``M_n(w + j)``.

The mesh may be the real view of the buffer an in-place real-to-complex transform works in
(rows padded to 2 (K2 // 2 + 1) entries); the kernels touch the first K2 entries of each row only.

Race-free spreading: the ions are grouped into slabs of mesh planes along axis 0, each slab at
least n - 1 planes thick and an even number of slabs. An ion of slab s writes only into slabs
s - 1 and s, so all even slabs can be filled at once by different threads, then all odd slabs.
No per-thread copies of the mesh are made (memory stays O(N + mesh)).

References
----------
U. Essmann, L. Perera, M. L. Berkowitz, T. Darden, H. Lee and L. G. Pedersen,
J. Chem. Phys. 103 (1995) 8577 (the method, the B-spline moduli, energy, forces and virial).
I. J. Schoenberg, Cardinal Spline Interpolation (SIAM, 1973) (B-spline recursion).
"""

import math

import numpy as np
from numba import njit, prange

from .geometry_kernels import PRANGE_ONLY


@njit(cache=True, inline="always")
def _spline_row(w, order, values, slopes):
    """values[j] = M_n(w + j) and slopes[j] = M_n'(w + j) for j = 0 .. n-1, 0 <= w < 1."""
    values[0] = w
    values[1] = 1.0 - w
    for j in range(2, order):
        values[j] = 0.0
    for k in range(3, order + 1):
        if k == order:
            # derivative of M_n from M_{n-1}: M_n'(x) = M_{n-1}(x) - M_{n-1}(x - 1)
            slopes[0] = values[0]
            for j in range(1, order):
                slopes[j] = values[j] - values[j - 1]
        # M_k(x) = [x M_{k-1}(x) + (k - x) M_{k-1}(x - 1)] / (k - 1), downwards so values[j-1] is old
        inv = 1.0 / (k - 1)
        for j in range(k - 1, 0, -1):
            x = w + j
            values[j] = (x * values[j] + (k - x) * values[j - 1]) * inv
        values[0] = w * values[0] * inv
    if order == 2:
        slopes[0] = 1.0
        slopes[1] = -1.0


@njit(cache=True)
def spline_at_integers(order):
    """M_n(j) for j = 0 .. n-1 (used by the B-spline moduli)."""
    values = np.zeros(order)
    slopes = np.zeros(order)
    _spline_row(0.0, order, values, slopes)
    return values


@njit(cache=True, inline="always")
def _base_and_fraction(f, k):
    u = f * k
    base = int(math.floor(u))
    w = u - base
    if base >= k:
        base -= k
    if base < 0:
        base += k
    return base, w


@njit(cache=True, inline="always")
def _ion_splines(frac, i, k0, k1, k2, order, v0, v1, v2, d0, d1, d2):
    """Spline weights and slopes of ion i along the three axes; returns its base mesh indices."""
    b0, w0 = _base_and_fraction(frac[i, 0], k0)
    b1, w1 = _base_and_fraction(frac[i, 1], k1)
    b2, w2 = _base_and_fraction(frac[i, 2], k2)
    _spline_row(w0, order, v0, d0)
    _spline_row(w1, order, v1, d1)
    _spline_row(w2, order, v2, d2)
    return b0, b1, b2


@njit(cache=True, inline="always")
def _reversed(values, order, out):
    """out[t] = values[order - 1 - t]: the weights of the points floor(u) - (order - 1) + t."""
    for t in range(order):
        out[t] = values[order - 1 - t]


@njit(parallel=PRANGE_ONLY, cache=True, fastmath={"contract"})
def spread_into(mesh, frac, charges, order_of_atoms, slab_start, n_slabs, shape, order):
    """Add Q(g) = sum_i q_i prod_a M_n(u_ia - g_a) (periodic) to ``mesh``, shape (K0, K1, L >= K2).

    ``order_of_atoms`` lists the ions slab by slab, ``slab_start`` (n_slabs + 1) where each slab's
    ions begin in it; ``n_slabs`` is 1 (serial) or even with slabs >= order - 1 planes thick.
    Only the first K2 entries of each row are touched, so ``mesh`` may be the real view of the
    half-spectrum buffer of an in-place real-to-complex transform (rows of L = 2 (K2 // 2 + 1)).
    The n points an ion reaches along the last axis are contiguous unless they wrap round the
    cell edge, so its innermost loop is a plain run of n memory cells.
    """
    k0, k1, k2 = shape[0], shape[1], shape[2]
    row = mesh.shape[2]
    flat = mesh.reshape(mesh.size)
    if n_slabs == 1:
        phases = 1
        per_phase = 1
    else:
        phases = 2
        per_phase = n_slabs // 2
    for phase in range(phases):
        for t in prange(per_phase):
            s = 2 * t + phase if phases == 2 else 0
            v0 = np.empty(order)
            v1 = np.empty(order)
            v2 = np.empty(order)
            d = np.empty(order)
            r2 = np.empty(order)
            weights = np.empty(order * order)
            rows = np.empty(order * order, dtype=np.int64)
            for idx in range(slab_start[s], slab_start[s + 1]):
                i = order_of_atoms[idx]
                b0, b1, b2 = _ion_splines(frac, i, k0, k1, k2, order, v0, v1, v2, d, d, d)
                _reversed(v2, order, r2)
                first = b2 - (order - 1)
                q = charges[i]
                # the order^2 rows along the last axis the ion reaches: where each starts, its weight
                for j0 in range(order):
                    g0 = b0 - j0
                    if g0 < 0:
                        g0 += k0
                    a0 = q * v0[j0]
                    for j1 in range(order):
                        g1 = b1 - j1
                        if g1 < 0:
                            g1 += k1
                        weights[j0 * order + j1] = a0 * v1[j1]
                        rows[j0 * order + j1] = (g0 * k1 + g1) * row
                if first >= 0:
                    for p in range(order * order):
                        start = rows[p] + first
                        a = weights[p]
                        for t2 in range(order):
                            flat[start + t2] += a * r2[t2]
                else:
                    for p in range(order * order):
                        a = weights[p]
                        for t2 in range(order):
                            g2 = first + t2
                            if g2 < 0:
                                g2 += k2
                            flat[rows[p] + g2] += a * r2[t2]


@njit(cache=True)
def spread_charges(frac, charges, order_of_atoms, slab_start, n_slabs, shape, order):
    """Charge mesh Q(g) = sum_i q_i prod_a M_n(u_ia - g_a) (periodic), shape (K0, K1, K2)
    (see :func:`spread_into`)."""
    mesh = np.zeros((shape[0], shape[1], shape[2]))
    spread_into(mesh, frac, charges, order_of_atoms, slab_start, n_slabs, shape, order)
    return mesh


@njit(parallel=PRANGE_ONLY, cache=True)
def apply_influence(spectrum, recip, shape, moduli0, moduli1, moduli2, alpha, volume, want_virial):
    """Mesh energy and virial from the charge spectrum, and the spectrum times C(m) in place.

    ``spectrum`` is F[Q] on the real-to-complex half mesh, shape (K0, K1, K2 // 2 + 1);
    on return it holds C(m) F[Q](m) with the influence function (Essmann et al. eq. (4.7))

        C(m) = B(m) exp(-pi^2 |m*|^2 / alpha^2) / (pi V |m*|^2),  B(m) = prod_a |b_a(m_a)|^2,  C(0) = 0,

    ``recip`` rows the reciprocal vectors without 2 pi (a_i . recip_j = delta_ij), ``moduli_a``
    the |b_a(m_a)|^2 and m* = sum_a m_a recip_a for the signed frequencies m_a. C is computed on
    the fly, so no mesh-sized array besides the spectrum is needed.

    Returns ``(energy, virial)``: E = 1/2 sum_m C(m) |F[Q](m)|^2 (planes 0 < m2 < K2/2 stand for
    m and -m) and dE/d(strain) as xx yy zz yz xz xy,
    sum_m E(m) [-delta_ab + 2 (1 + pi^2 m*^2 / alpha^2) m*_a m*_b / m*^2] (Essmann et al.
    eq. (2.8) with the B-spline moduli fixed).
    """
    k0, k1, k2 = shape[0], shape[1], shape[2]
    h2 = k2 // 2 + 1
    rows = np.zeros((k0, 7))
    factor = math.pi * math.pi / (alpha * alpha)
    for i0 in prange(k0):
        m0 = i0 if i0 <= k0 // 2 else i0 - k0
        e = 0.0
        vxx = 0.0
        vyy = 0.0
        vzz = 0.0
        vyz = 0.0
        vxz = 0.0
        vxy = 0.0
        for i1 in range(k1):
            m1 = i1 if i1 <= k1 // 2 else i1 - k1
            b01 = moduli0[i0] * moduli1[i1]
            for i2 in range(h2):
                if i0 == 0 and i1 == 0 and i2 == 0:
                    spectrum[0, 0, 0] = 0.0
                    continue
                x = m0 * recip[0, 0] + m1 * recip[1, 0] + i2 * recip[2, 0]
                y = m0 * recip[0, 1] + m1 * recip[1, 1] + i2 * recip[2, 1]
                z = m0 * recip[0, 2] + m1 * recip[1, 2] + i2 * recip[2, 2]
                m2 = x * x + y * y + z * z
                c = b01 * moduli2[i2] * math.exp(-factor * m2) / (math.pi * volume * m2)
                f = spectrum[i0, i1, i2]
                weight = 1.0 if (i2 == 0 or (k2 % 2 == 0 and i2 == k2 // 2)) else 2.0
                em = 0.5 * weight * c * (f.real * f.real + f.imag * f.imag)
                spectrum[i0, i1, i2] = f * c
                e += em
                if want_virial:
                    g = em * 2.0 * (1.0 + factor * m2) / m2
                    vxx += g * x * x
                    vyy += g * y * y
                    vzz += g * z * z
                    vyz += g * y * z
                    vxz += g * x * z
                    vxy += g * x * y
        rows[i0, 0] = e
        rows[i0, 1] = vxx - e
        rows[i0, 2] = vyy - e
        rows[i0, 3] = vzz - e
        rows[i0, 4] = vyz
        rows[i0, 5] = vxz
        rows[i0, 6] = vxy
    total = rows.sum(axis=0)
    return total[0], total[1:].copy()


@njit(parallel=PRANGE_ONLY, cache=True, fastmath={"contract"})
def interpolate(frac, charges, psi, shape, order, recip, want_forces, atoms):
    """Potential at each ion, sum_g W_i(g) psi(g) (N,), and forces -q_i grad_i of it (N, 3).

    ``psi`` is dE/dQ on the mesh, shape (K0, K1, L >= K2) (only the first K2 entries of each row
    are read); the gradient of the weights is taken through the chain rule du_a/dr = K_a recip_a.
    The ions are visited in the order ``atoms`` (a permutation: neighbours in space one after the
    other read the same mesh rows); each is handled by one thread and written once.
    """
    n = frac.shape[0]
    k0, k1, k2 = shape[0], shape[1], shape[2]
    row = psi.shape[2]
    flat = psi.reshape(psi.size)
    potential = np.zeros(n)
    forces = np.zeros((n, 3) if want_forces else (1, 3))
    for idx in prange(n):
        i = atoms[idx]
        v0 = np.empty(order)
        v1 = np.empty(order)
        v2 = np.empty(order)
        d0 = np.empty(order)
        d1 = np.empty(order)
        d2 = np.empty(order)
        r2 = np.empty(order)
        e2 = np.empty(order)
        rows = np.empty(order * order, dtype=np.int64)
        b0, b1, b2 = _ion_splines(frac, i, k0, k1, k2, order, v0, v1, v2, d0, d1, d2)
        _reversed(v2, order, r2)
        _reversed(d2, order, e2)
        first = b2 - (order - 1)
        # where each of the order^2 rows along the last axis the ion reads starts
        for j0 in range(order):
            g0 = b0 - j0
            if g0 < 0:
                g0 += k0
            for j1 in range(order):
                g1 = b1 - j1
                if g1 < 0:
                    g1 += k1
                rows[j0 * order + j1] = (g0 * k1 + g1) * row
        phi = 0.0
        du0 = 0.0
        du1 = 0.0
        du2 = 0.0
        for j0 in range(order):
            for j1 in range(order):
                start = rows[j0 * order + j1]
                s = 0.0
                s2 = 0.0
                if first >= 0:
                    start += first
                    if want_forces:
                        for t2 in range(order):
                            p = flat[start + t2]
                            s += r2[t2] * p
                            s2 += e2[t2] * p
                    else:
                        for t2 in range(order):
                            s += r2[t2] * flat[start + t2]
                else:
                    for t2 in range(order):
                        g2 = first + t2
                        if g2 < 0:
                            g2 += k2
                        p = flat[start + g2]
                        s += r2[t2] * p
                        s2 += e2[t2] * p
                w01 = v0[j0] * v1[j1]
                phi += w01 * s
                if want_forces:
                    du0 += d0[j0] * v1[j1] * s
                    du1 += v0[j0] * d1[j1] * s
                    du2 += w01 * s2
        potential[i] = phi
        if want_forces:
            q = charges[i]
            g0 = du0 * k0
            g1 = du1 * k1
            g2 = du2 * k2
            for c in range(3):
                forces[i, c] = -q * (g0 * recip[0, c] + g1 * recip[1, c] + g2 * recip[2, c])
    if not want_forces:
        forces = np.zeros((n, 3))
    return potential, forces


@njit(cache=True)
def mesh_site_terms(frac, charges, psi, shape, order, recip, want_forces):
    """Potentials and forces of every ion in index order (see :func:`interpolate`)."""
    return interpolate(frac, charges, psi, shape, order, recip, want_forces, np.arange(frac.shape[0]))
