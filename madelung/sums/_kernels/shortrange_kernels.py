"""Numba kernels of the short-range pair terms (repulsion and dispersion).

Arithmetic only. The ions (sorted by bin, see ``geometry.build_bins``) walk the half of the
bin stencil with the neighbour walk the real-space Coulomb kernel uses (``walker.gather_partners``),
so each pair (i, j, image) within the cutoff is found once, and the pair energy

    phi(r) = B r^-n + A exp(-r / rho) - C r^-6

times a switching function S(r) that takes the pair terms smoothly to zero between
``r_on`` and ``r_cut`` is added to both ions. Each pair species (s_i, s_j) has its row
``table[s_i, s_j]`` = (B, n, A, 1/rho, C); a form that is not used has zero prefactors.

Switching (C2-continuous quintic, x = (r - r_on) / (r_cut - r_on))::

    S = 1 - 10 x^3 + 15 x^4 - 6 x^5,   dS/dr = -30 x^2 (1 - x)^2 / (r_cut - r_on)

Half of each pair's energy and virial goes to each ion, the force to both with opposite signs.
Ions are split into ``walker.CHUNKS`` chunks (``walker.chunk_parts``), each accumulating into its
own rows, summed at the end in a fixed order (the result does not depend on the number of threads).

References
----------
M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210; M. Born and J. E. Mayer, Z. Phys. 75
(1932) 1; R. A. Buckingham, Proc. R. Soc. Lond. A 168 (1938) 264 (the pair forms).
"""

import math

import numpy as np
from numba import njit, prange

from .geometry_kernels import PRANGE_ONLY
from .walker import shared_atom_partners, chunk_bounds, chunk_parts, chunk_totals, walk_context, walk_workspace


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


@njit(cache=True)
def _add_virial(virial, row, h, dx, dy, dz):
    """Add h times the outer product of (dx, dy, dz) to ``virial[row]`` as xx, yy, zz, yz, xz, xy."""
    virial[row, 0] += h * dx * dx
    virial[row, 1] += h * dy * dy
    virial[row, 2] += h * dz * dz
    virial[row, 3] += h * dy * dz
    virial[row, 4] += h * dx * dz
    virial[row, 5] += h * dx * dy


@njit(cache=True, inline="always")
def _pair_energy(row, r, r2):
    """phi(r) and dphi/dr of one table row (B, n, A, 1/rho, C)."""
    big_b = row[0]
    power = row[1]
    big_a = row[2]
    inv_rho = row[3]
    big_c = row[4]
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
    return phi, dphi


@njit(parallel=PRANGE_ONLY, cache=True, error_model="numpy")
def pair_terms(positions, species, cell, counts, offsets, bin_of, bin_start, table,
               r_on, r_cut, want_forces, want_virial):
    """Short-range energy per ion (eV), forces (N, 3) (eV/Å) and per-ion virial (N, 6)
    as xx, yy, zz, yz, xz, xy of dE/d(strain) (eV), and the number of (i, j, image) terms
    counting both orders.

    ``species`` (N,) int64 indexes ``table`` (S, S, 5) float64 rows (B, n, A, 1/rho, C);
    ``offsets`` is the bin stencil (``CellBins.offsets``). Forces and virial are zeros unless
    asked for.
    """
    n = positions.shape[0]
    kinds = species.astype(np.float64)
    walk = walk_context(positions, offsets, True, cell, counts, bin_start)
    energy_part, force_part, virial_part, pair_part = chunk_parts(n, want_forces, want_virial)
    for c in prange(len(pair_part)):
        energy = energy_part[c]
        forces = force_part[c]
        virial = virial_part[c]
        work = walk_workspace(walk)
        _, _, _, partner, kind, dxs, dys, dzs, r2s = work
        count = 0
        start, stop = chunk_bounds(c, n, len(pair_part))
        for i in range(start, stop):
            m = shared_atom_partners(i, bin_of, walk, kinds, r_cut * r_cut, work)
            si = species[i]
            for t in range(m):
                row = table[si, int(kind[t])]
                if row[0] == 0.0 and row[2] == 0.0 and row[4] == 0.0:
                    continue
                j = partner[t]
                r = math.sqrt(r2s[t])
                phi, dphi = _pair_energy(row, r, r2s[t])
                s, ds = _switch(r, r_on, r_cut)
                half_energy = 0.5 * phi * s
                energy[i] += half_energy
                energy[j] += half_energy
                count += 2
                if want_forces or want_virial:
                    de_over_r = (dphi * s + phi * ds) / r
                    dx = dxs[t]
                    dy = dys[t]
                    dz = dzs[t]
                    if want_forces:
                        forces[i, 0] -= de_over_r * dx
                        forces[i, 1] -= de_over_r * dy
                        forces[i, 2] -= de_over_r * dz
                        forces[j, 0] += de_over_r * dx
                        forces[j, 1] += de_over_r * dy
                        forces[j, 2] += de_over_r * dz
                    if want_virial:
                        h = 0.5 * de_over_r
                        _add_virial(virial, i, h, dx, dy, dz)
                        _add_virial(virial, j, h, dx, dy, dz)
        pair_part[c] = count
    return chunk_totals(energy_part, force_part, virial_part, pair_part, want_forces, want_virial)
