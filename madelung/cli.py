"""The ``madelung`` command line: parsing and printing only; the work is done by the public API.

Every command takes a structure file (anything ASE reads: CIF, POSCAR, extended XYZ, ...),
prints a readable report by default and JSON with ``--json``.
Exit codes: 0 done, 2 a problem with the input (one line on stderr), 1 an internal error.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import warnings

import numpy as np

from . import __version__
from .errors import InputError, MadelungWarning
from .constants import CONVENTION_TEXT
from .units import EV_TO_KJ_PER_MOL

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
    parser.add_argument("--cell", choices=("input", "primitive", "conventional"), default="input",
                        help="use the cell as read (default) or spglib's standardized primitive or conventional "
                             "cell (same energy per formula unit)")
    _structure_options(parser)


def _structure_options(parser, charges_from=True):
    from .crystal import DEFAULT_MAX_ATOMS
    from .symmetry import DEFAULT_SYMPREC

    if charges_from:
        parser.add_argument("--charges-from", choices=("file", "auto", "equilibrate"), default="file",
                            help="where charges come from: the file (default), assigned oxidation states (auto; "
                                 "states in the file and --charge rules are kept) or charge equilibration")
    parser.add_argument("--occupancy", choices=("average", "error"), default="average",
                        help="mixed or partly occupied sites: occupancy-weighted mean charge with a warning "
                             "(average, default) or refuse the file (error)")
    parser.add_argument("--max-atoms", type=int, default=DEFAULT_MAX_ATOMS, metavar="N",
                        help=f"refuse structures with more sites than this (default {DEFAULT_MAX_ATOMS})")
    parser.add_argument("--symprec", type=float, default=DEFAULT_SYMPREC, metavar="Å",
                        help=f"symmetry tolerance (default {DEFAULT_SYMPREC:g} Å, suits experimental CIFs)")


def _crystal_options(args):
    return dict(source=args.file, min_distance=args.min_distance, occupancy=args.occupancy,
                max_atoms=args.max_atoms)


def load_crystal(args):
    """The crystal named on the command line, with its charges, in the cell asked for."""
    from .symmetry import standard_cell

    return standard_cell(_load_charged(args), getattr(args, "cell", "input"), symprec=args.symprec)


def _load_charged(args):
    from .crystal import Crystal, parse_charge_rules, read_structure

    rules = parse_charge_rules(args.charge)
    atoms = read_structure(args.file, max_atoms=args.max_atoms)
    method = getattr(args, "charges_from", "file")
    if method == "auto":
        return _auto_assignment(atoms, rules, args)[0]
    if method == "equilibrate":
        if rules:
            raise InputError(f"{args.file}: --charge cannot be combined with --charges-from equilibrate")
        return Crystal.from_ase(atoms, "equilibrate", **_crystal_options(args))
    crystal = Crystal.from_ase(atoms, None, **_crystal_options(args)) if not rules \
        else _with_rules(atoms, rules, args)
    return crystal


def _auto_assignment(atoms, rules, args, ignore_file_states=False):
    """Assigned oxidation states: file states (unless ignored) and --charge rules are kept."""
    from .charges import assign_oxidation_states
    from .crystal import Crystal, file_states

    options = _crystal_options(args)
    base = Crystal.from_ase(atoms, np.zeros(len(atoms)), **options)
    known = [(None,) * len(base.species_of(i)) for i in range(len(base))] if ignore_file_states \
        else [tuple(s) for s in file_states(atoms)]
    unknown = sorted(set(rules) - set(base.symbols) - set(base.labels)
                     - {el for i in range(len(base)) for el, _ in base.species_of(i)})
    if unknown:
        raise InputError(f"{args.file}: charge given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    for i in range(len(base)):
        parts = base.species_of(i)
        label = base.labels[i]
        known[i] = tuple(rules.get(label, rules.get(el, known[i][k] if k < len(known[i]) else None))
                         for k, (el, _) in enumerate(parts))
    assignment = assign_oxidation_states(base, known_states=known, symprec=args.symprec,
                                         mixing_denominator=getattr(args, "mixing_denominator", 2))
    return base.with_charges(assignment.charges), assignment


def _with_rules(atoms, rules, args):
    """Charges from rules; species the rules do not name keep the charges read from the file.

    A rule gives the charge of an ion; mixed or partly occupied sites get the occupancy-weighted sum."""
    from .crystal import Crystal

    symbols = atoms.get_chemical_symbols()
    labels = [str(x) for x in atoms.arrays["labels"]] if "labels" in atoms.arrays else None
    entries = atoms.arrays.get("site_species")
    if entries is None:
        if "oxidation_states" in atoms.arrays:
            known = np.array(atoms.arrays["oxidation_states"], dtype=float)
        elif np.any(atoms.get_initial_charges() != 0):
            known = atoms.get_initial_charges()
        else:
            return Crystal.from_ase(atoms, rules, **_crystal_options(args))
        entries = [((el, 1.0, float(q)),) for el, q in zip(symbols, known)]
    elements = {el for e in entries for el, _, _ in e} | set(symbols)
    unknown = sorted(set(rules) - elements - set(labels or ()))
    if unknown:
        raise InputError(f"{args.file}: charge given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    charges = np.empty(len(atoms))
    for i, parts in enumerate(entries):
        label = labels[i] if labels else None
        total = 0.0
        for element, occ, state in parts:
            value = rules.get(label, rules.get(element, state))
            if value is None or not np.isfinite(value):
                raise InputError(f"{args.file}: site {label or i} ({element}) has no charge in the file or the "
                                 f"rules; add --charge {label or element}=Q")
            total += occ * value
        charges[i] = total
    return Crystal.from_ase(atoms, charges, **_crystal_options(args))


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
    return parser


def _run_energy(args):
    from . import ewald
    from .units import EV_PER_A3_TO_GPA

    crystal = load_crystal(args)
    result = ewald(crystal, tol=args.tol, forces=args.forces, stress=args.stress)
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
    lines.append(f"  note        {MODEL_NOTE}")
    print("\n".join(lines))
    return 0


# ---------------------------------------------------------------- sites
def _add_sites(sub):
    parser = sub.add_parser("sites", help="electrostatic potential at every crystallographic site",
                            description="Electrostatic potential at each ion from all the other ions (V), "
                                        "with the site Madelung constant M_i = -phi_i r0 / (k_e q_i): one row per "
                                        "orbit of symmetry-equivalent sites (Wyckoff letter and multiplicity), "
                                        "or every site with --all.")
    _common(parser)
    parser.add_argument("--all", action="store_true", help="one row per site instead of one per orbit")
    return parser


def _run_sites(args):
    from .constants import madelung_constants
    from .symmetry import crystal_symmetry

    crystal = load_crystal(args)
    symmetry = crystal_symmetry(crystal, symprec=args.symprec)
    constants = madelung_constants(crystal, tol=args.tol)
    potentials = constants.ewald.potentials
    z = crystal.formula_units
    energy_per_fu = constants.ewald.energy / z

    def row(i, orbit):
        return {"index": i, "label": crystal.labels[i], "element": crystal.species_label(i),
                "wyckoff": orbit.wyckoff, "multiplicity": orbit.multiplicity, "sites_in_cell": len(orbit.sites),
                "charge_e": float(crystal.charges[i]), "potential_V": float(potentials[i]),
                "site_constant": None if math.isnan(constants.site[i]) else float(constants.site[i]),
                "site_energy_eV": float(crystal.charges[i] * potentials[i]),
                "averaged": crystal.is_averaged(i)}

    orbit_rows = []
    for orbit in symmetry.orbits:
        entry = row(orbit.representative, orbit)
        spread = float(np.ptp(potentials[list(orbit.sites)]))
        entry["potential_spread_V"] = spread
        orbit_rows.append(entry)
    site_rows = [row(i, symmetry.orbits[symmetry.orbit_of[i]]) for i in range(len(crystal))]
    if args.json:
        _print_json({"file": args.file, "cell": args.cell, "space_group": symmetry.symbol,
                     "space_group_number": symmetry.number, "symprec_angstrom": symmetry.symprec,
                     "formula_units": z, "energy_per_formula_unit_eV": energy_per_fu,
                     "r0_angstrom": constants.r0, "orbits": orbit_rows, "sites": site_rows,
                     "site_constant_convention": "M_i = -phi_i r0 / (k_e q_i)",
                     "error_estimate_eV": constants.ewald.error_estimate})
        return 0
    print(f"madelung sites  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    print(f"  symmetry    {symmetry.symbol} (No. {symmetry.number}), {len(symmetry.orbits)} orbits, "
          f"tolerance {symmetry.symprec:g} Å; cell: {args.cell}")
    print(f"  energy      {energy_per_fu:.8f} eV per formula unit {crystal.reduced_formula} "
          "(signed electrostatic energy)")
    print(f"  r0 (shortest cation–anion distance) {constants.r0:.5f} Å")
    print()
    first = "#" if args.all else "sites"
    print(f"  {first:>5}  {'label':<10} {'species':<12} {'Wyckoff':>7} {'charge':>8}  {'potential / V':>15}  "
          f"{'M_i':>11}  {'q*phi / eV':>12}")
    for r in (site_rows if args.all else orbit_rows):
        m = "—" if r["site_constant"] is None else f"{r['site_constant']:11.6f}"
        count = r["index"] if args.all else r["sites_in_cell"]
        wyckoff = f"{r['multiplicity']}{r['wyckoff']}"
        print(f"  {count:>5}  {r['label']:<10} {r['element']:<12} {wyckoff:>7} {r['charge_e']:>+8.3f}  "
              f"{r['potential_V']:>15.8f}  {m:>11}  {r['site_energy_eV']:>12.6f}")
    print()
    print("  M_i = -phi_i r0 / (k_e q_i): the site potential in units of k_e q_i / r0 (positive = held by its "
          "surroundings); E = 1/2 sum q_i phi_i")
    if any(r["averaged"] for r in site_rows):
        print("  averaged    mixed or partly occupied sites carry occupancy-weighted mean charges (virtual crystal)")
    print(f"  note        {MODEL_NOTE}")
    return 0


# ---------------------------------------------------------------- charges
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
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="fix the state of an element or site label, e.g. Fe1=+3 (auto only; repeat as needed)")
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
    parser.add_argument("--tol", type=float, default=1e-8, metavar="TOL", help="accuracy of the Ewald sums (1e-8)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å; 0 switches the check off)")
    parser.add_argument("--json", action="store_true", help="print JSON: every ranked candidate")
    _structure_options(parser, charges_from=False)
    return parser


def _candidate_json(assignment, candidate, rank):
    return {"rank": rank, "assignment": assignment.describe(candidate),
            "states": [{"label": g.label, "wyckoff": g.wyckoff, "sites_in_cell": len(g.sites),
                        "species": [{"element": el, "occupancy": occ, "state": q}
                                    for (el, occ), q in zip(g.species, states)],
                        "potential_V": phi, "bond_valence_sum": bvs}
                       for g, states, phi, bvs in zip(assignment.groups, candidate.states, candidate.potentials,
                                                      candidate.bond_valence_sums)],
            "electronegativity_violations": candidate.electronegativity_violations,
            "wrong_sign_sites": candidate.wrong_sign_sites,
            "bond_valence_misfit": candidate.bond_valence_misfit,
            "mixed_valence_orbits": candidate.mixed_groups,
            "energy_per_formula_unit_eV": candidate.energy_per_formula_unit,
            "energy_per_formula_unit_kJ_per_mol": candidate.energy_per_formula_unit * EV_TO_KJ_PER_MOL}


def _run_charges(args):
    from .charges.oxidation import mixed_note
    from .crystal import parse_charge_rules, read_structure

    atoms = read_structure(args.file, max_atoms=args.max_atoms)
    if args.method == "equilibrate":
        return _run_equilibrate(args, atoms)
    rules = parse_charge_rules(args.charge)
    args.charges_from = "auto"
    crystal, a = _auto_assignment(atoms, rules, args, ignore_file_states=args.ignore_file_states) \
        if args.total_charge == 0 else _auto_charged(atoms, rules, args)
    if args.json:
        _print_json({"file": args.file, "formula": crystal.reduced_formula, "space_group": a.space_group,
                     "method": "oxidation-state assignment", "reason": a.reason,
                     "bond_valence_used_in_ranking": a.used_bond_valence, "truncated": a.truncated,
                     "candidates": [_candidate_json(a, c, k + 1) for k, c in enumerate(a.candidates)],
                     "note": "formal oxidation states: bookkeeping of the ionic limit, not measured charges"})
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
    print("  note        formal oxidation states are bookkeeping of the ionic limit, not measured charges; "
          "BVS: bond-valence sums (Brown & Altermatt 1985, Brese & O'Keeffe 1991)")
    return 0


def _auto_charged(atoms, rules, args):
    raise InputError(f"{args.file}: --total-charge applies to --method equilibrate; oxidation states are "
                     "assigned for a neutral cell")


def _run_equilibrate(args, atoms):
    from .charges import equilibrate
    from .crystal import Crystal
    from .symmetry import crystal_symmetry

    if args.charge:
        raise InputError(f"{args.file}: --charge cannot be combined with --method equilibrate")
    base = Crystal.from_ase(atoms, np.zeros(len(atoms)), **_crystal_options(args))
    result = equilibrate(base, total_charge=args.total_charge, kernel=args.kernel, dielectric=args.dielectric,
                         tol=args.tol)
    crystal = base.with_charges(result.charges)
    symmetry = crystal_symmetry(base, symprec=args.symprec, by_charge=False)
    rows = []
    for orbit in symmetry.orbits:
        q = result.charges[list(orbit.sites)]
        i = orbit.representative
        rows.append({"label": crystal.labels[i], "species": crystal.species_label(i), "wyckoff": orbit.wyckoff,
                     "multiplicity": orbit.multiplicity, "sites_in_cell": len(orbit.sites),
                     "charge_e": float(q.mean()), "charge_spread_e": float(np.ptp(q)),
                     "electronegativity_eV": float(result.electronegativity[i]),
                     "hardness_eV": float(result.hardness[i])})
    if args.json:
        _print_json({"file": args.file, "method": "charge equilibration", "kernel": result.kernel,
                     "dielectric": result.dielectric, "total_charge_e": result.total_charge,
                     "chemical_potential_eV": result.chemical_potential, "model_energy_eV": result.energy,
                     "parameters": result.parameter_source, "orbits": rows, "charges_e": result.charges,
                     "note": "equilibrated charges are model estimates of charge transfer"})
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


# ---------------------------------------------------------------- constant
def _add_constant(sub):
    parser = sub.add_parser("constant", help="Madelung constants in each named convention",
                            description="Madelung constants with r0 the shortest cation–anion distance and E_fu "
                                        "the electrostatic energy per formula unit, in three named conventions. "
                                        "Several files give one row each; a file that fails gets its message in "
                                        "its row and the others go on.")
    _common(parser)
    parser.add_argument("more_files", nargs="*", metavar="FILE", help=argparse.SUPPRESS)
    return parser


def _run_constant(args):
    from .constants import madelung_constants

    files = [args.file, *args.more_files]
    if len(files) > 1:
        return _constant_table(args, files)
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


def _constant_table(args, files):
    """One row per file; failures are rows too, and the run goes on."""
    from .constants import madelung_constants

    rows = []
    for path in files:
        args.file = path
        try:
            c = madelung_constants(load_crystal(args), tol=args.tol)
            rows.append({"file": path, "status": "ok", **c.as_dict()})
        except InputError as exc:
            rows.append({"file": path, "status": str(exc)})
    failed = sum(row["status"] != "ok" for row in rows)
    if args.json:
        _print_json({"structures": rows, "failed": failed})
        return 0
    print(f"madelung constant  {len(files)} structures, tol {args.tol:.0e}")
    print(f"  {'file':<34} {'formula':<9} {'r0 / Å':>8} {'charges in':>13} {'handbook':>13} {'common factor':>14}")
    for row in rows:
        name = os.path.basename(row["file"])
        if row["status"] != "ok":
            print(f"  {name:<34} failed: {row['status']}")
            continue
        print(f"  {name:<34} {row['formula']:<9} {row['r0_angstrom']:>8.4f} {row['charges_left_in']:>13.8f} "
              f"{_fmt(row['handbook'], 8):>13} {_fmt(row['common_factor'], 8):>14}")
    print()
    for name in ("charges_left_in", "handbook", "common_factor"):
        print(f"  {name:<16} {CONVENTION_TEXT[name]}")
    print(f"  {len(rows) - failed} done, {failed} failed")
    print(f"  note        {MODEL_NOTE}")
    return 0


# ---------------------------------------------------------------- main
COMMANDS = {
    "energy": (_add_energy, _run_energy),
    "sites": (_add_sites, _run_sites),
    "charges": (_add_charges, _run_charges),
    "constant": (_add_constant, _run_constant),
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
