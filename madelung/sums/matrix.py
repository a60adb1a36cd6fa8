"""Site potentials for many charge sets at once, and the periodic Coulomb interaction matrix.

The Ewald sum is linear in the charges. For a fixed cell and positions, the splitting parameter,
the bins and the reciprocal vectors are chosen once and every charge set reuses them with the
same kernels as :func:`madelung.sums.direct.ewald_direct`. Column ``j`` of the Coulomb matrix is
the potential (V) at every site from a unit charge on site ``j`` and all its periodic images,
with a uniform neutralizing background; so ``phi = J @ q`` and, for a neutral ``q``,
``E = q @ J @ q / 2`` reproduce the direct sum (the background terms cancel).

:func:`potentials_for_charge_sets` costs one sum per charge set (use it for a few sets, e.g. one
unit charge per symmetry orbit). :func:`coulomb_matrix` builds the whole N x N matrix with a
pair list from the shared neighbour machinery and one matrix product for reciprocal space; its memory grows as
N^2 and N times the number of k-vectors, so we refuse more than :data:`MAX_MATRIX_SITES` sites.
"""

from __future__ import annotations

import math
import time
from contextlib import contextmanager

import numpy as np
from threadpoolctl import ThreadpoolController

from ..errors import InputError
from .geometry import neighbour_pairs, thread_budget
from ..units import COULOMB_CONSTANT
from .direct import assemble, params_of, planned_result, warn_if_charged
from ._kernels import kernels
from .plan import plan_sum
from .tuning import ChargeSums
from ..defaults import SUM_TOL

#: Largest number of sites for which a full N x N Coulomb matrix is built.
MAX_MATRIX_SITES = 600

#: Matrix products and eigenvalue problems below this many multiply-adds run on one BLAS thread.
#: OpenBLAS splits a 40 x 1150 x 40 product over its threads; on a machine shared with other work
#: the sleeping threads wake late and the product takes 10-60 ms instead of 0.2 ms
#: (benchmarks/per_call.py measured it: the Coulomb matrix of a 40-ion cell, median 14 ms on two
#: threads against 1.8 ms on one).
SERIAL_BLAS_BELOW_FLOPS = 5e7

_BLAS = []


@contextmanager
def blas_budget(flops):
    """Run the BLAS/LAPACK calls inside on one thread when they are small (``flops`` multiply-adds).

    The BLAS libraries are found once per process (~0.5 ms); then each library's thread count is
    read and, where it is not one already, set to one and back (about 1 µs a call; entering
    threadpoolctl's ``limit`` costs about 10 µs, twice per described structure).
    """
    if flops >= SERIAL_BLAS_BELOW_FLOPS:
        yield
        return
    if not _BLAS:
        _BLAS.append(tuple(ThreadpoolController().select(user_api="blas").lib_controllers))
    threaded = [(library, count) for library in _BLAS[0] if (count := library.get_num_threads()) != 1]
    for library, _ in threaded:
        library.set_num_threads(1)
    try:
        yield
    finally:
        for library, count in threaded:
            library.set_num_threads(count)


def potentials_for_charge_sets(cell, positions, charge_sets, tol=SUM_TOL, d_min=None):
    """Ewald site potentials (V) of several charge sets on the same sites.

    Parameters
    ----------
    cell : (3, 3) lattice vectors as rows, Å.
    positions : (N, 3) Cartesian positions, Å.
    charge_sets : (M, N) array: M charge vectors, e.
    tol : wanted error relative to ``k_e * max_m sum(q_m^2) / d_min`` (as :func:`madelung.ewald`).
    d_min : shortest interionic distance, Å (computed if not given).

    Returns
    -------
    (M, N) array of potentials, V: row m is the potential at every site from charge set m
    (own charge excluded, own images included, neutralizing background for a net charge).

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (accuracy control, via the sum plan).
    """
    positions = np.ascontiguousarray(positions, dtype=np.float64)
    sets = np.atleast_2d(np.asarray(charge_sets, dtype=np.float64))
    n = len(positions)
    if sets.shape[1] != n:
        raise InputError(f"charge sets have {sets.shape[1]} entries for {n} sites")
    square = np.einsum("mi,mi->m", sets, sets)
    sums = ChargeSums(n, float(np.max(square)), float(np.max(np.abs(sets).sum(axis=1))), 0.0)
    plan = plan_sum(cell, positions, sums=sums, tol=tol, method="direct", d_min=d_min)
    a = plan.alpha
    bins, ks, frac = plan.bins, plan.kspace, plan.frac
    out = np.empty((len(sets), n))
    with thread_budget(plan.predicted_ns):
        for m, charges in enumerate(sets):
            charges = np.ascontiguousarray(charges)
            phi_r, _, _, _ = kernels.real_space_terms(
                bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.offsets, bins.bin_of,
                bins.bin_start, a, plan.real_cutoff, False, False)
            phi = bins.unsorted(phi_r)
            if len(ks.hkl):
                s_re, s_im = kernels.structure_factors(frac, charges, ks.hkl, ks.hmax, kernels.CHUNKS)
                phi_k, _ = kernels.reciprocal_site_terms(frac, charges, ks.hkl, ks.hmax, ks.kvectors, ks.weights,
                                                         s_re, s_im, False)
                phi = phi + phi_k
            net = float(charges.sum())
            self_and_background = 2.0 * a / math.sqrt(math.pi) * charges + math.pi * net / (plan.volume * a * a)
            out[m] = COULOMB_CONSTANT * (phi - self_and_background)
    return out


def screened_pairs(cell, positions, types, alpha_by_type, r_cut, bins=None, pairs=None):
    """(N, N) sum over images of ``erfc(alpha_ij r) / r`` within ``r_cut`` (Å^-1, no Coulomb constant),
    ``alpha_ij = alpha_by_type[types[i], types[j]]``; the site itself is left out, its images are not
    (``bins``: these positions' bins for ``r_cut``, if built already; ``pairs``: their
    :func:`~madelung.sums.geometry.neighbour_pairs` within exactly ``r_cut``, if found already)."""
    from scipy.special import erfc

    n = len(positions)
    if pairs is None:
        pairs = neighbour_pairs(np.ascontiguousarray(cell, dtype=np.float64),
                                np.ascontiguousarray(positions, dtype=np.float64), r_cut, bins=bins)
    owner, partner, distance = pairs
    types = np.asarray(types, dtype=np.int64)
    alpha = np.asarray(alpha_by_type, dtype=np.float64)[types[owner], types[partner]]
    return np.bincount(owner * n + partner, weights=erfc(alpha * distance) / distance, minlength=n * n).reshape(n, n)


def site_plan(cell, positions, tol=SUM_TOL, d_min=None, reduced=None):
    """The direct-sum plan of the sites for unit charges on every site: the one the Coulomb matrix
    runs with (its :meth:`~madelung.sums.plan.SumPlan.with_charges` serves any charges on these
    sites at least as accurately, see there). ``reduced``: the cell's
    :class:`~madelung.structure.lattice.ReducedCell`, if at hand (``Crystal.reduced``)."""
    n = len(positions)
    return plan_sum(cell, positions, sums=ChargeSums(n, float(n), float(n), float(n)), tol=tol, method="direct",
                    d_min=d_min, reduced=reduced)


def coulomb_matrix(cell, positions, tol=SUM_TOL, d_min=None, plan=None):
    """The periodic Coulomb interaction matrix of point charges, V per e.

    Parameters
    ----------
    cell, positions : lattice vectors (rows) and Cartesian positions, Å.
    tol : accuracy as for :func:`potentials_for_charge_sets` (for unit charges on every site).
    d_min : shortest interionic distance, Å (computed if not given).
    plan : the :func:`site_plan` of these sites, if made already (``tol`` and ``d_min`` are then its own).

    Returns
    -------
    (N, N) symmetric array ``J`` with ``J[i, j]`` the potential at site i from a unit charge on
    site j and its images, neutralizing background included (``J[i, i]``: own images only).

    Notes
    -----
    Real space: :func:`screened_pairs` (pairs from the shared neighbour machinery) with the Ewald
    splitting parameter; reciprocal space:
    ``sum_k 2 w(k) cos(k . (r_i - r_j))`` from the same half-space k-vectors and weights as
    the direct sum, as one matrix product ``X X^T`` of the weighted phase factors
    ``sqrt(w) cos(k . r)``, ``sqrt(w) sin(k . r)`` (the weights are positive).

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    positions = np.ascontiguousarray(positions, dtype=np.float64)
    n = len(positions)
    if n > MAX_MATRIX_SITES:
        raise InputError(f"a full Coulomb matrix of {n} sites is more than the limit of {MAX_MATRIX_SITES}")
    if plan is None:
        plan = site_plan(cell, positions, tol=tol, d_min=d_min)
    elif plan.method != "direct" or plan.n_atoms != n:
        raise ValueError(f"the Coulomb matrix of {n} sites needs a direct-sum plan of those sites")
    return _assembled(*_matrix_parts(plan, positions), plan)


def _matrix_parts(plan, positions, pairs=None):
    """``(real, reciprocal)``, each (N, N) in Gaussian units (1/Å): the screened real-space sum
    over images and ``sum_k 2 w(k) cos(k . (r_i - r_j))`` (see :func:`coulomb_matrix`)."""
    n = len(positions)
    a = plan.alpha
    # the plan's own bins (built for its real-space cutoff, and already by a sum of the same plan)
    real = screened_pairs(plan.cell, positions, np.zeros(n, dtype=np.int64), np.full((1, 1), a), plan.real_cutoff,
                          bins=plan.bins, pairs=pairs)
    ks = plan.kspace
    # sqrt(w(k)) exp(i k . r_j) for every site and k-vector, as products of one table of
    # exp(2 pi i h f_a) per lattice direction (fewer exponentials than one per site and k-vector);
    # one row per k-vector, so that picking the rows of a table copies whole rows
    waves = np.sqrt(ks.weights)[:, None].astype(complex)
    for axis in range(3):
        table = np.exp(2j * math.pi * np.outer(np.arange(-ks.hmax[axis], ks.hmax[axis] + 1), plan.frac[:, axis]))
        waves = waves * table[ks.hkl[:, axis] + ks.hmax[axis]]
    waves = np.concatenate([waves.real, waves.imag], axis=0)
    with blas_budget(2.0 * n * n * len(ks.weights)):
        recip = waves.T @ waves     # sum_k w(k) cos(k . (r_i - r_j)), twice over the half space
    return real, recip


def _assembled(real, recip, plan):
    """The Coulomb matrix (V per e) from its two parts, with the self and background terms."""
    a = plan.alpha
    matrix = real + recip - 2.0 * a / math.sqrt(math.pi) * np.eye(len(real)) - math.pi / (plan.volume * a * a)
    matrix = COULOMB_CONSTANT * 0.5 * (matrix + matrix.T)
    return matrix


def matrix_and_sum(crystal, plan, pairs=None):
    """The Coulomb matrix of a crystal's sites and, from the same terms, the crystal's own direct
    Ewald sum (energy, site potentials; no forces): ``phi = J q``.

    ``plan`` is the :func:`site_plan` of the crystal's sites and ``pairs`` its real-space pairs, if
    found already (the sites' :func:`~madelung.sums.geometry.neighbour_pairs` within the plan's
    real-space cutoff). The sum runs on the plan's layout for the
    crystal's charges (:meth:`~madelung.sums.plan.SumPlan.with_charges`); it is the direct sum
    with the same splitting parameter, pairs and k-vectors, so it agrees with
    :func:`madelung.sums.direct.run_direct` to rounding. Returns ``(matrix, EwaldResult)``, the
    result None when the layout does not meet the plan's ``tol`` for these charges (then sum
    apart).

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    started = time.perf_counter()
    positions = np.ascontiguousarray(crystal.positions, dtype=np.float64)
    if plan.method != "direct" or plan.n_atoms != len(positions) or len(positions) > MAX_MATRIX_SITES:
        raise ValueError("the Coulomb matrix of a crystal needs a direct-sum plan of its sites")
    if pairs is None:
        pairs = neighbour_pairs(plan.cell, positions, plan.real_cutoff, bins=plan.bins)
    real, recip = _matrix_parts(plan, positions, pairs)
    matrix = _assembled(real, recip, plan)
    charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
    charged = plan.with_charges(charges)
    if not (charged.tol <= plan.tol and charged.error_estimate <= charged.target):
        return matrix, None
    background = warn_if_charged(crystal, charged)
    phi_recip = recip @ charges
    assembled = assemble(charges, real @ charges, phi_recip, 0.5 * float(charges @ phi_recip), plan.alpha,
                         plan.volume, charged.sums.net, background, COULOMB_CONSTANT)
    params = params_of(charged, len(pairs[0]), tuple(int(x) for x in plan.bins.reach))
    return matrix, planned_result(charged, assembled, params, started)
