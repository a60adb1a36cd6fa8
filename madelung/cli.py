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
    parser.add_argument("--method", choices=("auto", "direct", "mesh"), default="auto",
                        help="Ewald engine: direct sum, particle mesh, or the one predicted faster (default auto)")
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
    from .crystal import Crystal, charges_in_structure

    base = charges_in_structure(atoms)
    if base is None:
        return Crystal.from_ase(atoms, rules, source=args.file, min_distance=args.min_distance)
    symbols = atoms.get_chemical_symbols()
    labels = [str(x) for x in atoms.arrays["labels"]] if "labels" in atoms.arrays else symbols
    unknown = sorted(set(rules) - set(symbols) - set(labels))
    if unknown:
        raise InputError(f"{args.file}: charge given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    charges = np.array([rules.get(label, rules.get(symbol, q)) for label, symbol, q in zip(labels, symbols, base)])
    missing = [label for label, q in zip(labels, charges) if not np.isfinite(q)]
    if missing:
        raise InputError(f"{args.file}: site {missing[0]} has no charge in the file or the rules; "
                         f"add --charge {missing[0]}=Q")
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
    return parser


def _run_energy(args):
    from . import ewald
    from .units import EV_PER_A3_TO_GPA

    crystal = load_crystal(args)
    result = ewald(crystal, tol=args.tol, forces=args.forces, stress=args.stress, method=args.method)
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
    parser = sub.add_parser("sites", help="electrostatic potential at every site",
                            description="Electrostatic potential at each ion from all the other ions (V), "
                                        "with the site Madelung constant M_i = -phi_i r0 / (k_e q_i).")
    _common(parser)
    return parser


def _run_sites(args):
    from .constants import madelung_constants

    crystal = load_crystal(args)
    constants = madelung_constants(crystal, tol=args.tol, method=args.method)
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
    c = madelung_constants(crystal, tol=args.tol, method=args.method)
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
            c = madelung_constants(load_crystal(args), tol=args.tol, method=args.method)
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
