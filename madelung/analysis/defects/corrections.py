"""Charged-cell correction: the image energy of a charge in a supercell with a scalar or tensor
dielectric constant, and its 1/L series.

References
----------
G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (point charge in a neutralizing
background, image energy q^2 alpha / 2 eps L).
R. Rurali and X. Cartoixà, Nano Lett. 9 (2009) 975 and Y. Kumagai and F. Oba, Phys. Rev. B 89
(2014) 195205 (anisotropic screening: Ewald sum with a dielectric tensor).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from ...structure.crystal import Crystal
from ...errors import InputError
from ...sums._kernels import point_kernels
from ...sums.geometry import plane_spacings, reduced_basis
from ...sums.plan import plan_sum, reciprocal_vectors
from ...units import COULOMB_CONSTANT
from ...structure.supercells import Supercell
from ...defaults import SUM_TOL

@dataclass(frozen=True)
class ChargedCellCorrection:
    """Point-charge image correction of a charge q in a periodic supercell with dielectric screening.

    Attributes
    ----------
    energy : correction to add to the supercell energy, eV: -(q^2 / 2) k_e v_M (positive for a
        charged defect; for a cube, q^2 alpha_M k_e / (2 eps L)).
    charge : q, e. dielectric : (3, 3) tensor used.
    madelung_potential : k_e v_M, the potential of the screened periodic point-charge array with its
        background at the charge's own site (its own 1/r left out), V per e.
    cell : (3, 3) supercell, Å. length : V^(1/3), Å.
    effective_constant : 2 L E / (k_e q^2) with L = V^(1/3) (the Madelung-type constant over eps;
        equals alpha_M / eps for a simple cubic cell), or nan for q = 0.
    alpha, real_cutoff, reciprocal_cutoff : splitting parameter and cutoffs (in the metric of eps).
    real_terms, k_vectors : terms summed.
    error_estimate : predicted error of ``energy``, eV.
    """

    energy: float
    charge: float
    dielectric: np.ndarray
    madelung_potential: float
    cell: np.ndarray
    length: float
    effective_constant: float
    alpha: float
    real_cutoff: float
    reciprocal_cutoff: float
    real_terms: int
    k_vectors: int
    error_estimate: float

    @property
    def volume(self) -> float:
        """Volume of the supercell, Å^3."""
        return abs(float(np.linalg.det(self.cell)))

    @property
    def dielectric_eigenvalues(self) -> np.ndarray:
        """Principal values of the dielectric tensor, ascending."""
        return np.linalg.eigvalsh(self.dielectric)

    def to_dict(self) -> dict:
        """JSON-ready: cell Å, volume Å^3, charge e, the dielectric tensor and its principal values,
        the correction eV, the Madelung potential V, the effective constant (None for q = 0, where
        it is undefined), the sum's parameters and its error estimate eV."""
        return {"cell_angstrom": self.cell.tolist(), "volume_angstrom3": self.volume, "charge_e": self.charge,
                "dielectric": self.dielectric.tolist(), "dielectric_eigenvalues": self.dielectric_eigenvalues.tolist(),
                "correction_eV": self.energy, "madelung_potential_V": self.madelung_potential,
                "effective_constant": self.effective_constant if math.isfinite(self.effective_constant) else None,
                "error_estimate_eV": self.error_estimate, "alpha_per_angstrom": self.alpha,
                "real_terms": self.real_terms, "k_vectors": self.k_vectors,
                "sign_convention": "add the correction to the energy of the charged supercell"}


def dielectric_tensor(value, source=None):
    """A validated dielectric tensor (3, 3) from a number, three diagonal numbers or nine numbers."""
    where = f"{source}: " if source else ""
    try:
        array = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{where}dielectric constant must be numbers, got {value!r}") from None
    if array.size == 1:
        array = float(array.ravel()[0]) * np.eye(3)
    elif array.size == 3:
        array = np.diag(array.ravel())
    elif array.size == 9:
        array = array.reshape(3, 3)
    else:
        raise InputError(f"{where}dielectric tensor needs 1, 3 (diagonal) or 9 numbers, got {array.size}")
    if not np.all(np.isfinite(array)):
        raise InputError(f"{where}dielectric tensor contains a non-finite number")
    scale = float(np.max(np.abs(array)))
    if scale == 0 or abs(np.linalg.det(array)) <= 1e-12 * scale ** 3:
        raise InputError(f"{where}dielectric tensor is singular (determinant {np.linalg.det(array):.3g})")
    if np.max(np.abs(array - array.T)) > 1e-6 * scale:
        raise InputError(f"{where}dielectric tensor is not symmetric")
    array = 0.5 * (array + array.T)
    eigenvalues = np.linalg.eigvalsh(array)
    if eigenvalues.min() <= 0:
        raise InputError(f"{where}dielectric tensor is not positive definite (eigenvalues "
                         f"{', '.join(f'{e:.4g}' for e in eigenvalues)})")
    return array


def read_dielectric_tensor(path):
    """Read 1, 3 or 9 numbers (whitespace or commas; '#' comments) from a text file."""
    import os

    path = os.fspath(path)
    if not os.path.isfile(path):
        raise InputError(f"{path}: no such file")
    numbers = []
    with open(path, encoding="utf-8") as handle:
        for line in handle:
            line = line.split("#", 1)[0]
            for token in re.split(r"[,\s]+", line.strip()):
                if token:
                    try:
                        numbers.append(float(token))
                    except ValueError:
                        raise InputError(f"{path}: {token!r} is not a number") from None
    return dielectric_tensor(numbers, source=path)


def charged_cell_correction(cell, charge, dielectric=1.0, *, tol=SUM_TOL) -> ChargedCellCorrection:
    """Image correction of a point charge in a periodic cell with a scalar or tensor dielectric constant.

    Parameters
    ----------
    cell : (3, 3) array_like, or Crystal, or Supercell
        The (super)cell, rows are lattice vectors, Å; any shape.
    charge : float
        Defect charge q, e.
    dielectric : float, three numbers or (3, 3)
        Scalar dielectric constant, diagonal or full symmetric positive-definite tensor.
    tol : float
        Relative accuracy of the lattice sum.

    Returns
    -------
    ChargedCellCorrection

    Notes
    -----
    The anisotropic Madelung potential of the array of point charges with a neutralizing
    background, screened by eps (Rurali & Cartoixà; Kumagai & Oba), is

        v_M = sum_{n != 0} erfc(alpha s_n) / (sqrt(det eps) s_n)
              + (4 pi / V) sum_{k != 0} exp(-k.eps.k / 4 alpha^2) / (k.eps.k)
              - pi / (V alpha^2) - 2 alpha / (sqrt(pi) sqrt(det eps)),   s_n = sqrt(n.eps^-1.n),

    and the correction is E = -(q^2 / 2) k_e v_M. For eps = e I it is 1/e times the vacuum
    value, and for a cube of side L it is the Makov–Payne q^2 alpha_M / (2 e L). The splitting
    parameter and cutoffs are chosen for the isotropic sum of the lattice eps^-1/2 n, which is the
    same sum in other coordinates.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014.
    R. Rurali and X. Cartoixà, Nano Lett. 9 (2009) 975.
    Y. Kumagai and F. Oba, Phys. Rev. B 89 (2014) 195205.
    """
    if isinstance(cell, Supercell):
        cell = cell.crystal.cell
    elif isinstance(cell, Crystal):
        cell = cell.cell
    try:
        cell = np.array(cell, dtype=float)
    except (TypeError, ValueError):
        raise InputError("cell must be a 3x3 matrix of numbers (Å)") from None
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)):
        raise InputError(f"cell must be a finite 3x3 matrix (rows are lattice vectors), got shape {cell.shape}")
    volume = abs(float(np.linalg.det(cell)))
    if volume < 1e-6 * float(np.prod(np.linalg.norm(cell, axis=1))) or volume < 1e-8:
        raise InputError(f"the cell is degenerate (volume {volume:.3g} Å^3)")
    try:
        charge = float(charge)
    except (TypeError, ValueError):
        raise InputError(f"charge must be a number of e, got {charge!r}") from None
    if not math.isfinite(charge):
        raise InputError("charge must be finite")
    eps = dielectric_tensor(dielectric)
    k_e = COULOMB_CONSTANT
    det = float(np.linalg.det(eps))
    root_det = math.sqrt(det)
    values, vectors = np.linalg.eigh(eps)
    inverse = np.ascontiguousarray(np.linalg.inv(eps))
    inverse_root = vectors @ np.diag(values ** -0.5) @ vectors.T

    # the lattice sums run in the reduced basis (the same lattice, well-shaped image boxes);
    # tuning in the coordinates where the sum is isotropic
    sum_cell, _ = reduced_basis(cell)
    scaled = sum_cell @ inverse_root
    # one unit charge in the scaled cell: the plan's splitting parameter and cutoffs
    choice = plan_sum(scaled, np.zeros((1, 3)), np.ones(1), tol=tol, method="direct")
    a = choice.alpha

    # real space: s_n < r_cut needs |n| < r_cut sqrt(max eigenvalue)
    reach = choice.real_cutoff * math.sqrt(values.max())
    nmax = np.ceil(reach / plane_spacings(sum_cell)).astype(np.int64)
    real_sum, real_terms = point_kernels.anisotropic_real_space_sum(
        np.ascontiguousarray(sum_cell), inverse, a, choice.real_cutoff, nmax)
    # reciprocal space: k.eps.k <= k_cut^2 needs |k| <= k_cut / sqrt(min eigenvalue)
    _, kvectors, _ = reciprocal_vectors(sum_cell, choice.reciprocal_cutoff / math.sqrt(values.min()))
    kek = np.einsum("mi,ij,mj->m", kvectors, eps, kvectors)
    inside = kek <= choice.reciprocal_cutoff ** 2
    kek = kek[inside]
    reciprocal_sum = 2.0 * (4.0 * math.pi / volume) * float(np.sum(np.exp(-kek / (4.0 * a * a)) / kek))
    v_m = (real_sum / root_det + reciprocal_sum - math.pi / (volume * a * a)
           - 2.0 * a / (math.sqrt(math.pi) * root_det))
    energy = -0.5 * charge * charge * k_e * v_m
    length = volume ** (1.0 / 3.0)
    constant = 2.0 * length * energy / (k_e * charge * charge) if charge != 0 else float("nan")
    # the tuning's error is for sum q^2 = 1 in the scaled frame; the sum scales by 1/sqrt(det eps)
    error = charge * charge * choice.error_estimate / root_det
    return ChargedCellCorrection(
        energy=float(energy), charge=charge, dielectric=eps, madelung_potential=float(k_e * v_m), cell=cell,
        length=float(length), effective_constant=float(constant), alpha=float(a), real_cutoff=choice.real_cutoff,
        reciprocal_cutoff=choice.reciprocal_cutoff, real_terms=int(real_terms), k_vectors=int(inside.sum()),
        error_estimate=float(error))


def _series_repeats(repeats):
    repeats = tuple(int(n) for n in repeats)
    if len(repeats) < 2 or min(repeats) < 1 or len(set(repeats)) != len(repeats):
        raise InputError(f"the series needs at least two different positive repeats, got {list(repeats)}")
    return repeats


@dataclass(frozen=True)
class CorrectionSeries:
    """The correction over the supercells n x (the given cell), with its 1/L check.

    Attributes
    ----------
    repeats : the n of each cell. lengths : V^(1/3) of each, Å. corrections : ChargedCellCorrection each.
    energies : their energies, eV. slope : least-squares a in E = a / L + c, eV·Å; intercept : c, eV
        (zero for a point-charge image energy, which falls exactly as 1/L for cells of one shape).
    spread : largest relative deviation of E·L from its mean.
    """

    repeats: tuple
    lengths: np.ndarray
    corrections: tuple
    energies: np.ndarray
    slope: float
    intercept: float
    spread: float

    def to_dict(self) -> dict:
        """JSON-ready: one entry per cell (repeat, L Å, correction eV, E*L eV Å) and the 1/L fit
        (slope eV Å, intercept eV, relative spread of E*L)."""
        return {"series": [{"repeat": n, "length_angstrom": c.length, "correction_eV": c.energy,
                            "energy_times_length_eV_angstrom": c.energy * c.length}
                           for n, c in zip(self.repeats, self.corrections)],
                "fit_slope_eV_angstrom": self.slope, "fit_intercept_eV": self.intercept,
                "relative_spread_of_E_times_L": self.spread}


def correction_series(cell, charge, dielectric=1.0, repeats=(1, 2, 3, 4), *, tol=SUM_TOL) -> CorrectionSeries:
    """:func:`charged_cell_correction` for the cells n x ``cell`` (n in ``repeats``), with the 1/L fit.

    References
    ----------
    G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014 (the 1/L law of the image energy).
    """
    if isinstance(cell, Supercell):
        cell = cell.crystal.cell
    elif isinstance(cell, Crystal):
        cell = cell.cell
    repeats = _series_repeats(repeats)
    cell = np.asarray(cell, float)
    corrections = tuple(charged_cell_correction(n * cell, charge, dielectric, tol=tol) for n in repeats)
    lengths = np.array([c.length for c in corrections])
    energies = np.array([c.energy for c in corrections])
    design = np.stack([1.0 / lengths, np.ones_like(lengths)], axis=1)
    (slope, intercept), *_ = np.linalg.lstsq(design, energies, rcond=None)
    products = energies * lengths
    mean = float(np.mean(products))
    spread = float(np.max(np.abs(products - mean)) / abs(mean)) if mean != 0 else 0.0
    return CorrectionSeries(repeats=repeats, lengths=lengths, corrections=corrections, energies=energies,
                            slope=float(slope), intercept=float(intercept), spread=spread)
