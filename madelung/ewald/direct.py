"""The direct Ewald sum: energy, site potentials, forces and stress of a periodic array of point charges.

    E = E_real + E_reciprocal + E_self + E_background

    E_real       = k_e/2 sum_i sum_j,n' q_i q_j erfc(alpha r_ijn) / r_ijn
    E_reciprocal = k_e (2 pi / V) sum_{k != 0} exp(-k^2 / 4 alpha^2) / k^2 |S(k)|^2
    E_self       = -k_e alpha / sqrt(pi) sum_i q_i^2
    E_background = -k_e pi Q^2 / (2 V alpha^2)        (only for a net charge Q)

The site potential phi_i (V) excludes the ion's own charge, so E = 1/2 sum_i q_i phi_i.
A cell with net charge Q is summed with a uniform neutralizing background (the tin-foil,
conducting boundary convention at infinity); the result says so and a warning is issued.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..errors import MadelungWarning
from ..geometry import build_bins, nearest_neighbour_distances, thread_budget, wrapped_fractional
from ..units import COULOMB_CONSTANT
from . import kernels, tuning

#: Net charges below this (e) are taken as zero: rounding in the charges, not a charged cell.
NEUTRAL_TOLERANCE = 1e-8

@dataclass(frozen=True)
class EwaldParameters:
    """How a sum was run.

    Attributes
    ----------
    method : "direct" (Ewald sum) or "mesh" (particle-mesh Ewald).
    alpha : splitting parameter, 1/Å.
    real_cutoff : real-space cutoff, Å.
    reciprocal_cutoff : reciprocal-space cutoff |k|, 1/Å.
    real_space_pairs : number of (i, j, image) terms inside the real-space cutoff.
    k_vectors : number of reciprocal vectors used (half of k-space; -k counted by symmetry).
    image_reach : bins searched along each lattice vector around each ion.
    """

    method: str
    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    real_space_pairs: int
    k_vectors: int
    image_reach: tuple
    extra: dict = field(default_factory=dict)


@dataclass(frozen=True)
class EwaldResult:
    """Electrostatics of one crystal.

    Attributes
    ----------
    energy : electrostatic energy of the cell, eV (signed; negative for a bound ionic crystal).
    potentials : (N,) electrostatic potential at each site from all other charges, V.
    forces : (N, 3) eV/Å, or None if not asked for.
    stress : (3, 3) eV/Å^3 with ASE's sign (dE/d strain / V), or None if not asked for.
    params : the splitting parameter and cutoffs used.
    error_estimate : predicted truncation error of ``energy``, eV.
    tol : the requested relative error.
    energy_scale : k_e sum(q^2) / d_min, eV; ``tol`` is relative to this.
    components : real, reciprocal, self and background parts of the energy, eV.
    net_charge : total charge of the cell, e.
    background : True when a neutralizing background was applied (net charge not zero).
    n_atoms : number of ions.
    seconds : wall time of the sum, s.
    """

    energy: float
    potentials: np.ndarray
    forces: np.ndarray | None
    stress: np.ndarray | None
    params: EwaldParameters
    error_estimate: float
    tol: float
    energy_scale: float
    components: dict
    net_charge: float
    background: bool
    n_atoms: int
    seconds: float

    @property
    def energy_per_atom(self) -> float:
        """eV per ion."""
        return self.energy / self.n_atoms


def reciprocal_vectors(cell, k_cut):
    """Half-space reciprocal vectors with 0 < |k| <= k_cut.

    Returns ``(hkl (M, 3) int64, k (M, 3) 1/Å, hmax (3,) int64)``; of each pair k, -k only the
    one with the first non-zero Miller index positive is kept.
    """
    recip = 2.0 * math.pi * np.linalg.inv(cell).T  # rows b_i with a_i . b_j = 2 pi delta_ij
    hmax = np.floor(k_cut * np.linalg.norm(cell, axis=1) / (2.0 * math.pi)).astype(np.int64)
    rows = []
    k2_cut = k_cut * k_cut
    for h in range(0, hmax[0] + 1):
        ks = np.arange(-hmax[1], hmax[1] + 1)
        ls = np.arange(-hmax[2], hmax[2] + 1)
        kk, ll = np.meshgrid(ks, ls, indexing="ij")
        hkl = np.stack([np.full(kk.size, h), kk.ravel(), ll.ravel()], axis=1)
        if h == 0:
            keep = (hkl[:, 1] > 0) | ((hkl[:, 1] == 0) & (hkl[:, 2] > 0))
            hkl = hkl[keep]
        kv = hkl @ recip
        rows.append(hkl[np.einsum("ij,ij->i", kv, kv) <= k2_cut])
    hkl = np.ascontiguousarray(np.concatenate(rows).astype(np.int64)) if rows else np.zeros((0, 3), np.int64)
    kvectors = np.ascontiguousarray(hkl @ recip)
    return hkl, kvectors, hmax


def _as_crystal_arrays(crystal):
    cell = np.ascontiguousarray(crystal.cell, dtype=np.float64)
    positions = np.ascontiguousarray(crystal.positions, dtype=np.float64)
    charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
    return cell, positions, charges


def shortest_distance(crystal) -> float:
    """Shortest interionic distance (images included), Å."""
    to_any, _, _ = nearest_neighbour_distances(crystal.cell, crystal.positions, crystal.charges)
    return float(np.min(to_any))


def warn_if_charged(crystal, net, charge_sq_sum) -> bool:
    """Whether the cell carries a net charge (then a neutralizing background is added, with a warning)."""
    background = abs(net) > NEUTRAL_TOLERANCE * max(1.0, math.sqrt(charge_sq_sum))
    if background:
        warnings.warn(f"{crystal.source + ': ' if crystal.source else ''}the cell carries a net charge of "
                      f"{net:+.6g} e; a uniform neutralizing background was added", MadelungWarning,
                      stacklevel=4)
    return background


def real_space_part(cell, positions, charges, alpha, r_cut, forces, stress):
    """Real-space sum in Gaussian units, in the original atom order.

    Returns ``(potentials (N,), forces (N, 3) or None, virial (6,) or None, pairs, image reach)``.
    """
    bins = build_bins(cell, positions, r_cut)
    phi_r, f_r, w_r, pairs = kernels.real_space_terms(
        bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.offsets, bins.bin_of,
        bins.bin_start, alpha, r_cut, bool(forces), bool(stress))
    return (bins.unsorted(phi_r), bins.unsorted(f_r) if forces else None, w_r.sum(axis=0) if stress else None,
            int(pairs), tuple(int(x) for x in bins.reach))


def symmetric(w):
    """3x3 tensor from its six components xx, yy, zz, yz, xz, xy."""
    return np.array([[w[0], w[5], w[4]], [w[5], w[1], w[3]], [w[4], w[3], w[2]]])


def assemble(charges, phi_real, phi_recip, e_recip, alpha, volume, net, background, k_e,
             force_parts=None, virial_parts=None):
    """Add the self and background terms and the units.

    ``phi_real``, ``phi_recip`` (e/Å), ``e_recip`` (e^2/Å), the real and reciprocal ``force_parts``
    (e^2/Å^2) and ``virial_parts`` (3x3 dE/d strain, e^2/Å) are in Gaussian units; the parts are
    None when not computed. Returns ``(potentials V, energy eV, components eV, forces eV/Å or
    None, stress eV/Å^3 or None)``, the arrays read-only.
    """
    q2 = float(np.dot(charges, charges))
    self_potential = -2.0 * alpha / math.sqrt(math.pi) * charges
    background_potential = -math.pi * net / (volume * alpha * alpha) if background else 0.0
    potentials = k_e * (phi_real + phi_recip + self_potential + background_potential)
    components = {
        "real": 0.5 * k_e * float(np.dot(charges, phi_real)),
        "reciprocal": k_e * e_recip,
        "self": -k_e * alpha / math.sqrt(math.pi) * q2,
        "background": -k_e * math.pi * net * net / (2.0 * volume * alpha * alpha) if background else 0.0,
    }
    forces = None if force_parts is None else k_e * (force_parts[0] + force_parts[1])
    stress = None
    if virial_parts is not None:
        bg_virial = (math.pi * net * net / (2.0 * volume * alpha * alpha)) * np.eye(3) if background else 0.0
        stress = k_e * (virial_parts[0] + virial_parts[1] + bg_virial) / volume
    for array in (potentials, forces, stress):
        if array is not None:
            array.setflags(write=False)
    return potentials, sum(components.values()), components, forces, stress


def ewald_direct(crystal, tol=1e-10, forces=False, stress=False, alpha=None, d_min=None) -> EwaldResult:
    """Ewald sum with cutoffs chosen for relative energy error ``tol``.

    See :func:`madelung.ewald` for the parameters.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253 (the method).
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (truncation errors, used for tuning).
    D. M. Heyes, J. Chem. Phys. 74 (1981) 1924 (pressure/stress of the Ewald sum).
    """
    started = time.perf_counter()
    cell, positions, charges = _as_crystal_arrays(crystal)
    n = len(charges)
    volume = abs(float(np.linalg.det(cell)))
    k_e = COULOMB_CONSTANT
    q2 = float(np.dot(charges, charges))
    net = float(charges.sum())
    if d_min is None:
        d_min = shortest_distance(crystal)
    choice = tuning.choose(tol, n, volume, q2, float(np.abs(charges).sum()), d_min, k_e, alpha=alpha)
    a = choice.alpha

    background = warn_if_charged(crystal, net, q2)

    with thread_budget(choice.predicted_cost):
        phi_real, force_real, real_w, pairs, reach = real_space_part(
            cell, positions, charges, a, choice.real_cutoff, forces, stress)

        # reciprocal space
        hkl, kvectors, hmax = reciprocal_vectors(cell, choice.reciprocal_cutoff)
        frac = wrapped_fractional(cell, positions)
        k2 = np.einsum("ij,ij->i", kvectors, kvectors)
        gauss = np.exp(-k2 / (4.0 * a * a)) / k2
        weights = np.ascontiguousarray(2.0 * (4.0 * math.pi / volume) * gauss)
        if len(hkl):
            s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
            phi_k, f_k = kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights,
                                                       s_re, s_im, bool(forces))
            s2 = s_re * s_re + s_im * s_im
        else:
            s2 = np.zeros(0)
            phi_k, f_k = np.zeros(n), np.zeros((n, 3))

    recip_virial = None
    if stress:
        # d E_recip / d strain_ab = sum_half 2 w(k)/2 |S|^2 [-delta_ab + 2 k_a k_b (1/k^2 + 1/(4 alpha^2))]
        half = 0.5 * weights * s2
        factor = 2.0 * (1.0 / k2 + 1.0 / (4.0 * a * a)) * half
        recip_virial = -half.sum() * np.eye(3) + np.einsum("m,ma,mb->ab", factor, kvectors, kvectors)
    potentials, energy, components, force_array, stress_array = assemble(
        charges, phi_real, phi_k, 0.5 * float(np.dot(weights, s2)), a, volume, net, background, k_e,
        (force_real, f_k) if forces else None, (symmetric(real_w), recip_virial) if stress else None)

    params = EwaldParameters(
        method="direct", alpha=a, real_cutoff=choice.real_cutoff,
        reciprocal_cutoff=choice.reciprocal_cutoff, real_space_pairs=int(pairs),
        k_vectors=int(len(hkl)), image_reach=reach)
    return EwaldResult(
        energy=energy, potentials=potentials, forces=force_array, stress=stress_array, params=params,
        error_estimate=choice.error_estimate, tol=float(tol), energy_scale=k_e * q2 / d_min,
        components=components, net_charge=net, background=bool(background), n_atoms=n,
        seconds=time.perf_counter() - started)
