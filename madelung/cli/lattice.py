"""Commands ``fit``, ``cycle``, ``relax`` and ``eos``: lattice energies in the rigid-ion model."""

from __future__ import annotations

import argparse
import os

import numpy as np

from ..analysis.lattice_energy import kapustinskii_of_ions
from ..errors import InputError
from ..report.files import cif_text
from ..report.files import write_text
from ..report.files import write_with
from ..units import EV_TO_KJ_PER_MOL
from .loading import _crystal_from, load_crystal
from .options import (
    _charge_option, _check_outputs, _common, _json_option, _min_distance_option, _overwrite_option, _tol_option)
from .output import RIGID_ION_NOTE, _print_json
from .text import _list_values, _parse_pairs


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
    _overwrite_option(parser)
    _charge_option(parser, help="charge of an element or site label for every file, e.g. Na=+1")
    _tol_option(parser, help="Ewald accuracy (default %(default)g)")
    _min_distance_option(parser, help=argparse.SUPPRESS)
    _json_option(parser)
    return parser


def _run_fit(args):
    from ..analysis.fitting import FitTarget, fit_repulsion

    fixed = _parse_pairs(args.fix, "--fix", number=False)
    for name, value in fixed.items():
        if value != "table":
            try:
                fixed[name] = float(value)
            except ValueError:
                raise InputError(f"--fix {name}={value}: not a number") from None
    moduli = _parse_pairs(args.bulk_modulus, "--bulk-modulus")
    _check_outputs(args, args.output)
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
    write_with(args.output, result.model.save)
    if args.json:
        _print_json({"output": args.output, "form": args.form, **result.to_dict()})
        return 0
    from ..sums.shortrange import PARAMETER_UNITS

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
    _charge_option(parser, help=argparse.SUPPRESS)
    _tol_option(parser, help=argparse.SUPPRESS)
    _min_distance_option(parser, help=argparse.SUPPRESS)
    _json_option(parser)
    return parser


def _run_cycle(args):
    from ..analysis.thermochemistry import born_haber_cycle, read_cycle_file

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
        from ..analysis.lattice_energy import lattice_energy

        crystal = _crystal_from(args.structure, args)
        if args.repulsion:
            result = lattice_energy(crystal, args.repulsion, tol=args.tol)
            model = result.lattice_energy_kj_per_mol
            forms = result.closed_forms
        else:
            from ..analysis.lattice_energy import closed_forms

            forms = closed_forms(crystal, None, tol=args.tol)
        if forms is not None and forms.kapustinskii is not None:
            kapustinskii = forms.kapustinskii * EV_TO_KJ_PER_MOL
    elif args.repulsion:
        raise InputError("cycle: --repulsion needs --structure FILE for the model lattice energy")
    if kapustinskii is None:   # no structure: Kapustinskii's estimate needs the ions only
        (m, zm, a), (x, zx, b) = cycle.cation, cycle.anion
        estimate = kapustinskii_of_ions(m, zm, a, x, zx, b)
        kapustinskii = None if estimate is None else estimate * EV_TO_KJ_PER_MOL
    comparisons = {}
    for name, value in (("rigid-ion model", model), ("Kapustinskii", kapustinskii)):
        if value is not None:
            comparisons[name] = cycle.compare(value, args.covalent_threshold)
    if args.json:
        _print_json({**cycle.to_dict(), "comparisons": comparisons})
        return 0
    print(f"madelung cycle  {cycle.compound}   (kJ/mol per formula unit)")
    for s in cycle.steps:
        print(f"      {s.text:<66} {s.value:+11.2f}   {s.source}")
    print(f"      {'':<66} {'-' * 11}")
    print(f"      {'cycle lattice energy (solid -> gaseous ions)':<66} {cycle.lattice_energy:+11.2f}")
    print(f"  gas-phase electron transfer alone (ionisation + attachment) {cycle.electron_transfer:+.2f} kJ/mol")
    for name, c in comparisons.items():
        value, difference, fraction, covalent = c.model, c.difference, c.fraction, c.covalent_character
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
    parser.add_argument("--force-limit", type=float, default=1e-4, metavar="eV/Å", help="force criterion (default 1e-4)")
    parser.add_argument("--max-steps", type=int, default=500, help="most optimiser steps (default 500)")
    parser.add_argument("-o", "--output", metavar="OUT", help="relaxed structure (format from the extension; "
                        "default FILE stem + '-relaxed.cif'; a CIF carries the charges)")
    parser.add_argument("--write-unconverged", action="store_true",
                        help="write the last structure even if the relaxation did not converge")
    _overwrite_option(parser)
    return parser


def _write_structure(path, atoms, crystal):
    """A structure file that reads back with the charges of ``crystal`` (CIF: oxidation states;
    other formats: ASE initial charges where the format keeps them)."""
    if path.lower().endswith(".cif"):
        write_text(path, cif_text(atoms.cell, atoms.get_positions(), atoms.get_chemical_symbols(),
                                  crystal.charges, crystal.labels, title=crystal.reduced_formula))
        return
    import ase.io

    atoms = atoms.copy()
    atoms.set_initial_charges(crystal.charges)
    try:
        write_with(path, lambda temporary: ase.io.write(temporary, atoms))
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{path}: cannot write the structure ({' '.join(str(exc).split())[:160]})") from None


def _run_relax(args):
    from ..analysis.calculator import relax

    output = args.output or os.path.splitext(os.path.basename(args.file))[0] + "-relaxed.cif"
    _check_outputs(args, output)
    crystal = load_crystal(args)
    result = relax(crystal, args.repulsion, cell=not args.positions_only, force_limit=args.force_limit, max_steps=args.max_steps,
                   tol=args.tol)
    if not result.converged and not args.write_unconverged:
        raise InputError(f"{args.file}: the relaxation did not converge in {result.steps_taken} steps (force limit {args.force_limit:g} "
                         f"eV/Å); nothing written (raise --max-steps, loosen --force-limit, or pass --write-unconverged)")
    _write_structure(output, result.atoms, crystal)
    if not result.converged:
        raise InputError(f"{args.file}: the relaxation did not converge in {result.steps_taken} steps (force limit {args.force_limit:g} "
                         f"eV/Å); last structure written to {output}")
    z = result.formula_units
    if args.json:
        _print_json({"file": args.file, "output": output, **result.to_dict()})
        return 0
    print(f"madelung relax  {args.file} -> {output}")
    print(f"  {'positions and cell' if result.cell_relaxed else 'positions'} relaxed with BFGS: "
          f"{result.steps_taken} steps, converged (force limit {result.force_limit:g} eV/Å)")
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
    _overwrite_option(parser)
    return parser


def _run_eos(args):
    from ..analysis.equation_of_state import equation_of_state
    from ..report.plots import write_equation_of_state_png

    _check_outputs(args, args.plot)
    crystal = load_crystal(args)
    eos = equation_of_state(crystal, args.repulsion, span=args.span, points=args.points, tol=args.tol)
    if args.plot:
        write_with(args.plot, lambda temporary: write_equation_of_state_png(temporary, eos), binary=True)
    z = eos.formula_units
    if args.json:
        _print_json({"file": args.file, **eos.to_dict(), "volume_change_from_input": eos.v0 / crystal.volume - 1,
                     "plot": args.plot})
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
