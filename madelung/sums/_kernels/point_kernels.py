"""Numba kernels for sums at arbitrary points of space (not only at the ions).

The ions are sorted into bins by ``geometry.build_bins``; each point is given its own bin
(from its wrapped fractional coordinates) and walks the whole pruned stencil of neighbour bins
(``CellBins.offsets``) with the neighbour walk the ion-ion sums use (``walker.gather_partners``,
the point being no ion). Points are split into chunks, each thread owning its points.

    real space at a point r:   sum_j,n q_j [erfc(alpha d) - erfc(beta d)] / d,   d = |r - r_j - n|

``beta`` is the width parameter of Gaussian-smeared ions, beta = 1 / (sqrt(2) sigma); a
non-positive ``beta`` means point ions (the erfc(beta d) term is left out). The
reciprocal-space part at points is ``kernels.reciprocal_site_terms`` with unit charges.

Kernels do arithmetic only; the Python side (``madelung.analysis.defects``) validates and chooses.

References
----------
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the real-space sum); M. Born and J. E. Mayer, Z. Phys. 75
(1932) 1 (the exponential contact repulsion).
"""

import math

import numpy as np
from numba import njit, prange

from .erfc import erfc_and_gaussian
from .walker import chunk_bounds, gather_partners, walk_context, walk_workspace

_TWO_OVER_SQRT_PI = 2.0 / math.sqrt(math.pi)

#: Points per chunk of work (one thread's share at a time, one work space).
POINTS_PER_CHUNK = 16


@njit(cache=True)
def _ions_near(p, points, point_bin, walk, values, cut2, work):
    """The ions within the cutoff of point p over the whole stencil (``walker.gather_partners``)."""
    return gather_partners(points[p, 0], points[p, 1], points[p, 2], point_bin[p, 0], point_bin[p, 1],
                           point_bin[p, 2], -1, walk, values, cut2, work)


@njit(parallel=True, cache=True)
def real_space_at_points(points, point_bin, exclude, positions, charges, cell, counts, offsets, bin_start,
                         alpha, beta, r_cut, coincide, want_field):
    """Real-space Ewald potential and field at points, and the nearest ion of each point.

    Parameters
    ----------
    points : (M, 3) wrapped Cartesian positions of the points, Å.
    point_bin : (M, 3) bin of each point.
    exclude : (M,) sorted index of an ion to leave out of the point's sum when it lies within
        ``coincide`` of the point (-1: none).
    positions, charges, cell, counts, offsets, bin_start : the binned ions (``CellBins``; ``offsets``
        is its pruned stencil of bin offsets).
    alpha : splitting parameter, 1/Å. beta : smearing parameter, 1/Å (<= 0: point ions).
    r_cut : real-space cutoff, Å. coincide : distance below which a point sits on an ion, Å.

    Returns
    -------
    potential (M,) in e/Å; field (M, 3) in e/Å^2 (zeros unless asked); nearest (M,) distance to
    the nearest ion within ``r_cut`` (inf if none), Å; nearest_index (M,) its sorted index (-1);
    pairs, the number of (point, ion, image) terms summed.
    """
    m_points = points.shape[0]
    potential = np.zeros(m_points)
    field = np.zeros((m_points, 3))
    nearest = np.full(m_points, np.inf)
    nearest_index = np.full(m_points, -1, dtype=np.int64)
    pair_count = np.zeros(m_points, dtype=np.int64)
    co2 = coincide * coincide
    smeared = beta > 0.0
    walk = walk_context(positions, offsets, False, cell, counts, bin_start)
    n_chunks = (m_points + POINTS_PER_CHUNK - 1) // POINTS_PER_CHUNK
    for c in prange(n_chunks):
        work = walk_workspace(walk)
        _, _, _, partner, qs, dxs, dys, dzs, r2s = work
        start, stop = chunk_bounds(c, m_points, n_chunks)
        for p in range(start, stop):
            m = _ions_near(p, points, point_bin, walk, charges, r_cut * r_cut, work)
            phi = 0.0
            ex = 0.0
            ey = 0.0
            ez = 0.0
            best = np.inf
            best_j = -1
            count = 0
            for t in range(m):
                r2 = r2s[t]
                j = partner[t]
                if r2 < best:
                    best = r2
                    best_j = j
                if j == exclude[p] and r2 < co2:
                    continue
                count += 1
                q = qs[t]
                if r2 < 1e-24:
                    # only reachable for smeared ions (points on point ions are refused)
                    if smeared:
                        phi += q * _TWO_OVER_SQRT_PI * (beta - alpha)
                    continue
                r = math.sqrt(r2)
                erfc_ar, gaussian = erfc_and_gaussian(alpha * r)
                screened = erfc_ar / r
                # g = -(1/r) d/dr of the pair function
                g = (screened + _TWO_OVER_SQRT_PI * alpha * gaussian) / r2
                if smeared:
                    erfc_br, gaussian_b = erfc_and_gaussian(beta * r)
                    wide = erfc_br / r
                    screened -= wide
                    g -= (wide + _TWO_OVER_SQRT_PI * beta * gaussian_b) / r2
                phi += q * screened
                if want_field:
                    ex += q * g * dxs[t]
                    ey += q * g * dys[t]
                    ez += q * g * dzs[t]
            potential[p] = phi
            pair_count[p] = count
            if best_j >= 0:
                nearest[p] = math.sqrt(best)
                nearest_index[p] = best_j
            if want_field:
                field[p, 0] = ex
                field[p, 1] = ey
                field[p, 2] = ez
    return potential, field, nearest, nearest_index, pair_count.sum()


@njit(parallel=True, cache=True)
def contact_repulsion_at_points(points, point_bin, positions, radii, cell, counts, offsets, bin_start,
                                probe_radius, prefactor, softness, r_cut, want_gradient):
    """Born–Mayer contact energy of a probe at each point with the ions, and its gradient.

    E(r) = sum_j,n prefactor * exp((R_j + R_probe - d) / softness) over ions within ``r_cut``,
    d = |r - r_j - n|. Returns energy (M,) in the units of ``prefactor`` and the gradient
    dE/dr (M, 3) per Å (zeros unless asked).
    """
    m_points = points.shape[0]
    energy = np.zeros(m_points)
    gradient = np.zeros((m_points, 3))
    walk = walk_context(positions, offsets, False, cell, counts, bin_start)
    n_chunks = (m_points + POINTS_PER_CHUNK - 1) // POINTS_PER_CHUNK
    for c in prange(n_chunks):
        work = walk_workspace(walk)
        _, _, _, _, radius, dxs, dys, dzs, r2s = work
        start, stop = chunk_bounds(c, m_points, n_chunks)
        for p in range(start, stop):
            m = _ions_near(p, points, point_bin, walk, radii, r_cut * r_cut, work)
            e = 0.0
            gx = 0.0
            gy = 0.0
            gz = 0.0
            for t in range(m):
                if r2s[t] < 1e-24:
                    continue
                r = math.sqrt(r2s[t])
                term = prefactor * math.exp((radius[t] + probe_radius - r) / softness)
                e += term
                if want_gradient:
                    h = -term / (softness * r)
                    gx += h * dxs[t]
                    gy += h * dys[t]
                    gz += h * dzs[t]
            energy[p] = e
            if want_gradient:
                gradient[p, 0] = gx
                gradient[p, 1] = gy
                gradient[p, 2] = gz
    return energy, gradient


@njit(cache=True)
def anisotropic_real_space_sum(cell, inverse_dielectric, alpha, r_cut, nmax):
    """sum over lattice vectors n != 0 with s = sqrt(n . eps^-1 . n) < r_cut of erfc(alpha s) / s.

    ``nmax`` (3,) bounds the integer triples searched. Returns ``(sum in 1/Å, terms)``; the caller
    divides by sqrt(det eps).
    """
    total = 0.0
    count = 0
    cut2 = r_cut * r_cut
    for i in range(-nmax[0], nmax[0] + 1):
        for j in range(-nmax[1], nmax[1] + 1):
            for k in range(-nmax[2], nmax[2] + 1):
                if i == 0 and j == 0 and k == 0:
                    continue
                x = i * cell[0, 0] + j * cell[1, 0] + k * cell[2, 0]
                y = i * cell[0, 1] + j * cell[1, 1] + k * cell[2, 1]
                z = i * cell[0, 2] + j * cell[1, 2] + k * cell[2, 2]
                s2 = (x * (inverse_dielectric[0, 0] * x + inverse_dielectric[0, 1] * y + inverse_dielectric[0, 2] * z)
                      + y * (inverse_dielectric[1, 0] * x + inverse_dielectric[1, 1] * y
                             + inverse_dielectric[1, 2] * z)
                      + z * (inverse_dielectric[2, 0] * x + inverse_dielectric[2, 1] * y
                             + inverse_dielectric[2, 2] * z))
                if s2 >= cut2:
                    continue
                s = math.sqrt(s2)
                total += math.erfc(alpha * s) / s
                count += 1
    return total, count
