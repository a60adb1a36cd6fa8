"""Electrostatic descriptors of one crystal for screening tables: one flat row of named numbers.

:func:`describe` runs one Ewald sum (through :func:`madelung.madelung_constants`) and one
periodic Coulomb matrix (:func:`madelung.sums.matrix.coulomb_matrix`) and returns a
:class:`Description` whose ``to_dict()`` is a row with keys :data:`COLUMNS` in that order, every
value a float, int or str, so that thousands of rows stack into a table with one fixed schema.

The columns (units in the names: eV, V, e, Å):

``n_atoms``, ``formula``, ``reduced_formula``, ``formula_units``, ``volume_per_atom_A3``
    Size and composition of the cell as given.
``energy_eV``, ``energy_per_atom_eV``, ``energy_per_formula_unit_eV``, ``energy_per_formula_unit_kJ_mol``
    Signed electrostatic (Ewald) energy of the point charges: negative when the ions bind.
``error_estimate_eV``, ``tol``
    Predicted truncation error of ``energy_eV`` and the requested relative tolerance.
``r0_A``
    Shortest cation–anion distance.
``madelung_charges_left_in``, ``madelung_handbook``, ``madelung_common_factor``
    Madelung constants in the conventions of :mod:`madelung.analysis.madelung_constants` (NaN where the
    convention is undefined for this structure, e.g. handbook with two cation kinds).
``cation_potential_{min,mean,max}_V``, ``anion_potential_{min,mean,max}_V``
    Statistics of the site potentials over cation and over anion sites.
``species_potentials_V``
    JSON text ``{"O": [min, mean, max], ...}``: the same statistics per species (element, or the
    mixture label of a mixed site). Kept as text so that the table schema does not depend on the
    elements present; the per-site table of :mod:`madelung.batch` has every site.
``site_constant_{min,max}``
    Range of the site Madelung constants ``M_i = -phi_i r0 / (k_e q_i)``.
``charge_min_e``, ``charge_max_e``, ``charge_mean_abs_e``, ``charge_rms_e``
    Charge statistics over the sites.
``ewald_matrix_spectrum_000`` ... ``ewald_matrix_spectrum_{L-1}`` (L = :data:`SPECTRUM_LENGTH`)
    Eigenvalues (eV) of the Ewald sum matrix defined below, sorted by decreasing absolute value,
    zero-padded to length L; a cell with more than L sites keeps its L largest in magnitude.
``ewald_matrix_note``
    ``""``, or why the spectrum is truncated or missing (NaN): cells beyond the Coulomb-matrix
    size limit.

The Ewald sum matrix
--------------------
Following Faber, Lindmaa, von Lilienfeld and Armiento (2015), the matrix is the pairwise
decomposition of the periodic Coulomb energy. With ``J`` the periodic Coulomb interaction matrix
(``J[i, j]``: potential in V at site i from a unit charge on site j and all its images, with a
uniform neutralizing background; ``J[i, i]``: the site's own images, the Ewald self term and the
background), we define

    X[i, j] = q_i q_j J[i, j]   (eV),   so that   E = 1/2 sum_ij X[i, j]

for a neutral cell: the sum of all entries is twice the Ewald energy. The diagonal X[i, i] holds
the interaction of ion i with its own periodic images plus its share of the Ewald self and
background terms. Our charges are the model's ion charges (formal, assigned or equilibrated),
not the nuclear charges the paper uses, because that is the electrostatics this engine
describes; and the paper's split of the diagonal terms may differ from ours by a convention
(we write this from memory): compare the definitions before comparing numbers. The eigenvalues of X do not depend on the order of the atoms nor on which of the
equivalent unit cells of the same lattice (same number of sites) is used.

Limits: a point-charge model with formal charges overstates the electrostatics of a real, partly
covalent solid. These are model descriptors for ranking and learning, not measured properties.

References
----------
F. Faber, A. Lindmaa, O. A. von Lilienfeld and R. Armiento, "Crystal structure representations for
machine learning models of formation energies", Int. J. Quantum Chem. 115 (2015) 1094.
P. P. Ewald, Ann. Phys. 369 (1921) 253.
E. Madelung, Phys. Z. 19 (1918) 524.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from ..units import EV_TO_KJ_PER_MOL
from ..structure.crystal import Crystal
from ..sums.geometry import nearest_from_pairs, neighbour_pairs, shared_bins
from ..sums.matrix import blas_budget, coulomb_matrix, matrix_and_sum, site_plan, MAX_MATRIX_SITES
from ..charges.polyatomic import centred_crystal, find_polyatomic_ions
from .madelung_constants import madelung_constants
from ..defaults import SCREENING_TOL, SPECTRUM_LENGTH



def spectrum_columns(length=SPECTRUM_LENGTH):
    """Names of the eigenvalue columns."""
    names = _SPECTRUM_NAMES.get(length)
    if names is None:
        names = tuple(f"ewald_matrix_spectrum_{k:03d}" for k in range(length))
        if length <= 1000:
            _SPECTRUM_NAMES[length] = names
    return list(names)


_SPECTRUM_NAMES = {}


_SCALAR_COLUMNS = [
    ("n_atoms", "int"), ("formula", "str"), ("reduced_formula", "str"), ("formula_units", "int"),
    ("volume_per_atom_A3", "float"),
    ("energy_eV", "float"), ("energy_per_atom_eV", "float"), ("energy_per_formula_unit_eV", "float"),
    ("energy_per_formula_unit_kJ_mol", "float"), ("error_estimate_eV", "float"), ("tol", "float"),
    ("r0_A", "float"),
    ("madelung_charges_left_in", "float"), ("madelung_handbook", "float"), ("madelung_common_factor", "float"),
    ("cation_potential_min_V", "float"), ("cation_potential_mean_V", "float"), ("cation_potential_max_V", "float"),
    ("anion_potential_min_V", "float"), ("anion_potential_mean_V", "float"), ("anion_potential_max_V", "float"),
    ("species_potentials_V", "str"),
    ("site_constant_min", "float"), ("site_constant_max", "float"),
    ("charge_min_e", "float"), ("charge_max_e", "float"), ("charge_mean_abs_e", "float"), ("charge_rms_e", "float"),
]


def column_types(length=SPECTRUM_LENGTH) -> dict:
    """Every descriptor column with its type (``"int"``, ``"float"`` or ``"str"``), in order."""
    types = dict(_SCALAR_COLUMNS)
    types.update({name: "float" for name in spectrum_columns(length)})
    types["ewald_matrix_note"] = "str"
    return types


#: The descriptor columns of :func:`describe`, in order (default spectrum length).
COLUMNS = tuple(column_types())


@dataclass(frozen=True)
class Description:
    """The electrostatic descriptors of one crystal (:func:`describe`), one named field per column.

    The scalar fields carry the column names and units of the module docstring (``energy_eV``,
    ``r0_A``, ``madelung_handbook`` ...; NaN where a convention is undefined for the structure).

    Attributes
    ----------
    spectrum : (L,) float ndarray
        The padded Ewald-sum-matrix spectrum, eV (the ``ewald_matrix_spectrum_NNN`` columns; empty
        for L = 0).
    ewald_matrix_note : str
        ``""`` or why the spectrum is truncated or missing.
    sites : tuple of dict, or None
        With ``describe(..., sites=True)``: one row per site with the keys of :data:`SITE_COLUMNS`
        (index, label, species, charge e, potential V, site constant, q*phi eV, fractional x, y, z).
    """

    n_atoms: int
    formula: str
    reduced_formula: str
    formula_units: int
    volume_per_atom_A3: float
    energy_eV: float
    energy_per_atom_eV: float
    energy_per_formula_unit_eV: float
    energy_per_formula_unit_kJ_mol: float
    error_estimate_eV: float
    tol: float
    r0_A: float
    madelung_charges_left_in: float
    madelung_handbook: float
    madelung_common_factor: float
    cation_potential_min_V: float
    cation_potential_mean_V: float
    cation_potential_max_V: float
    anion_potential_min_V: float
    anion_potential_mean_V: float
    anion_potential_max_V: float
    species_potentials_V: str
    site_constant_min: float
    site_constant_max: float
    charge_min_e: float
    charge_max_e: float
    charge_mean_abs_e: float
    charge_rms_e: float
    spectrum: np.ndarray
    ewald_matrix_note: str
    sites: tuple = None

    @classmethod
    def from_row(cls, row, sites=None, spectrum_length=SPECTRUM_LENGTH):
        """The description holding a flat row of :func:`column_types` ``(spectrum_length)``."""
        spectrum = np.array([row[name] for name in spectrum_columns(spectrum_length)], dtype=float)
        return cls(**{name: row[name] for name, _ in _SCALAR_COLUMNS}, spectrum=spectrum,
                   ewald_matrix_note=row["ewald_matrix_note"], sites=None if sites is None else tuple(sites))

    def to_dict(self) -> dict:
        """The flat row of the screening table: keys :func:`column_types` ``(len(spectrum))`` in order,
        floats, ints and strings only (NaN where a value is undefined; the serializer's policy
        decides how NaN is written). The per-site rows stay in :attr:`sites`."""
        row = {name: getattr(self, name) for name, _ in _SCALAR_COLUMNS}
        row.update(zip(spectrum_columns(len(self.spectrum)), (float(v) for v in self.spectrum)))
        row["ewald_matrix_note"] = self.ewald_matrix_note
        return row


def ewald_sum_matrix(crystal, tol=SCREENING_TOL, d_min=None, plan=None, coulomb=None):
    """The Ewald sum matrix ``X[i, j] = q_i q_j J[i, j]`` (eV) defined in the module docstring
    (``plan``: the crystal's :func:`madelung.sums.matrix.site_plan`, if made already; ``coulomb``:
    the Coulomb matrix J itself, if made already).

    References
    ----------
    F. Faber, A. Lindmaa, O. A. von Lilienfeld and R. Armiento, Int. J. Quantum Chem. 115 (2015) 1094.
    """
    q = np.asarray(crystal.charges, dtype=float)
    if coulomb is None:
        coulomb = coulomb_matrix(crystal.cell, crystal.positions, tol=tol, d_min=d_min, plan=plan)
    return q[:, None] * coulomb * q[None, :]


def ewald_matrix_spectrum(crystal, length=SPECTRUM_LENGTH, tol=SCREENING_TOL, d_min=None, plan=None, coulomb=None):
    """Eigenvalues of :func:`ewald_sum_matrix` sorted by decreasing magnitude, zero-padded to ``length``.

    Returns ``(values, note)``: ``note`` is ``""``, says that the spectrum was truncated to the
    ``length`` largest magnitudes, or, for a cell beyond the Coulomb-matrix size limit, says so
    (values then NaN). ``plan``, ``coulomb``: as for :func:`ewald_sum_matrix`.
    """
    out = np.zeros(length)
    n = len(crystal)
    if n > MAX_MATRIX_SITES:
        out[:] = np.nan
        return out, f"not computed: {n} sites, more than the Coulomb-matrix limit of {MAX_MATRIX_SITES}"
    matrix = ewald_sum_matrix(crystal, tol=tol, d_min=d_min, plan=plan, coulomb=coulomb)
    with blas_budget(float(n) ** 3):
        values = np.linalg.eigvalsh(matrix)
    # decreasing magnitude; ties (degenerate pairs +x, -x) broken by sign so the order is unique
    values = values[np.lexsort((-values, -np.abs(np.round(values, 10))))]
    kept = min(n, length)
    out[:kept] = values[:kept]
    note = f"truncated: {n} eigenvalues, the {length} largest in magnitude kept" if n > length else ""
    return out, note


def _stats(values):
    """(min, mean, max) of an array; the extremes from a list (one NumPy reduction, not three, on
    arrays of a few numbers), the mean NumPy's own."""
    if len(values) == 0:
        return (math.nan, math.nan, math.nan)
    listed = values.tolist()
    return (float(min(listed)), float(values.mean()), float(max(listed)))


def describe(crystal, tol=SCREENING_TOL, spectrum_length=SPECTRUM_LENGTH, sites=False):
    """Electrostatic descriptors of a neutral crystal: one flat row (see the module docstring).

    Parameters
    ----------
    crystal : Crystal
        A neutral crystal with cations and anions.
    tol : float, optional
        Relative accuracy of the Ewald sum and of the Coulomb matrix (default 1e-8).
    spectrum_length : int, optional
        Length L of the padded Ewald-sum-matrix spectrum (0 leaves the spectrum out).
    sites : bool, optional
        Also return the per-site values (see :data:`SITE_COLUMNS`).

    Notes
    -----
    A salt of polyatomic ions (carbonate, sulfate, hydroxide, ammonium, ...) is described with
    each ion as one charge at its centre (:func:`madelung.charges.polyatomic.centred_crystal`), so
    its row and its sites are those of the ions, as in ``madelung constant``.

    Returns
    -------
    Description
        One named field per column; ``to_dict()`` gives the flat row (keys :func:`column_types`
        ``(spectrum_length)`` in order; floats, ints and strings only) and, with ``sites=True``,
        ``sites`` holds the per-site rows.

    Raises
    ------
    InputError
        For a cell with a net charge, or without both cations and anions.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253; E. Madelung, Phys. Z. 19 (1918) 524;
    F. Faber, A. Lindmaa, O. A. von Lilienfeld and R. Armiento, Int. J. Quantum Chem. 115 (2015) 1094.
    """
    if not isinstance(crystal, Crystal):
        raise InputError(f"describe() needs a madelung.Crystal, got {type(crystal).__name__}")
    with shared_bins():
        # salts of polyatomic ions are described with each ion one charge at its centre, as the
        # command line and madelung_constants do by default
        found = find_polyatomic_ions(crystal)
        if found.found:
            crystal = centred_crystal(crystal, found)
        n = len(crystal)
        # one plan of the sites, tuned for unit charges on every site: the Coulomb matrix of the
        # spectrum needs it, and it is at least as accurate for the crystal's own charges, so the
        # energy and the Madelung constants run on it too (bins and k-vectors built once). Its
        # real-space pairs, found once, serve the Coulomb matrix, the nearest distances and the
        # first shells (a search of their own only when a nearest partner lies farther out)
        plan = nearest = pairs = coulomb = result = None
        if spectrum_length and n <= MAX_MATRIX_SITES:
            plan = site_plan(crystal.cell, crystal.positions, tol=tol, d_min=crystal.shortest_distance,
                             reduced=crystal.reduced)
            pairs = neighbour_pairs(plan.cell, crystal.positions, plan.real_cutoff, bins=plan.bins)
            nearest = nearest_from_pairs(*pairs, crystal.charges, partners=False)   # the distances suffice
            # the Coulomb matrix, and the crystal's own sum as J q from the same terms
            coulomb, result = matrix_and_sum(crystal, plan, pairs)
        if nearest is None:
            nearest = crystal.nearest_distances()
        constants = madelung_constants(crystal, tol=tol, polyatomic_ions="atoms", ewald_result=result,
                                       plan=plan if result is None else None, nearest=nearest,
                                       pairs=None if pairs is None else (*pairs, plan.real_cutoff))
    result = constants.ewald
    q = np.asarray(crystal.charges, dtype=float)
    phi = np.asarray(result.potentials)
    z = constants.formula_units
    row = {
        "n_atoms": n, "formula": crystal.formula, "reduced_formula": crystal.reduced_formula, "formula_units": z,
        "volume_per_atom_A3": crystal.volume / n,
        "energy_eV": result.energy, "energy_per_atom_eV": result.energy / n,
        "energy_per_formula_unit_eV": result.energy / z,
        "energy_per_formula_unit_kJ_mol": result.energy / z * EV_TO_KJ_PER_MOL,
        "error_estimate_eV": result.error_estimate, "tol": float(tol), "r0_A": constants.r0,
        "madelung_charges_left_in": constants.charges_left_in,
        "madelung_handbook": math.nan if constants.handbook is None else constants.handbook,
        "madelung_common_factor": math.nan if constants.common_factor is None else constants.common_factor,
    }
    for name, mask in (("cation", q > 0), ("anion", q < 0)):
        low, mean, high = _stats(phi[mask])
        row[f"{name}_potential_min_V"], row[f"{name}_potential_mean_V"], row[f"{name}_potential_max_V"] = \
            low, mean, high
    species = {}
    for i, label in enumerate(crystal.symbols if crystal.species is None else map(crystal.species_label, range(n))):
        species.setdefault(label, []).append(i)
    row["species_potentials_V"] = json.dumps({k: [round(v, 10) for v in _stats(phi[sites])]
                                              for k, sites in species.items()}, sort_keys=True)
    site = constants.site[np.isfinite(constants.site)]
    row["site_constant_min"], _, row["site_constant_max"] = _stats(site)
    charges = q.tolist()
    row["charge_min_e"] = float(min(charges))
    row["charge_max_e"] = float(max(charges))
    row["charge_mean_abs_e"] = float(np.abs(q).mean())
    row["charge_rms_e"] = math.sqrt((q * q).mean())
    if spectrum_length:
        # the matrix was made with the sum above (None beyond the size limit, where the spectrum is NaN)
        values, note = ewald_matrix_spectrum(crystal, spectrum_length, coulomb=coulomb)
        row.update(zip(spectrum_columns(spectrum_length), (float(v) for v in values)))
    else:
        note = "not computed: spectrum length 0"
    row["ewald_matrix_note"] = note
    if not sites:
        return Description.from_row(row, None, spectrum_length)
    frac = crystal.fractional_positions
    table = [{"site": i, "label": crystal.labels[i], "species": crystal.species_label(i),
              "charge_e": float(q[i]), "potential_V": float(phi[i]),
              "site_constant": float(constants.site[i]), "q_phi_eV": float(q[i] * phi[i]),
              "x_frac": float(frac[i, 0]), "y_frac": float(frac[i, 1]), "z_frac": float(frac[i, 2])}
             for i in range(n)]
    return Description.from_row(row, table, spectrum_length)


#: Columns of the per-site values of :func:`describe` (``sites=True``), with their types:
#: site index, CIF label, species (element or mixture), charge, potential, site Madelung
#: constant ``-phi_i r0 / (k_e q_i)`` (NaN for an uncharged site), ``q_i phi_i`` (eV; the
#: energy sums half of these) and fractional coordinates.
SITE_COLUMNS = {"site": "int", "label": "str", "species": "str", "charge_e": "float", "potential_V": "float",
                "site_constant": "float", "q_phi_eV": "float", "x_frac": "float", "y_frac": "float",
                "z_frac": "float"}


def empty_row(spectrum_length=SPECTRUM_LENGTH) -> dict:
    """A row of the descriptor columns with nothing known (NaN, -1 or "") for a failed structure."""
    fill = {"int": -1, "float": math.nan, "str": ""}
    return {name: fill[kind] for name, kind in column_types(spectrum_length).items()}
