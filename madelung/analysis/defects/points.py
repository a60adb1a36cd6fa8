"""Ewald potential (and field) of a crystal's point charges at arbitrary Cartesian points.

References
----------
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the lattice sums).
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass

import numpy as np

from ...structure.crystal import Crystal
from ...errors import InputError, MadelungWarning
from ...sums._kernels import kernels, point_kernels
from ...sums.direct import EwaldParameters
from ...sums.geometry import EXAMINED_PAIR_NS, plane_spacings, thread_budget, wrapped_fractional
from ...sums.plan import plan_for
from ...units import COULOMB_CONSTANT
from ...defaults import SUM_TOL

#: A point nearer than this to an ion (Å) sits on it.
ON_ION_DISTANCE = 1e-4


#: Rough cost of one (point or ion, k-vector) reciprocal term, ns, for choosing the thread count.
RECIPROCAL_TERM_NS = 4.0


def _where(crystal):
    return f"{crystal.source}: " if getattr(crystal, "source", None) else ""


@dataclass(frozen=True)
class PointPotentials:
    """The electrostatic potential of a crystal at given points.

    Attributes
    ----------
    points : (M, 3) Cartesian points, Å.
    potentials : (M,) potential, V (eV per e).
    field : (M, 3) electric field -grad(phi), V/Å, or None if not asked for.
    nearest_distance : (M,) distance to the nearest ion (periodic images count), Å.
    nearest_index : (M,) index of that ion.
    excluded : (M,) index of the ion left out at each point (-1: none).
    smearing : Gaussian width sigma of the ions, Å (0: point ions).
    params : splitting parameter and cutoffs used.
    error_estimate : predicted truncation error of each potential, V.
    background : True when the cell has a net charge and a uniform neutralizing background.
    net_charge : total charge of the cell, e.
    seconds : wall time, s.
    """

    points: np.ndarray
    potentials: np.ndarray
    field: np.ndarray | None
    nearest_distance: np.ndarray
    nearest_index: np.ndarray
    excluded: np.ndarray
    smearing: float
    params: EwaldParameters
    error_estimate: float
    background: bool
    net_charge: float
    seconds: float

    def to_dict(self) -> dict:
        """JSON-ready: points Å, potentials V, field V/Å (None unless asked), nearest ions (distance Å,
        index), excluded ions, smearing Å, the sum's parameters and error estimate V."""
        return {"points_angstrom": np.asarray(self.points).tolist(),
                "potentials_V": np.asarray(self.potentials).tolist(),
                "field_V_per_angstrom": None if self.field is None else np.asarray(self.field).tolist(),
                "nearest_distance_angstrom": np.asarray(self.nearest_distance).tolist(),
                "nearest_index": np.asarray(self.nearest_index).tolist(),
                "excluded": np.asarray(self.excluded).tolist(),
                "smearing_angstrom": self.smearing, "parameters": self.params.to_dict(),
                "error_estimate_V": self.error_estimate, "background": self.background,
                "net_charge_e": self.net_charge, "seconds": self.seconds}


def _point_bins(bins, points):
    """Wrapped fractional and Cartesian coordinates of points, and the bin of each among ``bins``."""
    frac = wrapped_fractional(bins.cell, points)
    point_bin = np.minimum(np.floor(frac * bins.counts).astype(np.int64), bins.counts - 1)
    return frac, np.ascontiguousarray(frac @ bins.cell), np.ascontiguousarray(point_bin)


class _PointSum:
    """The Ewald sum of one crystal prepared once (bins, structure factors) for many point queries."""

    def __init__(self, crystal, tol=SUM_TOL, smearing=0.0, alpha=None, warn=True):
        if not isinstance(crystal, Crystal):
            raise InputError(f"a madelung.Crystal is needed, got {type(crystal).__name__}")
        smearing = float(smearing)
        if not (math.isfinite(smearing) and smearing >= 0):
            raise InputError(f"smearing must be a width >= 0 in Å, got {smearing!r}")
        self.crystal = crystal
        self.smearing = smearing
        charges = np.ascontiguousarray(crystal.charges, dtype=np.float64)
        n = len(charges)
        d_min = None if n > 1 else float(np.min(plane_spacings(crystal.cell)))
        self.beta = 1.0 / (math.sqrt(2.0) * smearing) if smearing > 0 else 0.0
        plan = plan_for(crystal, tol, method="direct", alpha=alpha, d_min=d_min)
        if self.beta > 0 and self.beta <= plan.alpha:
            # wide Gaussians: their potential is the reciprocal sum at alpha = beta alone
            plan = plan_for(crystal, tol, method="direct", alpha=self.beta, d_min=plan.d_min)
        self.plan = plan
        self.alpha = plan.alpha
        self.background = plan.background
        net = plan.sums.net
        if self.background and warn:
            warnings.warn(f"{_where(crystal)}the cell carries a net charge of {net:+.6g} e; "
                          "a uniform neutralizing background was added", MadelungWarning, stacklevel=3)
        self.cell, self.charges, self.volume, self.net = plan.cell, charges, plan.volume, net
        self.tol = tol
        self.bins = plan.bins
        self.sorted_charges = self.bins.sorted_values(charges)
        self.examined_per_point = n * self.bins.examined_volume / plan.volume
        self.rank = np.empty(n, dtype=np.int64)
        self.rank[self.bins.order] = np.arange(n)
        ks = plan.kspace
        self.hkl, self.kvectors, self.hmax, self.weights = ks.hkl, ks.kvectors, ks.hmax, ks.weights
        if len(self.hkl):
            with thread_budget(RECIPROCAL_TERM_NS * n * len(self.hkl)):
                self.s_re, self.s_im = kernels.structure_factors(plan.frac, charges, self.hkl, self.hmax,
                                                                 kernels.CHUNKS)
        # potential error: the energy estimate is k_e/2 sum|q| dphi
        self.potential_error = 2.0 * plan.error_estimate / plan.sums.absolute_sum

    def params(self, pairs):
        return EwaldParameters(method="direct", alpha=self.alpha, real_cutoff=self.plan.real_cutoff,
                               reciprocal_cutoff=self.plan.reciprocal_cutoff, real_space_pairs=int(pairs),
                               k_vectors=int(len(self.hkl)), image_reach=tuple(int(x) for x in self.bins.reach),
                               extra={"smearing_angstrom": self.smearing})

    def point_bins(self, points):
        return _point_bins(self.bins, points)

    def evaluate(self, points, exclude=None, want_field=False):
        """Raw evaluation: (potential V, field V/Å or zeros, nearest distance, nearest original index, pairs).

        ``exclude`` holds original ion indices (-1 none): that ion is left out where the point sits on it.
        """
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        m = len(points)
        frac, wrapped, point_bin = self.point_bins(points)
        if exclude is None:
            exclude = np.full(m, -1, dtype=np.int64)
        exclude_sorted = np.where(exclude >= 0, self.rank[np.maximum(exclude, 0)], -1).astype(np.int64)
        b = self.bins
        with thread_budget(m * (self.examined_per_point * EXAMINED_PAIR_NS + RECIPROCAL_TERM_NS * len(self.hkl))):
            phi_r, e_r, nearest, nearest_sorted, pairs = point_kernels.real_space_at_points(
                wrapped, point_bin, exclude_sorted, b.positions, self.sorted_charges, b.cell, b.counts, b.offsets,
                b.bin_start, self.alpha, self.beta, self.plan.real_cutoff, ON_ION_DISTANCE, bool(want_field))
            if len(self.hkl):
                phi_k, e_k = kernels.reciprocal_site_terms(frac, np.ones(m), self.hkl, self.hmax, self.kvectors,
                                                           self.weights, self.s_re, self.s_im, bool(want_field))
            else:
                phi_k, e_k = np.zeros(m), np.zeros((m, 3))
        phi = phi_r + phi_k
        if self.background:
            phi = phi - math.pi * self.net / (self.volume * self.alpha ** 2)
        # the excluded ion's smooth (reciprocal) part: erf(alpha d)/d -> 2 alpha / sqrt(pi) at d = 0
        excluded_here = exclude >= 0
        if excluded_here.any():
            phi[excluded_here] -= 2.0 * self.alpha / math.sqrt(math.pi) * self.charges[exclude[excluded_here]]
        nearest_index = np.where(nearest_sorted >= 0, b.order[np.maximum(nearest_sorted, 0)], -1)
        k_e = COULOMB_CONSTANT
        return k_e * phi, k_e * (e_r + e_k), nearest, nearest_index, pairs

    def nearest(self, points):
        """Distance to the nearest ion (within the real-space cutoff) and its original index."""
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        _, wrapped, point_bin = self.point_bins(points)
        b = self.bins
        with thread_budget(len(points) * self.examined_per_point * EXAMINED_PAIR_NS):
            _, _, nearest, nearest_sorted, _ = point_kernels.real_space_at_points(
                wrapped, point_bin, np.full(len(points), -1, dtype=np.int64), b.positions, self.sorted_charges,
                b.cell, b.counts, b.offsets, b.bin_start, self.alpha, self.beta, self.plan.real_cutoff,
                ON_ION_DISTANCE, False)
        return nearest, np.where(nearest_sorted >= 0, b.order[np.maximum(nearest_sorted, 0)], -1)

    def resolve_exclusions(self, points, exclude):
        """Check the points against the ions and turn ``exclude`` into one ion index per point."""
        points = np.ascontiguousarray(points, dtype=np.float64).reshape(-1, 3)
        m = len(points)
        labels = self.crystal.labels
        if self.beta > 0 and (exclude is None or (isinstance(exclude, str) and exclude == "none")):
            return np.full(m, -1, dtype=np.int64)  # smeared ions: every point is allowed
        # nearest ion of each point (one real-space pass without the field)
        nearest, nearest_index = self.nearest(points)
        if exclude is None or (isinstance(exclude, str) and exclude == "none"):
            wanted = np.full(m, -1, dtype=np.int64)
        elif isinstance(exclude, str):
            if exclude != "coincident":
                raise InputError(f"exclude={exclude!r} not understood; give 'coincident', None or ion indices")
            wanted = np.where(nearest < ON_ION_DISTANCE, nearest_index, -1).astype(np.int64)
        else:
            try:
                wanted = np.array(exclude, dtype=np.int64).reshape(-1)
            except (TypeError, ValueError):
                raise InputError("exclude must hold one ion index per point (-1 for none)") from None
            if wanted.shape != (m,):
                raise InputError(f"exclude has {wanted.size} entries for {m} points")
            if np.any(wanted >= len(labels)) or np.any(wanted < -1):
                bad = int(wanted[(wanted >= len(labels)) | (wanted < -1)][0])
                raise InputError(f"exclude names ion {bad}, but the structure has ions 0..{len(labels) - 1}")
            for p in np.flatnonzero(wanted >= 0):
                if not (nearest[p] < ON_ION_DISTANCE and nearest_index[p] == wanted[p]):
                    raise InputError(f"point {p} at {np.round(points[p], 6).tolist()} Å is not on ion "
                                     f"{labels[wanted[p]]} (#{wanted[p]}); exclude only leaves out an ion "
                                     "the point sits on")
        if self.beta == 0:
            on_ion = np.flatnonzero((nearest < ON_ION_DISTANCE) & (wanted < 0))
            if len(on_ion):
                p = int(on_ion[0])
                i = int(nearest_index[p])
                raise InputError(f"point {p} at {np.round(points[p], 6).tolist()} Å sits on ion {labels[i]} (#{i}); "
                                 "the potential of a point charge is infinite there (exclude that ion "
                                 "explicitly, or use a smearing width)")
        return wanted


def _as_points(points, name="points"):
    try:
        array = np.array(points, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be numbers (Cartesian coordinates in Å)") from None
    if array.ndim == 1 and array.size == 3:
        array = array.reshape(1, 3)
    if array.ndim != 2 or array.shape[1] != 3:
        raise InputError(f"{name} must have shape (M, 3), got {array.shape}")
    bad = np.flatnonzero(~np.all(np.isfinite(array), axis=1))
    if len(bad):
        raise InputError(f"{name}: point {bad[0]} has a non-finite coordinate")
    return np.ascontiguousarray(array)


def potential_at(crystal, points, *, tol=SUM_TOL, field=False, exclude=None, smearing=0.0, alpha=None):
    """Electrostatic potential (and optionally field) of a periodic crystal at any Cartesian points.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and charges.
    points : (M, 3) array_like
        Cartesian points, Å (any; they are folded into the cell).
    tol : float, optional
        Accuracy, as in :func:`madelung.ewald` (relative to ``k_e sum(q^2) / d_min``).
    field : bool, optional
        Also return the electric field E = -grad(phi), V/Å.
    exclude : None, "coincident" or (M,) ints, optional
        Ions to leave out: "coincident" leaves out any ion a point sits on; an array names one
        ion per point (-1 none), which the point must sit on. A point on an ion that is not
        left out is refused for point ions (the potential is infinite there).
    smearing : float, optional
        Treat each ion as a normalised Gaussian charge exp(-r^2 / 2 sigma^2) of this width
        sigma (Å) instead of a point (default 0, point ions). The potential is then finite
        everywhere; beyond about 4 sigma from an ion it equals the point-ion potential.
    alpha : float, optional
        Fix the Ewald splitting parameter (1/Å).

    Returns
    -------
    PointPotentials
        ``potentials`` in V, ``field`` in V/Å, the nearest ion of each point and the parameters.

    Notes
    -----
    phi(r) = k_e [sum_j,n q_j erfc(alpha d)/d + (4 pi / V) sum_{k != 0} exp(-k^2 / 4 alpha^2) / k^2
    Re(S(k) exp(-i k.r)) - pi Q / (V alpha^2)], d = |r - r_j - n|, the last term only for a net
    charge Q (neutralizing background). With an ion left out at its own site this is the
    engine's site potential. The zero of the potential is the Ewald convention: the cell average
    of phi is zero.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351 (error estimates, used for tuning).
    """
    started = time.perf_counter()
    points = _as_points(points)
    engine = _PointSum(crystal, tol=tol, smearing=smearing, alpha=alpha)
    wanted = engine.resolve_exclusions(points, exclude)
    phi, efield, nearest, nearest_index, pairs = engine.evaluate(points, wanted, field)
    for array in (phi, efield, nearest, nearest_index, wanted):
        array.setflags(write=False)
    return PointPotentials(points=points, potentials=phi, field=efield if field else None,
                           nearest_distance=nearest, nearest_index=nearest_index, excluded=wanted,
                           smearing=engine.smearing, params=engine.params(pairs),
                           error_estimate=engine.potential_error, background=bool(engine.background),
                           net_charge=engine.net, seconds=time.perf_counter() - started)
