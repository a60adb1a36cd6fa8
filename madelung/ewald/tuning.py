"""Choosing the Ewald splitting parameter and cutoffs for a stated accuracy.

The user states ``tol``, the wanted error of the energy relative to the scale
``E_scale = k_e * sum(q_i^2) / d_min`` (d_min the shortest interionic distance).
We pick the splitting parameter alpha that minimises the predicted cost, with the
real-space cutoff and the reciprocal cutoff each set so that its truncation-error
estimate is a share of the target.

Truncation-error estimates (Kolafa & Perram, Mol. Simul. 9 (1992) 351, for the energy,
Q = sum q_i^2, V the volume, L = V^(1/3), K = k_cut L / (2 pi))::

    dE_real  ~ k_e Q sqrt(r_cut / (2 V)) (alpha r_cut)^-2 exp(-alpha^2 r_cut^2)
    dE_recip ~ k_e Q alpha / pi^2 K^(-3/2) exp(-(pi K / (alpha L))^2)

These are root-mean-square estimates for disordered charges. A crystal's errors are
systematic (whole shells or Bragg reflections left out), so we aim ``SAFETY`` below the
target; the convergence benchmark and the tests check the achieved error against
independent high-precision values for every bundled prototype.

Cost model: the real-space sum costs ``REAL_PAIR_COST`` nanoseconds per (i, j, image) term inside
the cutoff (counting both orders, as in the double sum) plus ``STENCIL_COST`` per atom and bin of
the stencil searched around it; the reciprocal sum costs ``RECIPROCAL_TERM_COST`` nanoseconds per
atom and half-space k-vector (structure factors and site terms together). All were measured on
one thread of the 2-core reference machine with ``benchmarks/calibrate_cost.py``; the predicted
cost is in nanoseconds of one thread.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

#: Aim this far below the requested error (crystal errors are systematic, not random).
SAFETY = 0.05

#: Nanoseconds per real-space term, per (atom, stencil bin) and per (atom, k-vector) term, forces
#: included, one thread. Measured by benchmarks/calibrate_cost.py (rattled rock-salt supercells,
#: N = 512 and 4096): 20-35 ns per real term overall at r_cut 18-12 Å, 3.8-4.3 ns per (atom, k).
REAL_PAIR_COST = 13.6
STENCIL_COST = 22.6
RECIPROCAL_TERM_COST = 4.0
#: Bins in a typical stencil (three bins per cutoff, reach 3, corners pruned).
STENCIL_BINS = 330

#: The estimates hold once the sums have many terms; never go below these.
MIN_REAL_NEIGHBOURS = 30.0
MIN_K_VECTORS = 10.0

@dataclass(frozen=True)
class Choice:
    """Splitting parameter (1/Å), cutoffs (Å, 1/Å) and their predicted errors (eV) and cost."""

    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    real_error: float
    reciprocal_error: float
    predicted_cost: float  # ns of one thread

    @property
    def error_estimate(self) -> float:
        return self.real_error + self.reciprocal_error


def real_space_error(alpha, r_cut, n_atoms, volume, charge_sq_sum, charge_abs_sum, k_e):
    """Truncation error of the real-space energy, eV (works on arrays of alpha and r_cut).

    Kolafa and Perram's root-mean-square error of the potential at one ion from the omitted
    pairs, ``dphi = q_rms sqrt(rho) exp(-alpha^2 r_cut^2) / (alpha^2 r_cut^1.5)``, summed coherently
    over the ions, ``dE = 1/2 sum|q_i| dphi``: in an ordered crystal the omitted shells err the
    same way at every equivalent ion, so the errors add rather than average out.
    """
    q_rms = math.sqrt(charge_sq_sum / n_atoms)
    dphi = q_rms * math.sqrt(n_atoms / volume) * np.exp(-(alpha * r_cut) ** 2) / (alpha ** 2 * r_cut ** 1.5)
    return k_e * 0.5 * charge_abs_sum * dphi


def reciprocal_space_error(alpha, k_cut, n_atoms, volume, charge_sq_sum, charge_abs_sum, k_e):
    """Truncation error of the reciprocal-space energy, eV (works on arrays of alpha and k_cut).

    As for :func:`real_space_error`: the root-mean-square potential error at one ion from the
    omitted k-vectors, ``dphi = sqrt(8 Q alpha^2 / (V k_cut^3)) exp(-k_cut^2 / 4 alpha^2)``
    (Q = sum q^2), summed coherently over the ions.
    """
    dphi = np.sqrt(8.0 * charge_sq_sum * alpha ** 2 / (volume * k_cut ** 3)) \
        * np.exp(-k_cut ** 2 / (4.0 * alpha ** 2))
    return k_e * 0.5 * charge_abs_sum * dphi


def _solve_decreasing(func, target, low, high):
    """Smallest x in [low, high] with func(x) <= target, for func decreasing there; elementwise
    bisection in log x over arrays of starting brackets."""
    low = np.array(low, dtype=float)
    high = np.array(high, dtype=float)
    for _ in range(60):
        short = func(high) > target
        if not short.any():
            break
        high = np.where(short, 2.0 * high, high)
    else:
        raise InputError("cannot reach the requested accuracy; is tol too small?")
    done = func(low) <= target
    for _ in range(80):
        mid = np.sqrt(low * high)
        above = func(mid) > target
        low = np.where(above, mid, low)
        high = np.where(above, high, mid)
        if np.all(high / low < 1.0 + 1e-6):  # cutoffs need no more digits than this
            break
    return np.where(done, low, high)


def cutoffs_for(alpha, target_real, target_recip, stats):
    """Smallest cutoffs meeting each error share at this alpha (scalar or array), respecting the
    minimum term counts."""
    n_atoms, volume = stats[0], stats[1]
    alpha = np.asarray(alpha, dtype=float)
    density = n_atoms / volume
    r_min = (3.0 * MIN_REAL_NEIGHBOURS / (4.0 * math.pi * density)) ** (1.0 / 3.0)
    # half-space k-vector count = (4/3) pi k^3 V / (8 pi^3) / 2
    k_min = (MIN_K_VECTORS * 12.0 * math.pi ** 2 / volume) ** (1.0 / 3.0)
    # beyond these the functions are monotone decreasing in the cutoff
    r_cut = _solve_decreasing(lambda r: real_space_error(alpha, r, *stats),
                              target_real, np.maximum(r_min, 1.0 / alpha), 100.0 / alpha)
    k_cut = _solve_decreasing(lambda k: reciprocal_space_error(alpha, k, *stats),
                              target_recip, np.maximum(k_min, 2.0 * alpha), 200.0 * alpha)
    if r_cut.ndim == 0:
        return float(r_cut), float(k_cut)
    return r_cut, k_cut


def predicted_cost(r_cut, k_cut, n_atoms, volume):
    """Predicted cost of one energy + potentials + forces evaluation, ns of one thread (scalar or array)."""
    density = n_atoms / volume
    real_pairs = n_atoms * (4.0 / 3.0) * math.pi * r_cut ** 3 * density
    k_vectors = (4.0 / 3.0) * math.pi * k_cut ** 3 * volume / (16.0 * math.pi ** 3)
    return (REAL_PAIR_COST * real_pairs + STENCIL_COST * STENCIL_BINS * n_atoms
            + RECIPROCAL_TERM_COST * n_atoms * k_vectors)


def choose(tol, n_atoms, volume, charge_sq_sum, charge_abs_sum, d_min, k_e, alpha=None) -> Choice:
    """Choose alpha and both cutoffs for relative energy error ``tol``.

    Parameters
    ----------
    tol : float
        Target error of the energy relative to ``k_e * sum(q^2) / d_min``.
    n_atoms, volume, charge_sq_sum, charge_abs_sum, d_min : number of ions, Å^3, e^2, e, Å.
    k_e : Coulomb constant, eV·Å.
    alpha : float, optional
        Fix the splitting parameter (1/Å) instead of minimising the cost.

    References
    ----------
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (error estimates).
    """
    if not (isinstance(tol, (int, float)) and math.isfinite(tol) and 0 < tol < 1):
        raise InputError(f"tol must be a number between 0 and 1, got {tol!r}")
    if charge_sq_sum <= 0:
        raise InputError("all charges are zero; there is no electrostatic energy to compute")
    scale = k_e * charge_sq_sum / d_min
    target = tol * scale * SAFETY
    share = 0.5 * target

    stats = (n_atoms, volume, charge_sq_sum, charge_abs_sum, k_e)

    def make(alphas):
        r_cut, k_cut = cutoffs_for(alphas, share, share, stats)
        cost = predicted_cost(r_cut, k_cut, n_atoms, volume)
        best = int(np.argmin(cost))
        a, r, k = float(alphas[best]), float(r_cut[best]), float(k_cut[best])
        return Choice(a, r, k, float(real_space_error(a, r, *stats)) / SAFETY,
                      float(reciprocal_space_error(a, k, *stats)) / SAFETY, float(cost[best]))

    if alpha is not None:
        if not (math.isfinite(alpha) and alpha > 0):
            raise InputError(f"alpha must be a positive number (1/Å), got {alpha!r}")
        return make(np.array([float(alpha)]))
    # around the usual balance point sqrt(pi) (N / V^2)^(1/6), then refined near the best
    centre = math.sqrt(math.pi) * (n_atoms / volume ** 2) ** (1.0 / 6.0)
    coarse = make(centre * np.geomspace(0.1, 10.0, 61))
    return make(coarse.alpha * np.geomspace(0.93, 1.075, 15))
