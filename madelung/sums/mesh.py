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
analytic gradient of the weights W_i, the stress from the strain derivative of E_mesh. The mesh
is laid on the plan's reduced basis (:mod:`.plan`); its size and error estimate come from the
Miller indices the sum needs (:mod:`.tuning`).

Memory and order of work. The charge mesh, its spectrum and the potential mesh psi are one array:
the half spectrum (K0, K1, K2 // 2 + 1) of complex numbers, whose real view has rows of
2 (K2 // 2 + 1) numbers. The charges are spread into the first K2 entries of each row, the
transform runs in place (real-to-complex along the last axis a few planes at a time, then
complex along the first two axes), the influence function multiplies it in place, and the
inverse brings psi back into the same rows: about 8 bytes per mesh point for the whole mesh part.
Ions are spread and interpolated in the order of the plan's bins, so ions near in space read and
write the same mesh rows one after the other.

The check. Unless switched off, every mesh sum is checked against an independent direct
reciprocal sum at the same splitting parameter, and the mesh refined if the check misses the
target:

- ``subsample``: the mesh potentials of up to CHECK_SAMPLE of the crystal's own ions against the
  direct reciprocal sum (full structure factors), when that costs at most CHECK_SHARE of the
  predicted sum;
- ``proxy cell``: otherwise, a cell 1/n_a the size along each reduced lattice vector, with the same
  splitting parameter, a mesh of the same or a coarser step, and PROXY_IONS random ions with charges
  drawn from the crystal's; its measured mesh error against its direct reciprocal sum is compared
  with the estimate's prediction for it, and the crystal's estimate is scaled up by that ratio when
  the estimate proves optimistic. It costs a small fraction of the sum whatever the size.

The mesh forces are less accurate than the energy for the same mesh: the B-spline gradient loses
about one order of the spline's accuracy. On 1728 rattled rock-salt ions the largest force error
in units of k_e q^2 / d_min^2 was 15 times the relative energy error (tests/test_mesh.py allows
10 times the potential allowance over d_min).

References
----------
U. Essmann, L. Perera, M. L. Berkowitz, T. Darden, H. Lee and L. G. Pedersen,
J. Chem. Phys. 103 (1995) 8577 (smooth particle-mesh Ewald).
M. Deserno and C. Holm, J. Chem. Phys. 109 (1998) 7678 (mesh error analysis).
A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (real-space truncation error).
"""

from __future__ import annotations

import math
import mmap
import time

import numba
import numpy as np

from ..errors import InputError
from ..units import COULOMB_CONSTANT
from .geometry import thread_budget
from ._kernels import kernels, mesh_kernels
from . import tuning
from . import plan as plan_module
from .direct import EwaldResult, assemble, params_of, planned_result, real_space_part, symmetric, warn_if_charged
from .tuning import ChargeSums
from ..defaults import SUM_TOL

#: The subsample check runs when its predicted time is below this share of the predicted sum;
#: it compares CHECK_SAMPLE ions. Otherwise the proxy-cell check runs with PROXY_IONS ions.
CHECK_SHARE = 0.1
CHECK_SAMPLE = 48
PROXY_IONS = 96
#: Refinements of the mesh after a failed check, at most.
MAX_REFINEMENTS = 4


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


def _slabs(frac0, size, order, threads, atoms=None):
    """Group ions into slabs of mesh planes along axis 0 for race-free spreading.

    ``atoms``: an order of the ions that keeps neighbours in space together (the plan's bins);
    each slab keeps it (the default is the index order)."""
    n = len(frac0)
    atoms = np.arange(n, dtype=np.int64) if atoms is None else np.ascontiguousarray(atoms, dtype=np.int64)
    thickness = max(order - 1, 1)
    n_slabs = min(size // thickness, 8 * max(threads, 1))
    n_slabs -= n_slabs % 2
    if threads <= 1 or n_slabs < 2:
        return atoms, np.array([0, n], np.int64), 1
    base = np.minimum(np.floor(frac0 * size).astype(np.int64), size - 1)
    plane_to_slab = (np.arange(size, dtype=np.int64) * n_slabs) // size
    # slab s holds the planes p with floor(p S / K) = s: floor(K / S) >= thickness of them or more
    slab_of = plane_to_slab[base]
    order_of_atoms = atoms[np.argsort(slab_of[atoms], kind="stable")]
    start = np.zeros(n_slabs + 1, np.int64)
    np.cumsum(np.bincount(slab_of, minlength=n_slabs), out=start[1:])
    return order_of_atoms, start, n_slabs


#: Meshes of at least this many bytes live in memory of ordinary pages (see :func:`mesh_buffer`).
ORDINARY_PAGES_FROM_BYTES = 1 << 22


def mesh_buffer(shape):
    """The half spectrum of a real mesh, complex (K0, K1, K2 // 2 + 1) zeros, and its real view
    (K0, K1, 2 (K2 // 2 + 1)): the charges are spread into the first K2 entries of each row of the
    view, transformed in place, and the potential mesh comes back in the same place (one array of
    about 8 bytes per mesh point for the whole mesh part).

    A large mesh is taken as anonymous memory of ordinary pages (zeros from the system), not as a
    numpy array, which numpy advises the system to back with huge pages: the first touch of those
    can wait for the system to assemble free huge pages. Measured on the 2-core reference machine,
    one thread, 500^3 mesh, 10^6 ions, the first sum of a process: spreading, both transforms and
    interpolation 6.3-6.5 s with huge pages, 4.5-4.9 s without (later sums in the same process
    4.0 and 4.5-4.8 s).
    """
    k0, k1, k2 = (int(k) for k in shape)
    half = (k0, k1, k2 // 2 + 1)
    size = 16 * k0 * k1 * half[2]
    if size < ORDINARY_PAGES_FROM_BYTES:
        spectrum = np.zeros(half, dtype=np.complex128)
    else:
        spectrum = np.frombuffer(mmap.mmap(-1, size), dtype=np.complex128).reshape(half)
    return spectrum, spectrum.view(np.float64)


#: Planes along axis 0 transformed per call along the last axis (bounds the temporary array).
PLANES_PER_CALL = 8


def _into(result, target):
    """Make ``target`` hold ``result`` (a transform asked to work in place may hand back a copy)."""
    if result.__array_interface__["data"][0] != target.__array_interface__["data"][0] or result.strides != target.strides:
        target[...] = result


def forward_transform(spectrum, real, shape, threads):
    """The discrete Fourier transform of the real mesh in ``real[:, :, :K2]``, in place into
    ``spectrum`` (the same memory): real-to-complex along the last axis a few planes at a time,
    then complex along the first two axes in place."""
    import scipy.fft    # here, not at the top: only a mesh sum needs FFTs, and scipy.fft takes ~0.1 s to import
    k0, k2 = int(shape[0]), int(shape[2])
    for p in range(0, k0, PLANES_PER_CALL):
        q = min(k0, p + PLANES_PER_CALL)
        spectrum[p:q] = scipy.fft.rfft(real[p:q, :, :k2], axis=2, workers=threads)
    _into(scipy.fft.fftn(spectrum, axes=(0, 1), workers=threads, overwrite_x=True), spectrum)


def inverse_transform(spectrum, real, shape, threads):
    """The unnormalised inverse of :func:`forward_transform`, in place: afterwards ``real[:, :, :K2]``
    holds sum_m spectrum(m) exp(2 pi i m.g / K)."""
    import scipy.fft    # only a mesh sum needs FFTs (see forward_transform)
    k0, k2 = int(shape[0]), int(shape[2])
    _into(scipy.fft.ifftn(spectrum, axes=(0, 1), norm="forward", workers=threads, overwrite_x=True), spectrum)
    for p in range(0, k0, PLANES_PER_CALL):
        q = min(k0, p + PLANES_PER_CALL)
        real[p:q, :, :k2] = scipy.fft.irfft(spectrum[p:q], n=k2, axis=2, norm="forward", workers=threads,
                                            overwrite_x=True)


def mesh_reciprocal(cell, frac, charges, alpha, shape, order, want_forces, want_virial, threads=None, atoms=None):
    """Mesh part in Gaussian units: ``(energy, potentials (N,), forces (N, 3), virial (6,))``.

    Potentials in e/Å, forces in e^2/Å^2, energy and virial (xx yy zz yz xz xy, dE/d strain) in e^2/Å.
    ``atoms``: an order of the ions that keeps neighbours in space together (faster, same result).
    """
    threads = numba.get_num_threads() if threads is None else threads
    shape_arr = np.asarray(shape, dtype=np.int64)
    volume = abs(float(np.linalg.det(cell)))
    recip = np.ascontiguousarray(np.linalg.inv(cell).T)
    atom_order, slab_start, n_slabs = _slabs(frac[:, 0], int(shape[0]), order, threads, atoms)
    spectrum, real = mesh_buffer(shape)
    mesh_kernels.spread_into(real, frac, charges, atom_order, slab_start, n_slabs, shape_arr, order)
    forward_transform(spectrum, real, shape, threads)
    moduli = [np.ascontiguousarray(bspline_moduli(int(k), order)) for k in shape]
    energy, virial = mesh_kernels.apply_influence(spectrum, recip, shape_arr, moduli[0], moduli[1], moduli[2],
                                                  float(alpha), volume, bool(want_virial))
    inverse_transform(spectrum, real, shape, threads)
    potential, forces = mesh_kernels.interpolate(frac, charges, real, shape_arr, order, recip, bool(want_forces),
                                                 atom_order)
    return energy, potential, forces, virial


def _direct_reciprocal_potentials(cell, frac, charges, alpha, target_sums, target, sample=None):
    """Direct reciprocal potentials (e/Å) at ``sample`` (default all), converged to 1 % of ``target``
    (eV, coherent Kolafa–Perram estimate for ``target_sums``)."""
    volume = abs(float(np.linalg.det(cell)))
    _, k_cut = tuning.cutoffs_for(np.array([alpha]), 1.0, 0.01 * target, target_sums, volume, COULOMB_CONSTANT)
    hkl, kvectors, hmax = plan_module.reciprocal_vectors(cell, float(k_cut[0]))
    if len(hkl) == 0:
        return np.zeros(len(charges) if sample is None else len(sample))
    k2 = np.einsum("ij,ij->i", kvectors, kvectors)
    weights = np.ascontiguousarray(2.0 * (4.0 * math.pi / volume) * np.exp(-k2 / (4.0 * alpha * alpha)) / k2)
    s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, numba.get_num_threads())
    if sample is not None:
        frac, charges = np.ascontiguousarray(frac[sample]), np.ascontiguousarray(charges[sample])
    phi, _ = kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_re, s_im, False)
    return phi


def subsample_seconds(plan):
    """Predicted time of the subsample check, s of one thread (its structure factors dominate)."""
    _, k_cut = tuning.cutoffs_for(np.array([plan.alpha]), 1.0, 0.01 * plan.target, plan.sums, plan.volume,
                                  COULOMB_CONSTANT)
    k_count = (4.0 / 3.0) * math.pi * float(k_cut[0]) ** 3 * plan.volume / (16.0 * math.pi ** 3)
    return 1e-9 * tuning.RECIPROCAL_TERM_COST * 0.5 * plan.n_atoms * k_count


def subsample_check(plan, charges, phi_mesh, seed=0):
    """Mesh potentials of a random subsample of ions against the direct reciprocal sum.

    Returns the measured energy error bound (eV, 1/2 sum|q_i| times the rms potential error) and a
    record of the check."""
    rng = np.random.default_rng(seed)
    sample = np.sort(rng.choice(plan.n_atoms, size=min(plan.n_atoms, CHECK_SAMPLE), replace=False))
    phi = _direct_reciprocal_potentials(plan.cell, plan.frac, charges, plan.alpha, plan.sums, plan.target, sample)
    diff = phi_mesh[sample] - phi
    rms = float(np.sqrt(np.mean(diff * diff)))
    measured = COULOMB_CONSTANT * 0.5 * plan.sums.absolute_sum * rms
    return measured, {"kind": "subsample", "sample": int(len(sample)), "rms_potential_error_V": COULOMB_CONSTANT * rms,
                      "max_potential_error_V": COULOMB_CONSTANT * float(np.max(np.abs(diff))),
                      "energy_error_bound_eV": measured}


def _proxy_divisions(plan, shape, order):
    """Divisions n_a of the reduced lattice vectors for the proxy cell: about PROXY_IONS ions at the
    crystal's density, each proxy axis keeping at least two spline widths of mesh points."""
    lengths = np.linalg.norm(plan.cell, axis=1)
    n = np.ones(3, dtype=np.int64)
    while plan.n_atoms / np.prod(n) > 2 * PROXY_IONS:
        room = [a for a in range(3) if shape[a] // (n[a] + 1) >= tuning.MIN_MESH_PER_ORDER * order]
        if not room:
            break
        a = max(room, key=lambda i: lengths[i] / n[i])
        n[a] += 1
    return n


def proxy_check(plan, shape, order, charges, seed=0):
    """The mesh error of a proxy cell (see the module notes) against its own direct reciprocal sum.

    Returns ``(ratio, record)``: ratio = measured / predicted error for the proxy (> 1: the
    estimate is optimistic at this geometry and mesh step)."""
    rng = np.random.default_rng(seed)
    divisions = _proxy_divisions(plan, shape, order)
    cell = np.ascontiguousarray(plan.cell / divisions[:, None])
    proxy_shape = tuple(int(shape[a] // divisions[a]) for a in range(3))
    count = int(min(max(16, round(plan.n_atoms / np.prod(divisions))), 4 * PROXY_IONS))
    q = rng.choice(np.asarray(charges, dtype=float), size=count)
    q = np.ascontiguousarray(q - q.mean())
    if not np.any(q):
        q = np.ascontiguousarray(np.resize([1.0, -1.0], count))
    frac = np.ascontiguousarray(rng.random((count, 3)))
    sums = ChargeSums.of(q)
    lengths = np.linalg.norm(cell, axis=1)
    predicted = tuning.mesh_error(plan.alpha, tuning.mesh_steps(lengths, proxy_shape), order, sums, COULOMB_CONSTANT)
    _, phi_mesh, _, _ = mesh_reciprocal(cell, frac, q, plan.alpha, proxy_shape, order, False, False)
    phi = _direct_reciprocal_potentials(cell, frac, q, plan.alpha, sums, 0.01 * predicted)
    diff = phi_mesh - phi
    measured = COULOMB_CONSTANT * 0.5 * sums.absolute_sum * float(np.sqrt(np.mean(diff * diff)))
    ratio = measured / predicted if predicted > 0 else math.inf
    return ratio, {"kind": "proxy cell", "divisions": divisions.tolist(), "proxy_mesh": list(proxy_shape),
                   "proxy_ions": count, "measured_eV": measured, "predicted_eV": predicted,
                   "measured_over_predicted": ratio}


def run_mesh(crystal, plan, forces=False, stress=False, check="auto") -> EwaldResult:
    """Smooth particle-mesh Ewald sum of ``crystal`` as ``plan`` (method "mesh") laid it out.

    ``check``: "auto" (default) runs the subsample check when it costs at most CHECK_SHARE of the
    sum and the proxy-cell check otherwise; True always runs the subsample check; False none. A
    failed check refines the mesh (unless the user fixed it) and the sum runs again; the result's
    ``params.extra["check"]`` records what ran.

    References
    ----------
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577 (the method, forces, virial).
    M. Deserno and C. Holm, J. Chem. Phys. 109 (1998) 7678 (mesh error analysis).
    D. M. Heyes, J. Chem. Phys. 74 (1981) 1924 (stress of the Ewald sum).
    """
    if check not in ("auto", True, False):
        raise InputError(f"check must be 'auto', True or False, got {check!r}")
    started = time.perf_counter()
    charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
    a, order = plan.alpha, plan.order
    background = warn_if_charged(crystal, plan)
    lengths = np.linalg.norm(plan.cell, axis=1)
    mesh_target = 0.5 * plan.target
    shape = plan.mesh
    mesh_error = plan.reciprocal_error
    fixed = plan.extra.get("mesh_fixed", False)
    checks = []
    threads = numba.get_num_threads()
    with thread_budget(plan.predicted_ns):
        phi_real, force_real, real_w, pairs, reach = real_space_part(plan, charges, forces, stress)
        use_subsample = check is True or (check == "auto" and subsample_seconds(plan)
                                          <= CHECK_SHARE * plan.predicted_seconds["mesh"])
        scale = 1.0
        for attempt in range(MAX_REFINEMENTS + 1):
            if check is not False and not use_subsample:
                ratio, record = proxy_check(plan, shape, order, charges, seed=attempt)
                checks.append(record)
                scale = max(1.0, ratio)
                mesh_error = scale * tuning.mesh_error(a, tuning.mesh_steps(lengths, shape), order, plan.sums,
                                                       COULOMB_CONSTANT)
                if mesh_error > mesh_target and not fixed and attempt < MAX_REFINEMENTS:
                    shape = _refined(shape, mesh_error / mesh_target, order)
                    continue
            e_mesh, phi_k, f_k, w_k = mesh_reciprocal(plan.cell, plan.frac, charges, a, shape, order,
                                                      bool(forces), bool(stress), atoms=plan.bins.order)
            if check is False or not use_subsample:
                break
            measured, record = subsample_check(plan, charges, phi_k, seed=attempt)
            checks.append(record)
            mesh_error = max(mesh_error, measured)
            if measured <= mesh_target or fixed or attempt == MAX_REFINEMENTS:
                break
            shape = _refined(shape, measured / mesh_target, order)
            mesh_error = tuning.mesh_error(a, tuning.mesh_steps(lengths, shape), order, plan.sums, COULOMB_CONSTANT)

    assembled = assemble(charges, phi_real, phi_k, e_mesh, a, plan.volume, plan.sums.net, background,
                         COULOMB_CONSTANT, (force_real, f_k) if forces else None,
                         (symmetric(real_w), symmetric(w_k)) if stress else None)
    spreading = (f"slabs of mesh planes along axis 0, {threads} threads" if threads > 1
                 else "serial (one thread)")
    params = params_of(plan, pairs, reach, shape=shape, mesh=tuple(int(k) for k in shape), order=int(order),
                       spreading=spreading, predicted_seconds=plan.predicted_seconds["mesh"], checks=checks,
                       check=checks[-1] if checks else None, mesh_error_eV=mesh_error)
    return planned_result(plan, assembled, params, started,
                          error_estimate=plan.real_error + mesh_error + plan.rounding_error)


def _refined(shape, excess, order):
    """A finer mesh for an error ``excess`` times the target (the error falls about as K^-order)."""
    import scipy.fft    # only a mesh sum needs FFTs (see forward_transform)
    grow = excess ** (1.0 / order) * 1.1
    return tuple(int(scipy.fft.next_fast_len(int(math.ceil(k * grow)), real=True)) for k in shape)


def ewald_mesh(crystal, tol=SUM_TOL, forces=False, stress=False, alpha=None, mesh=None, order=None,
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
        Fix the mesh shape (points along each vector of the reduced basis, ``result.plan.cell``).
    order : int, optional
        Fix the B-spline order (4..8; the tuner picks from 4, 6, 8).
    check : "auto", True or False
        See :func:`run_mesh`.

    Returns
    -------
    EwaldResult
        As the direct engine; ``params.method == "mesh"``; ``params.extra`` holds ``mesh``,
        ``order``, ``spreading``, ``predicted_seconds`` (of one thread), ``check`` and ``checks``.
    """
    plan = plan_module.plan_for(crystal, tol, method="mesh", alpha=alpha, mesh=mesh, order=order, d_min=d_min)
    return run_mesh(crystal, plan, forces=forces, stress=stress, check=check)
