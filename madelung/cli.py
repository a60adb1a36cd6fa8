"""The ``madelung`` command line: parsing and printing only; the work is done by the public API.

Every command takes a structure file (anything ASE reads: CIF, POSCAR, extended XYZ, ...),
prints a readable report by default and JSON with ``--json``.
Exit codes: 0 every input done; 2 a problem with an input (one line on stderr; with several inputs
after all the others were done, with a summary line); 1 an internal error; 141 the reader of the
output closed the pipe. No command writes over an existing file without ``--overwrite``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import re
import sys
import warnings

import numpy as np

from . import __version__
from .analysis.embedding import OFFSETS as EMBEDDING_OFFSETS, embedding
from .analysis.embedding_files import FILES as EMBEDDING_FILES, check_output_folder, embedding_report, write_embedding
from .errors import InputError, MadelungError, MadelungWarning
from .analysis.madelung_constants import CONVENTION_TEXT
from .report.files import check_outputs, cif_text, write_text, write_with
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
        command = self.prog.split()[-1]
        self.exit(2, f"madelung: {message} (see {'madelung' if command == 'madelung' else 'madelung ' + command} "
                     "--help)\n")


def _tolerance(text):
    """``--tol``: a finite number between the double-precision epsilon and 1."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"{text} must lie between 0 and 1")
    if value < np.finfo(float).eps:
        raise argparse.ArgumentTypeError(f"{text} is below what double precision resolves "
                                         f"({np.finfo(float).eps:.1e} relative)")
    return value


#: Options naming files a command reads; no output may be one of them.
INPUT_OPTIONS = ("file", "files", "more_files", "repulsion", "structure", "input", "dielectric_tensor", "db")


def _overwrite_option(parser):
    parser.add_argument("--overwrite", action="store_true", help="replace output files that exist already")


def _check_outputs(args, *paths):
    """Refuse unwritable, existing (without --overwrite) or input-replacing outputs before any work."""
    inputs = []
    for name in INPUT_OPTIONS:
        value = getattr(args, name, None)
        inputs.extend(value if isinstance(value, list) else [value])
    check_outputs(paths, inputs=[p for p in inputs if isinstance(p, str)],
                  overwrite=getattr(args, "overwrite", False))


def _common(parser):
    parser.add_argument("file", metavar="FILE", help="structure file: CIF, POSCAR, extended XYZ, ... (read by ASE)")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or a site label, e.g. Na=+1 or O1=-2 (repeat as needed); "
                             "overrides charges read from the file")
    parser.add_argument("--tol", type=_tolerance, default=1e-10, metavar="TOL",
                        help="wanted error of the energy relative to k_e*sum(q^2)/d_min (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å; 0 switches the check off)")
    parser.add_argument("--method", choices=("auto", "direct", "mesh"), default="auto",
                        help="Ewald engine: direct sum, particle mesh, or the one predicted faster (default auto)")
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
    parser.add_argument("--block", metavar="NAME|NUMBER", default=None,
                        help="the CIF data block (or frame) to read, by name or number counted from 1; needed "
                             "for a file with several structures")
    parser.add_argument("--allow-net-charge", action="store_true",
                        help="sum a cell the file's states and occupancies leave charged, with a uniform "
                             "neutralizing background (refused by default)")
    parser.add_argument("--occupancy", choices=("average", "error"), default="average",
                        help="mixed or partly occupied sites: occupancy-weighted mean charge with a warning "
                             "(average, default) or refuse the file (error)")
    parser.add_argument("--max-atoms", type=int, default=DEFAULT_MAX_ATOMS, metavar="N",
                        help=f"refuse structures with more sites than this (default {DEFAULT_MAX_ATOMS})")
    parser.add_argument("--symprec", type=float, default=DEFAULT_SYMPREC, metavar="Å",
                        help=f"symmetry tolerance (default {DEFAULT_SYMPREC:g} Å, suits experimental CIFs)")


def _structure_defaults(args):
    """Fill the structure options for commands whose parser does not declare them."""
    from .crystal import DEFAULT_MAX_ATOMS
    from .symmetry import DEFAULT_SYMPREC

    for name, value in (("min_distance", 0.5), ("occupancy", "average"), ("max_atoms", DEFAULT_MAX_ATOMS),
                        ("symprec", DEFAULT_SYMPREC), ("charges_from", "file"), ("cell", "input"),
                        ("block", None), ("allow_net_charge", False), ("charge", [])):
        if not hasattr(args, name):
            setattr(args, name, value)
    return args


def _crystal_options(args):
    """The loader's options from the command line (:func:`madelung.io.read.load`)."""
    _structure_defaults(args)
    return dict(block=args.block, min_distance=args.min_distance, occupancy=args.occupancy,
                max_atoms=args.max_atoms, symprec=args.symprec, allow_net_charge=args.allow_net_charge,
                mixing_denominator=getattr(args, "mixing_denominator", 2))


def load_crystal(args):
    """The crystal named on the command line, with its charges, in the cell asked for."""
    from .symmetry import standard_cell

    _structure_defaults(args)
    return standard_cell(_load_charged(args), args.cell, symprec=args.symprec)


def _load_charged(args):
    return _charged(args)[0]


def _charged(args, ignore_file_states=False):
    """The crystal of the file on the command line and, for --charges-from auto, its assignment."""
    from .crystal import parse_charge_rules
    from .io.read import load

    _structure_defaults(args)
    loaded = load(args.file, getattr(args, "charges_from", "file"), rules=parse_charge_rules(args.charge),
                  ignore_file_states=ignore_file_states, **_crystal_options(args))
    return loaded.crystal, loaded.assignment


#: Charge summaries list at most this many entries.
SUMMARY_ENTRIES = 12


def _charge_summary(crystal):
    """Charges per site label when the labels name orbits (a CIF), else per element and charge, with
    counts: never one entry per site of a large cell."""
    by_label = {}
    for i, (label, q) in enumerate(zip(crystal.labels, crystal.charges)):
        by_label.setdefault((label, round(float(q), 9)), []).append(i)
    if len(by_label) > SUMMARY_ENTRIES:
        by_label = {}
        for i, q in enumerate(crystal.charges):
            by_label.setdefault((crystal.species_label(i), round(float(q), 9)), []).append(i)
    entries = [f"{name} {q:+g}" + (f" x{len(sites)}" if len(sites) > 1 else "")
               for (name, q), sites in by_label.items()]
    more = len(entries) - SUMMARY_ENTRIES
    return ", ".join(entries[:SUMMARY_ENTRIES]) + (f" and {more} more kinds" if more > 0 else "")


def _fmt(value, digits=6):
    return "undefined" if value is None else f"{value:.{digits}f}"


def _print_json(data):
    def default(obj):
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, (np.floating, np.integer)):
            return obj.item()
        raise TypeError(type(obj).__name__)

    try:
        text = json.dumps(data, indent=2, default=default, allow_nan=False)
    except ValueError:
        raise NonFiniteResult("a result is not a finite number (NaN or infinity); nothing printed") from None
    print(text)


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
            f"({p.k_vectors} k-vectors), {result.seconds * 1000:.1f} ms"] + (
        [f"  mesh        {'x'.join(str(k) for k in p.extra['mesh'])} points, B-spline order {p.extra['order']}"]
        if p.method == "mesh" else [])


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
    _polyatomic_option(parser)
    return parser


def _run_energy(args):
    from .sums.dispatch import ewald
    from .units import EV_PER_A3_TO_GPA

    crystal = load_crystal(args)
    found = _polyatomic_ions(args, crystal)
    if found is not None:
        return _run_energy_with_ions(args, crystal, found)
    result = ewald(crystal, tol=args.tol, forces=args.forces, stress=args.stress, method=args.method)
    lattice = None
    if args.repulsion:
        from .analysis.lattice_energy import lattice_energy

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
            data["lattice"]["volume_based"] = _volume_based(crystal).to_dict()
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
        volume_based = _volume_based(crystal)
        # the Kapustinskii line above already holds a simple salt; thermochemical radii matter for ions
        lines.extend(_volume_based_lines(volume_based, kapustinskii=volume_based.ions != "none"))
        lines.append(f"  note        {RIGID_ION_NOTE}")
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
    from .analysis.madelung_constants import madelung_constants
    from .symmetry import crystal_symmetry

    crystal = load_crystal(args)
    symmetry = crystal_symmetry(crystal, symprec=args.symprec)
    constants = madelung_constants(crystal, tol=args.tol, method=args.method)
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
    parser.add_argument("--tol", type=_tolerance, default=1e-8, metavar="TOL", help="accuracy of the Ewald sums (1e-8)")
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
            "sites_in_rarely_seen_states": candidate.rare_sites,
            "energy_per_formula_unit_eV": candidate.energy_per_formula_unit,
            "energy_per_formula_unit_kJ_per_mol": candidate.energy_per_formula_unit * EV_TO_KJ_PER_MOL}


def _run_charges(args):
    from .charges.oxidation import mixed_note
    if args.method == "equilibrate":
        return _run_equilibrate(args)
    if args.total_charge != 0:
        raise InputError(f"{args.file}: --total-charge applies to --method equilibrate; oxidation states are "
                         "assigned for a neutral cell")
    args.charges_from = "auto"
    crystal, a = _charged(args, ignore_file_states=args.ignore_file_states)
    if args.json:
        _print_json({"file": args.file, "formula": crystal.reduced_formula, "space_group": a.space_group,
                     "method": "oxidation-state assignment", "reason": a.reason,
                     "bond_valence_used_in_ranking": a.used_bond_valence, "truncated": a.truncated,
                     "searched_rarely_seen_states": a.searched_rare_states,
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
    if a.searched_rare_states:
        print("  searched    rarely seen oxidation states too (no common assignment was neutral, or its bond "
              "valences misfit by more than 25 %)")
    print("  note        formal oxidation states are bookkeeping of the ionic limit, not measured charges; "
          "BVS: bond-valence sums (Brown & Altermatt 1985, Brese & O'Keeffe 1991)")
    return 0


def _run_equilibrate(args):
    from .io.read import load
    from .symmetry import crystal_symmetry

    if args.charge:
        raise InputError(f"{args.file}: --charge cannot be combined with --method equilibrate")
    loaded = load(args.file, "equilibrate", total_charge=args.total_charge, kernel=args.kernel,
                  dielectric=args.dielectric, tol=args.tol, **_crystal_options(args))
    crystal, result = loaded.crystal, loaded.equilibration
    symmetry = crystal_symmetry(crystal, symprec=args.symprec, by_charge=False)
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
    _polyatomic_option(parser)
    return parser


def _run_constant(args):
    from .analysis.madelung_constants import madelung_constants
    from .io.read import structures_to_read

    files = [args.file, *args.more_files]
    if len(files) > 1 or (args.block is None and len(structures_to_read(args.file)) > 1):
        return _constant_table(args, files)
    crystal, found = _ions_as_units(args, load_crystal(args))
    c = madelung_constants(crystal, tol=args.tol, method=args.method)
    if args.json:
        _print_json({"file": args.file, **c.as_dict(),
                     **({"polyatomic_ions": found.to_dict()} if found is not None else {})})
        return 0
    print(f"madelung constant  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    if found is not None:
        print(f"  polyatomic ions {found.summary()}: each one charge at its centre; r0 is measured to the "
              f"ion centres (--polyatomic-ions atoms: every atom a point charge)")
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
    if abs(c.r0_mean_first_shell - c.r0) > 1e-6 * c.r0:
        print(f"\n  with r0 = mean first-shell cation–anion distance {c.r0_mean_first_shell:.6f} Å "
              "(the choice behind tabulated values for uneven shells):")
        print(f"  {'charges_left_in':<16} {_fmt(c.charges_left_in_mean_first_shell, 10):>15}")
        if c.handbook_mean_first_shell is not None:
            print(f"  {'handbook':<16} {_fmt(c.handbook_mean_first_shell, 10):>15}")
    print(f"\n  estimated error of the constants {c.error_estimate:.1e}")
    print(f"  note        {MODEL_NOTE}")
    return 0


# ---------------------------------------------------------------- defects
def _frac(f):
    return "(" + ", ".join(f"{x:.4f}" for x in f) + ")"


def _series(text):
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--series {text!r} must be integers such as 1,2,3") from None


def _dielectric_from(args):
    from .analysis.defects import dielectric_tensor, read_dielectric_tensor

    if getattr(args, "dielectric_tensor", None):
        if args.dielectric is not None:
            raise InputError("give either --dielectric or --dielectric-tensor, not both")
        return read_dielectric_tensor(args.dielectric_tensor)
    if args.dielectric is not None:
        return dielectric_tensor(args.dielectric)
    return None


def _dielectric_options(parser):
    parser.add_argument("--dielectric", type=float, metavar="EPS", help="scalar dielectric constant")
    parser.add_argument("--dielectric-tensor", metavar="FILE",
                        help="text file with the dielectric tensor: 9 numbers (3 rows), 3 (diagonal) or 1")


def _supercell_options(parser):
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--supercell", metavar="NxMxK",
                       help="supercell repeats, e.g. 3x3x3 (or nine integers, the rows of a matrix)")
    group.add_argument("--min-length", type=float, metavar="Å",
                       help="the smallest near-cubic supercell whose lattice-plane spacings all reach this length")


def _eps_text(eps):
    if np.allclose(eps, eps[0, 0] * np.eye(3)):
        return f"{eps[0, 0]:g}"
    return "[" + "; ".join(" ".join(f"{x:g}" for x in row) for row in eps) + "]"


def _add_map(sub):
    parser = sub.add_parser("map", help="potential on a grid (cube file) and a plane heat map (PNG)",
                            description="Electrostatic potential on a regular grid over the cell, written as a "
                                        "Gaussian cube file, and a PNG heat map of one lattice plane with its ions "
                                        "marked. Ions are Gaussians of width --smearing (0: point ions).")
    _common(parser)
    parser.set_defaults(tol=1e-8)
    parser.add_argument("--grid", type=float, default=0.2, metavar="Å", help="grid step (default 0.2 Å)")
    parser.add_argument("--plane", default="001", metavar="HKL", help="lattice plane of the heat map (default 001)")
    parser.add_argument("--offset", type=float, default=0.5,
                        help="plane position: h*f1 + k*f2 + l*f3 = OFFSET (default 0.5)")
    parser.add_argument("--smearing", type=float, default=0.3, metavar="Å",
                        help="Gaussian width of the ions (default 0.3 Å; 0 = point ions, grid points on ions "
                             "then hold the site potential)")
    parser.add_argument("--output", metavar="PREFIX", help="output prefix (default: FILE name + '-potential')")
    _overwrite_option(parser)
    return parser


def _run_map(args):
    from .analysis.defects import plane_section, potential_grid, write_cube
    from .report.plots import write_plane_png

    prefix = args.output or os.path.splitext(os.path.basename(args.file))[0] + "-potential"
    cube, png = prefix + ".cube", prefix + ".png"
    _check_outputs(args, cube, png)
    crystal = load_crystal(args)
    grid = potential_grid(crystal, args.grid, smearing=args.smearing, tol=args.tol)
    section = plane_section(crystal, args.plane, args.offset, spacing=min(args.grid, 0.1),
                            smearing=args.smearing, tol=args.tol)
    write_with(cube, lambda temporary: write_cube(temporary, grid))
    title = f"{crystal.formula}: potential on ({args.plane}) at offset {args.offset:g}"
    write_with(png, lambda temporary: write_plane_png(temporary, section, title=title), binary=True)
    values = np.asarray(grid.values)
    if args.json:
        _print_json({"file": args.file, "cube_file": cube, "png_file": png, "grid_shape": list(grid.shape),
                     "grid_step_angstrom": grid.spacing, "smearing_angstrom": grid.smearing,
                     "potential_min_V": float(values.min()), "potential_max_V": float(values.max()),
                     "potential_mean_V": float(values.mean()), "error_estimate_V": grid.error_estimate,
                     "plane": list(section.miller), "offset": section.offset,
                     "plane_min_V": float(section.values.min()), "plane_max_V": float(section.values.max()),
                     "ions_in_plane": [{"label": a[2], "s": a[0], "t": a[1]} for a in section.atoms]})
        return 0
    n1, n2, n3 = grid.shape
    lines = [f"madelung map  {args.file}", *_structure_lines(crystal),
             f"  grid        {n1} x {n2} x {n3} points, step {', '.join(f'{x:.3f}' for x in grid.spacing)} Å; "
             + (f"ions as Gaussians of width {grid.smearing:g} Å" if grid.smearing else
                "point ions (grid points on ions hold the site potential)"),
             f"  potential   min {values.min():.4f} V, max {values.max():.4f} V, cell average {values.mean():.2e} V "
             "(Ewald convention: the average is zero)",
             f"  accuracy    estimated error {grid.error_estimate:.1e} V per value",
             f"  plane       ({' '.join(map(str, section.miller))}) at offset {section.offset:g}: "
             f"{section.values.min():.4f} .. {section.values.max():.4f} V, {len(section.atoms)} ions marked",
             f"  wrote       {cube} (Gaussian cube, values in V), {png}",
             f"  note        {MODEL_NOTE}"]
    print("\n".join(lines))
    return 0


def _add_interstitials(sub):
    parser = sub.add_parser("interstitials", help="candidate interstitial sites of a probe charge",
                            description="Local minima of a probe charge's energy (charge x potential plus a "
                                        "Born-Mayer contact term with ionic radii) on a grid, refined, filtered by "
                                        "a minimum distance to the ions and merged by symmetry.")
    _common(parser)
    parser.set_defaults(tol=1e-8)
    parser.add_argument("--probe", type=float, default=1.0, metavar="Q", help="probe charge in e (default +1)")
    parser.add_argument("--probe-radius", type=float, default=None, metavar="Å",
                        help="probe radius (default 0.76 Å, about Li+)")
    parser.add_argument("--radius", action="append", default=[], metavar="KEY=Å",
                        help="ion radius by element or site label (default: Shannon effective ionic radii)")
    parser.add_argument("--clearance", type=float, default=0.75,
                        help="keep candidates at least CLEARANCE x (R_ion + R_probe) from every ion (default 0.75)")
    parser.add_argument("--grid", type=float, default=0.2, metavar="Å", help="search-grid step (default 0.2 Å)")
    return parser


def _run_interstitials(args):
    from .analysis.defects import DEFAULT_PROBE_RADIUS, find_interstitials

    crystal = load_crystal(args)
    radii = {}
    for rule in args.radius:
        key, sep, value = str(rule).partition("=")
        try:
            radii[key.strip()] = float(value)
        except ValueError:
            sep = ""
        if not sep or not key.strip():
            raise InputError(f"radius {rule!r} must look like ELEMENT=Å or LABEL=Å, e.g. O=1.40")
    unknown = sorted(set(radii) - set(crystal.symbols) - set(crystal.labels))
    if unknown:
        raise InputError(f"{args.file}: radius given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    probe_radius = DEFAULT_PROBE_RADIUS if args.probe_radius is None else args.probe_radius
    search = find_interstitials(crystal, args.probe, spacing=args.grid, probe_radius=probe_radius, radii=radii,
                                clearance=args.clearance, tol=args.tol)
    rows = [{"fractional": s.fractional, "position_angstrom": s.position, "potential_V": s.potential,
             "electrostatic_energy_eV": s.electrostatic_energy, "contact_energy_eV": s.contact_energy,
             "total_energy_eV": s.total_energy, "nearest_ion": s.nearest_label,
             "nearest_distance_angstrom": s.nearest_distance, "multiplicity": s.multiplicity}
            for s in search.sites]
    if args.json:
        _print_json({"file": args.file, "probe_charge_e": search.probe, "probe_radius_angstrom": search.probe_radius,
                     "radii_angstrom": search.radii, "clearance": search.clearance,
                     "grid_shape": list(search.grid_shape), "grid_minima": search.grid_minima,
                     "rejected": search.rejected, "sites": rows, "error_estimate_V": search.error_estimate})
        return 0
    print(f"madelung interstitials  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    radii_text = ", ".join(f"{k} {v:.2f}" for k, v in search.radii.items())
    print(f"  probe       charge {search.probe:+g} e, radius {search.probe_radius:.2f} Å; ion radii (Å) {radii_text}")
    print(f"  search      grid {'x'.join(map(str, search.grid_shape))}, {search.grid_minima} grid minima, "
          f"{search.rejected} rejected (nearer than {search.clearance:g} x (R_ion + R_probe) to an ion, or not a "
          "minimum inside its refinement box)")
    print()
    print(f"  {'#':>3}  {'fractional position':<28} {'q*phi / eV':>11} {'contact / eV':>12} {'nearest ion':>14} "
          f"{'mult':>5}")
    for i, s in enumerate(search.sites, 1):
        print(f"  {i:>3}  {_frac(s.fractional):<28} {s.electrostatic_energy:>11.4f} {s.contact_energy:>12.4f} "
              f"{s.nearest_label + f' {s.nearest_distance:.3f} Å':>14} {s.multiplicity:>5}")
    if not search.sites:
        print("  no candidate site passed the filters: every empty site is a saddle of the probe's energy here "
              "(a larger --probe-radius stiffens the contact term)")
    print()
    print("  q*phi: probe charge times the crystal's potential (ranked by it, lowest first); contact: Born-Mayer "
          "term b exp((R_ion+R_probe-d)/rho), b = 0.211 eV, rho = 0.33 Å, which gives the minima (a bare point "
          "charge has no stable site, Earnshaw). Unrelaxed lattice.")
    print(f"  note        {MODEL_NOTE}")
    return 0


def _constant_table(args, files):
    """One row per file, or per data block of a file with several (unless --block picks one); failures
    are rows too, and the run goes on."""
    from .analysis.madelung_constants import madelung_constants
    from .io.read import structures_to_read

    chosen = args.block
    entries = [(path, block) for path in files
               for block in ([chosen] if chosen is not None else structures_to_read(path))]
    files = [path if block is None else f"{path}#{block}" for path, block in entries]
    rows = []
    for (path, block), name in zip(entries, files):
        args.file, args.block = path, block
        try:
            crystal, found = _ions_as_units(args, load_crystal(args))
            c = madelung_constants(crystal, tol=args.tol, method=args.method)
            rows.append({"file": name, "status": "ok", **c.as_dict(),
                         **({"polyatomic_ions": found.summary()} if found is not None else {})})
        except InputError as exc:
            rows.append({"file": name, "status": str(exc)})
    failed = sum(row["status"] != "ok" for row in rows)
    code = _batch_code(failed, len(rows), "files")
    if args.json:
        _print_json({"structures": rows, "failed": failed})
        return code()
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
    if any(row.get("polyatomic_ions") for row in rows):
        print("  polyatomic ions count as one charge at their centre (--polyatomic-ions atoms: every atom)")
    print(f"  {len(rows) - failed} done, {failed} failed")
    print(f"  note        {MODEL_NOTE}")
    return code()


def _batch_code(failed, total, what):
    """The exit code of a command over several inputs, as a function to call after printing:
    0 when all succeeded, else 2 with a summary line on stderr."""
    def code():
        if not failed:
            return 0
        print(f"madelung: {failed} of {total} {what} failed (messages above)", file=sys.stderr)
        return 2
    return code


# ---------------------------------------------------------------- screen
def _add_screen(sub):
    from .analysis.descriptors import SPECTRUM_LENGTH

    parser = sub.add_parser("screen", help="descriptors of many structures into one table",
                            description="Screen many structures: one row per structure (identifiers, status, "
                                        "timings, electrostatic descriptors) in a Parquet, CSV or JSON-lines table "
                                        "chosen by the ending of --out. Inputs are files, folders, globs or ASE "
                                        "databases. A structure that fails gets its message in the status column and "
                                        "the job goes on; the exit code is 0 when every structure succeeded, 2 when "
                                        "any failed (the table is written either way).")
    parser.add_argument("inputs", nargs="*", metavar="INPUT", help="structure files, folders, globs ('**' allowed) "
                                                                   "or ASE databases (*.db)")
    parser.add_argument("--out", required=True, metavar="TABLE", help="results table: .parquet, .csv or .jsonl")
    parser.add_argument("--db", metavar="FILE", help="ASE database (SQLite by default) to screen")
    parser.add_argument("--select", metavar="QUERY", help="ASE database selection, e.g. 'natoms<100'")
    parser.add_argument("--write-db", action="store_true",
                        help="store the results in the database rows as madelung_* key-value pairs")
    parser.add_argument("--sites", metavar="TABLE", help="also write one row per site to this table")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or a site label for every structure, e.g. O=-2 (repeat)")
    parser.add_argument("--tol", type=_tolerance, default=1e-8, metavar="TOL",
                        help="relative accuracy of every sum (default 1e-8)")
    parser.add_argument("--workers", type=int, metavar="N", help="worker processes (default: every core)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="run on this Dask distributed scheduler (e.g. tcp://10.0.0.5:8786) instead of the "
                             "local pool; needs pip install 'madelung[dask]'. The cluster must be trusted: "
                             "results come back by its serialisation, so a hostile worker can run code here")
    parser.add_argument("--timeout", type=float, metavar="S", help="seconds allowed per structure")
    parser.add_argument("--resume", action="store_true", help="keep rows already ok in --out, screen the rest")
    parser.add_argument("--overwrite", action="store_true",
                        help="replace an existing --out (and --sites) table instead of refusing it")
    parser.add_argument("--chunk", type=int, default=256, metavar="N", help="rows written at once, at least "
                                                                             "(default 256)")
    parser.add_argument("--spectrum-length", type=int, default=SPECTRUM_LENGTH, metavar="L",
                        help=f"padded length of the Ewald-sum-matrix spectrum (default {SPECTRUM_LENGTH})")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å)")
    parser.add_argument("--no-progress", action="store_true", help="no progress bar or progress lines")
    parser.add_argument("--json", action="store_true", help="print the summary as JSON")
    _structure_options(parser)
    return parser


def _run_screen(args):
    from .crystal import parse_charge_rules
    from .screen import screen

    if not args.inputs and not args.db:
        raise InputError("nothing to screen: give files, folders, globs or --db FILE")
    if args.workers is not None and args.workers < 1:
        raise InputError(f"--workers must be at least 1, got {args.workers}")
    if args.block is not None:
        raise InputError("--block picks one structure of one file; screen reads every data block of every file")
    summary = screen(args.inputs, args.out, db=args.db, select=args.select, charges=args.charges_from,
                     charge_rules=parse_charge_rules(args.charge), tol=args.tol, workers=args.workers,
                     scheduler=args.scheduler, timeout=args.timeout, resume=args.resume, sites=args.sites,
                     write_db=args.write_db, chunk_size=args.chunk, progress=not args.no_progress,
                     spectrum_length=args.spectrum_length, symprec=args.symprec, min_distance=args.min_distance,
                     max_atoms=args.max_atoms, occupancy=args.occupancy, allow_net_charge=args.allow_net_charge,
                     overwrite=args.overwrite)
    code = _batch_code(summary.failed, summary.ok + summary.failed, f"structures ({summary.out})")
    if args.json:
        _print_json(summary.as_dict())
        return code()
    for source, status in summary.failures[:10]:
        print(f"  failed  {status if source in status else f'{source}: {status}'}")
    if len(summary.failures) > 10:
        print(f"  ... and {summary.failed - 10} more failed rows (status column of {summary.out})")
    print(summary.line())
    return code()


# ---------------------------------------------------------------- demo
def _add_demo(sub):
    parser = sub.add_parser("demo", help="screen the bundled candidate coatings and plot them",
                            description="Screen the invented candidate structures in structures/demo/ (ternary "
                                        "oxides and halides on rock-salt, spinel and perovskite prototypes) on the "
                                        "local pool, write the table, print the ranked top rows and save a PNG "
                                        "scatter plot.")
    parser.add_argument("--out-dir", default="madelung-demo", metavar="DIR",
                        help="where the table and the plot go (default ./madelung-demo; created, its parent "
                             "folder must exist)")
    parser.add_argument("--parents", action="store_true", help="also create missing parent folders of --out-dir")
    _overwrite_option(parser)
    parser.add_argument("--workers", type=int, metavar="N", help="worker processes (default: every core)")
    parser.add_argument("--top", type=int, default=10, metavar="N", help="rows shown (default 10)")
    parser.add_argument("--json", action="store_true", help="print the ranked rows as JSON")
    return parser


def _run_demo(args):
    from .demo import run_demo

    result = run_demo(args.out_dir, workers=args.workers, top=args.top, progress=not args.json,
                      parents=args.parents, overwrite=args.overwrite)
    code = _batch_code(result.summary.failed, result.summary.ok + result.summary.failed, "demo structures")
    if args.json:
        _print_json(result.as_dict())
        return code()
    print(result.report())
    return code()


def _add_defect(sub):
    parser = sub.add_parser("defect", help="vacancy, substitution and interstitial electrostatics in a supercell",
                            description="Unrelaxed electrostatic energy change of point defects in a supercell, the "
                                        "change of the potential on the neighbouring sites and the Madelung-site-"
                                        "potential estimate. A charged defect is summed with a uniform neutralizing "
                                        "background unless you add a compensating defect yourself.")
    _common(parser)
    parser.add_argument("--vacancy", action="append", default=[], metavar="SITE",
                        help="empty a site: LABEL (its copy in the first cell), LABEL@x,y,z (copy nearest that "
                             "supercell fractional point) or #INDEX; repeat for several")
    parser.add_argument("--substitute", action="append", default=[], metavar="SITE=EL[:Q]",
                        help="replace the ion on SITE by element EL with charge Q, e.g. Mg1=Al:+3")
    parser.add_argument("--interstitial", action="append", default=[], metavar="x,y,z=EL[:Q]",
                        help="add an ion at fractional coordinates of the input cell, e.g. 0.5,0.5,0.5=Li")
    parser.add_argument("--rank-vacancies", metavar="SPECIES",
                        help="rank the inequivalent sites of anions, cations, an element or a label by vacancy "
                             "electrostatics instead")
    _supercell_options(parser)
    parser.add_argument("--neighbour-radius", type=float, default=3.5, metavar="Å",
                        help="report potential changes on sites within this distance (default 3.5 Å)")
    parser.add_argument("--series", metavar="N,N,...",
                        help="also repeat the supercell N times along each axis (e.g. 1,2,3) and check the 1/L "
                             "extrapolation of the energy change")
    _dielectric_options(parser)
    return parser


def _run_defect(args):
    from .analysis.defects import defect_energy, vacancy_ranking

    crystal = load_crystal(args)
    if args.rank_vacancies:
        if args.vacancy or args.substitute or args.interstitial:
            raise InputError("--rank-vacancies ranks single vacancies; give it without other defects")
        ranking = vacancy_ranking(crystal, args.rank_vacancies, supercell=args.supercell,
                                  min_length=args.min_length, tol=args.tol)
        return _print_ranking(args, crystal, ranking)
    eps = _dielectric_from(args)
    result = defect_energy(crystal, vacancy=args.vacancy, substitute=args.substitute, interstitial=args.interstitial,
                           supercell=args.supercell, min_length=args.min_length, tol=args.tol,
                           neighbour_radius=args.neighbour_radius, dielectric=eps)
    series = None
    if args.series:
        from .analysis.defects import defect_series

        series = defect_series(crystal, _series(args.series), supercell=args.supercell, min_length=args.min_length,
                               vacancy=args.vacancy, substitute=args.substitute, interstitial=args.interstitial,
                               tol=args.tol)
    sc = result.supercell
    background_text = ("uniform neutralizing background (the defects carry a net charge)" if result.background
                       else "none needed (the defects are neutral overall)")
    if args.json:
        _print_json({
            "file": args.file, "supercell": sc.describe(), "supercell_matrix": sc.matrix,
            "supercell_ions": len(sc.crystal), "supercell_volume_angstrom3": sc.crystal.volume,
            "defects": [{"kind": d.kind, "spec": d.spec, "label": d.label, "index": d.index,
                         "element_before": d.element_before, "element_after": d.element_after,
                         "charge_before_e": d.charge_before, "charge_after_e": d.charge_after,
                         "delta_charge_e": d.delta_charge, "position_angstrom": d.position,
                         "potential_V": d.potential, "madelung_estimate_eV": d.madelung_estimate}
                        for d in result.defects],
            "perfect_energy_eV": result.perfect_energy, "defective_energy_eV": result.defective_energy,
            "energy_change_eV": result.energy_change, "defect_charge_e": result.defect_charge,
            "charge_compensation": background_text, "madelung_estimate_eV": result.madelung_estimate,
            "defect_array_energy_eV": result.defect_array_energy, "identity_residual_eV": result.identity_residual,
            "image_correction_vacuum_eV": result.image_correction,
            "energy_change_plus_image_correction_eV": result.energy_change + result.image_correction,
            "dielectric_correction_eV": None if result.dielectric_correction is None
            else result.dielectric_correction.energy,
            "neighbours": [{"index": n.index, "label": n.label, "distance_angstrom": n.distance,
                            "potential_before_V": n.potential_before, "potential_after_V": n.potential_after,
                            "change_V": n.change} for n in result.neighbours],
            "error_estimate_eV": result.error_estimate,
            "series": None if series is None else {
                "repeats": list(series.repeats), "lengths_angstrom": series.lengths,
                "energy_changes_eV": series.energy_changes, "corrected_eV": series.corrected,
                "fit_dilute_limit_eV": series.dilute_limit, "fit_slope_eV_angstrom": series.slope},
            "sign_convention": "energy change = E(defective supercell) - E(perfect supercell); removed ions go to "
                               "infinity, added ions come from infinity",
        })
        return 0
    lines = [f"madelung defect  {args.file}", *_structure_lines(crystal),
             f"  supercell   {sc.describe()} ({sc.size} cells, {len(sc.crystal)} ions, "
             f"{sc.crystal.volume:.2f} Å^3, L = V^(1/3) = {sc.crystal.volume ** (1 / 3):.3f} Å)", ""]
    lines.append(f"  {'defect':<22} {'site':<8} {'q before':>9} {'q after':>8} {'Dq':>6} {'phi / V':>11} "
                 f"{'Dq*phi / eV':>12}")
    for d in result.defects:
        what = {"vacancy": f"vacancy {d.spec}", "substitution": f"subst. {d.spec}",
                "interstitial": f"interst. {d.spec}"}[d.kind]
        lines.append(f"  {what:<22} {d.label or '-':<8} {d.charge_before:>+9.3f} {d.charge_after:>+8.3f} "
                     f"{d.delta_charge:>+6.2f} {d.potential:>11.5f} {d.madelung_estimate:>12.5f}")
    lines += ["",
              "  energies (eV; change = E(defective) - E(perfect), removed ions to infinity, unrelaxed)",
              f"      supercell energy change             {result.energy_change:14.6f}",
              f"      Madelung-site-potential estimate    {result.madelung_estimate:14.6f}   (sum Dq*phi, dilute limit)",
              f"      defect-charge array term            {result.defect_array_energy:14.6f}   "
              "(images + mutual interaction + background)",
              f"      check: change - estimate - array    {result.identity_residual:14.2e}",
              f"  compensation {background_text}; net defect charge {result.defect_charge:+g} e"]
    if abs(result.defect_charge) > 0:
        lines.append(f"      image correction, eps = 1           {result.image_correction:14.6f}   "
                     f"(change + correction = {result.energy_change + result.image_correction:.6f})")
    if result.dielectric_correction is not None:
        dc = result.dielectric_correction
        lines.append(f"      image correction, screened          {dc.energy:14.6f}   "
                     f"(eps = {_eps_text(dc.dielectric)}; for a screened calculation of this supercell)")
    if series is not None:
        lines += ["", "  1/L check: the same defects in n x the supercell",
                  f"  {'n':>3} {'L / Å':>9} {'change / eV':>14} {'+ image corr. / eV':>19}"]
        for n, length, change, corr in zip(series.repeats, series.lengths, series.energy_changes, series.corrected):
            lines.append(f"  {n:>3} {length:>9.3f} {change:>14.6f} {corr:>19.6f}")
        lines.append(f"  fit change = E_dilute + a/L: E_dilute = {series.dilute_limit:.6f} eV (Madelung estimate "
                     f"{series.madelung_estimate:.6f} eV), a = {series.slope:.4f} eV Å")
    if result.neighbours:
        lines += ["", f"  potential change on sites within {args.neighbour_radius:g} Å of a defect",
                  f"  {'#':>6}  {'label':<8} {'distance / Å':>12} {'phi before / V':>15} {'phi after / V':>14} "
                  f"{'change / V':>11}"]
        for n in result.neighbours:
            lines.append(f"  {n.index:>6}  {n.label:<8} {n.distance:>12.4f} {n.potential_before:>15.5f} "
                         f"{n.potential_after:>14.5f} {n.change:>11.5f}")
    lines += [f"  accuracy    estimated error {result.error_estimate:.1e} eV", f"  note        {MODEL_NOTE}"]
    print("\n".join(lines))
    return 0


def _print_ranking(args, crystal, ranking):
    if args.json:
        _print_json({"file": args.file, "species": ranking.species,
                     "supercell": None if ranking.supercell is None else ranking.supercell.describe(),
                     "sites": [{"label": r.label, "element": r.element, "charge_e": r.charge, "index": r.index,
                                "multiplicity": r.multiplicity, "potential_V": r.potential,
                                "madelung_estimate_eV": r.madelung_estimate,
                                "supercell_energy_change_eV": r.supercell_energy,
                                "image_term_eV": r.image_term} for r in ranking.rows],
                     "ranking": "lowest Madelung-site-potential estimate -q*phi first"})
        return 0
    lines = [f"madelung defect --rank-vacancies {ranking.species}  {args.file}", *_structure_lines(crystal), ""]
    head = f"  {'rank':>4}  {'site':<8} {'charge':>7} {'mult':>5} {'phi / V':>11} {'-q*phi / eV':>12}"
    if ranking.supercell is not None:
        head += f" {'supercell / eV':>15} {'image / eV':>11}"
    lines.append(head)
    for i, r in enumerate(ranking.rows, 1):
        line = (f"  {i:>4}  {r.label:<8} {r.charge:>+7.2f} {r.multiplicity:>5} {r.potential:>11.5f} "
                f"{r.madelung_estimate:>12.5f}")
        if r.supercell_energy is not None:
            line += f" {r.supercell_energy:>15.5f} {r.image_term:>11.5f}"
        lines.append(line)
    lines.append("")
    lines.append("  -q*phi: Madelung-site-potential estimate of the unrelaxed vacancy energy (ion removed to "
                 "infinity, dilute limit); lowest first.")
    if ranking.supercell is not None:
        lines.append(f"  supercell {ranking.supercell.describe()}: direct energy change with a neutralizing "
                     "background = -q*phi + image term (the lone-charge Ewald energy).")
    lines.append(f"  note        {MODEL_NOTE}")
    print("\n".join(lines))
    return 0


def _add_correction(sub):
    parser = sub.add_parser("correction", help="charged-supercell image correction with a dielectric constant or tensor",
                            description="Point-charge image correction of a defect of charge q in a periodic "
                                        "supercell, screened by a scalar dielectric constant or a full 3x3 tensor "
                                        "(anisotropic Ewald sum), with its 1/L check over a series of supercells.")
    parser.add_argument("file", metavar="FILE", nargs="?",
                        help="structure file whose cell is used (optional; or give --cell)")
    parser.add_argument("--cell", metavar="SPEC",
                        help="the cell instead of a file: L (cube), a,b,c, a,b,c,alpha,beta,gamma, nine numbers, "
                             "or bcc:L / fcc:L (primitive cells of the cubic lattice constant L)")
    parser.add_argument("--charge", type=float, required=True, metavar="Q", help="defect charge in e")
    _dielectric_options(parser)
    _supercell_options(parser)
    parser.add_argument("--series", default="1,2,3,4", metavar="N,N,...",
                        help="repeats of the supercell for the 1/L check (default 1,2,3,4)")
    parser.add_argument("--tol", type=_tolerance, default=1e-10, help="relative accuracy of the lattice sum")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    return parser


def parse_cell(text):
    """A cell from a command-line spec (see ``madelung correction --help``)."""
    from ase.geometry import cellpar_to_cell

    text = str(text).strip().lower()
    kind = None
    if ":" in text:
        kind, _, text = text.partition(":")
    try:
        values = [float(x) for x in re.split(r"[,\s]+", text) if x]
    except ValueError:
        raise InputError(f"cell {text!r} must be numbers (Å, degrees)") from None
    if not values or not all(math.isfinite(v) for v in values):
        raise InputError(f"cell {text!r} must be finite numbers")
    if kind is not None:
        if kind not in ("sc", "bcc", "fcc") or len(values) != 1:
            raise InputError(f"cell {kind}:{text} must be sc:L, bcc:L or fcc:L")
        length = values[0]
        shape = {"sc": np.eye(3), "bcc": 0.5 * (np.ones((3, 3)) - 2 * np.eye(3)),
                 "fcc": 0.5 * (np.ones((3, 3)) - np.eye(3))}[kind]
        return length * shape
    if len(values) == 1:
        return values[0] * np.eye(3)
    if len(values) == 3:
        return np.diag(values)
    if len(values) == 6:
        return np.array(cellpar_to_cell(values))
    if len(values) == 9:
        return np.array(values).reshape(3, 3)
    raise InputError(f"cell spec has {len(values)} numbers; give 1, 3, 6 or 9")


def _run_correction(args):
    from .io.read import read_structure
    from .analysis.defects import charged_cell_correction, correction_series, make_supercell, parse_supercell

    if (args.file is None) == (args.cell is None):
        raise InputError("give a structure file or --cell (one of them)")
    if args.file is not None:
        cell = np.array(read_structure(args.file).cell)
        source = args.file
    else:
        cell = parse_cell(args.cell)
        source = f"--cell {args.cell}"
    if args.supercell is not None:
        cell = parse_supercell(args.supercell) @ cell
    elif args.min_length is not None:
        from .crystal import Crystal

        cell = make_supercell(Crystal(cell, [[0, 0, 0]], [1.0]), min_length=args.min_length).crystal.cell
    eps = _dielectric_from(args)
    if eps is None:
        eps = np.eye(3)
    main = charged_cell_correction(cell, args.charge, eps, tol=args.tol)
    series = correction_series(cell, args.charge, eps, _series(args.series), tol=args.tol)
    values = np.linalg.eigvalsh(eps)
    if args.json:
        _print_json({"cell_source": source, "cell_angstrom": cell, "volume_angstrom3": abs(np.linalg.det(cell)),
                     "charge_e": args.charge, "dielectric": eps, "dielectric_eigenvalues": values,
                     "correction_eV": main.energy, "madelung_potential_V": main.madelung_potential,
                     "effective_constant": main.effective_constant, "error_estimate_eV": main.error_estimate,
                     "alpha_per_angstrom": main.alpha, "real_terms": main.real_terms, "k_vectors": main.k_vectors,
                     "series": [{"repeat": n, "length_angstrom": c.length, "correction_eV": c.energy,
                                 "energy_times_length_eV_angstrom": c.energy * c.length}
                                for n, c in zip(series.repeats, series.corrections)],
                     "fit_slope_eV_angstrom": series.slope, "fit_intercept_eV": series.intercept,
                     "relative_spread_of_E_times_L": series.spread,
                     "sign_convention": "add the correction to the energy of the charged supercell"})
        return 0
    lengths = np.linalg.norm(cell, axis=1)
    lines = [f"madelung correction  {source}",
             f"  cell        |a| {lengths[0]:.4f}, |b| {lengths[1]:.4f}, |c| {lengths[2]:.4f} Å; volume "
             f"{abs(np.linalg.det(cell)):.3f} Å^3; L = V^(1/3) = {main.length:.4f} Å",
             f"  dielectric  {_eps_text(eps)} (eigenvalues {', '.join(f'{v:.4g}' for v in values)})",
             f"  charge      {args.charge:+g} e",
             "",
             f"  image correction      {main.energy:14.6f} eV   (add to the charged-supercell energy)",
             f"  Madelung potential    {main.madelung_potential:14.6f} V    (screened point-charge array with background, "
             "own charge left out)",
             f"  2 L E / (k_e q^2)     {main.effective_constant:14.6f}      (alpha_M / eps for a simple cube)",
             f"  accuracy    estimated error {main.error_estimate:.1e} eV; alpha {main.alpha:.4f} 1/Å, "
             f"{main.real_terms} real-space and {main.k_vectors} reciprocal terms",
             "",
             "  1/L check over supercells n x cell",
             f"  {'n':>3} {'L / Å':>10} {'E / eV':>14} {'E*L / eV Å':>14}"]
    for n, c in zip(series.repeats, series.corrections):
        lines.append(f"  {n:>3} {c.length:>10.4f} {c.energy:>14.8f} {c.energy * c.length:>14.8f}")
    lines += [f"  fit E = a/L + c: a = {series.slope:.8f} eV Å, c = {series.intercept:.2e} eV; "
              f"E*L spread {series.spread:.1e} (a point-charge image energy falls exactly as 1/L)",
              "  model: point-charge image term only (no quadrupole or potential-alignment terms); the "
              "correction is a model estimate."]
    print("\n".join(lines))
    return 0


# ---------------------------------------------------------------- lattice energies
LATTICE_SIGN = ("lattice energy = positive energy to separate the solid into gaseous ions (handbook sign); "
                "Coulomb and short-range energies are signed sums")
RIGID_ION_NOTE = ("Rigid-ion model: formal point charges plus fitted short-range terms; no polarisation, "
                  "covalency, zero-point or thermal energy. Results are model estimates.")


def _parse_pairs(rules, what, number=True):
    """``KEY=VALUE`` options into a dict (values as floats unless ``number`` is False)."""
    from .crystal import parse_key_values

    return parse_key_values(rules, what, number=number)


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
    _overwrite_option(parser)
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or site label for every file, e.g. Na=+1")
    parser.add_argument("--tol", type=_tolerance, default=1e-10, metavar="TOL", help="Ewald accuracy (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å", help=argparse.SUPPRESS)
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    return parser


def _run_fit(args):
    from .analysis.fitting import FitTarget, fit_repulsion

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
        _print_json({"output": args.output, "form": args.form,
                     "parameters": [{"pairs": ["-".join(p) for p in x.pairs], "name": x.name, "value": x.value,
                                     "uncertainty": x.uncertainty, "role": x.role} for x in result.parameters],
                     "residuals": result.model.info["residuals"], "chi_square": result.chi_square,
                     "degrees_of_freedom": result.degrees_of_freedom, "evaluations": result.evaluations,
                     "message": result.message})
        return 0
    from .sums.shortrange import PARAMETER_UNITS

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
    parser.add_argument("--tol", type=_tolerance, default=1e-10, help=argparse.SUPPRESS)
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
    from .analysis.thermochemistry import born_haber_cycle, read_cycle_file

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
        from .analysis.lattice_energy import lattice_energy

        crystal = _crystal_from(args.structure, args)
        if args.repulsion:
            result = lattice_energy(crystal, args.repulsion, tol=args.tol)
            model = result.lattice_energy_kj_per_mol
            forms = result.closed_forms
        else:
            from .analysis.lattice_energy import closed_forms

            forms = closed_forms(crystal, None, tol=args.tol)
        if forms is not None and forms.kapustinskii is not None:
            kapustinskii = forms.kapustinskii * EV_TO_KJ_PER_MOL
    elif args.repulsion:
        raise InputError("cycle: --repulsion needs --structure FILE for the model lattice energy")
    if kapustinskii is None:
        from .elements import shannon_radius
        from .analysis.lattice_energy import kapustinskii_energy

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
    from .analysis.calculator import relax

    output = args.output or os.path.splitext(os.path.basename(args.file))[0] + "-relaxed.cif"
    _check_outputs(args, output)
    crystal = load_crystal(args)
    result = relax(crystal, args.repulsion, cell=not args.positions_only, fmax=args.fmax, steps=args.steps,
                   tol=args.tol)
    if not result.converged and not args.write_unconverged:
        raise InputError(f"{args.file}: the relaxation did not converge in {result.steps} steps (fmax {args.fmax:g} "
                         f"eV/Å); nothing written (raise --steps, loosen --fmax, or pass --write-unconverged)")
    _write_structure(output, result.atoms, crystal)
    if not result.converged:
        raise InputError(f"{args.file}: the relaxation did not converge in {result.steps} steps (fmax {args.fmax:g} "
                         f"eV/Å); last structure written to {output}")
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
    _overwrite_option(parser)
    return parser


def _run_eos(args):
    from .analysis.equation_of_state import equation_of_state

    _check_outputs(args, args.plot)
    crystal = load_crystal(args)
    eos = equation_of_state(crystal, args.repulsion, span=args.span, points=args.points, tol=args.tol)
    if args.plot:
        write_with(args.plot, eos.plot, binary=True)
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


# ---------------------------------------------------------------- polyatomic ions
POLYATOMIC_CHOICES = ("centre", "formal", "equilibrated", "atoms")


def _polyatomic_option(parser):
    parser.add_argument("--polyatomic-ions", choices=POLYATOMIC_CHOICES, default="centre",
                        help="how polyatomic ions (carbonate, sulfate, nitrate, ammonium, hydroxide, ...) are "
                             "treated: found and summed as ions, with the whole charge at the ion's centre "
                             "(centre, default), spread over its atoms by formal states (formal) or by charge "
                             "equilibration within the ion (equilibrated); energies are then inter-ion energies "
                             "and Madelung constants take one charge per ion. 'atoms': no detection, every atom "
                             "a point charge")


def _polyatomic_ions(args, crystal):
    """The polyatomic ions of the crystal, or None when there are none or the user asked for atoms."""
    from .charges.polyatomic import find_polyatomic_ions

    if getattr(args, "polyatomic_ions", "atoms") == "atoms":
        return None
    found = find_polyatomic_ions(crystal)
    return found if found.found else None


def _ions_as_units(args, crystal):
    """(crystal with one charge per polyatomic ion, ions found) or (crystal, None) without ions."""
    from .charges.polyatomic import centred_crystal

    found = _polyatomic_ions(args, crystal)
    return (crystal, None) if found is None else (centred_crystal(crystal, found), found)


RULE_TEXT = {"centre": "whole charge at the ion's centre", "formal": "spread over its atoms by formal states",
             "equilibrated": "spread over its atoms by charge equilibration within the ion"}


def _volume_based(crystal, found=None):
    from .analysis.volume_based import volume_based_energies

    return volume_based_energies(crystal, found)


def _volume_based_lines(vb, kapustinskii=True):
    fit = (f"alpha {vb.coefficients[0]}, beta {vb.coefficients[1]}" if vb.coefficients[1] is not None
           else f"A {vb.coefficients[0]}")
    lines = [f"      volume-based   {vb.volume_based:10.2f}   Glasser–Jenkins, V_m {vb.volume_per_formula_unit:.3f} Å^3, "
             f"I = {vb.ionic_strength:g}, {vb.salt_type} fit ({fit})"]
    if kapustinskii and vb.kapustinskii is not None:
        radii = ", ".join(f"{ion} {r:.3f} Å" for ion, r in vb.radii.items())
        lines.append(f"      Kapustinskii   {vb.kapustinskii:10.2f}   with thermochemical radii of polyatomic ions: "
                     f"{radii}")
    lines += [f"      ({note})" for note in vb.notes]
    return lines


def _run_energy_with_ions(args, crystal, found):
    """The energy report for a crystal holding polyatomic ions: inter-ion energies and lattice-energy estimates."""
    from .charges.polyatomic import centred_crystal, interionic_energy
    from .analysis.lattice_energy import closed_forms

    for flag, name in ((args.forces, "--forces"), (args.stress, "--stress"), (args.repulsion, "--repulsion")):
        if flag:
            raise InputError(f"{args.file}: {name} is not available with polyatomic ions treated as ions "
                             f"({found.summary()}); add --polyatomic-ions atoms to sum every atom as a point charge")
    rule = args.polyatomic_ions
    result = interionic_energy(crystal, rule, tol=args.tol, method=args.method, found=found)
    centred = centred_crystal(crystal, found)
    forms = closed_forms(centred, tol=args.tol)
    vb = _volume_based(crystal, found)
    z = result.formula_units
    if args.json:
        born_mayer = None if forms.born_mayer is None else forms.born_mayer * EV_TO_KJ_PER_MOL
        _print_json({"file": args.file, "formula": result.formula, "formula_units": z, "n_atoms": len(crystal),
                     "volume_angstrom3": crystal.volume, **result.to_dict(),
                     "lattice_energy_estimates_kJ_per_mol": {
                         "born_mayer": born_mayer, "madelung_constant_handbook": forms.madelung_constant,
                         "r0_angstrom": forms.r0, "rho_angstrom": forms.rho,
                         "volume_based": vb.to_dict(), "kapustinskii_thermochemical_radii": vb.kapustinskii}})
        return 0
    per_fu = result.per_formula_unit
    lines = [f"madelung energy  {args.file}", *_structure_lines(crystal),
             f"  polyatomic ions {found.summary()}; charge of each ion: {RULE_TEXT[rule]}",
             f"  electrostatic energy between ions (signed; formula unit {result.formula}, Z = {z})",
             f"      Ewald sum of the charges as placed   {result.total:16.8f} eV per cell",
             f"      internal energy of the ions          {result.internal:16.8f} eV per cell (removed)",
             f"      inter-ion energy                     {result.interionic:16.8f} eV per cell",
             f"      per formula unit                     {per_fu:16.8f} eV  = {per_fu * EV_TO_KJ_PER_MOL:12.3f} kJ/mol",
             f"  accuracy    estimated error {result.error_estimate:.2e} eV (tol {args.tol:.1e})",
             f"  lattice-energy estimates (positive, kJ/mol per {result.formula})"]
    if forms.born_mayer is not None:
        lines.append(f"      Born–Mayer     {forms.born_mayer * EV_TO_KJ_PER_MOL:10.2f}   Madelung constant (handbook) "
                     f"{forms.madelung_constant:.6f} with one charge per ion, r0 {forms.r0:.4f} Å to the ion "
                     f"centres, rho {forms.rho_source}")
    else:
        lines.append(f"      Born–Mayer     not applicable: {forms.notes.get('born_mayer', '')}")
    lines.extend(_volume_based_lines(vb))
    lines.append(f"  note        {result.note}; lattice energies likewise exclude them")
    lines.append("  note        polyatomic ions were found and treated as ions (default); "
                 "--polyatomic-ions atoms sums every atom as a point charge")
    lines += [f"  note        {g.formula} (sites {', '.join(crystal.labels[i] for i in g.members[:4])}"
              f"{' ...' if len(g.members) > 4 else ''}): {g.note}" for g in found.unrecognised[:5]]
    lines += [f"  note        {n}" for n in found.notes[:5]]
    lines.append(f"  note        {MODEL_NOTE}")
    print("\n".join(lines))
    return 0


# ---------------------------------------------------------------- embed
def _add_embed(sub):
    parser = sub.add_parser("embed", help="a cluster and a fitted point-charge field for embedded-cluster calculations",
                            description="Cut a cluster of whole ions around a site or point and surround it with point "
                                        "charges out to a field radius; the charges of the outermost layer are fitted "
                                        "(zero total charge and dipole) so that the potential inside the cluster "
                                        "matches the periodic crystal's. Writes " + ", ".join(EMBEDDING_FILES.values())
                                        + " into the output folder, centre at the origin (Å, e).")
    parser.add_argument("file", metavar="FILE", help="structure file: CIF, POSCAR, extended XYZ, ... (read by ASE)")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an element or a site label, e.g. Na=+1 or O1=-2 (repeat as needed)")
    parser.add_argument("--center", required=True, metavar="SITE",
                        help="centre of the cluster: a site label (its first site), #INDEX, or fractional "
                             "coordinates x,y,z")
    parser.add_argument("--cluster-radius", type=float, required=True, metavar="Å",
                        help="ions whose centre lies within this distance form the cluster")
    parser.add_argument("--field-radius", type=float, required=True, metavar="Å",
                        help="point charges stand for every ion out to this distance")
    parser.add_argument("--fitted-thickness", type=float, metavar="Å",
                        help="thickness of the outer layer of fitted charges (default: the larger of 3 Å and twice "
                             "the shortest cation-anion distance)")
    parser.add_argument("--grid-spacing", type=float, metavar="Å",
                        help="step of the grid of fitting points in the cluster (default: about 1200 points)")
    parser.add_argument("--offset", choices=EMBEDDING_OFFSETS, default="ewald",
                        help="match the periodic potential's values in the Ewald convention (ewald, default) or up "
                             "to a fitted constant (free)")
    parser.add_argument("--out", required=True, metavar="DIR", help="output folder (created if needed)")
    parser.add_argument("--overwrite", action="store_true", help="replace files of an earlier run in the folder")
    parser.add_argument("--tol", type=float, default=1e-10, metavar="TOL",
                        help="accuracy of the periodic potentials, relative to k_e*sum(q^2)/d_min (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å; 0 switches the check off)")
    parser.add_argument("--cell", choices=("input", "primitive", "conventional"), default="input",
                        help="use the cell as read (default) or spglib's standardized cell")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    _structure_options(parser)
    return parser


def _run_embed(args):
    check_output_folder(args.out, args.overwrite)
    crystal = load_crystal(args)
    result = embedding(crystal, args.center, args.cluster_radius, args.field_radius,
                       fitted_thickness=args.fitted_thickness, grid_spacing=args.grid_spacing, offset=args.offset,
                       tol=args.tol)
    paths = write_embedding(result, args.out, overwrite=args.overwrite)
    if args.json:
        data = result.to_dict()
        for key in ("charge_positions_angstrom", "charges_e", "formal_charges_e", "fitted", "charge_labels"):
            data.pop(key)  # the full lists are in the files
        _print_json({"file": args.file, **data, "files": paths})
        return 0
    print(embedding_report(result))
    print(f"  wrote             {', '.join(paths.values())}")
    return 0


# ---------------------------------------------------------------- orderings
def _add_orderings(sub):
    from .analysis.orderings import DEFAULT_MAX_DISTINCT
    from .crystal import DEFAULT_MAX_ATOMS
    from .symmetry import DEFAULT_SYMPREC

    parser = sub.add_parser("orderings", help="rank the orderings of mixed or partly occupied sites by energy",
                            description="Place the ions of the mixed or partly occupied sites (and the vacancies) "
                                        "in every symmetry-distinct way in a supercell, or search for the lowest "
                                        "ways when there are too many, and rank them by electrostatic energy. "
                                        "Writes the kept orderings as CIF files with oxidation states and the "
                                        "energy of every distinct ordering as a table. Point charges on the "
                                        "unrelaxed lattice: a first filter, not a phase diagram.")
    parser.add_argument("file", metavar="FILE", help="structure file with mixed or partly occupied sites (CIF)")
    parser.add_argument("--supercell", default="1", metavar="NxMxK",
                        help="supercell repeats, e.g. 2x2x1 (or nine integers, the rows of a matrix); default 1")
    parser.add_argument("--keep", type=int, default=20, metavar="N", help="orderings written as CIF (default 20)")
    parser.add_argument("--out", required=True, metavar="DIR", help="folder for the CIF files and the energy table")
    parser.add_argument("--overwrite", action="store_true", help="allow writing into a folder that holds files")
    parser.add_argument("--table", choices=("parquet", "csv"), default="parquet",
                        help="format of the table of all energies (default parquet)")
    parser.add_argument("--strategy", choices=("auto", "enumeration", "search"), default="auto",
                        help="enumerate every ordering, search by simulated annealing, or enumerate when there are "
                             "at most --max-distinct symmetry-distinct orderings (auto, default)")
    parser.add_argument("--max-distinct", type=int, default=DEFAULT_MAX_DISTINCT, metavar="N",
                        help="largest number of symmetry-distinct orderings to enumerate "
                             f"(default {DEFAULT_MAX_DISTINCT:.0e})")
    parser.add_argument("--restarts", type=int, default=8, metavar="N", help="independent annealing runs (default 8)")
    parser.add_argument("--sweeps", type=int, default=50, metavar="N",
                        help="attempted swaps per site at each annealing temperature (default 50)")
    parser.add_argument("--seed", type=int, default=0, metavar="N", help="random seed of the search (default 0)")
    parser.add_argument("--workers", type=int, default=1, metavar="N", help="worker processes (default 1)")
    parser.add_argument("--scheduler", metavar="ADDRESS", help="run the chunks on this Dask scheduler instead")
    parser.add_argument("--background", action="store_true",
                        help="allow a net charge, summed with a uniform neutralizing background")
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[],
                        help="charge of an ion by element (or site label), e.g. Li=+1 or Mg=+2 (repeat as needed)")
    parser.add_argument("--charges-from", choices=("file", "auto", "equilibrate"), default="file",
                        help="where charges come from: the file (default), assigned oxidation states (auto) or "
                             "charge equilibration")
    parser.add_argument("--tol", type=float, default=1e-10, metavar="TOL",
                        help="accuracy of the Coulomb matrix, relative to k_e*sum(q^2)/d_min (default 1e-10)")
    parser.add_argument("--min-distance", type=float, default=0.5, metavar="Å",
                        help="refuse ions closer than this (default 0.5 Å)")
    parser.add_argument("--max-atoms", type=int, default=DEFAULT_MAX_ATOMS, metavar="N",
                        help=f"refuse structures with more sites than this (default {DEFAULT_MAX_ATOMS})")
    parser.add_argument("--symprec", type=float, default=DEFAULT_SYMPREC, metavar="Å",
                        help=f"symmetry tolerance (default {DEFAULT_SYMPREC:g} Å)")
    parser.add_argument("--json", action="store_true", help="print JSON instead of a report")
    return parser


def _ion_charges_of(args, crystal):
    """Per site, the charge of each of its species, as the loader decided them (the file's states and
    the rules, or the assignment); None after charge equilibration (partial charges: each ion's charge
    only where a site holds one species)."""
    if args.charges_from == "equilibrate":
        return None
    return [crystal.states_of(i) for i in range(len(crystal))]


def _run_orderings(args):
    from .analysis.ordering_output import check_output_folder, write_ranking
    from .analysis.orderings import rank_orderings
    from .crystal import parse_charge_rules
    from .io.read import load

    check_output_folder(args.out, args.overwrite)
    if args.keep < 1:
        raise InputError(f"--keep must be a positive whole number, got {args.keep}")
    rules = parse_charge_rules(args.charge)
    _structure_defaults(args)
    options = {**_crystal_options(args), "allow_net_charge": args.background}
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*virtual-crystal average.*")  # the point of this command
        crystal = load(args.file, args.charges_from, rules=rules, **options).crystal
    ranking = rank_orderings(crystal, args.supercell, keep=args.keep,
                             ion_charges=_ion_charges_of(args, crystal), method=args.strategy,
                             max_distinct=args.max_distinct, restarts=args.restarts, sweeps=args.sweeps,
                             seed=args.seed, workers=args.workers, scheduler=args.scheduler,
                             background=args.background, tol=args.tol, symprec=args.symprec)
    files = write_ranking(ranking, args.out, table_format=args.table, overwrite=args.overwrite)
    if args.json:
        _print_json({**ranking.to_dict(), "files": files})
        return 0
    exact = ranking.method == "enumeration"
    print(f"madelung orderings  {args.file}   {ranking.formula} x {ranking.formula_units} in a {ranking.supercell} "
          f"supercell, {ranking.sites} disordered sites")
    for line in ranking.sublattices:
        print(f"  sublattice  {line}")
    print(f"  orderings   {ranking.total_orderings} in all, {ranking.distinct_orderings} symmetry-distinct "
          f"(Burnside, {ranking.symmetry_operations} site permutations)")
    if exact:
        print(f"  enumerated  {ranking.enumerated_distinct} distinct orderings "
              f"({'equal to' if ranking.enumerated_distinct == ranking.distinct_orderings else 'DIFFERENT FROM'} "
              f"Burnside's count) in {ranking.seconds:.2f} s; energies computed for {ranking.candidates_visited}, "
              "the rest skipped as copies of orderings already counted")
    else:
        print(f"  search      simulated annealing, {args.restarts} restarts, {ranking.candidates_visited} swaps tried, "
              f"{ranking.enumerated_distinct} distinct orderings found in {ranking.seconds:.2f} s; a search, not a "
              "proof: a lower ordering may exist")
    print(f"\n  {'rank':>4}  {'above lowest':>14}  {'energy':>14}  {'degeneracy':>10}  space group")
    print(f"  {'':>4}  {'meV/f.u.':>14}  {'eV/f.u.':>14}  {'':>10}")
    for o in ranking.orderings:
        print(f"  {o.rank:>4}  {1000 * o.energy_above_lowest:>14.3f}  {o.energy_per_formula_unit:>14.6f}  "
              f"{o.degeneracy:>10}  {o.space_group}")
    print(f"\n  energy      signed electrostatic (Ewald) energy per formula unit {ranking.formula}")
    print(f"  files       {len(files['cif'])} CIF files with oxidation states and {files['table']} in {args.out}")
    print(f"  note        {ranking.NOTE}")
    return 0


# ---------------------------------------------------------------- main
# ---------------------------------------------------------------- compile
def _add_compile(sub):
    parser = sub.add_parser("compile", help="compile every numerical kernel now, into the on-disk cache",
                            description="Run each engine once on a two-ion cell so that every numerical kernel "
                                        "is compiled and cached before the first real job (about a minute on a "
                                        "new machine; a second or two once cached). For cluster images, "
                                        "containers and CI.")
    parser.add_argument("--json", action="store_true", help="print the steps and their times as JSON")
    return parser


def _run_compile(args):
    from .precompile import compile_kernels

    def progress(index, count, name):
        if not args.json:
            print(f"  [{index + 1}/{count}] compiling {name} ...", flush=True)

    result = compile_kernels(progress)
    if args.json:
        _print_json(result.to_dict())
        return 0
    print(f"compiled and cached in {result.total_seconds:.1f} s")
    return 0


COMMANDS = {
    "energy": (_add_energy, _run_energy),
    "sites": (_add_sites, _run_sites),
    "charges": (_add_charges, _run_charges),
    "constant": (_add_constant, _run_constant),
    "screen": (_add_screen, _run_screen),
    "demo": (_add_demo, _run_demo),
    "map": (_add_map, _run_map),
    "interstitials": (_add_interstitials, _run_interstitials),
    "defect": (_add_defect, _run_defect),
    "correction": (_add_correction, _run_correction),
    "fit": (_add_fit, _run_fit),
    "cycle": (_add_cycle, _run_cycle),
    "relax": (_add_relax, _run_relax),
    "eos": (_add_eos, _run_eos),
    "embed": (_add_embed, _run_embed),
    "orderings": (_add_orderings, _run_orderings),
    "compile": (_add_compile, _run_compile),
}


def build_parser():
    parser = _Parser(prog="madelung", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="Units: Å, e, eV, V; kJ/mol per formula unit. Exit codes: 0 every input done, "
                            "2 an input failed (the others still done), 1 internal error. Existing files are "
                            "replaced only with --overwrite.")
    parser.add_argument("--version", action="version", version=f"madelung {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a full traceback on internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for add, _ in COMMANDS.values():
        add(sub)
    return parser


class NonFiniteResult(MadelungError):
    """A result came out NaN or infinite: our fault, reported as an internal error, never printed."""


class _FiniteOutput:
    """Standard output of a command: text holding a NaN or an infinity is refused, not printed."""

    NON_FINITE = re.compile(r"(?<![\w./])[-+]?(?:nan|inf)(?![\w./-])")

    def __init__(self, stream):
        self.stream = stream

    def write(self, text):
        if self.NON_FINITE.search(text):
            raise NonFiniteResult("a result is not a finite number (NaN or infinity); not printed")
        return self.stream.write(text)

    def __getattr__(self, name):
        return getattr(self.stream, name)


def _quiet_stdout():
    """The reader closed the pipe: point stdout at /dev/null so the final flush stays silent."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass


def main(argv=None):
    parser = build_parser()
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 2
    _, run = COMMANDS[args.command]
    stdout = sys.stdout
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", MadelungWarning)
        try:
            sys.stdout = _FiniteOutput(stdout)
            code = run(args)
            sys.stdout = stdout
            stdout.flush()
        except InputError as exc:
            sys.stdout = stdout
            print(f"madelung: {' '.join(str(exc).split())}", file=sys.stderr)
            return 2
        except BrokenPipeError:
            sys.stdout = stdout
            _quiet_stdout()
            return 141
        except KeyboardInterrupt:
            print("madelung: interrupted", file=sys.stderr)
            return 130
        except Exception as exc:  # our fault, not the user's
            if args.debug:
                raise
            print(f"madelung: internal error: {type(exc).__name__}: {' '.join(str(exc).split())} "
                  "(rerun with --debug for details)", file=sys.stderr)
            return 1
        finally:
            sys.stdout = stdout
            for w in caught:
                if issubclass(w.category, MadelungWarning):
                    print(f"madelung: warning: {w.message}", file=sys.stderr)
    return code


if __name__ == "__main__":
    sys.exit(main())
