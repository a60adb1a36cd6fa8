"""Smooth particle-mesh Ewald (SPME): energy, site potentials, forces and stress in O(N log N).

    E = E_real + E_mesh + E_self + E_background

The real-space, self and background terms are those of the direct sum (:mod:`.direct`); the
reciprocal sum is replaced by its mesh form (Essmann et al. 1995)::

    Q(g)   = sum_i q_i prod_a M_n(K_a f_ia - g_a)              (B-spline charge spreading)
    E_mesh = 1/2 sum_{m != 0} C(m) |F[Q](m)|^2,
    C(m)   = B(m) exp(-pi^2 |m*|^2 / alpha^2) / (pi V |m*|^2), B(m) = prod_a |b_a(m_a)|^2
    phi_i  = sum_g W_i(g) psi(g),  psi = K0 K1 K2 F^-1[C F[Q]]   (potential at ion i)

with M_n the cardinal B-spline of order n, F the discrete Fourier transform, m* the reciprocal
vector of the mesh frequency m and b_a the exponential-spline moduli. Forces come from the
analytic gradient of the weights W_i, the stress from the strain derivative of E_mesh.

Tuning. ``tol`` has the meaning of the direct engine: the energy error wanted relative to
E_scale = k_e sum q^2 / d_min. The real-space cutoff comes from the same coherent
Kolafa–Perram estimate as the direct engine (:func:`.tuning.real_space_error`). The mesh
error is the calibrated estimate :func:`mesh_error` (a power law in alpha times the mesh step,
fitted to measured errors, errors of the ions added coherently like the direct engine's
estimates); the splitting parameter, the spline order and the mesh are chosen for the least
predicted time. When it is cheap, the mesh potentials of a random subsample of ions are
checked against the direct reciprocal sum at the same splitting parameter. The measured error
is reported in ``params.extra["check"]``, and the mesh is refined if the check misses the target.

References
----------
U. Essmann, L. Perera, M. L. Berkowitz, T. Darden, H. Lee and L. G. Pedersen,
J. Chem. Phys. 103 (1995) 8577 (smooth particle-mesh Ewald).
M. Deserno and C. Holm, J. Chem. Phys. 109 (1998) 7678 (mesh error analysis; the form
of the estimate, a power of alpha h set by the assignment order).
A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (real-space truncation error).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numba
import numpy as np
import scipy.fft

from ..errors import InputError
from ..geometry import plane_spacings, thread_budget, wrapped_fractional
from ..units import COULOMB_CONSTANT
from . import kernels, mesh_kernels, tuning
from .direct import (EwaldParameters, EwaldResult, _as_crystal_arrays, assemble, real_space_part,
                     reciprocal_vectors, shortest_distance, symmetric, warn_if_charged)

#: Spline orders the tuner considers (odd orders run when asked for; the calibration found them
#: no more accurate than the even order below them for more work).
TUNED_ORDERS = (4, 6, 8)
#: Orders accepted when given explicitly.
ALLOWED_ORDERS = (4, 5, 6, 7, 8)

#: Calibrated estimate of the mesh error (see :func:`mesh_error`): order -> (A_n, s_n). The
#: exponents s_n are least-squares fits and A_n twice the largest prefactor seen, both printed by
#: benchmarks/calibrate_mesh.py (largest A: 14.6, 1222, 420, 2.33e4, 2.56e4 for orders 4..8,
#: set by small strongly skewed cells; medians 5.1, 190, 98, 2.3e3, 2.8e3).
MESH_ERROR_MODEL = {4: (29.3, 4.220), 5: (2444.0, 6.784), 6: (840.0, 7.055), 7: (4.65e4, 9.148),
                    8: (5.12e4, 9.779)}

#: Nanoseconds of one thread per unit of work of the mesh part, measured with
#: ``benchmarks/scaling_mesh.py --calibrate`` (process time, one thread, rattled rock salt,
#: N = 4096 and 32768: 1.6-1.8, 0.41-0.42 and 4.4-5.3 ns, the last raised for the array work
#: around the kernels). The real-space part uses the direct engine's constants (tuning.py), so
#: both engines' predictions are in the same unit for method="auto".
SPLINE_POINT_NS = 1.8       # one (ion, mesh point) weight, in spreading or in interpolation
FFT_POINT_LOG_NS = 0.45     # one point x log2(points) of one real-to-complex FFT
MESH_POINT_NS = 8.0         # influence function, energy/virial and array work per mesh point

#: The tuner puts at least this many times the spline order of mesh points along each axis.
MIN_MESH_PER_ORDER = 2

#: Largest mesh the tuner picks, in bytes of peak mesh memory (16 bytes per point: the real
#: mesh and its half spectrum are alive together during each FFT); keeps N = 10^6 under 4 GB
#: with the O(N) arrays (measured peak 3.3 GB for rattled rock salt at tol 1e-6 and 1e-8).
MESH_MEMORY_LIMIT_BYTES = 2.0e9

#: With check="auto" the subsample check runs when its predicted time is below this share of
#: the predicted mesh time; it compares CHECK_SAMPLE ions.
CHECK_SHARE = 0.3
CHECK_SAMPLE = 48


@dataclass(frozen=True)
class MeshChoice:
    """Splitting parameter (1/Å), real cutoff (Å), mesh shape, spline order, errors (eV) and the
    predicted cost (s of one thread)."""

    alpha: float
    real_cutoff: float
    shape: tuple
    order: int
    real_error: float
    mesh_error: float
    predicted_seconds: float

    @property
    def error_estimate(self) -> float:
        return self.real_error + self.mesh_error


def mesh_error(alpha, spacings, order, charge_sq_sum, k_e):
    """Predicted error of the mesh energy, eV:

        dE = k_e / 2 sum(q^2) alpha A_n mean_a (alpha h_a / pi)^s_n

    with h_a = plane spacing / K_a the mesh step along lattice vector a and n the spline order.
    The form is an assumption, chosen because it fits: each ion's potential error is taken to
    scale like q_i alpha times a power of alpha h set by the order (the aliasing picture of
    Deserno and Holm), as the aliased interaction of an ion's spread charge with itself would;
    the measured errors do grow with alpha at fixed alpha h. The errors of the ions add
    coherently, as in :mod:`.tuning`. The fitted power is close to n for n = 4 and steeper for
    higher orders. ``A_n`` and ``s_n`` (MESH_ERROR_MODEL) were
    fitted to the measured mesh error, against the direct reciprocal sum at the same alpha, of
    every bundled prototype (as given, and as 2x2x2 supercells with random displacements) and
    random neutral triclinic cells (some small and strongly skewed), at alpha d_min = 2, 3, 4.5
    and alpha h / pi = 0.06 to 0.3 with at least two spline widths per axis; the
    larger of the coherent potential error 1/2 sum|q_i| rms(dphi) and the energy difference was
    fitted, and A_n is twice the largest value seen.
    """
    prefactor, power = MESH_ERROR_MODEL[order]
    mean = sum((alpha * h / math.pi) ** power for h in spacings) / 3.0
    return k_e * 0.5 * charge_sq_sum * alpha * prefactor * mean


def mesh_shape_for(alpha, order, target, plane, charge_sq_sum, k_e):
    """Smallest FFT-friendly mesh meeting ``target`` (eV) at this alpha and order (equal steps)."""
    prefactor, power = MESH_ERROR_MODEL[order]
    x = (target / (k_e * 0.5 * charge_sq_sum * alpha * prefactor)) ** (1.0 / power)
    h = x * math.pi / alpha
    # at least two spline widths per axis: with fewer, each ion's spline wraps round most of the
    # cell and the calibrated estimate was seen to be optimistic (skewed cells of a few ions)
    return tuple(int(scipy.fft.next_fast_len(max(MIN_MESH_PER_ORDER * order, int(math.ceil(d / h))), real=True))
                 for d in plane)


def predicted_mesh_ns(r_cut, shape, order, n_atoms, volume):
    """Predicted cost of one mesh evaluation with forces, ns of one thread.

    The real-space part is costed as in the direct engine (:func:`.tuning.predicted_cost` with no
    k-vectors); then two B-spline passes over order^3 points per ion, two FFTs and the mesh work.
    """
    points = float(np.prod(shape))
    return (tuning.predicted_cost(r_cut, 0.0, n_atoms, volume)
            + SPLINE_POINT_NS * 2.0 * n_atoms * order ** 3
            + FFT_POINT_LOG_NS * 2.0 * points * math.log2(max(points, 2.0))
            + MESH_POINT_NS * points)


def _check_tol(tol):
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and 0 < tol < 1):
        raise InputError(f"tol must be a number between 0 and 1, got {tol!r}")


def choose_mesh(tol, cell, n_atoms, charge_sq_sum, charge_abs_sum, d_min, k_e, alpha=None,
                mesh=None, order=None) -> MeshChoice:
    """Choose alpha, the real cutoff, the mesh and the spline order for relative energy error ``tol``.

    Parameters
    ----------
    tol : float
        Target energy error relative to ``k_e * sum(q^2) / d_min``.
    cell : (3, 3) lattice vectors, Å.
    n_atoms, charge_sq_sum, charge_abs_sum, d_min : number of ions, e^2, e, Å.
    k_e : Coulomb constant, eV·Å.
    alpha, mesh, order : optional
        Fix the splitting parameter (1/Å), the mesh shape (3 ints) or the spline order.

    References
    ----------
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577; M. Deserno and C. Holm,
    J. Chem. Phys. 109 (1998) 7678; A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    """
    _check_tol(tol)
    if charge_sq_sum <= 0:
        raise InputError("all charges are zero; there is no electrostatic energy to compute")
    volume = abs(float(np.linalg.det(cell)))
    plane = plane_spacings(cell)
    stats = (n_atoms, volume, charge_sq_sum, charge_abs_sum, k_e)
    target = tol * k_e * charge_sq_sum / d_min
    real_share = 0.5 * target * tuning.SAFETY
    mesh_share = 0.5 * target
    if order is not None:
        if order not in ALLOWED_ORDERS:
            raise InputError(f"spline order must be one of {ALLOWED_ORDERS}, got {order!r}")
        orders = (int(order),)
    else:
        orders = TUNED_ORDERS
    if mesh is not None:
        mesh = tuple(int(k) for k in np.broadcast_to(np.asarray(mesh), (3,)))
        if min(mesh) < max(orders):
            raise InputError(f"mesh {mesh} must have at least as many points along each axis as the "
                             f"spline order ({max(orders)})")
    density = n_atoms / volume
    r_min = (3.0 * tuning.MIN_REAL_NEIGHBOURS / (4.0 * math.pi * density)) ** (1.0 / 3.0)

    def real_cutoffs(alphas):
        alphas = np.asarray(alphas, dtype=float)
        return np.atleast_1d(tuning._solve_decreasing(lambda r: tuning.real_space_error(alphas, r, *stats),
                                                      real_share, np.maximum(r_min, 1.0 / alphas), 100.0 / alphas))

    def make(a, r_cut, n):
        a, r_cut = float(a), float(r_cut)
        shape = mesh if mesh is not None else mesh_shape_for(a, n, mesh_share, plane, charge_sq_sum, k_e)
        spacings = tuple(plane[i] / shape[i] for i in range(3))
        return MeshChoice(a, r_cut, shape, n,
                          float(tuning.real_space_error(a, r_cut, *stats)) / tuning.SAFETY,
                          mesh_error(a, spacings, n, charge_sq_sum, k_e),
                          1e-9 * predicted_mesh_ns(r_cut, shape, n, n_atoms, volume))

    if alpha is not None:
        if not (math.isfinite(alpha) and alpha > 0):
            raise InputError(f"alpha must be a positive number (1/Å), got {alpha!r}")
        r_cut = real_cutoffs([float(alpha)])[0]
        return min((make(alpha, r_cut, n) for n in orders), key=lambda c: c.predicted_seconds)
    alphas = (3.0 / d_min) * np.geomspace(0.2, 3.0, 41)
    r_cuts = real_cutoffs(alphas)
    candidates = [make(a, r, n) for n in orders for a, r in zip(alphas, r_cuts)]
    if mesh is not None:
        # a fixed mesh: the fastest choice whose estimate meets the target
        good = [c for c in candidates if c.mesh_error <= mesh_share]
        candidates = good or [min(candidates, key=lambda c: c.mesh_error)]
    else:
        small = [c for c in candidates if 16.0 * np.prod(c.shape) <= MESH_MEMORY_LIMIT_BYTES]
        candidates = small or [min(candidates, key=lambda c: np.prod(c.shape))]
    return min(candidates, key=lambda c: c.predicted_seconds)


def bspline_moduli(size, order):
    """|b(m)|^2 for m = 0 .. size-1 (Essmann et al. eq. (4.4)); zeros of odd orders at m = K/2
    are replaced by the mean of their neighbours (as suggested there)."""
    values = mesh_kernels.spline_at_integers(order)
    k = np.arange(order - 1)
    m = np.arange(size)
    phase = np.exp(2j * math.pi * np.outer(m, k) / size)
    denominator = np.abs(phase @ values[1:order]) ** 2
    moduli = np.zeros(size)
    ok = denominator > 1e-10
    moduli[ok] = 1.0 / denominator[ok]
    for i in np.flatnonzero(~ok):
        moduli[i] = 0.5 * (moduli[(i - 1) % size] + moduli[(i + 1) % size])
    return moduli


def _slabs(frac0, size, order, threads):
    """Group ions into slabs of mesh planes along axis 0 for race-free spreading."""
    thickness = max(order - 1, 1)
    n_slabs = min(size // thickness, 8 * max(threads, 1))
    n_slabs -= n_slabs % 2
    if threads <= 1 or n_slabs < 2:
        return np.arange(len(frac0), dtype=np.int64), np.array([0, len(frac0)], np.int64), 1
    base = np.minimum(np.floor(frac0 * size).astype(np.int64), size - 1)
    plane_to_slab = (np.arange(size, dtype=np.int64) * n_slabs) // size
    # slab s holds the planes p with floor(p S / K) = s: floor(K / S) >= thickness of them or more
    slab_of = plane_to_slab[base]
    order_of_atoms = np.argsort(slab_of, kind="stable").astype(np.int64)
    start = np.zeros(n_slabs + 1, np.int64)
    np.cumsum(np.bincount(slab_of, minlength=n_slabs), out=start[1:])
    return order_of_atoms, start, n_slabs


def mesh_reciprocal(cell, frac, charges, alpha, shape, order, want_forces, want_virial, threads=None):
    """Mesh part in Gaussian units: ``(energy, potentials (N,), forces (N, 3), virial (6,))``.

    Potentials in e/Å, forces in e^2/Å^2, energy and virial (xx yy zz yz xz xy, dE/d strain) in e^2/Å.
    """
    threads = numba.get_num_threads() if threads is None else threads
    shape_arr = np.asarray(shape, dtype=np.int64)
    volume = abs(float(np.linalg.det(cell)))
    recip = np.ascontiguousarray(np.linalg.inv(cell).T)
    atom_order, slab_start, n_slabs = _slabs(frac[:, 0], int(shape[0]), order, threads)
    q_mesh = mesh_kernels.spread_charges(frac, charges, atom_order, slab_start, n_slabs, shape_arr, order)
    del atom_order
    spectrum = scipy.fft.rfftn(q_mesh, workers=threads, overwrite_x=True)
    del q_mesh
    moduli = [np.ascontiguousarray(bspline_moduli(int(k), order)) for k in shape]
    energy, virial = mesh_kernels.apply_influence(spectrum, recip, shape_arr, moduli[0], moduli[1], moduli[2],
                                                  float(alpha), volume, bool(want_virial))
    psi = scipy.fft.irfftn(spectrum, s=tuple(int(k) for k in shape), workers=threads, overwrite_x=True)
    del spectrum
    psi *= float(np.prod(shape))
    potential, forces = mesh_kernels.mesh_site_terms(frac, charges, np.ascontiguousarray(psi), shape_arr,
                                                     order, recip, bool(want_forces))
    return energy, potential, forces, virial


def _check_against_direct(cell, frac, charges, alpha, phi_mesh, target, budget_seconds, stats, rng_seed=0):
    """Mesh potentials of a random subsample against the direct reciprocal sum at the same alpha.

    The direct sum is converged to 1 % of ``target`` (eV, coherent Kolafa–Perram estimate).
    Returns ``None`` when it would take longer than ``budget_seconds``, else ``(sample size,
    rms potential error e/Å, max potential error e/Å)``.
    """
    n = len(charges)
    volume = abs(float(np.linalg.det(cell)))
    k_cut = tuning._solve_decreasing(lambda k: tuning.reciprocal_space_error(alpha, k, *stats),
                                     0.01 * target, 2.0 * alpha, 200.0 * alpha)
    k_count = (4.0 / 3.0) * math.pi * k_cut ** 3 * volume / (16.0 * math.pi ** 3)
    if 1e-9 * tuning.RECIPROCAL_TERM_COST * 0.5 * n * k_count > budget_seconds:  # structure factors
        return None
    hkl, kvectors, hmax = reciprocal_vectors(cell, k_cut)
    if len(hkl) == 0:
        return (0, 0.0, 0.0)
    k2 = np.einsum("ij,ij->i", kvectors, kvectors)
    weights = np.ascontiguousarray(2.0 * (4.0 * math.pi / volume) * np.exp(-k2 / (4.0 * alpha * alpha)) / k2)
    s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, numba.get_num_threads())
    rng = np.random.default_rng(rng_seed)
    sample = np.sort(rng.choice(n, size=min(n, CHECK_SAMPLE), replace=False))
    phi_direct, _ = kernels.reciprocal_site_terms(np.ascontiguousarray(frac[sample]),
                                                  np.ascontiguousarray(charges[sample]), hkl, hmax,
                                                  kvectors, weights, s_re, s_im, False)
    diff = phi_mesh[sample] - phi_direct
    return len(sample), float(np.sqrt(np.mean(diff * diff))), float(np.max(np.abs(diff)))


def _charge_sums(crystal, d_min):
    """Arrays and sums both mesh entry points need: ``(cell, positions, charges, volume, sum q^2,
    sum |q|, net charge, d_min)``."""
    cell, positions, charges = _as_crystal_arrays(crystal)
    volume = abs(float(np.linalg.det(cell)))
    q2 = float(np.dot(charges, charges))
    q_abs = float(np.abs(charges).sum())
    if d_min is None:
        d_min = shortest_distance(crystal)
    return cell, positions, charges, volume, q2, q_abs, float(charges.sum()), d_min


def ewald_mesh(crystal, tol=1e-10, forces=False, stress=False, alpha=None, mesh=None, order=None,
               check="auto", d_min=None) -> EwaldResult:
    """Smooth particle-mesh Ewald sum with parameters chosen for relative energy error ``tol``.

    Parameters
    ----------
    crystal : Crystal
    tol : float
        Wanted energy error relative to ``k_e * sum(q^2) / d_min`` (as :func:`madelung.ewald`).
    forces, stress : bool
        Also compute forces (eV/Å) and the stress tensor (eV/Å^3, ASE sign).
    alpha : float, optional
        Fix the splitting parameter (1/Å).
    mesh : int or 3 ints, optional
        Fix the mesh shape (points along each lattice vector).
    order : int, optional
        Fix the B-spline order (4..8; the tuner picks from 4, 6, 8).
    check : "auto", True or False
        Compare the mesh potentials of a random subsample of ions with the direct reciprocal sum
        ("auto": when that costs little). With a tuned mesh, a failed check refines the mesh.

    Returns
    -------
    EwaldResult
        As the direct engine; ``params.method == "mesh"``, ``params.extra`` holds ``mesh``,
        ``order``, ``spreading``, ``predicted_seconds`` (of one thread) and ``check``. ``params.k_vectors`` is the
        number of mesh frequencies (half spectrum) and ``params.reciprocal_cutoff`` the smallest
        Nyquist wavenumber pi K_a / spacing_a, 1/Å.

    Notes
    -----
    Spreading is race-free by slabs of mesh planes (see :mod:`.mesh_kernels`); no per-thread mesh
    copies. Memory is O(N + mesh): the charge mesh, its half spectrum and the influence function.
    Potentials include the mesh's self-interaction of each ion's spread charge exactly as the
    reciprocal sum does, so the self term is the usual -2 alpha q_i / sqrt(pi).

    References
    ----------
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577 (the method, forces, virial).
    M. Deserno and C. Holm, J. Chem. Phys. 109 (1998) 7678 (mesh error analysis).
    D. M. Heyes, J. Chem. Phys. 74 (1981) 1924 (stress of the Ewald sum).
    """
    started = time.perf_counter()
    cell, positions, charges, volume, q2, q_abs, net, d_min = _charge_sums(crystal, d_min)
    n = len(charges)
    k_e = COULOMB_CONSTANT
    if check not in ("auto", True, False):
        raise InputError(f"check must be 'auto', True or False, got {check!r}")
    choice = choose_mesh(tol, cell, n, q2, q_abs, d_min, k_e, alpha=alpha, mesh=mesh, order=order)
    a = choice.alpha

    background = warn_if_charged(crystal, net, q2)

    # small sums run on one thread (see geometry.thread_budget, which takes ns of one thread)
    with thread_budget(choice.predicted_seconds * 1e9):
        # real space: the same kernel and bins as the direct engine
        phi_real, force_real, real_w, pairs, reach = real_space_part(
            cell, positions, charges, a, choice.real_cutoff, forces, stress)

        frac = wrapped_fractional(cell, positions)
        target_mesh = 0.5 * tol * k_e * q2 / d_min
        shape = choice.shape
        mesh_error_estimate = choice.mesh_error
        checked = None
        threads = numba.get_num_threads()
        for attempt in range(4):
            e_mesh, phi_k, f_k, w_k = mesh_reciprocal(cell, frac, charges, a, shape, choice.order,
                                                      bool(forces), bool(stress))
            if check is False:
                break
            budget = CHECK_SHARE * choice.predicted_seconds if check == "auto" else float("inf")
            result = _check_against_direct(cell, frac, charges, a, phi_k, target_mesh, budget,
                                           (n, volume, q2, q_abs, k_e))
            if result is None:
                break
            size, rms, worst = result
            measured = k_e * 0.5 * q_abs * rms  # coherent, like the estimates
            checked = {"sample": size, "rms_potential_error_V": k_e * rms, "max_potential_error_V": k_e * worst,
                       "energy_error_bound_eV": measured, "attempt": attempt}
            mesh_error_estimate = max(mesh_error_estimate, measured)
            if measured <= target_mesh or mesh is not None:
                break
            # the estimate was optimistic for this structure: refine the mesh and try again
            grow = (measured / target_mesh) ** (1.0 / choice.order) * 1.1
            shape = tuple(int(scipy.fft.next_fast_len(int(math.ceil(k * grow)), real=True)) for k in shape)
            plane = plane_spacings(cell)
            mesh_error_estimate = mesh_error(a, tuple(plane[i] / shape[i] for i in range(3)), choice.order, q2, k_e)

    potentials, energy, components, force_array, stress_array = assemble(
        charges, phi_real, phi_k, e_mesh, a, volume, net, background, k_e,
        (force_real, f_k) if forces else None, (symmetric(real_w), symmetric(w_k)) if stress else None)
    plane = plane_spacings(cell)
    nyquist = float(min(math.pi * shape[i] / plane[i] for i in range(3)))
    spreading = (f"slabs of mesh planes along axis 0, {threads} threads" if threads > 1
                 else "serial (one thread)")
    params = EwaldParameters(
        method="mesh", alpha=a, real_cutoff=choice.real_cutoff, reciprocal_cutoff=nyquist,
        real_space_pairs=int(pairs), k_vectors=int(shape[0] * shape[1] * (shape[2] // 2 + 1)),
        image_reach=reach,
        extra={"mesh": tuple(int(k) for k in shape), "order": int(choice.order), "spreading": spreading,
               "predicted_seconds": choice.predicted_seconds, "check": checked,
               "real_error_eV": choice.real_error, "mesh_error_eV": mesh_error_estimate})
    return EwaldResult(
        energy=energy, potentials=potentials, forces=force_array, stress=stress_array, params=params,
        error_estimate=choice.real_error + mesh_error_estimate, tol=float(tol), energy_scale=k_e * q2 / d_min,
        components=components, net_charge=net, background=bool(background), n_atoms=n,
        seconds=time.perf_counter() - started)


#: Below this predicted direct time (s of one thread) method="auto" takes the direct sum without
#: tuning the mesh: tuning the mesh and its fixed costs take longer than the mesh could save
#: (measured on rattled rock salt: the engines break even near 1000 ions, about 20 ms).
AUTO_DIRECT_BELOW_SECONDS = 0.015


def predicted_seconds(crystal, tol, alpha=None, d_min=None):
    """Predicted wall time of each engine at accuracy ``tol``: ``{"direct": s, "mesh": s}``.

    Each engine's own tuner picks its parameters and predicts its cost in seconds of one thread
    of the 2-core reference machine (only the comparison matters for method="auto"). When the
    direct sum is predicted to take less than :data:`AUTO_DIRECT_BELOW_SECONDS` the mesh is not
    tuned and its entry is ``inf``.
    """
    cell, _, charges, volume, q2, q_abs, _, d_min = _charge_sums(crystal, d_min)
    n = len(charges)
    k_e = COULOMB_CONSTANT
    direct_choice = tuning.choose(tol, n, volume, q2, q_abs, d_min, k_e, alpha=alpha)
    direct = 1e-9 * direct_choice.predicted_cost
    if direct < AUTO_DIRECT_BELOW_SECONDS:
        return {"direct": direct, "mesh": math.inf}
    mesh_choice = choose_mesh(tol, cell, n, q2, q_abs, d_min, k_e, alpha=alpha)
    return {"direct": direct, "mesh": mesh_choice.predicted_seconds}
