"""Command ``charges``: oxidation-state assignment or charge equilibration."""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ..units import EV_TO_KJ_PER_MOL
from .loading import _charged
from .options import (
    COARSE_TOL, _charge_option, _crystal_options, _json_option, _min_distance_option, _structure_options,
    _tol_option)
from .output import _print_json


def _add_charges(sub):
    parser = sub.add_parser("charges", help="assign oxidation states or equilibrate partial charges",
                            description="Charges for the point-charge model. 'auto' enumerates charge-neutral "
                                        "assignments of the common oxidation states per orbit of equivalent sites "
                                        "and ranks them by electronegativity order, site-potential signs, "
                                        "bond-valence sums and Madelung energy; 'equilibrate' computes partial "
                                        "charges by charge equilibration in the periodic cell.")
    parser.add_argument("file", metavar="FILE", help="structure file: CIF, POSCAR, extended XYZ, ... (read by ASE)")
    parser.add_argument("--method", choices=("auto", "equilibrate"), default="auto",
                        help="oxidation-state assignment (auto, default) or charge equilibration")
    _charge_option(parser, help="fix the state of an element or site label, e.g. Fe1=+3 (auto only; repeat as needed)")
    parser.add_argument("--ignore-file-states", action="store_true",
                        help="assign every site afresh, ignoring oxidation states written in the file")
    parser.add_argument("--mixing-denominator", type=int, default=2, metavar="D",
                        help="allow mixed-valence averages on an orbit in steps of 1/D (default 2; 1: integers only)")
    parser.add_argument("--kernel", choices=("gaussian", "point"), default="gaussian",
                        help="equilibration: Gaussian-shielded (default) or point-charge interaction")
    parser.add_argument("--dielectric", type=float, default=2.0, metavar="EPS",
                        help="equilibration: relative permittivity dividing the inter-site interaction (default 2)")
    parser.add_argument("--total-charge", type=float, default=0.0, metavar="Q",
                        help="net charge of the cell, e (default 0)")
    _tol_option(parser, default=COARSE_TOL, help="accuracy of the Ewald sums (default %(default)g)")
    _min_distance_option(parser)
    _json_option(parser, help="print JSON: every ranked candidate")
    _structure_options(parser, charges_from=False)
    return parser


def _run_charges(args):
    from ..charges.oxidation import mixed_note
    if args.method == "equilibrate":
        return _run_equilibrate(args)
    if args.total_charge != 0:
        raise InputError(f"{args.file}: --total-charge applies to --method equilibrate; oxidation states are "
                         "assigned for a neutral cell")
    args.charges_from = "auto"
    crystal, a = _charged(args, ignore_file_states=args.ignore_file_states)
    if args.json:
        _print_json({"file": args.file, "formula": crystal.reduced_formula, **a.to_dict()})
        return 0
    print(f"madelung charges  {args.file}")
    print(f"  structure   {crystal.formula} ({crystal.formula_units} x {crystal.reduced_formula}), "
          f"{len(crystal)} sites, {a.space_group}, {len(a.groups)} orbits")
    fixed = [g.label for g in a.groups if any(v is not None for v in g.fixed)]
    if fixed:
        print(f"  kept        states given for {', '.join(fixed)} (file or --charge)")
    print(f"  candidates  {len(a.candidates)} charge-neutral assignment(s)"
          + (" (enumeration stopped at the limit)" if a.truncated else ""))
    print()
    print(f"  {'orbit':<10} {'species':<12} {'Wyckoff':>7} {'sites':>5}  {'state':<30} {'potential / V':>14} "
          f"{'BVS':>7}")
    for g, states, phi, bvs in zip(a.groups, a.best.states, a.best.potentials, a.best.bond_valence_sums):
        text = " ".join(f"{el}{q:+g}{mixed_note(el, q)}" for (el, _), q in zip(g.species, states))
        shown = "—" if bvs is None else f"{bvs:7.3f}"
        print(f"  {g.label:<10} {g.species_label:<12} {g.wyckoff:>7} {len(g.sites):>5}  {text:<30} {phi:>14.6f} "
              f"{shown:>7}")
    print()
    best = a.best
    misfit = "—" if best.bond_valence_misfit is None else f"{best.bond_valence_misfit:.1%}"
    print(f"  chosen      {a.describe()}")
    print(f"              E = {best.energy_per_formula_unit:.4f} eV per formula unit "
          f"({best.energy_per_formula_unit * EV_TO_KJ_PER_MOL:.1f} kJ/mol, signed electrostatic), "
          f"bond-valence misfit {misfit}")
    if a.runner_up is not None:
        r = a.runner_up
        misfit = "—" if r.bond_valence_misfit is None else f"{r.bond_valence_misfit:.1%}"
        print(f"  runner-up   {a.describe(r)}")
        print(f"              E = {r.energy_per_formula_unit:.4f} eV per formula unit, bond-valence misfit {misfit}")
    print(f"  why         {a.reason}")
    if not a.used_bond_valence:
        print("  bond valence  not used in the ranking (parameters missing for some bonds or sites averaged)")
    if a.searched_rare_states:
        print("  searched    rarely seen oxidation states too (no common assignment was neutral, or its bond "
              "valences misfit by more than 25 %)")
    print("  note        formal oxidation states are bookkeeping of the ionic limit, not measured charges; "
          "BVS: bond-valence sums (Brown & Altermatt 1985, Brese & O'Keeffe 1991)")
    return 0


def _run_equilibrate(args):
    from ..io.read import load
    from ..structure.symmetry import crystal_symmetry

    if args.charge:
        raise InputError(f"{args.file}: --charge cannot be combined with --method equilibrate")
    loaded = load(args.file, "equilibrate", total_charge=args.total_charge, kernel=args.kernel,
                  dielectric=args.dielectric, tol=args.tol, **_crystal_options(args))
    crystal, result = loaded.crystal, loaded.equilibration
    symmetry = crystal_symmetry(crystal, symmetry_tolerance=args.symmetry_tolerance, by_charge=False)
    means, spreads = symmetry.orbit_means(result.charges)
    rows = []
    for orbit, mean, spread in zip(symmetry.orbits, means, spreads):
        i = orbit.representative
        rows.append({"label": crystal.labels[i], "species": crystal.species_label(i), "wyckoff": orbit.wyckoff,
                     "multiplicity": orbit.multiplicity, "sites_in_cell": len(orbit.sites),
                     "charge_e": float(mean), "charge_spread_e": float(spread),
                     "electronegativity_eV": float(result.electronegativity[i]),
                     "hardness_eV": float(result.hardness[i])})
    if args.json:
        _print_json({"file": args.file, **result.to_dict(), "orbits": rows})
        return 0
    print(f"madelung charges  {args.file}  (charge equilibration)")
    print(f"  structure   {crystal.formula}, {len(crystal)} sites, {symmetry.symbol} (No. {symmetry.number})")
    print(f"  model       {result.kernel} kernel, inter-site interaction / {result.dielectric:g}; "
          f"{result.parameter_source}")
    print(f"  total       {float(np.sum(result.charges)):+.6f} e (fixed at {result.total_charge:+g}); "
          f"equalized electronegativity {result.chemical_potential:.4f} eV")
    print()
    print(f"  {'orbit':<10} {'species':<12} {'Wyckoff':>7} {'sites':>5} {'charge / e':>11} {'chi / eV':>9} "
          f"{'J / eV':>8}")
    for r in rows:
        print(f"  {r['label']:<10} {r['species']:<12} {r['multiplicity']:>6}{r['wyckoff']} {r['sites_in_cell']:>5} "
              f"{r['charge_e']:>+11.4f} {r['electronegativity_eV']:>9.3f} {r['hardness_eV']:>8.3f}")
    print()
    print("  note        equilibrated charges are model estimates of charge transfer (parameter- and kernel-"
          "dependent), smaller than formal charges; they are not measured charges")
    return 0
