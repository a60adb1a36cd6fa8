"""Error estimates and cost models of the Ewald engines, and the parameter choice they imply.

Everything here is a function of a few numbers (ion count, volume, charge sums, cell vectors,
tolerance); :mod:`.plan` calls it once per sum and hands the result to every engine. Nothing else
in the package chooses a splitting parameter, a cutoff or a mesh.

The user states ``tol``, the wanted error of the energy relative to the scale
``E_scale = k_e * sum(q_i^2) / d_min`` (d_min the shortest interionic distance).

Truncation errors (Kolafa & Perram, Mol. Simul. 9 (1992) 351): the root-mean-square error of the
potential at one ion, summed *coherently* over the ions (``dE = 1/2 sum|q_i| dphi``), because in
an ordered crystal the omitted shells and Bragg reflections err the same way at every equivalent
ion. With Q = sum q^2, V the volume::

    dphi_real  = q_rms sqrt(N / V) exp(-alpha^2 r_c^2) / (alpha^2 r_c^1.5)
    dphi_recip = sqrt(8 Q alpha^2 / (V k_c^3)) exp(-k_c^2 / 4 alpha^2)

Both have the form ``C alpha^-1/2 x^-3/2 exp(-x^2)`` in x = alpha r_c and x = k_c / (2 alpha), so
each cutoff is one Newton solve of ``x^2 + 1.5 ln x = L`` (monotone for x > 0).

Mesh error (smooth particle-mesh Ewald, Essmann et al., J. Chem. Phys. 103 (1995) 8577): the
B-spline interpolation of exp(i k.r) with order n on K_a points along lattice vector a errs
through aliasing, governed by the ratio of the Miller index m_a that the sum needs to K_a
(Deserno & Holm, J. Chem. Phys. 109 (1998) 7678: the error is a power of that ratio set by the
order). The Miller index reached along a at |k| = k is at most ``k |a_a| / 2 pi`` (|a_a| the
*length* of the lattice vector, not the plane spacing: in an oblique basis the two differ by large
factors, and the plane spacing underestimates the indices needed). So the estimate takes the step
``h_a = |a_a| / K_a`` in::

    dE_mesh = k_e / 2 * Q * alpha * A_n * mean_a (alpha h_a / pi)^s_n

with A_n, s_n calibrated (MESH_ERROR_MODEL, ``benchmarks/calibrate_mesh.py``) on the bundled
prototypes, rattled supercells, both also in oblique bases, random triclinic cells and strongly
skewed small cells, with a 2x margin. The sums run in a reduced basis (:mod:`.plan`), where |a_a|
is close to the plane spacing; a check against an independent direct sum guards the estimate
(:mod:`.mesh`).

Rounding: double precision resolves an energy only to about ``eps * E_scale * sqrt(terms per
ion)`` (each ion's potential is a sum of that many terms of size up to k_e q / d_min, rounded
independently); this floor is added to every estimate and a ``tol`` below it is refused.

Cost model: nanoseconds of one thread, measured on the 2-core reference machine with
``benchmarks/calibrate_cost.py`` (direct) and ``benchmarks/scaling_mesh.py --calibrate`` (mesh).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..structure.bounds import MAX_MESH_BYTES, MESH_BYTES_PER_POINT

#: Aim this far below the requested error (crystal errors are systematic, not random).
SAFETY = 0.05

#: Nanoseconds per real-space term, per (atom, stencil bin) and per (atom, k-vector) term, forces
#: included, one thread. Measured by benchmarks/calibrate_cost.py (rattled rock-salt supercells,
#: N = 512 and 4096, medians of the half-stencil kernels with the polynomial erfc and the blocked
#: reciprocal loops): 12.4-14.6 ns per real term (both orders counted), 0.73-0.94 ns per (atom, k).
REAL_PAIR_COST = 13.6
STENCIL_COST = 22.6
RECIPROCAL_TERM_COST = 0.8
#: Bins in a typical stencil (three bins per cutoff, reach 3, corners pruned).
STENCIL_BINS = 330

#: The estimates hold once the sums have many terms; never go below these.
MIN_REAL_NEIGHBOURS = 30.0
MIN_K_VECTORS = 10.0

#: Machine epsilon of float64 and the factor of the rounding floor (see the module notes). Measured
#: against 30-digit mpmath sums of random 2-8 ion cells at tol 1e-12 ... 1e-15 the achieved error
#: stays below eps E_scale sqrt(terms per ion) (1e-16 to 1.5e-15 relative against 5e-15 to 8e-15).
EPSILON = float(np.finfo(float).eps)
ROUNDING_FACTOR = 1.0

#: Mesh: spline orders the tuner considers, orders accepted when given explicitly.
TUNED_ORDERS = (4, 6, 8)
ALLOWED_ORDERS = (4, 5, 6, 7, 8)

#: Calibrated mesh error model: order -> (A_n, s_n). The exponents s_n are least-squares fits and
#: A_n twice the largest prefactor seen, both printed by benchmarks/calibrate_mesh.py, run on the
#: reduced basis with the step |a_a| / K_a over 1254 cases: the bundled prototypes as given, as
#: rattled 2x2x2 supercells and both again in an oblique basis, random triclinic cells and small
#: strongly skewed cells, alpha d_min 2 to 4.5 (largest A: 8.54, 776.6, 210.1, 1.477e4, 4972 for
#: orders 4..8; medians 4.48, 166, 89.4, 2506, 2600).
MESH_ERROR_MODEL = {4: (17.1, 4.201), 5: (1553.0, 6.816), 6: (420.0, 7.069), 7: (2.95e4, 9.247),
                    8: (9944.0, 9.816)}

#: Nanoseconds of one thread per unit of work of the mesh part (rattled rock salt, N = 4096 and
#: 32768): one (ion, mesh point) spline weight, one point x log2(points) of an FFT, and the
#: influence function and array work per mesh point.
SPLINE_POINT_NS = 1.8
FFT_POINT_LOG_NS = 0.45
MESH_POINT_NS = 8.0

#: At least this many times the spline order of mesh points along each axis.
MIN_MESH_PER_ORDER = 2

#: The tuner picks no mesh above the memory bound the plan enforces (structure/bounds.py):
#: MESH_BYTES_PER_POINT per point, at most MAX_MESH_BYTES.


@dataclass(frozen=True)
class ChargeSums:
    """What the estimates need of the charges: ion count, sum q^2 (e^2), sum |q| (e), net (e)."""

    n_atoms: int
    square_sum: float
    absolute_sum: float
    net: float

    @classmethod
    def of(cls, charges):
        charges = np.asarray(charges, dtype=float)
        return cls(len(charges), float(np.dot(charges, charges)), float(np.abs(charges).sum()),
                   float(charges.sum()))


@dataclass(frozen=True)
class DirectChoice:
    """Splitting parameter (1/Å), cutoffs (Å, 1/Å), their predicted errors (eV) and cost (ns)."""

    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    real_error: float
    reciprocal_error: float
    predicted_ns: float


@dataclass(frozen=True)
class MeshChoice:
    """Splitting parameter, real cutoff, mesh shape and order, errors (eV), cost (ns)."""

    alpha: float
    real_cutoff: float
    shape: tuple
    order: int
    real_error: float
    mesh_error: float
    predicted_ns: float


def check_tol(tol):
    if isinstance(tol, bool) or not (isinstance(tol, (int, float, np.floating)) and math.isfinite(tol) and 0 < tol < 1):
        raise InputError(f"tol must be a number between 0 and 1, got {tol!r}")
    return float(tol)


def check_alpha(alpha):
    if alpha is None:
        return None
    if isinstance(alpha, bool) or not (isinstance(alpha, (int, float, np.floating)) and math.isfinite(alpha)
                                       and alpha > 0):
        raise InputError(f"alpha must be a positive number (1/Å), got {alpha!r}")
    return float(alpha)


def _real_prefactor(sums, volume, k_e):
    q_rms = math.sqrt(sums.square_sum / sums.n_atoms)
    return k_e * 0.5 * sums.absolute_sum * q_rms * math.sqrt(sums.n_atoms / volume)


def _recip_prefactor(sums, volume, k_e):
    return k_e * 0.5 * sums.absolute_sum * math.sqrt(sums.square_sum / volume)


def real_space_error(alpha, r_cut, sums, volume, k_e):
    """Truncation error of the real-space energy, eV (Kolafa–Perram, coherent over the ions)."""
    prefactor = _real_prefactor(sums, volume, k_e)
    if isinstance(alpha, float) and isinstance(r_cut, float):
        return _real_error(alpha, r_cut, prefactor)
    return _real_error(np.asarray(alpha, dtype=float), r_cut, prefactor, np.exp)


def reciprocal_space_error(alpha, k_cut, sums, volume, k_e):
    """Truncation error of the reciprocal-space energy, eV (Kolafa–Perram, coherent over the ions)."""
    prefactor = _recip_prefactor(sums, volume, k_e)
    if isinstance(alpha, float) and isinstance(k_cut, float):
        return _reciprocal_error(alpha, k_cut, prefactor)
    return _reciprocal_error(np.asarray(alpha, dtype=float), k_cut, prefactor, np.exp, np.sqrt)


def _solve_gaussian_tail(level):
    """x >= 1 with x^2 + 1.5 ln x = level (x = 1 where level <= 1), elementwise, by Newton."""
    level = np.asarray(level, dtype=float)
    x = np.sqrt(np.maximum(level, 1.0))
    for _ in range(12):
        step = (x * x + 1.5 * np.log(x) - level) / (2.0 * x + 1.5 / x)
        x = np.maximum(x - step, 1.0)
        if np.max(np.abs(step)) < 1e-10 * np.max(x):
            break
    return x


def cutoffs_for(alpha, real_target, recip_target, sums, volume, k_e):
    """Smallest real and reciprocal cutoffs meeting each error share at ``alpha`` (arrays), with the
    minimum term counts respected."""
    alpha = np.asarray(alpha, dtype=float)
    density = sums.n_atoms / volume
    r_min = (3.0 * MIN_REAL_NEIGHBOURS / (4.0 * math.pi * density)) ** (1.0 / 3.0)
    k_min = (MIN_K_VECTORS * 12.0 * math.pi ** 2 / volume) ** (1.0 / 3.0)
    x = _solve_gaussian_tail(np.log(_real_prefactor(sums, volume, k_e) / (real_target * np.sqrt(alpha))))
    y = _solve_gaussian_tail(np.log(_recip_prefactor(sums, volume, k_e) / (recip_target * np.sqrt(alpha))))
    return np.maximum(x / alpha, r_min), np.maximum(2.0 * alpha * y, k_min)


def _direct_cost_coefficients(n_atoms, volume):
    """``(real, reciprocal, fixed)`` with the predicted direct cost ``real r_c^3 + reciprocal k_c^3 + fixed`` (ns)."""
    density = n_atoms / volume
    real = REAL_PAIR_COST * n_atoms * (4.0 / 3.0) * math.pi * density
    reciprocal = RECIPROCAL_TERM_COST * n_atoms * (4.0 / 3.0) * math.pi * volume / (16.0 * math.pi ** 3)
    return real, reciprocal, STENCIL_COST * STENCIL_BINS * n_atoms


def direct_cost_ns(r_cut, k_cut, n_atoms, volume):
    """Predicted cost of one energy + potentials + forces evaluation, ns of one thread."""
    real, reciprocal, fixed = _direct_cost_coefficients(n_atoms, volume)
    return real * np.asarray(r_cut) ** 3 + reciprocal * np.asarray(k_cut) ** 3 + fixed


def _tail_root(level, power=1.5, start=None):
    """Scalar :func:`_solve_gaussian_tail`: x >= 1 with x^2 + power ln x = level, by Newton (from
    ``start`` when a nearby root is known)."""
    if level <= 1.0:
        return 1.0
    if start is None:
        start = math.sqrt(max(level - 0.5 * power * math.log(level), 1.0))   # ln x ~ ln(level) / 2
    x = start
    for _ in range(12):
        step = (x * x + power * math.log(x) - level) / (2.0 * x + power / x)
        x = max(x - step, 1.0)
        if abs(step) < 1e-7 * x:   # converging quadratically: x is now good to ~1e-14
            break
    return x


def _real_error(alpha, r_cut, prefactor, exp=math.exp):
    """:func:`real_space_error` with its prefactor worked out (``exp``: NumPy's for arrays)."""
    return prefactor * exp(-(alpha * r_cut) ** 2) / (alpha ** 2 * r_cut ** 1.5)


def _reciprocal_error(alpha, k_cut, prefactor, exp=math.exp, sqrt=math.sqrt):
    """:func:`reciprocal_space_error` with its prefactor worked out (``exp``, ``sqrt``: NumPy's for arrays)."""
    return prefactor * sqrt(8.0 * alpha ** 2 / k_cut ** 3) * exp(-k_cut ** 2 / (4.0 * alpha ** 2))


def choose_direct(target, sums, volume, d_min, k_e, alpha=None) -> DirectChoice:
    """Splitting parameter and cutoffs of the direct sum for an energy error ``target`` (eV).

    The error shares are half the target each, times :data:`SAFETY`. With x = alpha r_c and
    y = k_c / (2 alpha) from the Newton solves of the error estimates (module notes), the cost
    ``c_r (x / alpha)^3 + c_k (2 alpha y)^3`` is least where ``d cost / d ln alpha = 0``::

        alpha^6 = c_r x^3 (1 + e_x) / (8 c_k y^3 (1 - e_y)),   e_z = 1 / (2 (2 z^2 + 1.5))

        (e_z = -d ln z / d ln alpha, small since z depends on alpha only through ln alpha),

    solved by fixed-point iteration (a few steps: the right side hardly depends on alpha). The
    smallest cutoffs (MIN_REAL_NEIGHBOURS, MIN_K_VECTORS) put kinks into the cost; where one
    binds at that alpha, the optimum lies at the alpha where it starts to bind, also found by
    one more Newton solve, and the cheapest of the (up to) three is taken. All of it scalar
    arithmetic: no scan over alpha. ``d_min`` does not enter (the plan keeps choices by the
    other arguments).

    References
    ----------
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    """
    share = 0.5 * target * SAFETY
    density = sums.n_atoms / volume
    r_min = (3.0 * MIN_REAL_NEIGHBOURS / (4.0 * math.pi * density)) ** (1.0 / 3.0)
    k_min = (MIN_K_VECTORS * 12.0 * math.pi ** 2 / volume) ** (1.0 / 3.0)
    real_prefactor = _real_prefactor(sums, volume, k_e)
    recip_prefactor = _recip_prefactor(sums, volume, k_e)
    real_level = math.log(real_prefactor / share)
    recip_level = math.log(recip_prefactor / share)
    c_real, c_recip, fixed = _direct_cost_coefficients(sums.n_atoms, volume)
    last = [None, None]   # the latest roots: Newton starts there (alpha moves little between calls)

    def x_of(a):
        last[0] = _tail_root(real_level - 0.5 * math.log(a), 1.5, last[0])
        return last[0]

    def y_of(a):
        last[1] = _tail_root(recip_level - 0.5 * math.log(a), 1.5, last[1])
        return last[1]

    def stationary(a):
        x, y = x_of(a), y_of(a)
        e_x, e_y = 0.5 / (2.0 * x * x + 1.5), 0.5 / (2.0 * y * y + 1.5)
        return (c_real * x ** 3 * (1.0 + e_x) / (8.0 * c_recip * y ** 3 * (1.0 - e_y))) ** (1.0 / 6.0)

    if alpha is not None:
        candidates = [float(alpha)]
    else:
        best = math.sqrt(math.pi) * (sums.n_atoms / volume ** 2) ** (1.0 / 6.0)
        for _ in range(50):
            best, previous = stationary(best), best
            if abs(best - previous) <= 1e-7 * previous:   # the cost is flat here; the cutoffs follow alpha exactly
                break
        candidates = [best]
        # where a smallest cutoff binds, the alpha at which it starts to: x / alpha = r_min gives
        # x^2 + 2 ln x = level_r + ln(r_min) / 2, and 2 alpha y = k_min gives y^2 + ln y = level_k - ln(k_min / 2) / 2
        if x_of(best) / best < r_min:
            candidates.append(_tail_root(real_level + 0.5 * math.log(r_min), 2.0) / r_min)
        if 2.0 * best * y_of(best) < k_min:
            candidates.append(0.5 * k_min / _tail_root(recip_level - 0.5 * math.log(0.5 * k_min), 1.0))
    best = None
    for a in candidates:
        r, k = max(x_of(a) / a, r_min), max(2.0 * a * y_of(a), k_min)
        cost = c_real * r ** 3 + c_recip * k ** 3 + fixed
        if best is None or cost < best[3]:
            best = (a, r, k, cost)
    a, r, k, cost = best
    return DirectChoice(a, r, k, _real_error(a, r, real_prefactor) / SAFETY,
                        _reciprocal_error(a, k, recip_prefactor) / SAFETY, float(cost))


def mesh_error(alpha, steps, order, sums, k_e):
    """Predicted error of the mesh energy, eV, for steps ``h_a = |a_a| / K_a`` (Å).

    ``k_e / 2 * Q * alpha * A_n * mean_a (alpha h_a / pi)^s_n`` (see the module notes; the form is
    the aliasing picture of Deserno and Holm, the constants are calibrated).

    References
    ----------
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577; M. Deserno and C. Holm, J. Chem. Phys.
    109 (1998) 7678.
    """
    prefactor, power = MESH_ERROR_MODEL[order]
    mean = sum((alpha * h / math.pi) ** power for h in steps) / 3.0
    return k_e * 0.5 * sums.square_sum * alpha * prefactor * mean


def mesh_shape_for(alpha, order, target, lengths, sums, k_e):
    """Smallest FFT-friendly mesh meeting ``target`` (eV) at this alpha and order: equal steps
    ``|a_a| / K_a`` along every lattice vector, at least two spline widths per axis."""
    import scipy.fft    # here, not at the top: only a mesh sum needs it, and it takes ~0.1 s to import
    prefactor, power = MESH_ERROR_MODEL[order]
    x = (target / (k_e * 0.5 * sums.square_sum * alpha * prefactor)) ** (1.0 / power)
    h = x * math.pi / alpha
    return tuple(int(scipy.fft.next_fast_len(max(MIN_MESH_PER_ORDER * order, int(math.ceil(length / h))),
                                             real=True)) for length in lengths)


def mesh_steps(lengths, shape):
    return tuple(float(lengths[i]) / int(shape[i]) for i in range(3))


def mesh_cost_ns(r_cut, shape, order, n_atoms, volume):
    """Predicted cost of one mesh evaluation with forces, ns of one thread: the real-space part as
    in the direct engine, two B-spline passes over order^3 points per ion, two FFTs, the mesh work."""
    points = float(math.prod(shape))
    return (direct_cost_ns(r_cut, 0.0, n_atoms, volume)
            + SPLINE_POINT_NS * 2.0 * n_atoms * order ** 3
            + FFT_POINT_LOG_NS * 2.0 * points * math.log2(max(points, 2.0))
            + MESH_POINT_NS * points)


def choose_mesh(target, sums, volume, lengths, d_min, k_e, alpha=None, mesh=None, order=None) -> MeshChoice:
    """Splitting parameter, real cutoff, mesh and spline order of the mesh engine for an energy
    error ``target`` (eV): half to the real part (times :data:`SAFETY`), half to the mesh.

    ``lengths`` are the lattice-vector lengths of the (reduced) cell the mesh is laid on.
    ``alpha``, ``mesh`` (3 ints) and ``order`` may be fixed.

    References
    ----------
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577; M. Deserno and C. Holm,
    J. Chem. Phys. 109 (1998) 7678; A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    """
    real_share = 0.5 * target * SAFETY
    mesh_share = 0.5 * target
    if order is not None:
        if order not in ALLOWED_ORDERS:
            raise InputError(f"spline order must be one of {ALLOWED_ORDERS}, got {order!r}")
        orders = (int(order),)
    else:
        orders = TUNED_ORDERS
    if mesh is not None:
        try:
            mesh = tuple(int(k) for k in np.broadcast_to(np.asarray(mesh, dtype=np.int64), (3,)))
        except (TypeError, ValueError):
            raise InputError(f"mesh must be one or three whole numbers, got {mesh!r}") from None
        if min(mesh) < max(orders):
            raise InputError(f"mesh {mesh} must have at least as many points along each axis as the "
                             f"spline order ({max(orders)})")
    alphas = np.array([alpha]) if alpha is not None else (3.0 / d_min) * np.geomspace(0.2, 3.0, 41)
    r_cuts, _ = cutoffs_for(alphas, real_share, 1.0, sums, volume, k_e)
    candidates = []
    for n in orders:
        for a, r_cut in zip(alphas, r_cuts):
            a, r_cut = float(a), float(r_cut)
            shape = mesh if mesh is not None else mesh_shape_for(a, n, mesh_share, lengths, sums, k_e)
            candidates.append(MeshChoice(
                a, r_cut, shape, n, float(real_space_error(a, r_cut, sums, volume, k_e)) / SAFETY,
                mesh_error(a, mesh_steps(lengths, shape), n, sums, k_e),
                mesh_cost_ns(r_cut, shape, n, sums.n_atoms, volume)))
    if mesh is not None:
        good = [c for c in candidates if c.mesh_error <= mesh_share]
        candidates = good or [min(candidates, key=lambda c: c.mesh_error)]
    else:
        small = [c for c in candidates if MESH_BYTES_PER_POINT * np.prod(c.shape) <= MAX_MESH_BYTES]
        candidates = small or [min(candidates, key=lambda c: np.prod(c.shape))]
    return min(candidates, key=lambda c: c.predicted_ns)


def rounding_error(energy_scale, terms_per_ion):
    """What double precision can resolve of an energy with this scale (eV) and terms per ion."""
    return ROUNDING_FACTOR * EPSILON * energy_scale * math.sqrt(max(terms_per_ion, 1.0))
