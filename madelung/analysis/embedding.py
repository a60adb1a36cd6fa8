"""Embedded clusters: a finite array of point charges that reproduces a crystal's field in a region.

A quantum-chemical cluster calculation of a defect treats a few shells of ions around it
explicitly; the rest of the crystal must be represented by its electrostatic field. A bare
cut-out of point charges does that badly: the potential of a finite array of alternating
charges depends on its shape, net charge and dipole, and converges only conditionally. The
remedy used here (Derenzo, Klintenberg and Weber) keeps the ions out to a field radius at their
charges and adjusts the charges of the outermost layer, by least squares under the constraints
of zero total charge and zero dipole, so that the potential of the finite array at the cluster
sites and on a grid filling the cluster region equals the periodic (Ewald) potential.

Zones of the array, by the distance of each ion (or polyatomic ion) from the centre:

* cluster, distance <= cluster_radius: the ions the user treats explicitly;
* fixed charges, out to field_radius - fitted_thickness: point charges at the crystal's charges;
* fitted charges, the outermost layer of thickness fitted_thickness: adjusted charges.

The zero of the periodic potential is the Ewald convention (its cell average is zero); a finite
neutral array has its zero at infinity. By default the fit matches the Ewald values themselves
(the fitted layer supplies the constant); ``offset="free"`` fits a constant as well and reports it.
The result is a point-charge model of the environment: polarisation of the surroundings and the
treatment of the cluster boundary (pseudopotentials on the nearest cations, for instance) are the
user's modelling choices.

References
----------
S. E. Derenzo, M. K. Klintenberg and M. J. Weber, J. Chem. Phys. 112 (2000) 2074 (fitted
boundary charges reproducing the Ewald potential in a cluster region).
M. Klintenberg, S. E. Derenzo and M. J. Weber, Comput. Phys. Commun. 131 (2000) 120 (the
method as a procedure: zones, constraints, least squares).
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the periodic target).
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.linalg import solve_triangular

from ..structure.crystal import Crystal
from .defects import ON_ION_DISTANCE, potential_at
from ..errors import InputError, MadelungWarning
from ..sums.plan import NEUTRAL_TOLERANCE
from ..units import COULOMB_CONSTANT
from . import _embedding_kernels as kernels
from .cluster import array_ions, boundary_cations, clear_of_ions, resolve_center, shortest_cation_anion, sphere_grid
from ..defaults import SUM_TOL

#: By default the grid filling the cluster sphere has about this many points (the misfit is a
#: smooth, harmonic function inside the sphere, so a coarse grid pins it down), with a step of at
#: least MIN_GRID_SPACING Å.
GRID_POINTS = 1200
MIN_GRID_SPACING = 0.25

#: Singular values of the constrained fit below this fraction of the largest are dropped (the
#: potential of far charges inside the cluster is smooth, so the least-squares problem is
#: ill-conditioned; the minimum-norm solution keeps the fitted charges near their crystal values).
SINGULAR_CUTOFF = 1e-8

OFFSETS = ("ewald", "free")

_MILLIVOLT = 1000.0


@dataclass(frozen=True)
class Residual:
    """Embedded minus periodic potential at a set of points (after the fitted constant, if any).

    Attributes
    ----------
    points : number of points.
    rms_mV, max_mV : root mean square and largest absolute difference, mV.
    """

    points: int
    rms_mV: float
    max_mV: float

    @classmethod
    def of(cls, difference):
        difference = np.asarray(difference, dtype=float)
        if difference.size == 0:
            return cls(0, 0.0, 0.0)
        return cls(int(difference.size), float(np.sqrt(np.mean(difference ** 2)) * _MILLIVOLT),
                   float(np.max(np.abs(difference)) * _MILLIVOLT))

    def to_dict(self):
        return {"points": self.points, "rms_mV": self.rms_mV, "max_mV": self.max_mV}


@dataclass(frozen=True)
class BoundaryCation:
    """A point-charge cation next to the cluster (a usual place for a pseudopotential).

    Attributes
    ----------
    charge_index : index into the embedding's point charges.
    label, symbol : site label and element.
    distance : distance to the nearest anion of the cluster, Å.
    """

    charge_index: int
    label: str
    symbol: str
    distance: float

    def to_dict(self):
        return {"charge_index": self.charge_index, "label": self.label, "symbol": self.symbol,
                "distance_angstrom": self.distance}


@dataclass(frozen=True)
class Embedding:
    """A cluster of whole ions and the point charges that reproduce the crystal's field around it.

    Attributes
    ----------
    source : the crystal's file, if known.
    center : (3,) Cartesian centre, Å (crystal frame).
    center_text : what the centre was asked as (site label, #INDEX, fractional coordinates).
    cluster_radius, field_radius, fitted_thickness, grid_spacing : the geometry asked for, Å.
    offset_mode : "ewald" (the Ewald convention's values matched) or "free" (a constant fitted too).
    offset : the constant added to the periodic potential in the fit, V (0 for "ewald").
    cluster_positions : (N, 3) Cartesian positions of the cluster ions, Å (crystal frame).
    cluster_symbols, cluster_labels : element and site label of each cluster ion.
    cluster_sites : (N,) index of each cluster ion's site in the crystal.
    cluster_charges : (N,) the crystal's charges of the cluster ions, e.
    cluster_periodic_potentials : (N,) periodic site potential at each cluster ion (own ion left
        out), V, Ewald convention.
    cluster_embedded_potentials : (N,) the same from the finite array (cluster + point charges), V.
    charge_positions : (M, 3) positions of the point charges, Å (crystal frame).
    charge_labels, charge_symbols : the site each point charge stands for.
    charge_sites : (M,) crystal site index of each point charge.
    formal_charges : (M,) the crystal's charges at those positions, e.
    charges : (M,) the embedding's charges, e (equal to formal_charges except where fitted).
    fitted : (M,) True where the charge was adjusted.
    net_charge : total charge of cluster + point charges, e (zero by construction).
    dipole : (3,) dipole moment of cluster + point charges, e·Å (zero by construction).
    sites, grid : Residual at the cluster sites and on the fitting grid.
    check : Residual on a second grid, shifted by half a step (points not used in the fit).
    bare_sites, bare_grid : the same cut-out with the crystal's charges and no fit (for "free",
        with its best constant removed).
    boundary_cations : tuple of BoundaryCation.
    periodic_error_estimate : predicted error of the periodic potentials, V.
    seconds : wall time, s.
    """

    source: str | None
    center: np.ndarray
    center_text: str
    cluster_radius: float
    field_radius: float
    fitted_thickness: float
    grid_spacing: float
    offset_mode: str
    offset: float
    cluster_positions: np.ndarray
    cluster_symbols: tuple
    cluster_labels: tuple
    cluster_sites: np.ndarray
    cluster_charges: np.ndarray
    cluster_periodic_potentials: np.ndarray
    cluster_embedded_potentials: np.ndarray
    charge_positions: np.ndarray
    charge_labels: tuple
    charge_symbols: tuple
    charge_sites: np.ndarray
    formal_charges: np.ndarray
    charges: np.ndarray
    fitted: np.ndarray
    net_charge: float
    dipole: np.ndarray
    sites: Residual
    grid: Residual
    check: Residual
    bare_sites: Residual
    bare_grid: Residual
    boundary_cations: tuple
    periodic_error_estimate: float
    seconds: float

    @property
    def cluster_charge(self) -> float:
        """Sum of the crystal's charges of the cluster ions, e."""
        return float(np.sum(self.cluster_charges))

    def to_dict(self):
        changes = self.charges - self.formal_charges
        return {
            "source": self.source, "center_angstrom": self.center.tolist(), "center": self.center_text,
            "cluster_radius_angstrom": self.cluster_radius, "field_radius_angstrom": self.field_radius,
            "fitted_thickness_angstrom": self.fitted_thickness, "grid_spacing_angstrom": self.grid_spacing,
            "offset_mode": self.offset_mode, "offset_V": self.offset,
            "cluster": [{"symbol": s, "label": lab, "site": int(i), "position_angstrom": p.tolist(),
                         "charge_e": float(q), "periodic_potential_V": float(v), "embedded_potential_V": float(e)}
                        for s, lab, i, p, q, v, e in zip(self.cluster_symbols, self.cluster_labels,
                                                         self.cluster_sites, self.cluster_positions,
                                                         self.cluster_charges, self.cluster_periodic_potentials,
                                                         self.cluster_embedded_potentials)],
            "cluster_charge_e": self.cluster_charge,
            "point_charges": len(self.charges), "fitted_charges": int(np.count_nonzero(self.fitted)),
            "largest_fitted_change_e": float(np.max(np.abs(changes))) if len(changes) else 0.0,
            "net_charge_e": self.net_charge, "dipole_e_angstrom": self.dipole.tolist(),
            "residual_sites": self.sites.to_dict(), "residual_grid": self.grid.to_dict(),
            "residual_check": self.check.to_dict(), "bare_sites": self.bare_sites.to_dict(),
            "bare_grid": self.bare_grid.to_dict(),
            "boundary_cations": [b.to_dict() for b in self.boundary_cations],
            "periodic_error_estimate_V": self.periodic_error_estimate, "seconds": self.seconds,
            "charge_positions_angstrom": self.charge_positions.tolist(), "charges_e": self.charges.tolist(),
            "formal_charges_e": self.formal_charges.tolist(), "fitted": self.fitted.tolist(),
            "charge_labels": list(self.charge_labels),
        }


# ---------------------------------------------------------------- input
def _positive(value, what):
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{what} must be a length in Å, got {value!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"{what} must be a positive length in Å, got {value!r}")
    return value


# ---------------------------------------------------------------- fit
def constrained_least_squares(matrix, target, constraints, values, free_constant=False):
    """Minimum-norm x minimising |matrix x - target (- c)|^2 subject to constraints x = values exactly.

    The constraints are met through the orthonormal basis Q of their row space: x = Q y + w with
    y fixed by the constraints and w in their null space. With ``free_constant`` a constant c is
    fitted too (the rows are centred). Returns (x, c).
    """
    basis, upper = np.linalg.qr(constraints.T)
    if np.min(np.abs(np.diag(upper))) < 1e-8 * np.max(np.abs(np.diag(upper))):
        raise InputError("the fitted charges are too few or lie in a plane, so the total charge and dipole "
                         "cannot both be fixed; make the field radius or the fitted thickness larger")
    particular = basis @ solve_triangular(upper.T, values, lower=True)
    projected = matrix - (matrix @ basis) @ basis.T
    rest = target - matrix @ particular
    if free_constant:
        projected = projected - projected.mean(axis=0)
        rest = rest - rest.mean()
    w = np.linalg.lstsq(projected, rest, rcond=SINGULAR_CUTOFF)[0]
    w -= basis @ (basis.T @ w)
    x = particular + w
    constant = float(np.mean(matrix @ x - target)) if free_constant else 0.0
    return x, constant


def _array_potentials(points, positions, charges):
    return COULOMB_CONSTANT * kernels.free_space_potentials(np.ascontiguousarray(points, dtype=np.float64),
                                                            positions, np.ascontiguousarray(charges, np.float64),
                                                            ON_ION_DISTANCE)


def embedding(crystal, center, cluster_radius, field_radius, *, fitted_thickness=None,
              grid_spacing=None, offset="ewald", groups=None, tol=SUM_TOL, warn=True) -> Embedding:
    """A cluster of whole ions and a fitted point-charge field reproducing the crystal's potential.

    Parameters
    ----------
    crystal : Crystal
        A neutral crystal with its charges.
    center : int, str or 3 numbers
        The cluster's centre: a site index, a site label (its first site; an element symbol also
        works), or fractional coordinates (three numbers).
    cluster_radius : float
        Ions (whole polyatomic ions with ``groups``) whose centre lies within this distance of the
        centre form the cluster, Å.
    field_radius : float
        Point charges stand for every ion out to this distance, Å.
    fitted_thickness : float, optional
        Thickness of the outer layer whose charges are fitted, Å (default: the larger of 3 Å and
        twice the shortest cation-anion distance). Must leave room between cluster and layer.
    grid_spacing : float, optional
        Step of the grid of fitting points filling the cluster sphere, Å (default: about
        ``GRID_POINTS`` points in the sphere, at least 0.25 Å apart).
    offset : {"ewald", "free"}, optional
        "ewald" (default): match the periodic potential in the Ewald convention (zero cell average);
        "free": match it up to a constant, fitted and reported as ``offset``.
    groups : sequence of int, optional
        One ion number per site of the cell; sites sharing a number form one polyatomic ion, which
        is never split between zones (it belongs where its centroid lies). Default: every site
        is its own ion.
    tol : float, optional
        Accuracy of the periodic potentials, as in :func:`madelung.ewald`.
    warn : bool, optional
        Issue a :class:`MadelungWarning` naming the cations just outside the cluster.

    Returns
    -------
    Embedding
        Cluster, point charges (fitted ones marked), residuals in mV at the sites, on the fitting
        grid and on a shifted check grid, and the same for the bare cut-out.

    Notes
    -----
    Let phi_P be the periodic potential (own ion left out at a site) and phi_A the potential of
    the finite array. The fitted charges x (crystal charges x0) solve
    min |A x - (phi_P + c - phi_fixed)|^2 over the cluster sites and the grid, subject to
    sum(all charges) = 0 and sum(q r) = 0, with c = 0 ("ewald") or fitted ("free"). The problem is
    ill-conditioned; the minimum-norm change x - x0 within relative singular values above
    ``SINGULAR_CUTOFF`` is taken. The result is a point-charge field: it carries neither the
    polarisation of the surroundings nor any treatment of the cluster boundary.

    References
    ----------
    S. E. Derenzo, M. K. Klintenberg and M. J. Weber, J. Chem. Phys. 112 (2000) 2074.
    M. Klintenberg, S. E. Derenzo and M. J. Weber, Comput. Phys. Commun. 131 (2000) 120.
    """
    started = time.perf_counter()
    if not isinstance(crystal, Crystal):
        raise InputError(f"embedding() needs a madelung.Crystal, got {type(crystal).__name__}")
    cluster_radius = _positive(cluster_radius, "cluster radius")
    field_radius = _positive(field_radius, "field radius")
    if grid_spacing is None:
        grid_spacing = max(MIN_GRID_SPACING, cluster_radius * (4.0 * math.pi / (3.0 * GRID_POINTS)) ** (1.0 / 3.0))
    grid_spacing = _positive(grid_spacing, "grid spacing")
    if offset not in OFFSETS:
        raise InputError(f"offset must be one of {', '.join(OFFSETS)}, got {offset!r}")
    q = np.asarray(crystal.charges, dtype=float)
    if abs(q.sum()) > NEUTRAL_TOLERANCE * max(1.0, math.sqrt(float(q @ q))):
        raise InputError(f"{crystal.source or 'the crystal'}: the cell carries a net charge of {q.sum():+.6g} e; "
                         "an embedding needs a neutral crystal")
    center, center_text = resolve_center(crystal, center)
    if grid_spacing > cluster_radius:
        raise InputError(f"grid spacing {grid_spacing:g} Å is larger than the cluster radius {cluster_radius:g} Å")

    sites, positions, distances = array_ions(crystal, center, field_radius, groups)
    formal = q[sites]
    shortest = shortest_cation_anion(positions, formal)
    if fitted_thickness is None:
        fitted_thickness = max(3.0, 2.0 * shortest) if shortest else 3.0
    fitted_thickness = _positive(fitted_thickness, "fitted thickness")
    if field_radius - fitted_thickness <= cluster_radius:
        raise InputError(f"field radius {field_radius:g} Å leaves no room between the cluster ({cluster_radius:g} Å) "
                         f"and the fitted layer ({fitted_thickness:g} Å thick); make it larger than "
                         f"{cluster_radius + fitted_thickness:g} Å")
    in_cluster = distances <= cluster_radius + 1e-9
    fitted = distances > field_radius - fitted_thickness
    if not in_cluster.any():
        raise InputError(f"no ion lies within the cluster radius {cluster_radius:g} Å of the centre")
    if np.count_nonzero(fitted) < 8:
        raise InputError(f"only {np.count_nonzero(fitted)} ions lie in the fitted layer; make the field radius "
                         "or the fitted thickness larger")

    # fitting points: the cluster sites and a grid filling the cluster sphere; a shifted grid checks
    cluster_points = positions[in_cluster]
    grid = clear_of_ions(sphere_grid(center, cluster_radius, grid_spacing, 0.0), positions)
    check = clear_of_ions(sphere_grid(center, cluster_radius, grid_spacing, 0.5), positions)
    everything = np.concatenate([cluster_points, grid, check])
    exclude = np.concatenate([sites[in_cluster], np.full(len(grid) + len(check), -1)])
    periodic = potential_at(crystal, everything, tol=tol, exclude=exclude)
    phi_periodic = np.asarray(periodic.potentials)
    n_sites, n_fit = len(cluster_points), len(cluster_points) + len(grid)

    targets = everything[:n_fit]
    fixed = ~fitted
    phi_fixed = _array_potentials(targets, positions[fixed], formal[fixed])
    fit_positions = positions[fitted]
    matrix = COULOMB_CONSTANT / np.linalg.norm(targets[:, None, :] - fit_positions[None, :, :], axis=2)
    relative = fit_positions - center
    constraints = np.vstack([np.ones(len(fit_positions)), relative.T])
    values = -np.concatenate([[formal.sum()], formal @ (positions - center)])
    change, constant = constrained_least_squares(matrix, phi_periodic[:n_fit] - phi_fixed
                                                 - matrix @ formal[fitted], constraints, values,
                                                 free_constant=offset == "free")
    charges = formal.copy()
    charges[fitted] += change

    embedded = _array_potentials(everything, positions, charges)
    difference = embedded - phi_periodic - constant
    bare = _array_potentials(everything[:n_fit], positions, formal) - phi_periodic[:n_fit]
    if offset == "free":
        bare = bare - bare.mean()

    boundary, boundary_distance = boundary_cations(positions, formal, in_cluster, shortest)
    outside = np.flatnonzero(~in_cluster)
    charge_index = np.full(len(positions), -1)
    charge_index[outside] = np.arange(len(outside))
    cations = tuple(BoundaryCation(int(charge_index[i]), crystal.labels[sites[i]], crystal.symbols[sites[i]],
                                   float(d)) for i, d in zip(boundary, boundary_distance))
    if warn and cations:
        names = ", ".join(f"{c.label} #{c.charge_index} at {c.distance:.2f} Å" for c in cations[:8])
        more = f" and {len(cations) - 8} more" if len(cations) > 8 else ""
        warnings.warn(f"{len(cations)} point-charge cation(s) lie next to the cluster's anions ({names}{more}); "
                      "bare positive point charges there can pull electrons out of the cluster, and "
                      "pseudopotentials are usually placed on them", MadelungWarning, stacklevel=2)

    def frozen(array):
        array = np.ascontiguousarray(array)
        array.setflags(write=False)
        return array

    return Embedding(
        source=crystal.source, center=frozen(center), center_text=center_text, cluster_radius=cluster_radius,
        field_radius=field_radius, fitted_thickness=fitted_thickness, grid_spacing=grid_spacing,
        offset_mode=offset, offset=constant,
        cluster_positions=frozen(cluster_points),
        cluster_symbols=tuple(crystal.symbols[i] for i in sites[in_cluster]),
        cluster_labels=tuple(crystal.labels[i] for i in sites[in_cluster]),
        cluster_sites=frozen(sites[in_cluster]), cluster_charges=frozen(formal[in_cluster]),
        cluster_periodic_potentials=frozen(phi_periodic[:n_sites]),
        cluster_embedded_potentials=frozen(embedded[:n_sites]),
        charge_positions=frozen(positions[outside]),
        charge_labels=tuple(crystal.labels[i] for i in sites[outside]),
        charge_symbols=tuple(crystal.symbols[i] for i in sites[outside]),
        charge_sites=frozen(sites[outside]), formal_charges=frozen(formal[outside]),
        charges=frozen(charges[outside]), fitted=frozen(fitted[outside]),
        net_charge=float(charges.sum()), dipole=frozen(charges @ (positions - center)),
        sites=Residual.of(difference[:n_sites]), grid=Residual.of(difference[n_sites:n_fit]),
        check=Residual.of(difference[n_fit:]), bare_sites=Residual.of(bare[:n_sites]),
        bare_grid=Residual.of(bare[n_sites:n_fit]), boundary_cations=cations,
        periodic_error_estimate=float(periodic.error_estimate), seconds=time.perf_counter() - started)
