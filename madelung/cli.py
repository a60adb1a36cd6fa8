"""The ``madelung`` command line: parsing and printing only; the work is done by the public API.

Every command takes a structure file (anything ASE reads: CIF, POSCAR, extended XYZ, ...),
prints a readable report by default and JSON with ``--json``.
Exit codes: 0 done, 2 a problem with the input (one line on stderr), 1 an internal error.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import warnings

import numpy as np

from . import __version__
from .errors import InputError, MadelungWarning
from .units import COULOMB_CONSTANT, EV_TO_KJ_PER_MOL

MODEL_NOTE = ("Point-charge model: with formal charges the electrostatic terms overstate what a real, "
              "partly covalent solid holds. Results are model estimates, not measured properties.")

DESCRIPTION = """\
Electrostatics of ionic crystals: Ewald sums, site potentials and Madelung constants
of a periodic array of point charges, converged to the accuracy you ask for.

Charges come from the file (CIF oxidation states such as O2- or _atom_type_oxidation_number,
ASE initial charges) or from --charge rules by element or site label, e.g.
  madelung energy NaCl.cif --charge Na=+1 --charge Cl=-1
"""


# ---------------------------------------------------------------- helpers
class _Parser(argparse.ArgumentParser):
    """argparse that reports usage mistakes as one line and exit code 2."""

    def error(self, message):
        self.exit(2, f"madelung: {message} (see madelung {self.prog.split()[-1]} --help)\n")


def _common(parser):
    parser.add_argument("file", metavar="FILE", help="structure file: CIF, POSCAR, extended XYZ, ... (read by ASE)")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or a site label, e.g. Na=+1 or O1=-2 (repeat as needed); "
                             "overrides charges read from the file")
    parser.add_argument("--tol", type=float, default=1e-10, metavar="TOL",
                        help="wanted error of the energy relative to k_e*sum(q^2)/d_min (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å; 0 switches the check off)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")


def load_crystal(args):
    """The crystal named on the command line, with its charges."""
    from .crystal import Crystal, parse_charge_rules, read_structure

    rules = parse_charge_rules(args.charge)
    atoms = read_structure(args.file)
    crystal = Crystal.from_ase(atoms, None, source=args.file, min_distance=args.min_distance) if not rules \
        else _with_rules(atoms, rules, args)
    return crystal


def _with_rules(atoms, rules, args):
    """Charges from rules; sites the rules do not name keep the charges read from the file."""
    from .crystal import Crystal

    base = None
    if "oxidation_states" in atoms.arrays:
        base = np.array(atoms.arrays["oxidation_states"], dtype=float)
    elif np.any(atoms.get_initial_charges() != 0):
        base = atoms.get_initial_charges()
    if base is None:
        return Crystal.from_ase(atoms, rules, source=args.file, min_distance=args.min_distance)
    crystal = Crystal.from_ase(atoms, base, source=args.file, min_distance=0)
    named = set(rules)
    unknown = sorted(named - set(crystal.symbols) - set(crystal.labels))
    if unknown:
        raise InputError(f"{args.file}: charge given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    charges = np.array([rules.get(label, rules.get(symbol, q))
                        for label, symbol, q in zip(crystal.labels, crystal.symbols, base)])
    return Crystal.from_ase(atoms, charges, source=args.file, min_distance=args.min_distance)


def _charge_summary(crystal):
    seen = {}
    for symbol, label, q in zip(crystal.symbols, crystal.labels, crystal.charges):
        seen.setdefault(label, (symbol, q))
    return ", ".join(f"{label} {q:+g}" for label, (symbol, q) in seen.items())


def _fmt(value, digits=6):
    return "undefined" if value is None else f"{value:.{digits}f}"


def _print_json(data):
    def default(obj):
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, (np.floating, np.integer)):
            return obj.item()
        raise TypeError(type(obj).__name__)

    print(json.dumps(data, indent=2, default=default, allow_nan=True))


def _structure_lines(crystal):
    return [f"  structure   {crystal.formula} ({crystal.formula_units} x {crystal.reduced_formula}), "
            f"{len(crystal)} ions, cell volume {crystal.volume:.4f} Å^3",
            f"  charges     {_charge_summary(crystal)}  (net {crystal.net_charge:+.6g} e)"]


def _accuracy_lines(result):
    p = result.params
    return [f"  accuracy    tol {result.tol:.1e} relative to {result.energy_scale:.6g} eV "
            f"(k_e sum q^2 / d_min); estimated error {result.error_estimate:.2e} eV",
            f"  Ewald sum   {p.method}: alpha {p.alpha:.5f} 1/Å, real cutoff {p.real_cutoff:.3f} Å "
            f"({p.real_space_pairs} terms), reciprocal cutoff {p.reciprocal_cutoff:.3f} 1/Å "
            f"({p.k_vectors} k-vectors), {result.seconds * 1000:.1f} ms"]


def _ewald_json(result):
    p = result.params
    return {
        "energy_eV": result.energy, "energy_per_atom_eV": result.energy_per_atom,
        "error_estimate_eV": result.error_estimate, "tol": result.tol, "energy_scale_eV": result.energy_scale,
        "components_eV": result.components, "net_charge_e": result.net_charge,
        "neutralizing_background": result.background,
        "parameters": {"method": p.method, "alpha_per_angstrom": p.alpha, "real_cutoff_angstrom": p.real_cutoff,
                       "reciprocal_cutoff_per_angstrom": p.reciprocal_cutoff,
                       "real_space_terms": p.real_space_pairs, "k_vectors": p.k_vectors, **p.extra},
        "seconds": result.seconds,
    }


# ---------------------------------------------------------------- energy
def _add_energy(sub):
    parser = sub.add_parser("energy", help="electrostatic energy of a crystal",
                            description="Electrostatic (Coulomb) energy of the periodic point charges: "
                                        "the signed Ewald sum per cell, per ion and per formula unit.")
    _common(parser)
    parser.add_argument("--forces", action="store_true", help="also compute forces (eV/Å)")
    parser.add_argument("--stress", action="store_true", help="also compute the stress tensor (eV/Å^3, GPa)")
    parser.add_argument("--repulsion", metavar="PARAMS.json",
                        help="short-range parameter file (from madelung fit): adds the repulsion, the lattice "
                             "energy and the Born–Landé, Born–Mayer and Kapustinskii closed forms")
    return parser


def _run_energy(args):
    from . import ewald
    from .units import EV_PER_A3_TO_GPA

    crystal = load_crystal(args)
    result = ewald(crystal, tol=args.tol, forces=args.forces, stress=args.stress)
    lattice = None
    if args.repulsion:
        from .lattice import lattice_energy

        lattice = lattice_energy(crystal, args.repulsion, tol=args.tol)
    z = crystal.formula_units
    if args.json:
        data = {"file": args.file, "formula": crystal.formula, "reduced_formula": crystal.reduced_formula,
                "formula_units": z, "n_atoms": len(crystal), "volume_angstrom3": crystal.volume,
                **_ewald_json(result),
                "energy_per_formula_unit_eV": result.energy / z,
                "energy_per_formula_unit_kJ_per_mol": result.energy / z * EV_TO_KJ_PER_MOL,
                "sign_convention": "signed electrostatic energy of the cell (negative when the ions bind)"}
        if result.forces is not None:
            data["forces_eV_per_angstrom"] = result.forces
        if result.stress is not None:
            data["stress_eV_per_angstrom3"] = result.stress
        if lattice is not None:
            data["lattice"] = _lattice_json(lattice)
        _print_json(data)
        return 0
    per_fu = result.energy / z
    lines = [f"madelung energy  {args.file}", *_structure_lines(crystal),
             "  electrostatic energy (signed Ewald sum of the point charges)",
             f"      per cell            {result.energy:16.8f} eV",
             f"      per ion             {result.energy_per_atom:16.8f} eV",
             f"      per formula unit    {per_fu:16.8f} eV  = {per_fu * EV_TO_KJ_PER_MOL:12.3f} kJ/mol",
             *_accuracy_lines(result)]
    if result.background:
        lines.append(f"  background  net charge {result.net_charge:+.6g} e neutralized by a uniform background "
                     f"({result.components['background']:.6f} eV included)")
    if result.forces is not None:
        largest = float(np.max(np.linalg.norm(result.forces, axis=1)))
        lines.append(f"  forces      largest {largest:.6f} eV/Å (use --json for all)")
    if result.stress is not None:
        s = result.stress
        pressure = -np.trace(s) / 3 * EV_PER_A3_TO_GPA
        lines.append(f"  stress      xx {s[0, 0]:.6g} yy {s[1, 1]:.6g} zz {s[2, 2]:.6g} eV/Å^3; "
                     f"pressure {pressure:.4f} GPa")
    if lattice is not None:
        lines.append(f"  short-range terms from {args.repulsion}")
        lines.extend(_lattice_lines(lattice))
        lines.append(f"  note        {RIGID_ION_NOTE}")
    lines.append(f"  note        {MODEL_NOTE}")
    print("\n".join(lines))
    return 0


# ---------------------------------------------------------------- sites
def _add_sites(sub):
    parser = sub.add_parser("sites", help="electrostatic potential at every site",
                            description="Electrostatic potential at each ion from all the other ions (V), "
                                        "with the site Madelung constant M_i = -phi_i r0 / (k_e q_i).")
    _common(parser)
    return parser


def _run_sites(args):
    from .constants import madelung_constants

    crystal = load_crystal(args)
    constants = madelung_constants(crystal, tol=args.tol)
    potentials = constants.ewald.potentials
    rows = [{"index": i, "label": crystal.labels[i], "element": crystal.symbols[i],
             "charge_e": float(crystal.charges[i]), "potential_V": float(potentials[i]),
             "site_constant": None if math.isnan(constants.site[i]) else float(constants.site[i]),
             "site_energy_eV": float(crystal.charges[i] * potentials[i])}
            for i in range(len(crystal))]
    if args.json:
        _print_json({"file": args.file, "r0_angstrom": constants.r0, "sites": rows,
                     "site_constant_convention": "M_i = -phi_i r0 / (k_e q_i)",
                     "error_estimate_eV": constants.ewald.error_estimate})
        return 0
    print(f"madelung sites  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    print(f"  r0 (shortest cation–anion distance) {constants.r0:.5f} Å")
    print()
    print(f"  {'#':>5}  {'label':<8} {'elem':<4} {'charge':>8}  {'potential / V':>15}  {'M_i':>11}  {'q*phi / eV':>12}")
    for row in rows:
        m = "—" if row["site_constant"] is None else f"{row['site_constant']:11.6f}"
        print(f"  {row['index']:>5}  {row['label']:<8} {row['element']:<4} {row['charge_e']:>+8.3f}  "
              f"{row['potential_V']:>15.8f}  {m:>11}  {row['site_energy_eV']:>12.6f}")
    print()
    print("  M_i = -phi_i r0 / (k_e q_i): the site potential in units of k_e q_i / r0 (positive = held by its "
          "surroundings); E = 1/2 sum q_i phi_i")
    print(f"  note        {MODEL_NOTE}")
    return 0


# ---------------------------------------------------------------- constant
def _add_constant(sub):
    parser = sub.add_parser("constant", help="Madelung constants in each named convention",
                            description="Madelung constants with r0 the shortest cation–anion distance and E_fu "
                                        "the electrostatic energy per formula unit, in three named conventions.")
    _common(parser)
    return parser


def _run_constant(args):
    from .constants import CONVENTION_TEXT, madelung_constants

    crystal = load_crystal(args)
    c = madelung_constants(crystal, tol=args.tol)
    if args.json:
        _print_json({"file": args.file, **c.as_dict()})
        return 0
    print(f"madelung constant  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    print(f"  r0 (shortest cation–anion distance)  {c.r0:.6f} Å")
    print(f"  E_fu (per {c.formula})                {c.energy_per_formula_unit:.8f} eV"
          f" = {c.energy_per_formula_unit * EV_TO_KJ_PER_MOL:.3f} kJ/mol")
    print()
    rows = [("charges_left_in", c.charges_left_in, ""),
            ("handbook", c.handbook, c.handbook_note if c.handbook is None
             else f"z+ = {c.handbook_charges[0]:g}, |z-| = {c.handbook_charges[1]:g}"),
            ("common_factor", c.common_factor, c.common_factor_note if c.common_factor is None
             else f"Z = {c.common_factor_z:g}")]
    for name, value, note in rows:
        print(f"  {name:<16} {_fmt(value, 10):>15}   {CONVENTION_TEXT[name]}")
        if note:
            print(f"  {'':<16} {'':>15}   {note}")
    print(f"\n  estimated error of the constants {c.error_estimate:.1e}")
    print(f"  note        {MODEL_NOTE}")
    return 0


# ---------------------------------------------------------------- lattice energies
LATTICE_SIGN = ("lattice energy = positive energy to separate the solid into gaseous ions (handbook sign); "
                "Coulomb and short-range energies are signed sums")
RIGID_ION_NOTE = ("Rigid-ion model: formal point charges plus fitted short-range terms; no polarisation, "
                  "covalency, zero-point or thermal energy. Results are model estimates.")


def _parse_pairs(rules, what, number=True):
    """``KEY=VALUE`` options into a dict (values as floats unless ``number`` is False)."""
    result = {}
    for rule in rules or []:
        key, sep, value = str(rule).partition("=")
        key = key.strip()
        if not sep or not key:
            raise InputError(f"{what} {rule!r} must look like KEY=VALUE")
        if number:
            try:
                result[key] = float(value)
            except ValueError:
                raise InputError(f"{what} {rule!r}: {value!r} is not a number") from None
        else:
            result[key] = value.strip()
    return result


def _crystal_from(path, args):
    return load_crystal(argparse.Namespace(file=path, charge=args.charge, min_distance=args.min_distance))


def _lattice_json(result):
    data = {"formula": result.formula, "formula_units": result.formula_units, "n_atoms": result.n_atoms,
            "per_cell_eV": result.per_cell(), "per_atom_eV": result.per_atom(),
            "per_formula_unit_eV": result.per_formula_unit(),
            "lattice_energy_eV": result.lattice_energy,
            "lattice_energy_kJ_per_mol": result.lattice_energy_kj_per_mol,
            "pressure_GPa": result.pressure, "sign_convention": LATTICE_SIGN}
    forms = result.closed_forms
    if forms is not None:
        data["closed_forms"] = {
            "madelung_constant_handbook": forms.madelung_constant, "r0_angstrom": forms.r0,
            "born_lande_kJ_per_mol": None if forms.born_lande is None else forms.born_lande * EV_TO_KJ_PER_MOL,
            "born_exponent": forms.born_exponent, "born_exponent_source": forms.born_exponent_source,
            "born_mayer_kJ_per_mol": None if forms.born_mayer is None else forms.born_mayer * EV_TO_KJ_PER_MOL,
            "rho_angstrom": forms.rho, "rho_source": forms.rho_source,
            "kapustinskii_kJ_per_mol": None if forms.kapustinskii is None else forms.kapustinskii * EV_TO_KJ_PER_MOL,
            "shannon_radii_angstrom": forms.radii, "notes": forms.notes}
    return data


def _lattice_lines(result):
    kj = EV_TO_KJ_PER_MOL
    cell, atom, fu = result.per_cell(), result.per_atom(), result.per_formula_unit()
    lines = ["  rigid-ion energy (signed sums)          per cell / eV    per ion / eV   per formula unit / eV   kJ/mol",
             *[f"      {name:<32} {cell[key]:14.6f} {atom[key]:14.6f} {fu[key]:16.6f} {fu[key] * kj:14.2f}"
               for name, key in (("Coulomb (Ewald)", "coulomb"), ("short range (repulsion)", "short_range"),
                                 ("total", "total"))],
             f"  lattice energy  U = {result.lattice_energy:.6f} eV = {result.lattice_energy_kj_per_mol:.2f} kJ/mol "
             f"per {result.formula}   (positive: energy to separate the solid into gaseous ions)",
             f"  pressure        {result.pressure:.5f} GPa (zero at the structure the parameters were fitted to)"]
    forms = result.closed_forms
    if forms is not None:
        lines.append("  closed forms beside the model (kJ/mol per formula unit)")
        if forms.madelung_constant is None:
            lines.append(f"      Born–Landé, Born–Mayer not applicable: {forms.notes.get('born_mayer', '')}")
        else:
            lines.append(f"      Madelung constant (handbook convention) {forms.madelung_constant:.6f}, "
                         f"r0 {forms.r0:.4f} Å, charges +{forms.charges[0]:g}/-{forms.charges[1]:g}")
            if forms.born_lande is not None:
                lines.append(f"      Born–Landé     {forms.born_lande * kj:10.2f}   n = {forms.born_exponent:g} "
                             f"({forms.born_exponent_source})")
            else:
                lines.append(f"      Born–Landé     not applicable: {forms.notes.get('born_lande')}")
            lines.append(f"      Born–Mayer     {forms.born_mayer * kj:10.2f}   rho = {forms.rho:.4f} Å "
                         f"({forms.rho_source})")
        if forms.kapustinskii is not None:
            lines.append(f"      Kapustinskii   {forms.kapustinskii * kj:10.2f}   Shannon radii (VI) "
                         f"r+ {forms.radii[0]:.3f} Å, r- {forms.radii[1]:.3f} Å")
        elif "kapustinskii" in forms.notes:
            lines.append(f"      Kapustinskii   not applicable: {forms.notes['kapustinskii']}")
    return lines


def _add_fit(sub):
    parser = sub.add_parser("fit", help="fit short-range parameters to observed structures",
                            description="Fit short-range (repulsion) parameters so that each observed structure "
                                        "is stationary in the rigid-ion model: zero stress, zero forces, and "
                                        "optionally a measured bulk modulus. Structures holding the same ion pair "
                                        "share its parameters. Writes a JSON parameter file.")
    parser.add_argument("files", metavar="FILE", nargs="+", help="observed structures (CIF, POSCAR, ...)")
    parser.add_argument("--form", choices=("born-mayer", "buckingham", "born-lande"), default="born-mayer",
                        help="form of the cation–anion terms (default born-mayer)")
    parser.add_argument("--fix", action="append", default=[], metavar="NAME=VALUE",
                        help="hold a parameter at a value for every pair, e.g. rho=0.345 or C=0; "
                             "n=table takes n from the Born-exponent table")
    parser.add_argument("--shared", action="append", default=[], metavar="NAME",
                        help="fit one common value of this parameter for all pairs")
    parser.add_argument("--free", action="append", default=[], metavar="NAME",
                        help="fit this parameter separately for every pair (the prefactor A or B is by default)")
    parser.add_argument("--start", action="append", default=[], metavar="NAME=VALUE",
                        help="starting value of a fitted parameter (defaults rho 0.3, n 8, C 1)")
    parser.add_argument("--bulk-modulus", action="append", default=[], metavar="KEY=GPa",
                        help="measured bulk modulus of a structure, keyed by file or reduced formula, e.g. NaCl=24.0")
    parser.add_argument("--bulk-modulus-sigma", type=float, default=0.02, metavar="FRACTION",
                        help="weight of the bulk-modulus conditions as a relative uncertainty (default 0.02)")
    parser.add_argument("--cutoff", type=float, default=None, metavar="Å", help="short-range cutoff (default 10 Å)")
    parser.add_argument("--switch-width", type=float, default=None, metavar="Å",
                        help="width of the smooth switch-off before the cutoff (default 2 Å)")
    parser.add_argument("--max-evaluations", type=int, default=200, metavar="N",
                        help="budget of the least-squares fit (default 200); running out is an error")
    parser.add_argument("-o", "--output", default="repulsion.json", metavar="PARAMS.json",
                        help="parameter file to write (default repulsion.json)")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or site label for every file, e.g. Na=+1")
    parser.add_argument("--tol", type=float, default=1e-10, metavar="TOL", help="Ewald accuracy (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å", help=argparse.SUPPRESS)
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    return parser


def _run_fit(args):
    import os

    from .lattice import FitTarget, fit_repulsion

    fixed = _parse_pairs(args.fix, "--fix", number=False)
    for name, value in fixed.items():
        if value != "table":
            try:
                fixed[name] = float(value)
            except ValueError:
                raise InputError(f"--fix {name}={value}: not a number") from None
    moduli = _parse_pairs(args.bulk_modulus, "--bulk-modulus")
    crystals = [_crystal_from(path, args) for path in args.files]
    used = set()
    targets = []
    for path, crystal in zip(args.files, crystals):
        keys = [path, os.path.basename(path), crystal.reduced_formula]
        key = next((k for k in keys if k in moduli), None)
        if key is not None:
            used.add(key)
        value = moduli.get(key) if key else None
        targets.append(FitTarget(crystal, value, None if value is None else args.bulk_modulus_sigma * value,
                                 name=os.path.basename(path)))
    unused = sorted(set(moduli) - used)
    if unused:
        raise InputError(f"--bulk-modulus {unused[0]}: matches no given file or formula")
    result = fit_repulsion(targets, form=args.form, fixed=fixed, shared=args.shared, free=args.free,
                           start=_parse_pairs(args.start, "--start"), cutoff=args.cutoff,
                           switch_width=args.switch_width, tol=args.tol, max_evaluations=args.max_evaluations)
    result.model.save(args.output)
    if args.json:
        _print_json({"output": args.output, "form": args.form,
                     "parameters": [{"pairs": ["-".join(p) for p in x.pairs], "name": x.name, "value": x.value,
                                     "uncertainty": x.uncertainty, "role": x.role} for x in result.parameters],
                     "residuals": result.model.info["residuals"], "chi_square": result.chi_square,
                     "degrees_of_freedom": result.degrees_of_freedom, "evaluations": result.evaluations,
                     "message": result.message})
        return 0
    from .shortrange import PARAMETER_UNITS

    print(f"madelung fit  {len(targets)} structure(s), {args.form} cation–anion terms -> {args.output}")
    print("  parameters (± one standard deviation)")
    for x in result.parameters:
        pairs = ", ".join("-".join(p) for p in x.pairs)
        error = "" if x.uncertainty is None else f" ± {x.uncertainty:.4g}"
        print(f"      {pairs:<20} {x.name:<4} {x.value:14.6g}{error:<14} {PARAMETER_UNITS[x.name]:<8} ({x.role})")
    print("  conditions (model value, wanted, sigma)")
    for r in result.residuals:
        print(f"      {r.target:<24} {r.quantity:<22} {r.value:12.5g} {r.wanted:10.4g} ±{r.sigma:<8.3g} {r.unit}")
    print(f"  chi-square {result.chi_square:.3g} with {result.degrees_of_freedom} degree(s) of freedom; "
          f"{result.evaluations} evaluations; {result.message}")
    print(f"  note        {RIGID_ION_NOTE}")
    return 0


def _add_cycle(sub):
    parser = sub.add_parser("cycle", help="Born–Haber cycle lattice energy from enthalpies",
                            description="Lattice energy of a binary ionic solid from the Born–Haber cycle. "
                                        "Enthalpies in kJ/mol from a TOML file and/or options (options win); "
                                        "ionisation energies and first electron affinities come from the element "
                                        "library when not given. With --structure the Kapustinskii estimate and, "
                                        "with --repulsion too, the rigid-ion lattice energy are set beside it.")
    parser.add_argument("input", metavar="INPUT.toml", nargs="?", help="cycle input file (see the README)")
    parser.add_argument("--compound", help="formula, cation first, e.g. NaCl")
    parser.add_argument("--formation", type=float, metavar="kJ/mol", help="standard enthalpy of formation of the solid")
    parser.add_argument("--atomisation", action="append", default=[], metavar="EL=kJ/mol",
                        help="enthalpy of atomisation per mole of gaseous atoms (sublimation for a metal)")
    parser.add_argument("--dissociation", action="append", default=[], metavar="EL=kJ/mol",
                        help="dissociation enthalpy of the X2 molecule (half is used per atom)")
    parser.add_argument("--ionisation", action="append", default=[], metavar="EL=kJ/mol[,kJ/mol...]",
                        help="ionisation energies IE1[,IE2,...] (default: element library)")
    parser.add_argument("--electron-affinity", action="append", default=[], metavar="EL=kJ/mol[,kJ/mol...]",
                        help="electron-attachment enthalpies, negative when released (Cl=-349; O=-141,798)")
    parser.add_argument("--ion-charge", action="append", default=[], metavar="EL=Q",
                        help="ion charges (default: from the common oxidation states)")
    parser.add_argument("--structure", metavar="FILE", help="structure of the solid, for the model lattice energies")
    parser.add_argument("--repulsion", metavar="PARAMS.json", help="short-range parameters for the rigid-ion value")
    parser.add_argument("--covalent-threshold", type=float, default=0.08, metavar="FRACTION",
                        help="flag covalent character when the model is this far below the cycle (default 0.08)")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[], help=argparse.SUPPRESS)
    parser.add_argument("--tol", type=float, default=1e-10, help=argparse.SUPPRESS)
    parser.add_argument("--min-distance", type=float, default=0.5, help=argparse.SUPPRESS)
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    return parser


def _list_values(rules, what):
    result = {}
    for key, text in _parse_pairs(rules, what, number=False).items():
        try:
            result[key] = [float(v) for v in text.split(",")]
        except ValueError:
            raise InputError(f"{what} {key}={text}: values must be numbers separated by commas") from None
    return result


def _run_cycle(args):
    from .thermochemistry import born_haber_cycle, read_cycle_file

    data = read_cycle_file(args.input) if args.input else {}
    if args.compound:
        data["compound"] = args.compound
    if args.formation is not None:
        data["formation"] = args.formation
    for key, rules, what in (("atomisation", args.atomisation, "--atomisation"),
                             ("dissociation", args.dissociation, "--dissociation"),
                             ("charges", args.ion_charge, "--ion-charge")):
        data[key] = {**data.get(key, {}), **_parse_pairs(rules, what)}
    for key, rules, what in (("ionisation", args.ionisation, "--ionisation"),
                             ("electron_affinity", args.electron_affinity, "--electron-affinity")):
        data[key] = {**data.get(key, {}), **_list_values(rules, what)}
    missing = [k for k in ("compound", "formation") if k not in data]
    if missing:
        raise InputError("cycle: missing " + " and ".join(f"--{k}" for k in missing) +
                         " (or give them in an input file)")
    if not data["charges"]:
        data["charges"] = None
    cycle = born_haber_cycle(**data)

    model = kapustinskii = None
    if args.structure:
        from .lattice import lattice_energy

        crystal = _crystal_from(args.structure, args)
        if args.repulsion:
            result = lattice_energy(crystal, args.repulsion, tol=args.tol)
            model = result.lattice_energy_kj_per_mol
            forms = result.closed_forms
        else:
            from .lattice import closed_forms

            forms = closed_forms(crystal, None, tol=args.tol)
        if forms is not None and forms.kapustinskii is not None:
            kapustinskii = forms.kapustinskii * EV_TO_KJ_PER_MOL
    elif args.repulsion:
        raise InputError("cycle: --repulsion needs --structure FILE for the model lattice energy")
    if kapustinskii is None:
        from .elements import shannon_radius
        from .lattice import kapustinskii_energy

        (m, zm, a), (x, zx, b) = cycle.cation, cycle.anion
        try:
            kapustinskii = kapustinskii_energy(a + b, zm, zx, shannon_radius(m, zm), shannon_radius(x, zx)) * \
                EV_TO_KJ_PER_MOL
        except InputError:
            kapustinskii = None
    comparisons = {}
    for name, value in (("rigid-ion model", model), ("Kapustinskii", kapustinskii)):
        if value is not None:
            comparisons[name] = (value, *cycle.compare(value, args.covalent_threshold))
    if args.json:
        _print_json({"compound": cycle.compound, "steps": [{"step": s.text, "kJ_per_mol": s.value, "source": s.source}
                                                            for s in cycle.steps],
                     "lattice_energy_kJ_per_mol": cycle.lattice_energy,
                     "electron_transfer_kJ_per_mol": cycle.electron_transfer,
                     "comparisons": {k: {"lattice_energy_kJ_per_mol": v[0], "cycle_minus_model_kJ_per_mol": v[1],
                                         "relative": v[2], "covalent_character": v[3]}
                                     for k, v in comparisons.items()},
                     "sign_convention": LATTICE_SIGN})
        return 0
    print(f"madelung cycle  {cycle.compound}   (kJ/mol per formula unit)")
    for s in cycle.steps:
        print(f"      {s.text:<66} {s.value:+11.2f}   {s.source}")
    print(f"      {'':<66} {'-' * 11}")
    print(f"      {'cycle lattice energy (solid -> gaseous ions)':<66} {cycle.lattice_energy:+11.2f}")
    print(f"  gas-phase electron transfer alone (ionisation + attachment) {cycle.electron_transfer:+.2f} kJ/mol")
    for name, (value, difference, fraction, covalent) in comparisons.items():
        limit = 100 * args.covalent_threshold
        verdict = (f"cycle exceeds the ionic model by more than {limit:g} %: binding beyond point charges, "
                   "covalent character likely" if covalent else
                   f"the ionic model accounts for the cycle value within {limit:g} %"
                   if abs(fraction) <= args.covalent_threshold else
                   f"the ionic model exceeds the cycle value by more than {limit:g} %")
        print(f"  {name:<16} {value:10.2f} kJ/mol; cycle - model {difference:+9.2f} ({100 * fraction:+.1f} %): {verdict}")
    print("  note        sign: lattice energy is the positive energy to separate the solid into gaseous ions; "
          "electron attachment enthalpies are negative when energy is released")
    return 0


def _add_relax(sub):
    parser = sub.add_parser("relax", help="relax a structure in the rigid-ion model",
                            description="Relax ion positions and (by default) the cell with ASE's BFGS optimiser "
                                        "in the rigid-ion model (Ewald Coulomb + short-range terms); writes the "
                                        "relaxed structure and prints the volume change and energy gain.")
    _common(parser)
    parser.add_argument("--repulsion", required=True, metavar="PARAMS.json", help="short-range parameter file")
    parser.add_argument("--positions-only", action="store_true", help="keep the cell fixed")
    parser.add_argument("--fmax", type=float, default=1e-4, metavar="eV/Å", help="force criterion (default 1e-4)")
    parser.add_argument("--steps", type=int, default=500, help="most optimiser steps (default 500)")
    parser.add_argument("-o", "--output", metavar="OUT", help="relaxed structure (format from the extension; "
                        "default FILE stem + '-relaxed.cif')")
    return parser


def _run_relax(args):
    import os

    import ase.io

    from .calculator import relax

    crystal = load_crystal(args)
    result = relax(crystal, args.repulsion, cell=not args.positions_only, fmax=args.fmax, steps=args.steps,
                   tol=args.tol)
    output = args.output or os.path.splitext(os.path.basename(args.file))[0] + "-relaxed.cif"
    try:
        ase.io.write(output, result.atoms)
    except Exception as exc:
        raise InputError(f"{output}: cannot write the relaxed structure ({exc})") from None
    if not result.converged:
        raise InputError(f"{args.file}: the relaxation did not converge in {result.steps} steps (fmax {args.fmax:g} "
                         f"eV/Å); raise --steps or loosen --fmax (last structure written to {output})")
    z = result.formula_units
    if args.json:
        _print_json({"file": args.file, "output": output, "converged": result.converged, "steps": result.steps,
                     "cell_relaxed": result.cell_relaxed, "initial_volume_angstrom3": result.initial_volume,
                     "final_volume_angstrom3": result.final_volume, "volume_change": result.volume_change,
                     "initial_energy_eV": result.initial_energy, "final_energy_eV": result.final_energy,
                     "energy_gain_eV": result.energy_gain,
                     "energy_gain_kJ_per_mol_per_formula_unit": result.energy_gain / z * EV_TO_KJ_PER_MOL,
                     "cell": np.array(result.atoms.cell)})
        return 0
    print(f"madelung relax  {args.file} -> {output}")
    print(f"  {'positions and cell' if result.cell_relaxed else 'positions'} relaxed with BFGS: "
          f"{result.steps} steps, converged (fmax {result.fmax:g} eV/Å)")
    print(f"  volume      {result.initial_volume:.4f} -> {result.final_volume:.4f} Å^3 "
          f"({100 * result.volume_change:+.3f} %)")
    print(f"  energy      {result.initial_energy:.6f} -> {result.final_energy:.6f} eV per cell; gain "
          f"{result.energy_gain:.6f} eV = {result.energy_gain / z * EV_TO_KJ_PER_MOL:.3f} kJ/mol per formula unit")
    print(f"  note        {RIGID_ION_NOTE}")
    return 0


def _add_eos(sub):
    parser = sub.add_parser("eos", help="energy–volume scan with a Birch–Murnaghan fit",
                            description="Scan the rigid-ion energy over volumes (homogeneous scaling, fractional "
                                        "coordinates kept) and fit the third-order Birch–Murnaghan equation of "
                                        "state: equilibrium volume, bulk modulus and its pressure derivative.")
    _common(parser)
    parser.add_argument("--repulsion", required=True, metavar="PARAMS.json", help="short-range parameter file")
    parser.add_argument("--span", type=float, default=0.06, help="relative volume range ± (default 0.06)")
    parser.add_argument("--points", type=int, default=11, help="number of volumes (default 11)")
    parser.add_argument("--plot", metavar="PNG", help="write a PNG of the scan and the fit")
    return parser


def _run_eos(args):
    from .lattice import equation_of_state

    crystal = load_crystal(args)
    eos = equation_of_state(crystal, args.repulsion, span=args.span, points=args.points, tol=args.tol)
    if args.plot:
        eos.plot(args.plot)
    z = eos.formula_units
    if args.json:
        _print_json({"file": args.file, "volumes_angstrom3": eos.volumes, "energies_eV": eos.energies,
                     "e0_eV": eos.e0, "v0_angstrom3": eos.v0, "v0_per_formula_unit_angstrom3": eos.v0 / z,
                     "b0_GPa": eos.b0, "b0_prime": eos.b0_prime, "rms_eV": eos.rms,
                     "volume_change_from_input": eos.v0 / crystal.volume - 1, "plot": args.plot})
        return 0
    print(f"madelung eos  {args.file}   third-order Birch–Murnaghan fit of {len(eos.volumes)} volumes")
    print(f"  V0          {eos.v0:.4f} Å^3 per cell = {eos.v0 / z:.4f} Å^3 per formula unit "
          f"({100 * (eos.v0 / crystal.volume - 1):+.3f} % from the input structure)")
    print(f"  B0          {eos.b0:.3f} GPa      B0' {eos.b0_prime:.3f}")
    print(f"  E0          {eos.e0:.6f} eV per cell (signed total model energy); fit rms {eos.rms:.2e} eV")
    if args.plot:
        print(f"  plot        {args.plot}")
    print(f"  note        {RIGID_ION_NOTE}")
    return 0


# ---------------------------------------------------------------- main
COMMANDS = {
    "energy": (_add_energy, _run_energy),
    "sites": (_add_sites, _run_sites),
    "constant": (_add_constant, _run_constant),
    "fit": (_add_fit, _run_fit),
    "cycle": (_add_cycle, _run_cycle),
    "relax": (_add_relax, _run_relax),
    "eos": (_add_eos, _run_eos),
}


def build_parser():
    parser = _Parser(prog="madelung", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="Units: Å, e, eV, V; kJ/mol per formula unit. Exit codes: 0 done, 2 bad input, "
                            "1 internal error.")
    parser.add_argument("--version", action="version", version=f"madelung {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a full traceback on internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for add, _ in COMMANDS.values():
        add(sub)
    return parser


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 2
    _, run = COMMANDS[args.command]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", MadelungWarning)
        try:
            code = run(args)
        except InputError as exc:
            print(f"madelung: {exc}", file=sys.stderr)
            return 2
        except KeyboardInterrupt:
            print("madelung: interrupted", file=sys.stderr)
            return 130
        except Exception as exc:  # our fault, not the user's
            if args.debug:
                raise
            print(f"madelung: internal error: {type(exc).__name__}: {exc} (rerun with --debug for details)",
                  file=sys.stderr)
            return 1
        finally:
            for w in caught:
                if issubclass(w.category, MadelungWarning):
                    print(f"madelung: warning: {w.message}", file=sys.stderr)
    return code


if __name__ == "__main__":
    sys.exit(main())
