"""Lattice energies: Coulomb plus short-range terms, the classic closed forms, fitting of the
short-range parameters, and the Birch–Murnaghan equation of state.

Sign convention (the handbook one): the *lattice energy* is the positive energy needed to
separate the solid into gaseous ions at infinite distance, per formula unit,
``U = -(E_coulomb + E_short_range) / Z``. The Coulomb and short-range energies themselves are
reported as signed sums per cell (Coulomb negative, repulsion positive).

The model is a rigid-ion model with point charges (formal charges unless told otherwise):
it leaves out polarisation, covalency, zero-point and thermal energy, so a lattice energy
from it is a model estimate. Handbook lattice energies from the Born–Haber cycle include
all of those; the difference is what the comparison is for.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .units import COULOMB_CONSTANT, EV_PER_A3_TO_GPA, EV_TO_KJ_PER_MOL, kj_per_mol_to_ev

#: Kapustinskii's constant, 1.2025e-4 J m mol^-1, in kJ/mol Å; and his d = 0.345 Å
#: (A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283).
KAPUSTINSKII_CONSTANT_KJ_ANGSTROM = 1202.5
KAPUSTINSKII_D = 0.345

#: rho used in the Born–Mayer closed form when the model has no exponential term (Å);
#: the same 0.345 Å Kapustinskii adopted (common practice).
DEFAULT_BORN_MAYER_RHO = 0.345

#: Born exponents by the noble-gas (or d10) core of the ion, keyed by its electron count
#: (L. Pauling, The Nature of the Chemical Bond, 3rd ed. (1960), the Born-exponent table that
#: handbooks reproduce: He 5, Ne 7, Ar and Cu+ 9, Kr and Ag+ 10, Xe and Au+ 12; from memory).
BORN_EXPONENTS = {2: 5.0, 10: 7.0, 18: 9.0, 28: 9.0, 36: 10.0, 46: 10.0, 54: 12.0, 78: 12.0}


def _atomic_number(symbol):
    from ase.data import atomic_numbers

    if symbol not in atomic_numbers:
        raise InputError(f"unknown element symbol {symbol!r}")
    return atomic_numbers[symbol]


def born_exponent(symbol, charge) -> float:
    """Born exponent n of an ion from the electron configuration of its core.

    Parameters
    ----------
    symbol : str
        Element symbol.
    charge : float
        Ion charge in e (whole number).

    Returns
    -------
    float
        5 (He core), 7 (Ne), 9 (Ar, Cu+ type), 10 (Kr, Ag+ type), 12 (Xe, Au+ type).

    References
    ----------
    L. Pauling, The Nature of the Chemical Bond, 3rd ed. (Cornell, 1960), table of Born exponents.
    """
    electrons = _atomic_number(symbol) - int(round(charge))
    if electrons not in BORN_EXPONENTS:
        raise InputError(f"no Born exponent is tabulated for {symbol}{int(round(charge)):+d} ({electrons} electrons: "
                         "not a closed noble-gas or d10 shell); give n yourself")
    return BORN_EXPONENTS[electrons]


def born_lande_energy(madelung_constant, z_cation, z_anion, r0, n) -> float:
    """Born–Landé lattice energy per formula unit, eV (positive):
    ``U = M z+ |z-| k_e / r0 (1 - 1/n)``.

    Parameters
    ----------
    madelung_constant : float
        Madelung constant in the handbook convention (E_fu = -M z+ |z-| k_e / r0).
    z_cation, z_anion : float
        Ion charges (the sign of ``z_anion`` is ignored).
    r0 : float
        Shortest cation–anion distance, Å.
    n : float
        Born exponent.

    References
    ----------
    M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210.
    """
    return madelung_constant * abs(z_cation * z_anion) * COULOMB_CONSTANT / r0 * (1.0 - 1.0 / n)


def born_mayer_energy(madelung_constant, z_cation, z_anion, r0, rho) -> float:
    """Born–Mayer lattice energy per formula unit, eV (positive):
    ``U = M z+ |z-| k_e / r0 (1 - rho/r0)``.

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1.
    """
    return madelung_constant * abs(z_cation * z_anion) * COULOMB_CONSTANT / r0 * (1.0 - rho / r0)


def kapustinskii_energy(ions_per_formula_unit, z_cation, z_anion, r_cation, r_anion) -> float:
    """Kapustinskii estimate of the lattice energy per formula unit, eV (positive):
    ``U = K nu z+ |z-| / (r+ + r-) (1 - d / (r+ + r-))`` with K = 1.2025e-4 J m/mol, d = 0.345 Å.

    Parameters
    ----------
    ions_per_formula_unit : int
        nu, the number of ions in the formula unit (2 for NaCl, 3 for CaF2).
    z_cation, z_anion : float
        Ion charges (sign ignored).
    r_cation, r_anion : float
        Ionic radii, Å (Shannon's effective ionic radii are used by :func:`lattice_energy`).

    References
    ----------
    A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283.
    R. D. Shannon, Acta Cryst. A32 (1976) 751 (the radii).
    """
    d = r_cation + r_anion
    kj = KAPUSTINSKII_CONSTANT_KJ_ANGSTROM * ions_per_formula_unit * abs(z_cation * z_anion) / d * \
        (1.0 - KAPUSTINSKII_D / d)
    return kj_per_mol_to_ev(kj)


@dataclass(frozen=True)
class ClosedForms:
    """The classic closed-form lattice energies beside the model's, eV per formula unit (positive).

    Attributes
    ----------
    madelung_constant : handbook convention (E_fu = -M z+ |z-| k_e / r0), or None.
    r0 : shortest cation–anion distance, Å.
    charges : (z+, |z-|) or None.
    born_lande, born_exponent : the Born–Landé energy and the n used (from the model's
        Born–Landé pair, else the mean of the ions' tabulated Born exponents), or None.
    born_mayer, rho : the Born–Mayer energy and the rho used (from the model's exponential pair,
        else 0.345 Å), or None.
    kapustinskii, radii : the Kapustinskii estimate and the Shannon radii (r+, r-) used, or None.
    notes : why a closed form is missing, by name.
    """

    madelung_constant: float | None
    r0: float
    charges: tuple | None
    born_lande: float | None
    born_exponent: float | None
    born_exponent_source: str
    born_mayer: float | None
    rho: float | None
    rho_source: str
    kapustinskii: float | None
    radii: tuple | None
    notes: dict


@dataclass(frozen=True)
class LatticeEnergy:
    """Lattice energy of a crystal in the rigid-ion model.

    Attributes
    ----------
    formula : reduced formula (the formula unit).
    formula_units : Z, formula units per cell.
    n_atoms : ions per cell.
    coulomb : signed electrostatic energy per cell, eV.
    short_range : signed short-range energy per cell, eV (positive for net repulsion).
    total : coulomb + short_range per cell, eV.
    pressure : GPa (positive when the model wants to expand), or None.
    closed_forms : :class:`ClosedForms`, or None.
    """

    formula: str
    formula_units: int
    n_atoms: int
    coulomb: float
    short_range: float
    pressure: float | None
    closed_forms: ClosedForms | None

    @property
    def total(self) -> float:
        return self.coulomb + self.short_range

    @property
    def lattice_energy(self) -> float:
        """Positive energy to separate the solid into gaseous ions, eV per formula unit."""
        return -self.total / self.formula_units

    @property
    def lattice_energy_kj_per_mol(self) -> float:
        return self.lattice_energy * EV_TO_KJ_PER_MOL

    def per_cell(self):
        return {"coulomb": self.coulomb, "short_range": self.short_range, "total": self.total}

    def per_atom(self):
        return {k: v / self.n_atoms for k, v in self.per_cell().items()}

    def per_formula_unit(self):
        return {k: v / self.formula_units for k, v in self.per_cell().items()}


def closed_forms(crystal, model=None, tol=1e-10, ewald_result=None) -> ClosedForms:
    """Born–Landé, Born–Mayer and Kapustinskii lattice energies of a crystal with one cation and
    one anion kind, using the computed Madelung constant (handbook convention) and r0.
    ``ewald_result``: the crystal's Ewald sum if already done.

    References
    ----------
    M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210; M. Born and J. E. Mayer,
    Z. Phys. 75 (1932) 1; A. F. Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283;
    R. D. Shannon, Acta Cryst. A32 (1976) 751.
    """
    from .constants import madelung_constants
    from .elements import shannon_radius

    constants = madelung_constants(crystal, tol=tol, ewald_result=ewald_result)
    notes = {}
    m = constants.handbook
    if m is None:
        note = constants.handbook_note.removeprefix("undefined: ")
        return ClosedForms(None, constants.r0, None, None, None, "", None, None, "", None, None,
                           {"born_lande": note, "born_mayer": note, "kapustinskii": note})
    zp, zm = constants.handbook_charges
    cation = next(s for s, q in zip(crystal.symbols, crystal.charges) if q > 0)
    anion = next(s for s, q in zip(crystal.symbols, crystal.charges) if q < 0)
    pair = model.pair(cation, anion) if model is not None else None

    n = None
    n_source = ""
    if pair is not None and pair.form == "born-lande":
        n, n_source = pair.params["n"], "the model's Born–Landé pair"
    else:
        try:
            n = 0.5 * (born_exponent(cation, zp) + born_exponent(anion, -zm))
            n_source = "mean of the tabulated Born exponents of the two ions"
        except InputError as exc:
            notes["born_lande"] = str(exc)
    if pair is not None and pair.form in ("born-mayer", "buckingham"):
        rho, rho_source = pair.params["rho"], "the model's exponential pair"
    else:
        rho, rho_source = DEFAULT_BORN_MAYER_RHO, "0.345 Å (common practice)"

    kap = radii = None
    counts = crystal.element_counts()
    z = crystal.formula_units
    nu = (counts[cation] + counts[anion]) // z
    try:
        radii = (shannon_radius(cation, int(round(zp))), shannon_radius(anion, -int(round(zm))))
        kap = kapustinskii_energy(nu, zp, zm, *radii)
    except InputError as exc:
        notes["kapustinskii"] = str(exc)
    r0 = constants.r0
    return ClosedForms(
        madelung_constant=m, r0=r0, charges=(zp, zm),
        born_lande=None if n is None else born_lande_energy(m, zp, zm, r0, n), born_exponent=n,
        born_exponent_source=n_source, born_mayer=born_mayer_energy(m, zp, zm, r0, rho), rho=rho,
        rho_source=rho_source, kapustinskii=kap, radii=radii, notes=notes)


def total_terms(crystal, model, tol=1e-10, forces=False, stress=False):
    """Coulomb (Ewald) and short-range results of one crystal: ``(EwaldResult, ShortRangeResult)``."""
    from .sums.dispatch import ewald
    from .sums.shortrange import shortrange

    return ewald(crystal, tol=tol, forces=forces, stress=stress), shortrange(crystal, model, forces, stress)


def lattice_energy(crystal, repulsion, tol=1e-10, with_closed_forms=True) -> LatticeEnergy:
    """Lattice energy of a crystal: Coulomb (Ewald) plus the short-range terms of ``repulsion``.

    Parameters
    ----------
    crystal : Crystal
        A neutral crystal with charges.
    repulsion : RepulsionModel or path of a parameter file
    tol : float
        Relative accuracy of the Ewald sum.
    with_closed_forms : bool
        Also evaluate the Born–Landé, Born–Mayer and Kapustinskii closed forms where they apply.

    Returns
    -------
    LatticeEnergy

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1; P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    from .sums.shortrange import load_repulsion

    model = load_repulsion(repulsion)
    coulomb, short = total_terms(crystal, model, tol, stress=True)
    if coulomb.background:
        raise InputError(f"{crystal.source or 'structure'}: net charge {coulomb.net_charge:+.6g} e; "
                         "a lattice energy needs a neutral crystal")
    pressure = -np.trace(coulomb.stress + short.stress) / 3.0 * EV_PER_A3_TO_GPA
    forms = None
    if with_closed_forms and np.any(crystal.charges > 0) and np.any(crystal.charges < 0):
        forms = closed_forms(crystal, model, tol, ewald_result=coulomb)
    return LatticeEnergy(crystal.reduced_formula, crystal.formula_units, len(crystal), coulomb.energy,
                         short.energy, float(pressure), forms)


def scaled(crystal, factor):
    """The crystal with cell and positions scaled by ``factor`` (fractional coordinates kept)."""
    return crystal.replace(cell=crystal.cell * factor, positions=crystal.positions * factor)


def bulk_modulus(crystal, repulsion, tol=1e-10, step=0.002) -> float:
    """Bulk modulus of the model at the given structure under homogeneous strain, GPa:
    ``B = -dP / d ln V`` by central differences of the pressure (ions kept at fixed fractional
    coordinates, which is exact for structures without free coordinates such as rock salt).

    References
    ----------
    M. Born and K. Huang, Dynamical Theory of Crystal Lattices (Oxford, 1954), ch. III.
    """
    from .sums.shortrange import load_repulsion

    model = load_repulsion(repulsion)
    pressures = []
    for sign in (-1.0, 1.0):
        c, s = total_terms(scaled(crystal, 1.0 + sign * step), model, tol, stress=True)
        pressures.append(-np.trace(c.stress + s.stress) / 3.0)
    d_ln_v = 3.0 * (math.log1p(step) - math.log1p(-step))
    return float(-(pressures[1] - pressures[0]) / d_ln_v * EV_PER_A3_TO_GPA)


# ---------------------------------------------------------------- fitting
@dataclass(frozen=True)
class FitTarget:
    """One observed structure to fit to.

    Attributes
    ----------
    crystal : the observed structure (charges included).
    bulk_modulus : measured bulk modulus, GPa, or None.
    bulk_modulus_sigma : its weight as an uncertainty, GPa (default 2 % of the value).
    name : how the target is named in the report (default: the file, else the formula).
    """

    crystal: object
    bulk_modulus: float | None = None
    bulk_modulus_sigma: float | None = None
    name: str | None = None

    @property
    def label(self):
        return self.name or self.crystal.source or self.crystal.reduced_formula


@dataclass(frozen=True)
class FittedParameter:
    """One fitted or fixed parameter: ``pairs`` it applies to, ``name``, ``value``,
    one-standard-deviation ``uncertainty`` (None for fixed values), ``role``
    ("per pair", "shared" or "fixed")."""

    pairs: tuple
    name: str
    value: float
    uncertainty: float | None
    role: str


@dataclass(frozen=True)
class FitResidual:
    """One condition of the fit: ``target`` name, ``quantity``, the model's ``value`` and the
    ``wanted`` one in ``unit``, and the ``sigma`` it was weighted with."""

    target: str
    quantity: str
    value: float
    wanted: float
    unit: str
    sigma: float

    @property
    def normalised(self):
        return (self.value - self.wanted) / self.sigma


@dataclass(frozen=True)
class FitResult:
    """Outcome of :func:`fit_repulsion`.

    Attributes
    ----------
    model : the fitted :class:`RepulsionModel` (uncertainties attached to its pairs).
    parameters : tuple of :class:`FittedParameter`.
    residuals : tuple of :class:`FitResidual` (pressure, stress components, forces, bulk moduli).
    chi_square : sum of squared normalised residuals.
    degrees_of_freedom : conditions that depend on the parameters minus free parameters.
    evaluations : model evaluations used.
    message : the optimiser's message.
    """

    model: object
    parameters: tuple
    residuals: tuple
    chi_square: float
    degrees_of_freedom: int
    evaluations: int
    message: str


_START = {"rho": 0.3, "n": 8.0}
_LINEAR = ("A", "B", "C")
_PREFACTOR = {"born-mayer": "A", "buckingham": "A", "born-lande": "B"}


def _species_pairs(crystals):
    """Cation–anion pairs (fitted) and every other species pair (set to "none") present together."""
    fitted, other = set(), set()
    for crystal in crystals:
        sign = {}
        for s, q in zip(crystal.symbols, crystal.charges):
            sign.setdefault(s, set()).add(np.sign(q))
        species = sorted(sign)
        for i, a in enumerate(species):
            for b in species[i:]:
                opposite = (1.0 in sign[a] and -1.0 in sign[b]) or (-1.0 in sign[a] and 1.0 in sign[b])
                (fitted if opposite and a != b else other).add((a, b))
    other -= fitted
    return sorted(fitted), sorted(other)


def fit_repulsion(targets, form="born-mayer", fixed=None, shared=(), free=(), start=None,
                  cutoff=None, switch_width=None, pressure_sigma=1e-3, force_sigma=1e-4,
                  tol=1e-10, max_evaluations=200) -> FitResult:
    """Fit short-range parameters so that the observed structures are stationary.

    The conditions are: zero stress of every target (pressure and the other components, GPa),
    zero forces on every ion (eV/Å; automatically zero on sites fixed by symmetry), and, where a
    measured bulk modulus is given, the model's bulk modulus equal to it. Each condition is divided
    by its ``sigma`` and the sum of squares minimised with ``scipy.optimize.least_squares``
    (trust-region reflective), positive parameters fitted as logarithms.

    Parameters
    ----------
    targets : sequence of FitTarget (or Crystal)
        The observed structures; parameters of a species pair are shared by every target holding it.
    form : "born-mayer", "buckingham" or "born-lande"
        Form of every cation–anion pair. Other pairs (cation–cation, anion–anion) get form "none".
    fixed : dict, optional
        Parameters held at a value for every pair, e.g. ``{"rho": 0.345}``; for born-lande
        ``{"n": "table"}`` takes each pair's n from the Born-exponent table.
    shared : sequence of str
        Parameters fitted as one value common to every pair (e.g. ``("rho",)``).
    free : sequence of str
        Parameters fitted separately for every pair. The prefactor (A or B) is per pair unless
        named in ``shared`` or ``fixed``. Every other parameter must be fixed, shared or free.
    start : dict, optional
        Starting values of fitted shape parameters (defaults rho 0.3 Å, n 8).
    cutoff, switch_width : float, optional
        Cutoff handling of the fitted model, Å (defaults 10 and 2).
    pressure_sigma, force_sigma : float
        Weights (as uncertainties) of the stress conditions (GPa) and force conditions (eV/Å).
    tol : float
        Relative accuracy of the Ewald sums.
    max_evaluations : int
        Budget of the optimiser; running out of it is an error.

    Returns
    -------
    FitResult

    Notes
    -----
    Uncertainties come from the Jacobian at the solution, ``cov = (J^T J)^-1`` with residuals in units
    of their sigmas, multiplied by the reduced chi-square when it exceeds 1 and there are more
    conditions than parameters. A parameter the conditions do not determine (rho without a bulk
    modulus, say) is an error rather than a silent arbitrary value.

    Every condition is linear in A, B and C; these are solved exactly (non-negative linear least
    squares) for each trial of the shape parameters rho and n, which alone are iterated
    (variable projection). ``max_evaluations`` bounds those iterations.

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1 (fitting the repulsion to the equilibrium
    distance and compressibility); M. A. Branch, T. F. Coleman and Y. Li, SIAM J. Sci. Comput. 21
    (1999) 1 (the trust-region reflective least-squares method); G. H. Golub and V. Pereyra,
    SIAM J. Numer. Anal. 10 (1973) 413 (variable projection); P. B. Stark and R. L. Parker,
    Comput. Stat. 10 (1995) 129 (bounded-variable least squares).
    """
    from scipy.optimize import least_squares, lsq_linear

    from .crystal import Crystal
    from .sums.shortrange import DEFAULT_CUTOFF, DEFAULT_SWITCH_WIDTH, FORMS, PairPotential, RepulsionModel

    targets = [t if isinstance(t, FitTarget) else FitTarget(t) for t in targets]
    if not targets:
        raise InputError("fit: no structures given")
    for t in targets:
        if not isinstance(t.crystal, Crystal):
            raise InputError(f"fit: targets must hold madelung.Crystal objects, got {type(t.crystal).__name__}")
        if t.bulk_modulus is not None and not (math.isfinite(t.bulk_modulus) and t.bulk_modulus > 0):
            raise InputError(f"fit: bulk modulus of {t.label} must be a positive number of GPa, got {t.bulk_modulus!r}")
    if form not in _PREFACTOR:
        raise InputError(f"fit: form {form!r} is not one of {', '.join(_PREFACTOR)}")
    names = FORMS[form]
    fixed = dict(fixed or {})
    shared, free = list(shared), list(free)
    for group in (list(fixed), shared, free):
        for name in group:
            if name not in names:
                raise InputError(f"fit: {name!r} is not a parameter of the {form} form ({', '.join(names)})")
    for name in names:
        roles = (name in fixed) + (name in shared) + (name in free)
        if roles > 1:
            raise InputError(f"fit: parameter {name} is given more than one role (fixed, shared, free)")
        if roles == 0:
            if name == _PREFACTOR[form]:
                free.append(name)
            else:
                raise InputError(f"fit: parameter {name} of the {form} form is not set; fix it "
                                 f"(e.g. --fix {name}=VALUE), or fit it shared (--shared {name}) or per pair "
                                 f"(--free {name})")
    start = {**_START, **(start or {})}
    fitted_pairs, other_pairs = _species_pairs([t.crystal for t in targets])
    if not fitted_pairs:
        raise InputError("fit: the structures hold no cation–anion pair to fit")

    fixed_values = {}
    for name, value in fixed.items():
        if name == "n" and value == "table":
            for pair in fitted_pairs:
                charges = {s: q for t in targets for s, q in zip(t.crystal.symbols, t.crystal.charges)}
                fixed_values[(pair, name)] = 0.5 * (born_exponent(pair[0], charges[pair[0]]) +
                                                    born_exponent(pair[1], charges[pair[1]]))
            continue
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise InputError(f"fit: fixed value of {name} must be a number, got {value!r}") from None
        if not math.isfinite(value) or value < 0 or (value == 0 and name != "C"):
            raise InputError(f"fit: fixed value of {name} must be positive, got {value!r}")
        for pair in fitted_pairs:
            fixed_values[(pair, name)] = value

    # the free variables: (name, pairs it applies to)
    variables = []
    for name in names:
        if name in shared:
            variables.append((name, tuple(fitted_pairs)))
        elif name in free:
            variables.extend((name, (pair,)) for pair in fitted_pairs)

    cutoff = DEFAULT_CUTOFF if cutoff is None else float(cutoff)
    switch_width = DEFAULT_SWITCH_WIDTH if switch_width is None else float(switch_width)

    def build(values, uncertainty=None, info=None):
        params = {pair: {} for pair in fitted_pairs}
        errors = {pair: {} for pair in fitted_pairs}
        for (pair, name), value in fixed_values.items():
            params[pair][name] = value
        for k, (name, pairs) in enumerate(variables):
            for pair in pairs:
                params[pair][name] = float(values[k])
                if uncertainty is not None:
                    errors[pair][name] = float(uncertainty[k])
        pairs = [PairPotential(pair, form, params[pair], errors[pair]) for pair in fitted_pairs]
        pairs += [PairPotential(pair, "none", {}) for pair in other_pairs]
        return RepulsionModel(tuple(pairs), cutoff, switch_width, info or {})

    # the Coulomb part does not depend on the parameters: once per target (and strained copies)
    from .sums.dispatch import ewald
    from .sums.shortrange import shortrange

    step = 0.002
    cache = []
    for t in targets:
        c = ewald(t.crystal, tol=tol, forces=True, stress=True)
        entry = {"coulomb": c, "strained": None}
        if t.bulk_modulus is not None:
            strained = [scaled(t.crystal, 1.0 + s * step) for s in (-1.0, 1.0)]
            entry["strained"] = [(x, ewald(x, tol=tol, stress=True)) for x in strained]
        cache.append(entry)
    d_ln_v = 3.0 * (math.log1p(step) - math.log1p(-step))

    def conditions(values):
        model = build(values)
        out = []
        for t, entry in zip(targets, cache):
            c = entry["coulomb"]
            s = shortrange(t.crystal, model, forces=True, stress=True)
            stress = (c.stress + s.stress) * EV_PER_A3_TO_GPA
            pressure = -np.trace(stress) / 3.0
            deviatoric = stress + pressure * np.eye(3)
            out.append((t.label, "pressure", pressure, 0.0, "GPa", pressure_sigma))
            for (a, b), text in zip(((0, 0), (1, 1), (0, 1), (0, 2), (1, 2)),
                                    ("deviatoric stress xx", "deviatoric stress yy", "shear stress xy",
                                     "shear stress xz", "shear stress yz")):
                out.append((t.label, text, deviatoric[a, b], 0.0, "GPa", pressure_sigma))
            total_forces = c.forces + s.forces
            for i, row in enumerate(total_forces):
                for a, axis in enumerate("xyz"):
                    out.append((t.label, f"force {t.crystal.labels[i]}#{i} {axis}", row[a], 0.0, "eV/Å",
                                force_sigma))
            if t.bulk_modulus is not None:
                pressures = []
                for x, cx in entry["strained"]:
                    sx = shortrange(x, model, stress=True)
                    pressures.append(-np.trace(cx.stress + sx.stress) / 3.0)
                b_model = -(pressures[1] - pressures[0]) / d_ln_v * EV_PER_A3_TO_GPA
                sigma = t.bulk_modulus_sigma or 0.02 * t.bulk_modulus
                out.append((t.label, "bulk modulus", b_model, t.bulk_modulus, "GPa", sigma))
        return out

    # Variable projection: every condition is linear in the prefactors A, B and in C, so for given
    # shape parameters (rho, n) those are solved exactly by bounded linear least squares, and only
    # the shape parameters are left to the nonlinear trust-region iteration (Golub and Pereyra).
    linear = [k for k, (name, _) in enumerate(variables) if name in _LINEAR]
    nonlinear = [k for k, (name, _) in enumerate(variables) if name not in _LINEAR]
    counter = [0]

    def normalised(values):
        counter[0] += 1
        return np.array([(v - w) / s for _, _, v, w, _, s in conditions(values)])

    def solve_linear(theta):
        values = np.zeros(len(variables))
        values[nonlinear] = theta
        r0 = normalised(values)
        if not linear:
            return values, r0, np.zeros((len(r0), 0))
        columns = []
        for k in linear:
            unit = values.copy()
            unit[k] = 1.0
            columns.append(normalised(unit) - r0)
        m = np.array(columns).T
        norms = np.linalg.norm(m, axis=0)
        norms[norms == 0] = 1.0
        solution = lsq_linear(m / norms, -r0, bounds=(0.0, np.inf), method="bvls")
        values[linear] = solution.x / norms
        return values, r0 + m @ values[linear], m

    theta0 = np.array([float(start[variables[k][0]]) for k in nonlinear])
    if np.any(~np.isfinite(theta0)) or np.any(theta0 <= 0):
        raise InputError(f"fit: starting values must be positive, got {dict(zip([variables[k][0] for k in nonlinear], theta0))}")
    message = "linear least squares (no shape parameter to iterate)"
    if nonlinear:
        def outer(y):
            with np.errstate(over="ignore", invalid="ignore"):
                return solve_linear(np.exp(y))[1]

        solution = least_squares(outer, np.log(theta0), method="trf", max_nfev=int(max_evaluations),
                                 xtol=1e-12, ftol=1e-12, gtol=1e-12)
        if solution.status <= 0 or not np.all(np.isfinite(solution.fun)):
            raise InputError(f"fit did not converge after {solution.nfev} iterations ({solution.message}); "
                             "give other starting values (--start), fix more parameters or raise --max-evaluations")
        theta = np.exp(solution.x)
        message = str(solution.message)
    else:
        theta = theta0
    values, residual, m = solve_linear(theta)
    if not np.all(np.isfinite(residual)):
        raise InputError("fit did not converge: the model gave non-finite stresses; give other starting values")
    for k in linear:
        name, pairs = variables[k]
        if name != "C" and not values[k] > 0:
            raise InputError(f"fit: no positive {name} of {'-'.join(pairs[0])} makes the structure stationary; "
                             "the Coulomb pressure cannot be balanced in this model (check charges and form)")

    # uncertainties: the full Jacobian in parameter space at the solution (linear columns exact)
    jac = np.zeros((len(residual), len(values)))
    jac[:, linear] = m
    for k in nonlinear:
        h = 1e-5 * values[k]
        up, down = values.copy(), values.copy()
        up[k] += h
        down[k] -= h
        jac[:, k] = (normalised(up) - normalised(down)) / (2 * h)
    active = np.any(np.abs(jac) > 1e-6 * max(1.0, float(np.abs(jac).max())), axis=1)
    dof = int(active.sum()) - len(values)
    chi2 = float(np.sum(residual ** 2))

    def undetermined(k):
        name, pairs = variables[k]
        return InputError(f"fit: parameter {name} ({'-'.join(pairs[0])}) is not determined by the conditions; "
                          "fix it or add a measured bulk modulus")

    scale = np.linalg.norm(jac, axis=0)
    if np.any(scale == 0):
        raise undetermined(int(np.argmin(scale)))
    _, singular, vt = np.linalg.svd(jac / scale, full_matrices=False)
    if singular.min() <= 1e-8 * singular.max():
        raise undetermined(int(np.argmax(np.abs(vt[-1]))))
    covariance = ((vt.T / singular ** 2) @ vt) / np.outer(scale, scale)
    if dof > 0 and chi2 / dof > 1.0:
        covariance = covariance * (chi2 / dof)
    sigma = np.sqrt(np.diag(covariance))
    # a direction the conditions fix only through rounding noise shows as an uncertainty beyond the value
    for k, (name, _) in enumerate(variables):
        if name != "C" and sigma[k] > abs(values[k]):
            raise undetermined(k)

    rows = [FitResidual(*r) for r in conditions(values)]
    shown = [r for r in rows if r.quantity in ("pressure", "bulk modulus") or abs(r.value) > 1e-9]
    parameters = [FittedParameter(pairs, name, float(v), float(s), "shared" if name in shared else "per pair")
                  for (name, pairs), v, s in zip(variables, values, sigma)]
    fixed_seen = {}
    for (pair, name), value in fixed_values.items():
        fixed_seen.setdefault((name, value), []).append(pair)
    parameters += [FittedParameter(tuple(pairs), name, float(value), None, "fixed")
                   for (name, value), pairs in fixed_seen.items()]
    info = {
        "method": "variable projection: prefactors by scipy.optimize.lsq_linear, shape parameters by "
                  "scipy.optimize.least_squares (trf); conditions zero stress, zero forces"
                  + (" and measured bulk moduli" if any(t.bulk_modulus for t in targets) else ""),
        "targets": [{"name": t.label, "formula": t.crystal.reduced_formula,
                     **({"bulk_modulus_GPa": t.bulk_modulus} if t.bulk_modulus else {})} for t in targets],
        "chi_square": chi2, "degrees_of_freedom": dof,
        "residuals": [{"target": r.target, "quantity": r.quantity, "value": r.value, "wanted": r.wanted,
                       "unit": r.unit, "sigma": r.sigma} for r in shown],
        "uncertainty": "one standard deviation from the Jacobian, residuals in units of their sigmas",
    }
    model = build(values, sigma, info)
    return FitResult(model, tuple(parameters), tuple(shown), chi2, dof, counter[0], message)


# ---------------------------------------------------------------- equation of state
def birch_murnaghan(volume, e0, v0, b0, b0_prime):
    """Third-order Birch–Murnaghan energy E(V) (eV, Å^3, B0 in eV/Å^3).

    ``E = E0 + 9 V0 B0 / 16 {[(V0/V)^(2/3) - 1]^3 B0' + [(V0/V)^(2/3) - 1]^2 [6 - 4 (V0/V)^(2/3)]}``

    References
    ----------
    F. Birch, Phys. Rev. 71 (1947) 809.
    """
    eta = (v0 / np.asarray(volume, dtype=float)) ** (2.0 / 3.0)
    return e0 + 9.0 * v0 * b0 / 16.0 * ((eta - 1.0) ** 3 * b0_prime + (eta - 1.0) ** 2 * (6.0 - 4.0 * eta))


@dataclass(frozen=True)
class EquationOfState:
    """An energy–volume scan and its Birch–Murnaghan fit (per cell).

    Attributes
    ----------
    volumes : (M,) Å^3.  energies : (M,) total model energy, eV.
    e0 : eV.  v0 : equilibrium volume, Å^3.  b0 : bulk modulus, GPa.  b0_prime : dB/dP.
    rms : root-mean-square misfit of the fit, eV.
    formula_units : Z of the cell.
    """

    volumes: np.ndarray
    energies: np.ndarray
    e0: float
    v0: float
    b0: float
    b0_prime: float
    rms: float
    formula_units: int
    formula: str = ""
    extra: dict = field(default_factory=dict)

    def plot(self, path):
        """Write a PNG of the scan and the fitted curve (matplotlib, Agg backend)."""
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        z = self.formula_units
        fine = np.linspace(self.volumes.min(), self.volumes.max(), 200)
        fit = birch_murnaghan(fine, self.e0, self.v0, self.b0 / EV_PER_A3_TO_GPA, self.b0_prime)
        fig, ax = plt.subplots(figsize=(6, 4.2), dpi=120)
        ax.plot(fine / z, fit / z, "-", color="tab:blue", label="Birch–Murnaghan fit")
        ax.plot(self.volumes / z, self.energies / z, "o", color="tab:red", label="rigid-ion model")
        ax.axvline(self.v0 / z, color="grey", lw=0.8, ls="--")
        ax.set_xlabel("volume per formula unit (Å³)")
        ax.set_ylabel("total energy per formula unit (eV)")
        ax.set_title(f"{self.formula}: V0 = {self.v0 / z:.3f} Å³, B0 = {self.b0:.1f} GPa, B0' = {self.b0_prime:.2f}")
        ax.legend(frameon=False)
        fig.tight_layout()
        fig.savefig(path)
        plt.close(fig)


def equation_of_state(crystal, repulsion, span=0.06, points=11, tol=1e-10) -> EquationOfState:
    """Energy–volume scan under homogeneous scaling and a third-order Birch–Murnaghan fit.

    Parameters
    ----------
    crystal : Crystal
    repulsion : RepulsionModel or parameter-file path
    span : float
        Volumes from ``V (1 - span)`` to ``V (1 + span)`` (default 6 %).
    points : int
        Number of volumes (at least 5).
    tol : float
        Relative accuracy of the Ewald sums.

    Returns
    -------
    EquationOfState

    References
    ----------
    F. Birch, Phys. Rev. 71 (1947) 809.
    """
    from scipy.optimize import curve_fit

    from .sums.shortrange import load_repulsion

    model = load_repulsion(repulsion)
    if not (0 < span < 0.5):
        raise InputError(f"volume span must lie in (0, 0.5), got {span!r}")
    if int(points) < 5:
        raise InputError(f"an equation-of-state fit needs at least 5 volumes, got {points!r}")
    factors = np.linspace(1.0 - span, 1.0 + span, int(points))
    volumes, energies = [], []
    for f in factors:
        x = scaled(crystal, f ** (1.0 / 3.0))
        c, s = total_terms(x, model, tol)
        volumes.append(x.volume)
        energies.append(c.energy + s.energy)
    volumes, energies = np.array(volumes), np.array(energies)
    a, b, c0 = np.polyfit(volumes, energies, 2)
    if a <= 0:
        raise InputError(f"{crystal.source or crystal.reduced_formula}: the energy has no minimum in the scanned "
                         "volumes; the model is not bound there")
    v_guess = -b / (2 * a)
    guess = (float(np.polyval([a, b, c0], v_guess)), v_guess, 2 * a * v_guess, 4.0)
    try:
        popt, _ = curve_fit(birch_murnaghan, volumes, energies, p0=guess, maxfev=20000)
    except RuntimeError as exc:
        raise InputError(f"Birch–Murnaghan fit did not converge ({exc})") from None
    rms = float(np.sqrt(np.mean((birch_murnaghan(volumes, *popt) - energies) ** 2)))
    return EquationOfState(volumes, energies, float(popt[0]), float(popt[1]), float(popt[2] * EV_PER_A3_TO_GPA),
                           float(popt[3]), rms, crystal.formula_units, crystal.reduced_formula)
