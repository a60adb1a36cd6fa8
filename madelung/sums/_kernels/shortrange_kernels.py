"""Numba kernels of the short-range pair terms (repulsion and dispersion).

Arithmetic only. For every ion i (sorted by bin, see ``geometry.build_bins``) the kernel
walks the partners j and images within the cutoff through ``geometry_kernels.neighbour_bin``,
exactly like the real-space Coulomb kernel, and sums the pair energy

    phi(r) = B r^-n + A exp(-r / rho) - C r^-6

times a switching function S(r) that takes the pair terms smoothly to zero between
``r_on`` and ``r_cut``. Each pair species (s_i, s_j) has its row ``table[s_i, s_j]`` =
(B, n, A, 1/rho, C); a form that is not used has zero prefactors.

Switching (C2-continuous quintic, x = (r - r_on) / (r_cut - r_on))::

    S = 1 - 10 x^3 + 15 x^4 - 6 x^5,   dS/dr = -30 x^2 (1 - x)^2 / (r_cut - r_on)

Each thread owns ion i and writes only row i: half of each pair's energy and virial goes
to each ion, the whole force on i from j goes to i.
"""

import math

import numpy as np
from numba import njit, prange

from .geometry_kernels import neighbour_bin


@njit(cache=True, inline="always")
def _switch(r, r_on, r_cut):
    """S(r) and dS/dr of the quintic switching function."""
    if r <= r_on:
        return 1.0, 0.0
    width = r_cut - r_on
    x = (r - r_on) / width
    s = 1.0 - x * x * x * (10.0 - 15.0 * x + 6.0 * x * x)
    ds = -30.0 * x * x * (1.0 - x) * (1.0 - x) / width
    return s, ds


@njit(cache=True, inline="always")
def _ion_terms(i, positions, species, cell, counts, reach, bin_of, bin_start, table, r_on, r_cut,
               want_forces, want_virial, energy, forces, virial, pair_count):
    """Sum the pair terms of ion i into row i of the output arrays."""
    cut2 = r_cut * r_cut
    xi = positions[i, 0]
    yi = positions[i, 1]
    zi = positions[i, 2]
    si = species[i]
    e = 0.0
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
                    sj = species[j]
                    big_b = table[si, sj, 0]
                    power = table[si, sj, 1]
                    big_a = table[si, sj, 2]
                    inv_rho = table[si, sj, 3]
                    big_c = table[si, sj, 4]
                    if big_b == 0.0 and big_a == 0.0 and big_c == 0.0:
                        continue
                    r = math.sqrt(r2)
                    phi = 0.0
                    dphi = 0.0
                    if big_b != 0.0:
                        t = big_b * r ** (-power)
                        phi += t
                        dphi -= power * t / r
                    if big_a != 0.0:
                        t = big_a * math.exp(-r * inv_rho)
                        phi += t
                        dphi -= inv_rho * t
                    if big_c != 0.0:
                        t = big_c / (r2 * r2 * r2)
                        phi -= t
                        dphi += 6.0 * t / r
                    s, ds = _switch(r, r_on, r_cut)
                    e += 0.5 * phi * s
                    count += 1
                    if want_forces or want_virial:
                        de_over_r = (dphi * s + phi * ds) / r
                        if want_forces:
                            fx -= de_over_r * dx
                            fy -= de_over_r * dy
                            fz -= de_over_r * dz
                        if want_virial:
                            h = 0.5 * de_over_r
                            wxx += h * dx * dx
                            wyy += h * dy * dy
                            wzz += h * dz * dz
                            wyz += h * dy * dz
                            wxz += h * dx * dz
                            wxy += h * dx * dy
    energy[i] = e
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


@njit(parallel=True, cache=True)
def pair_terms(positions, species, cell, counts, reach, bin_of, bin_start, table,
               r_on, r_cut, want_forces, want_virial):
    """Short-range energy per ion (eV), forces (N, 3) (eV/Å) and per-ion virial (N, 6)
    as xx, yy, zz, yz, xz, xy of dE/d(strain) (eV), and the number of (i, j, image) terms.

    ``species`` (N,) int64 indexes ``table`` (S, S, 5) float64 rows (B, n, A, 1/rho, C).
    Forces and virial are zeros unless asked for. One thread per ion.
    """
    n = positions.shape[0]
    energy = np.zeros(n)
    forces = np.zeros((n, 3))
    virial = np.zeros((n, 6))
    pair_count = np.zeros(n, dtype=np.int64)
    for i in prange(n):
        _ion_terms(i, positions, species, cell, counts, reach, bin_of, bin_start, table, r_on, r_cut,
                   want_forces, want_virial, energy, forces, virial, pair_count)
    return energy, forces, virial, pair_count.sum()
