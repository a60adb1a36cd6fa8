"""The sum plan: everything a periodic Coulomb sum needs, decided once.

A :class:`SumPlan` is built from a cell, positions, charge statistics and a tolerance. It owns the
reduced basis the sums run in and its relation to the user's cell, the shortest distance, the
energy scale and target, the engine and its parameters (splitting parameter, cutoffs, mesh,
spline order), the error estimate of each part, the rounding floor, the predicted cost of each
engine, and — built on first use and then reused — the bins of the real-space sum and the
reciprocal vectors with their weights. Every driver takes a plan: the direct and mesh engines,
the Coulomb matrix, potentials at many charge sets and at arbitrary points, the dielectric-tensor
correction. Nothing else tunes.

Reuse. A plan depends on the cell, the positions, the charge sums and the options only, so the
plans of small cells are kept by exactly those (the same crystal summed again reuses its plan,
bins and k-vectors); the truncation target is rounded down to quarter-octave steps so that the
same cell with its ions moved keeps its tuning and k-vector table; and a direct plan serves other
charges on the same sites (:meth:`SumPlan.with_charges`, used by the descriptors for the energy,
the Madelung constants and the Coulomb matrix of one structure).

Reduced basis. The lattice is rewritten in its Niggli-reduced basis (spglib; Křivý & Gruber,
Acta Cryst. A32 (1976) 297), made right-handed. A unimodular change of basis leaves the lattice,
the Cartesian positions, and so every energy, potential, force and stress unchanged; in the
reduced basis the lattice vectors are short and nearly orthogonal, so bins, k-vector boxes and
the mesh are well shaped whatever basis the user wrote. Per-ion results keep the user's atom
order and Cartesian frame, so nothing needs mapping back; ``basis_change`` (integer, ``cell =
basis_change @ user_cell``) records the relation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from ..structure.bounds import check_mesh
from ..caches import remember
from ..errors import InputError
from .geometry import build_bins, reduced_cell, shortest_distance, wrapped_fractional
from ..units import COULOMB_CONSTANT
from . import tuning
from ._kernels import kernels
from .tuning import ChargeSums

METHODS = ("auto", "direct", "mesh")

#: Net charges below this (e, relative to sqrt(sum q^2)) are rounding in the charges, not a charged cell.
NEUTRAL_TOLERANCE = 1e-8

#: Below this predicted direct time (s of one thread) method="auto" takes the direct sum without
#: tuning the mesh: the mesh's fixed costs exceed what it could save (the engines break even near
#: 1000 rattled rock-salt ions, about 20 ms).
AUTO_DIRECT_BELOW_SECONDS = 0.015

#: Share of the target first set aside for rounding (see :func:`plan_sum`).
ROUNDING_SHARE = 1e-3

#: Recent direct-sum plans of small cells, by everything they were built from: the same sums
#: asked again (a crystal's energy, then its Madelung constants, its descriptors; a calculator
#: asked for energy and forces) reuse the plan with its bins and k-vectors instead of searching,
#: tuning and tabulating again. Larger cells spend their time in the sums, not in the plan.
_PLANS = {}
_PLANS_KEEP = 8
PLAN_REUSE_MAX_ATOMS = 600


#: Truncation targets are rounded down to a power of 2^(1/TARGET_STEPS_PER_OCTAVE) eV. The same
#: cell with its ions moved (a relaxation, a trajectory: the shortest distance and so the target
#: change a little) then gets the same splitting parameter and cutoffs, and its tuning and k-vector
#: table are reused (:data:`_CELL_KEEP` of each kept). Aiming up to 16 % lower costs about 1 % more terms.
TARGET_STEPS_PER_OCTAVE = 4
_DIRECT_CHOICES = {}
_KSPACES = {}
_CELL_KEEP = 8


def _aim(target):
    """``target`` (eV) rounded down to a power of 2^(1/TARGET_STEPS_PER_OCTAVE)."""
    return 2.0 ** (math.floor(TARGET_STEPS_PER_OCTAVE * math.log2(target)) / TARGET_STEPS_PER_OCTAVE)


#: Half-space boxes of Miller indices by their extent (a plan's k-vectors for any cell of that
#: extent are a subset); kept for the most recent extents up to a size.
_HALF_BOXES = {}
_HALF_BOXES_KEEP = 8
_HALF_BOX_MAX_ENTRIES = 50_000


def _half_space_box(hmax):
    """The Miller indices (int64, read-only) with |h_a| <= hmax_a, of each pair h, -h the one
    whose first non-zero index is positive, in a fixed order."""
    key = (int(hmax[0]), int(hmax[1]), int(hmax[2]))
    found = _HALF_BOXES.get(key)
    if found is not None:
        return found
    h, k, l = np.meshgrid(np.arange(0, key[0] + 1), np.arange(-key[1], key[1] + 1),
                          np.arange(-key[2], key[2] + 1), indexing="ij")
    hkl = np.stack([h.ravel(), k.ravel(), l.ravel()], axis=1)
    half = (hkl[:, 0] > 0) | ((hkl[:, 0] == 0) & ((hkl[:, 1] > 0) | ((hkl[:, 1] == 0) & (hkl[:, 2] > 0))))
    found = np.ascontiguousarray(hkl[half].astype(np.int64))
    found.setflags(write=False)
    if len(found) <= _HALF_BOX_MAX_ENTRIES:
        remember(_HALF_BOXES, _HALF_BOXES_KEEP, key, found)
    return found


def _reciprocal_table(cell, k_cut, alpha=1.0, volume=None, inverse=None):
    """``(hkl, k, hmax, k^2, weights)``: the half-space k-vectors with 0 < |k| <= k_cut
    (:func:`reciprocal_vectors`), their squared lengths (1/Å^2) and Ewald weights at ``alpha``
    (``kernels.k_vector_table``); ``volume`` and ``inverse`` of ``cell`` if at hand."""
    cell = np.asarray(cell, dtype=np.float64)
    inverse = np.linalg.inv(cell) if inverse is None else inverse
    volume = abs(float(np.linalg.det(cell))) if volume is None else volume
    lengths = np.sqrt(np.einsum("ij,ij->i", cell, cell))
    recip = np.ascontiguousarray(2.0 * math.pi * inverse.T)  # rows b_i with a_i . b_j = 2 pi delta_ij
    hmax = np.floor(k_cut * lengths / (2.0 * math.pi)).astype(np.int64)
    hkl, kv, k2, weights = kernels.k_vector_table(_half_space_box(hmax), recip, float(k_cut), float(alpha),
                                                  float(volume))
    return hkl, kv, hmax, k2, weights


def reciprocal_vectors(cell, k_cut):
    """Half-space reciprocal vectors with 0 < |k| <= k_cut.

    Returns ``(hkl (M, 3) int64, k (M, 3) 1/Å, hmax (3,) int64)``; of each pair k, -k only the
    one with the first non-zero Miller index positive is kept.
    """
    hkl, kv, hmax, _, _ = _reciprocal_table(cell, k_cut)
    return hkl, kv, hmax


@dataclass(frozen=True)
class KSpace:
    """Half-space reciprocal vectors of a plan and their Ewald weights ``2 (4 pi / V) exp(-k^2/4a^2) / k^2``."""

    hkl: np.ndarray
    kvectors: np.ndarray
    hmax: np.ndarray
    k2: np.ndarray
    weights: np.ndarray


@dataclass(frozen=True)
class SumPlan:
    """How one periodic sum will run, and what it is predicted to achieve.

    Attributes
    ----------
    method : "direct" or "mesh" (the engine that runs).
    tol : requested error relative to ``energy_scale``.
    energy_scale : k_e sum(q^2) / d_min, eV.
    d_min : shortest interionic distance (images included), Å.
    user_cell : the cell as given, Å. cell : the reduced basis the sums use, Å.
    basis_change : (3, 3) integers with ``cell = basis_change @ user_cell``.
    positions : (N, 3) Cartesian positions as given, Å. frac : wrapped fractional coordinates in ``cell``.
    volume : Å^3. sums : ion count and charge sums the estimates used.
    background : whether a neutralizing background is part of the sum (net charge not zero).
    alpha : splitting parameter, 1/Å. real_cutoff : Å. reciprocal_cutoff : |k| cutoff of the direct
        sum, 1/Å (for the mesh: the smallest Nyquist wavenumber pi K_a / |a_a|).
    mesh : mesh points along each reduced lattice vector (mesh engine) or None. order : spline order or None.
    real_error, reciprocal_error, rounding_error : parts of the error estimate, eV (the reciprocal
        part is the mesh's for the mesh engine).
    predicted_seconds : predicted time of each engine considered, s of one thread (None: not considered).
    chosen_by : "auto" or "user".
    lattice : the :class:`~madelung.structure.lattice.ReducedCell` of ``cell`` (its inverse, plane
        spacings ...), if known.
    """

    method: str
    tol: float
    energy_scale: float
    d_min: float
    user_cell: np.ndarray
    cell: np.ndarray
    basis_change: np.ndarray
    positions: np.ndarray
    frac: np.ndarray
    volume: float
    sums: ChargeSums
    background: bool
    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    mesh: tuple | None
    order: int | None
    real_error: float
    reciprocal_error: float
    rounding_error: float
    predicted_seconds: dict
    chosen_by: str
    extra: dict = field(default_factory=dict)
    lattice: object = None

    @property
    def n_atoms(self) -> int:
        return self.sums.n_atoms

    @property
    def error_estimate(self) -> float:
        """Predicted error of the energy, eV: truncation of both parts plus the rounding floor."""
        return self.real_error + self.reciprocal_error + self.rounding_error

    @property
    def target(self) -> float:
        return self.tol * self.energy_scale

    @cached_property
    def bins(self):
        """Atoms sorted into bins of the reduced cell for the real-space cutoff (built once)."""
        return build_bins(self.cell, self.positions, self.real_cutoff, reduced=self.lattice)

    @cached_property
    def kspace(self) -> KSpace:
        """Reciprocal vectors within the direct sum's cutoff and their weights (built once, and
        shared by the plans of the same cell, splitting parameter and cutoff)."""
        key = (self.cell.tobytes(), self.alpha, self.reciprocal_cutoff)
        found = _KSPACES.get(key)
        if found is None:
            hkl, kvectors, hmax, k2, weights = _reciprocal_table(
                self.cell, self.reciprocal_cutoff, self.alpha, self.volume,
                None if self.lattice is None else self.lattice.inverse)
            found = KSpace(hkl, kvectors, hmax, k2, weights)
            if len(hkl) <= _HALF_BOX_MAX_ENTRIES:
                remember(_KSPACES, _CELL_KEEP, key, found)
        return found

    @property
    def predicted_ns(self) -> float:
        return 1e9 * self.predicted_seconds[self.method]

    def with_charges(self, charges) -> "SumPlan":
        """This direct-sum layout (splitting parameter, cutoffs, bins, k-vectors, built once and
        shared) for other charges on the same sites, with their energy scale, background and
        error estimates (Kolafa–Perram, as in :func:`madelung.sums.tuning.choose_direct`).

        The layout was tuned for ``self.sums``; it holds the contract for the new charges when
        ``error_estimate <= target`` of the returned plan. A layout tuned for unit charges on every
        site (the Coulomb matrix) always does for a neutral set: both error estimates over the
        target scale as mean|q| / q_rms <= 1 relative to unit charges.

        References
        ----------
        A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
        """
        if self.method != "direct":
            raise ValueError("only a direct-sum plan can be reused for other charges")
        sums = ChargeSums.of(charges)
        if sums.n_atoms != self.n_atoms or sums.square_sum <= 0:
            raise InputError(f"{sums.n_atoms} charges (not all zero) are needed for the {self.n_atoms} sites of the plan")
        k_e = COULOMB_CONSTANT
        scale = k_e * sums.square_sum / self.d_min
        safety = tuning.SAFETY
        changes = dict(
            sums=sums, energy_scale=scale,
            background=bool(abs(sums.net) > NEUTRAL_TOLERANCE * max(1.0, math.sqrt(sums.square_sum))),
            real_error=float(tuning.real_space_error(self.alpha, self.real_cutoff, sums, self.volume, k_e)) / safety,
            reciprocal_error=float(tuning.reciprocal_space_error(self.alpha, self.reciprocal_cutoff, sums,
                                                                 self.volume, k_e)) / safety,
            rounding_error=float(tuning.rounding_error(scale, _terms_per_ion(self, sums, self.volume, "direct"))),
            predicted_seconds=dict(self.predicted_seconds), extra=dict(self.extra))
        # built once, for the sites, and kept by both plans (the charges do not enter): the sum
        # of the new charges needs them, and so does a later use of this plan (the Coulomb matrix)
        for name in ("bins", "kspace"):
            getattr(self, name)
        # a copy of every field and of the bins and k-vectors built, with the new charges' fields
        # (dataclasses.replace would run the frozen __init__ over all 26 fields again)
        plan = object.__new__(SumPlan)
        plan.__dict__.update(self.__dict__, **changes)
        return plan

    def to_dict(self) -> dict:
        return {"method": self.method, "chosen_by": self.chosen_by, "tol": self.tol,
                "energy_scale_eV": self.energy_scale, "shortest_distance_angstrom": self.d_min,
                "reduced_cell_angstrom": self.cell.tolist(), "basis_change": self.basis_change.tolist(),
                "alpha_per_angstrom": self.alpha, "real_cutoff_angstrom": self.real_cutoff,
                "reciprocal_cutoff_per_angstrom": self.reciprocal_cutoff,
                "mesh": list(self.mesh) if self.mesh else None, "spline_order": self.order,
                "real_error_eV": self.real_error, "reciprocal_error_eV": self.reciprocal_error,
                "rounding_error_eV": self.rounding_error, "error_estimate_eV": self.error_estimate,
                "predicted_seconds": dict(self.predicted_seconds), "background": self.background}


def _terms_per_ion(choice, sums, volume, method):
    density = sums.n_atoms / volume
    real = (4.0 / 3.0) * math.pi * choice.real_cutoff ** 3 * density
    if method == "mesh":
        return real + choice.order ** 3
    return real + (4.0 / 3.0) * math.pi * choice.reciprocal_cutoff ** 3 * volume / (8.0 * math.pi ** 3)


def _choose(method, target, sums, volume, lengths, d_min, alpha, mesh, order):
    """``(engine, its choice, predicted seconds of each engine)`` for an energy error ``target``.

    With ``method="auto"`` the direct sum is tuned first; the mesh only when the direct sum is
    predicted to take at least AUTO_DIRECT_BELOW_SECONDS. Engines not considered predict None.
    """
    k_e = COULOMB_CONSTANT
    predicted = {"direct": None, "mesh": None}
    direct = mesh_choice = None
    if method in ("auto", "direct"):
        key = (target, sums, volume, alpha)   # choose_direct does not look at d_min
        direct = _DIRECT_CHOICES.get(key)
        if direct is None:
            direct = tuning.choose_direct(target, sums, volume, d_min, k_e, alpha=alpha)
            remember(_DIRECT_CHOICES, _CELL_KEEP, key, direct)
        predicted["direct"] = 1e-9 * direct.predicted_ns
    wants_mesh = method == "mesh" or (method == "auto" and predicted["direct"] >= AUTO_DIRECT_BELOW_SECONDS)
    if wants_mesh:
        mesh_choice = tuning.choose_mesh(target, sums, volume, lengths, d_min, k_e, alpha=alpha, mesh=mesh,
                                         order=order)
        predicted["mesh"] = 1e-9 * mesh_choice.predicted_ns
    if method == "auto":
        method = "mesh" if predicted["mesh"] is not None and predicted["mesh"] < predicted["direct"] else "direct"
    return method, (mesh_choice if method == "mesh" else direct), predicted


def plan_sum(cell, positions, charges=None, *, tol, method="auto", alpha=None, mesh=None, order=None,
             sums=None, d_min=None, reduced=None) -> SumPlan:
    """Build the plan of a periodic sum.

    Parameters
    ----------
    cell : (3, 3) lattice vectors as rows, Å. positions : (N, 3) Cartesian, Å.
    charges : (N,) e, or None when ``sums`` describes the charges (e.g. unit charges of a matrix).
    tol : wanted energy error relative to ``k_e sum(q^2) / d_min``.
    method : "auto" (the engine predicted to be faster), "direct" or "mesh".
    alpha, mesh, order : optional fixed splitting parameter (1/Å), mesh (3 ints) and spline order.
    sums : ChargeSums, optional; by default from ``charges``.
    d_min : shortest interionic distance, Å (searched if not given).
    reduced : the :class:`~madelung.structure.lattice.ReducedCell` of ``cell``, if at hand.

    Raises
    ------
    InputError
        For a bad tol, alpha, method, mesh or order, charges that are all zero, or a tol below what
        double precision can resolve for this sum (the message gives the smallest meaningful tol).

    References
    ----------
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351; U. Essmann et al., J. Chem. Phys. 103
    (1995) 8577; I. Křivý and B. Gruber, Acta Cryst. A32 (1976) 297 (reduced cells).
    """
    tol = tuning.check_tol(tol)
    alpha = tuning.check_alpha(alpha)
    if method not in METHODS:
        raise InputError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    if (mesh is not None or order is not None) and method == "direct":
        raise InputError("a mesh or spline order applies to method='mesh' only")
    user_cell = np.ascontiguousarray(cell, dtype=np.float64)
    positions = np.ascontiguousarray(positions, dtype=np.float64)
    if sums is None:
        sums = ChargeSums.of(charges)
    key = None
    if mesh is None and order is None and len(positions) <= PLAN_REUSE_MAX_ATOMS:
        key = (user_cell.tobytes(), positions.shape, positions.tobytes(), sums, tol, method, alpha,
               None if d_min is None else float(d_min))
        found = _PLANS.get(key)
        if found is not None:
            return found
        user_cell, positions = _frozen_copy(user_cell), _frozen_copy(positions)
    plan = _build_plan(user_cell, positions, sums, tol, method, alpha, mesh, order, d_min, reduced)
    if key is not None and plan.method == "direct":
        remember(_PLANS, _PLANS_KEEP, key, plan)
    return plan


def _frozen_copy(array):
    """The array itself if it cannot change, else a read-only copy (a kept plan must not follow
    later edits of the caller's array)."""
    if array.flags.writeable:
        array = array.copy()
        array.setflags(write=False)
    return array


def _build_plan(user_cell, positions, sums, tol, method, alpha, mesh, order, d_min, reduced=None) -> SumPlan:
    """:func:`plan_sum` once its arguments are checked: reduce, search, tune, estimate."""
    if sums.square_sum <= 0:
        raise InputError("all charges are zero; there is no electrostatic energy to compute")
    facts = reduced_cell(user_cell) if reduced is None else reduced
    reduced, change, volume = facts.cell.copy(), facts.change.copy(), facts.volume
    if d_min is None:
        d_min = shortest_distance(reduced, positions)
    k_e = COULOMB_CONSTANT
    scale = k_e * sums.square_sum / d_min
    target = tol * scale
    background = abs(sums.net) > NEUTRAL_TOLERANCE * max(1.0, math.sqrt(sums.square_sum))
    lengths = facts.lengths

    chosen_by = "auto" if method == "auto" else "user"
    # the rounding floor takes its share of the target: truncation aims at what is left (first
    # guess: a thousandth; tuned again only where rounding takes more)
    truncation = _aim(target * (1.0 - ROUNDING_SHARE))
    method, choice, predicted = _choose(method, truncation, sums, volume, lengths, d_min, alpha, mesh, order)
    rounding = tuning.rounding_error(scale, _terms_per_ion(choice, sums, volume, method))
    if target <= rounding:
        smallest = 2.0 * rounding / scale
        raise InputError(f"tol {tol:g} is below what double precision can resolve for this sum; "
                         f"the smallest meaningful tol here is about {smallest:.1g}")
    if rounding > ROUNDING_SHARE * target:
        # tuned again for what rounding leaves, with the engine already chosen
        method, choice, retuned = _choose(method, _aim(target - rounding), sums, volume, lengths, d_min, alpha, mesh,
                                          order)
        predicted[method] = retuned[method]
    if method == "direct":
        reciprocal_cutoff, recip_error, shape, spline = choice.reciprocal_cutoff, choice.reciprocal_error, None, None
    else:
        shape, spline = tuple(int(k) for k in choice.shape), int(choice.order)
        check_mesh(shape)
        reciprocal_cutoff = float(min(math.pi * shape[i] / lengths[i] for i in range(3)))
        recip_error = choice.mesh_error
    return SumPlan(
        method=method, tol=tol, energy_scale=scale, d_min=float(d_min), user_cell=user_cell, cell=reduced,
        basis_change=change, positions=positions, frac=wrapped_fractional(reduced, positions), volume=volume,
        sums=sums, background=bool(background), alpha=float(choice.alpha), real_cutoff=float(choice.real_cutoff),
        reciprocal_cutoff=float(reciprocal_cutoff), mesh=shape, order=spline, real_error=float(choice.real_error),
        reciprocal_error=float(recip_error), rounding_error=float(rounding), predicted_seconds=predicted,
        chosen_by=chosen_by, extra={"mesh_fixed": mesh is not None}, lattice=facts.own())


def plan_for(crystal, tol, method="auto", alpha=None, mesh=None, order=None, d_min=None) -> SumPlan:
    """The plan of a crystal's Ewald sum (see :func:`plan_sum`), with the shortest distance the
    crystal found when it was checked unless ``d_min`` is given."""
    return plan_sum(crystal.cell, crystal.positions, crystal.charges, tol=tol, method=method, alpha=alpha,
                    mesh=mesh, order=order, d_min=crystal.shortest_distance if d_min is None else d_min,
                    reduced=crystal.reduced)
