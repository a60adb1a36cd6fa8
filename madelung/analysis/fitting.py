"""Fitting the short-range (repulsion) parameters to measured lattice constants, energies and
bulk moduli.

The model is a rigid-ion model with point charges; fitted parameters absorb what it leaves out
(polarisation, covalency), so they belong to this model only.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..structure.crystal import Crystal
from ..errors import InputError
from ..sums.dispatch import ewald
from ..sums.shortrange import (DEFAULT_CUTOFF, DEFAULT_SWITCH_WIDTH, FORMS, PairPotential, RepulsionModel,
                               shortrange)
from ..units import EV_PER_A3_TO_GPA
from .lattice_energy import born_exponent, scaled
from ..defaults import SUM_TOL

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

    def to_dict(self) -> dict:
        """JSON-ready; the value and its uncertainty in the parameter's unit (rho Å, A and B eV, C eV Å^6)."""
        return {"pairs": ["-".join(p) for p in self.pairs], "name": self.name, "value": self.value,
                "uncertainty": self.uncertainty, "role": self.role}


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

    def to_dict(self) -> dict:
        """JSON-ready; value, wanted and sigma in ``unit``."""
        return {"target": self.target, "quantity": self.quantity, "value": self.value, "wanted": self.wanted,
                "unit": self.unit, "sigma": self.sigma}


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

    def to_dict(self) -> dict:
        """JSON-ready: the parameters, the residuals (as the parameter file records them), the
        chi-square, the degrees of freedom, the evaluations and the optimiser's message."""
        return {"parameters": [p.to_dict() for p in self.parameters],
                "residuals": [r.to_dict() for r in self.residuals],
                "chi_square": self.chi_square, "degrees_of_freedom": self.degrees_of_freedom,
                "evaluations": self.evaluations, "message": self.message}


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
                  tol=SUM_TOL, max_evaluations=200) -> FitResult:
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
        "residuals": [r.to_dict() for r in shown],
        "uncertainty": "one standard deviation from the Jacobian, residuals in units of their sigmas",
    }
    model = build(values, sigma, info)
    return FitResult(model, tuple(parameters), tuple(shown), chi2, dof, counter[0], message)
