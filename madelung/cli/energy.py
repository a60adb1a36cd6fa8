"""Commands ``energy``, ``sites`` and ``constant``: electrostatic energy, site potentials, Madelung constants."""

from __future__ import annotations

import argparse
import math
import os

import numpy as np

from ..analysis.conventions import CONVENTION_TEXT
from ..errors import InputError
from ..units import EV_TO_KJ_PER_MOL, pressure_from_stress
from .loading import _ions_as_units, _polyatomic_ions, load_crystal
from .options import _common, _polyatomic_option
from .output import (
    MODEL_NOTE, RIGID_ION_NOTE, RULE_TEXT, _accuracy_lines, _batch_code, _ewald_json, _fmt, _lattice_lines,
    _print_json, _structure_lines, _volume_based, _volume_based_lines)


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
    from ..sums.dispatch import ewald

    crystal = load_crystal(args)
    found = _polyatomic_ions(args, crystal)
    if found is not None:
        return _run_energy_with_ions(args, crystal, found)
    result = ewald(crystal, tol=args.tol, forces=args.forces, stress=args.stress, method=args.method)
    lattice = None
    if args.repulsion:
        from ..analysis.lattice_energy import lattice_energy

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
            data["lattice"] = {**lattice.to_dict(), "volume_based": _volume_based(crystal)}
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
        pressure = pressure_from_stress(s)
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
    from ..analysis.madelung_constants import madelung_constants
    from ..structure.symmetry import crystal_symmetry

    crystal = load_crystal(args)
    symmetry = crystal_symmetry(crystal, symmetry_tolerance=args.symmetry_tolerance)
    # one row per atomic site: every atom a point charge here (polyatomic ions in energy/constant)
    constants = madelung_constants(crystal, tol=args.tol, method=args.method, polyatomic_ions="atoms")
    potentials = constants.ewald.potentials
    z = crystal.formula_units
    energy_per_fu = constants.energy_per_formula_unit

    def row(i, orbit):
        return {"index": i, "label": crystal.labels[i], "element": crystal.species_label(i),
                "wyckoff": orbit.wyckoff, "multiplicity": orbit.multiplicity, "sites_in_cell": len(orbit.sites),
                "charge_e": float(crystal.charges[i]), "potential_V": float(potentials[i]),
                "site_constant": None if math.isnan(constants.site[i]) else float(constants.site[i]),
                "q_phi_eV": float(crystal.charges[i] * potentials[i]),
                "averaged": crystal.is_averaged(i)}

    _, spreads = symmetry.orbit_means(potentials)
    orbit_rows = [{**row(orbit.representative, orbit), "potential_spread_V": float(spread)}
                  for orbit, spread in zip(symmetry.orbits, spreads)]
    site_rows = [row(i, symmetry.orbits[symmetry.orbit_of[i]]) for i in range(len(crystal))]
    if args.json:
        _print_json({"file": args.file, "cell": args.cell, "space_group": symmetry.symbol,
                     "space_group_number": symmetry.number, "symprec_angstrom": symmetry.symmetry_tolerance,
                     "formula_units": z, "energy_per_formula_unit_eV": energy_per_fu,
                     "r0_angstrom": constants.r0, "orbits": orbit_rows, "sites": site_rows,
                     "site_constant_convention": "M_i = -phi_i r0 / (k_e q_i)",
                     "error_estimate_eV": constants.ewald.error_estimate})
        return 0
    print(f"madelung sites  {args.file}")
    print("\n".join(_structure_lines(crystal)))
    print(f"  symmetry    {symmetry.symbol} (No. {symmetry.number}), {len(symmetry.orbits)} orbits, "
          f"tolerance {symmetry.symmetry_tolerance:g} Å; cell: {args.cell}")
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
              f"{r['potential_V']:>15.8f}  {m:>11}  {r['q_phi_eV']:>12.6f}")
    print()
    print("  M_i = -phi_i r0 / (k_e q_i): the site potential in units of k_e q_i / r0 (positive = held by its "
          "surroundings); E = 1/2 sum q_i phi_i")
    if any(r["averaged"] for r in site_rows):
        print("  averaged    mixed or partly occupied sites carry occupancy-weighted mean charges (virtual crystal)")
    print(f"  note        {MODEL_NOTE}")
    return 0


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
    from ..analysis.madelung_constants import madelung_constants
    from ..io.read import structures_to_read

    files = [args.file, *args.more_files]
    if len(files) > 1 or (args.block is None and len(structures_to_read(args.file)) > 1):
        return _constant_table(args, files)
    crystal, found = _ions_as_units(args, load_crystal(args))
    c = madelung_constants(crystal, tol=args.tol, method=args.method)
    if args.json:
        _print_json({"file": args.file, **c.to_dict(),
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


def _constant_table(args, files):
    """One row per file, or per data block of a file with several (unless --block picks one); failures
    are rows too, and the run goes on."""
    from ..analysis.madelung_constants import madelung_constants
    from ..io.read import structures_to_read

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
            rows.append({"file": name, "status": "ok", **c.to_dict(),
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


def _run_energy_with_ions(args, crystal, found):
    """The energy report for a crystal holding polyatomic ions: inter-ion energies and lattice-energy estimates."""
    from ..charges.polyatomic import centred_crystal, interionic_energy
    from ..analysis.lattice_energy import closed_forms

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
