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
from .geometry import thread_budget
from ..units import COULOMB_CONSTANT
from ._kernels import kernels
from . import plan as plan_module
from ..defaults import SUM_TOL

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

    def to_dict(self) -> dict:
        """JSON-ready: the engine, alpha 1/Å, cutoffs (Å, 1/Å), terms summed, and the engine's extras."""
        return {"method": self.method, "alpha_per_angstrom": self.alpha, "real_cutoff_angstrom": self.real_cutoff,
                "reciprocal_cutoff_per_angstrom": self.reciprocal_cutoff, "real_space_pairs": self.real_space_pairs,
                "k_vectors": self.k_vectors,
                **{k: list(v) if isinstance(v, tuple) else v for k, v in self.extra.items()}}


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
    plan : the :class:`~madelung.sums.plan.SumPlan` the sum ran with.
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
    plan: object = None

    @property
    def energy_per_atom(self) -> float:
        """eV per ion."""
        return self.energy / self.n_atoms

    def to_dict(self) -> dict:
        """JSON-ready: energies eV, potentials V, forces eV/Å, stress eV/Å^3, the plan's record."""
        def listed(array):
            return None if array is None else np.asarray(array).tolist()

        return {"energy_eV": self.energy, "energy_per_atom_eV": self.energy_per_atom,
                "components_eV": dict(self.components), "error_estimate_eV": self.error_estimate,
                "tol": self.tol, "energy_scale_eV": self.energy_scale, "net_charge_e": self.net_charge,
                "background": self.background, "n_atoms": self.n_atoms, "seconds": self.seconds,
                "potentials_V": listed(self.potentials), "forces_eV_per_angstrom": listed(self.forces),
                "stress_eV_per_cubic_angstrom": listed(self.stress),
                "parameters": self.params.to_dict()}


def warn_if_charged(crystal, plan) -> bool:
    """Whether the cell carries a net charge (then a neutralizing background is added, with a warning)."""
    background, net = plan.background, plan.sums.net
    if background:
        warnings.warn(f"{crystal.source + ': ' if crystal.source else ''}the cell carries a net charge of "
                      f"{net:+.6g} e; a uniform neutralizing background was added", MadelungWarning,
                      stacklevel=4)
    return background


def real_space_part(plan, charges, forces, stress):
    """Real-space sum in Gaussian units, in the original atom order, on the plan's bins.

    Returns ``(potentials (N,), forces (N, 3) or None, virial (6,) or None, pairs, image reach)``.
    """
    bins = plan.bins
    phi_r, f_r, w_r, pairs = kernels.real_space_terms(
        bins.positions, bins.sorted_values(charges), bins.cell, bins.counts, bins.offsets, bins.bin_of,
        bins.bin_start, plan.alpha, plan.real_cutoff, bool(forces), bool(stress))
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


def reciprocal_part(plan, frac, charges, forces):
    """Direct reciprocal sum in Gaussian units on the plan's k-vectors: ``(potentials (N,),
    forces (N, 3), energy, |S(k)|^2)``."""
    ks = plan.kspace
    if not len(ks.hkl):
        n = len(charges)
        return np.zeros(n), np.zeros((n, 3)), 0.0, np.zeros(0)
    s_re, s_im = kernels.structure_factors(frac, charges, ks.hkl, ks.hmax, kernels.CHUNKS)
    phi_k, f_k = kernels.reciprocal_site_terms(frac, charges, ks.hkl, ks.hmax, ks.kvectors, ks.weights,
                                               s_re, s_im, bool(forces))
    s2 = s_re * s_re + s_im * s_im
    return phi_k, f_k, 0.5 * float(np.dot(ks.weights, s2)), s2


def params_of(plan, pairs, reach, shape=None, **extra) -> EwaldParameters:
    """The public record of how a planned sum ran (``shape``: the mesh that ran, if refined)."""
    if plan.method == "mesh":
        shape = shape or plan.mesh
        lengths = np.linalg.norm(plan.cell, axis=1)
        k_vectors = int(shape[0] * shape[1] * (shape[2] // 2 + 1))
        reciprocal_cutoff = float(min(math.pi * shape[i] / lengths[i] for i in range(3)))
    else:
        k_vectors, reciprocal_cutoff = int(len(plan.kspace.hkl)), plan.reciprocal_cutoff
    return EwaldParameters(
        method=plan.method, alpha=plan.alpha, real_cutoff=plan.real_cutoff,
        reciprocal_cutoff=reciprocal_cutoff, real_space_pairs=int(pairs), k_vectors=k_vectors,
        image_reach=reach, extra={"chosen_by": plan.chosen_by,
                                  "predicted_seconds_by_method": dict(plan.predicted_seconds),
                                  "reduced_cell": plan.cell.tolist(), "basis_change": plan.basis_change.tolist(),
                                  "real_error_eV": plan.real_error, "reciprocal_error_eV": plan.reciprocal_error,
                                  "rounding_error_eV": plan.rounding_error, **extra})


def planned_result(plan, assembled, params, started, error_estimate=None) -> EwaldResult:
    """The result of a sum that ran as ``plan`` laid it out: ``assembled`` is what :func:`assemble`
    returned, ``params`` the record of :func:`params_of`, ``started`` the ``time.perf_counter()``
    at its start; ``error_estimate`` (eV) replaces the plan's own when the engine refined it."""
    potentials, energy, components, forces, stress = assembled
    return EwaldResult(
        energy=energy, potentials=potentials, forces=forces, stress=stress, params=params,
        error_estimate=plan.error_estimate if error_estimate is None else error_estimate, tol=plan.tol,
        energy_scale=plan.energy_scale, components=components, net_charge=plan.sums.net,
        background=bool(plan.background), n_atoms=len(potentials), seconds=time.perf_counter() - started,
        plan=plan)


def run_direct(crystal, plan, forces=False, stress=False) -> EwaldResult:
    """The direct Ewald sum of ``crystal`` as ``plan`` (method "direct") laid it out.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253 (the method).
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (truncation errors, used for tuning).
    D. M. Heyes, J. Chem. Phys. 74 (1981) 1924 (pressure/stress of the Ewald sum).
    """
    started = time.perf_counter()
    charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
    a = plan.alpha
    background = warn_if_charged(crystal, plan)
    with thread_budget(plan.predicted_ns):
        phi_real, force_real, real_w, pairs, reach = real_space_part(plan, charges, forces, stress)
        phi_k, f_k, e_recip, s2 = reciprocal_part(plan, plan.frac, charges, forces)

    recip_virial = None
    if stress:
        # d E_recip / d strain_ab = sum_half 2 w(k)/2 |S|^2 [-delta_ab + 2 k_a k_b (1/k^2 + 1/(4 alpha^2))]
        ks = plan.kspace
        half = 0.5 * ks.weights * s2
        factor = 2.0 * (1.0 / ks.k2 + 1.0 / (4.0 * a * a)) * half
        recip_virial = -half.sum() * np.eye(3) + np.einsum("m,ma,mb->ab", factor, ks.kvectors, ks.kvectors)
    assembled = assemble(charges, phi_real, phi_k, e_recip, a, plan.volume, plan.sums.net, background,
                         COULOMB_CONSTANT, (force_real, f_k) if forces else None,
                         (symmetric(real_w), recip_virial) if stress else None)
    return planned_result(plan, assembled, params_of(plan, pairs, reach), started)


def ewald_direct(crystal, tol=SUM_TOL, forces=False, stress=False, alpha=None, d_min=None) -> EwaldResult:
    """Ewald sum with cutoffs chosen for relative energy error ``tol`` (the direct engine).

    See :func:`madelung.ewald` for the parameters.
    """
    plan = plan_module.plan_for(crystal, tol, method="direct", alpha=alpha, d_min=d_min)
    return run_direct(crystal, plan, forces=forces, stress=stress)
