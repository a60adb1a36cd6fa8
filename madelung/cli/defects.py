"""Commands ``map``, ``interstitials``, ``defect`` and ``correction``: potentials on grids and defects."""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputError
from ..report.files import write_with
from .loading import _dielectric_from, load_crystal
from .options import (
    COARSE_TOL, _check_outputs, _common, _dielectric_options, _json_option, _overwrite_option, _supercell_options,
    _tol_option)
from .output import MODEL_NOTE, _eps_text, _frac, _print_json, _structure_lines
from .text import (
    _series, parse_cell, parse_interstitials, parse_key_values, parse_miller, parse_site, parse_substitutions,
    parse_supercell)


def _add_map(sub):
    parser = sub.add_parser("map", help="potential on a grid (cube file) and a plane heat map (PNG)",
                            description="Electrostatic potential on a regular grid over the cell, written as a "
                                        "Gaussian cube file, and a PNG heat map of one lattice plane with its ions "
                                        "marked. Ions are Gaussians of width --smearing (0: point ions).")
    _common(parser)
    parser.set_defaults(tol=COARSE_TOL)
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
    from ..analysis.defects import plane_section, potential_grid, write_gaussian_cube
    from ..report.plots import write_plane_png

    prefix = args.output or os.path.splitext(os.path.basename(args.file))[0] + "-potential"
    cube, png = prefix + ".cube", prefix + ".png"
    _check_outputs(args, cube, png)
    plane = parse_miller(args.plane)
    crystal = load_crystal(args)
    grid = potential_grid(crystal, args.grid, smearing=args.smearing, tol=args.tol)
    section = plane_section(crystal, plane, args.offset, spacing=min(args.grid, 0.1),
                            smearing=args.smearing, tol=args.tol)
    write_with(cube, lambda temporary: write_gaussian_cube(temporary, grid))
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
    parser.set_defaults(tol=COARSE_TOL)
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
    from ..analysis.defects import DEFAULT_PROBE_RADIUS, find_interstitials

    crystal = load_crystal(args)
    radii = parse_key_values(args.radius, "radius", "ELEMENT=Å or LABEL=Å, e.g. O=1.40")
    unknown = sorted(set(radii) - set(crystal.symbols) - set(crystal.labels))
    if unknown:
        raise InputError(f"{args.file}: radius given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    probe_radius = DEFAULT_PROBE_RADIUS if args.probe_radius is None else args.probe_radius
    search = find_interstitials(crystal, args.probe, spacing=args.grid, probe_radius=probe_radius, radii=radii,
                                clearance=args.clearance, tol=args.tol)
    if args.json:
        _print_json({"file": args.file, **search.to_dict()})
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


def _add_defect(sub):
    parser = sub.add_parser("defect", help="vacancy, substitution and interstitial electrostatics in a supercell",
                            description="Unrelaxed electrostatic energy change of point defects in a supercell, the "
                                        "change of the potential on the neighbouring sites and the Madelung-site-"
                                        "potential estimate. A charged defect is summed with a uniform neutralizing "
                                        "background unless you add a compensating defect yourself.")
    _common(parser)
    parser.add_argument("--vacancy", action="append", default=[], metavar="SITE",
                        help="empty a site: LABEL (its copy in the first cell), LABEL@x,y,z (copy nearest that "
                             "fractional point of the input cell) or #INDEX; repeat for several")
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
    from ..analysis.defects import defect_energy, vacancy_ranking

    supercell = None if args.supercell is None else parse_supercell(args.supercell)
    defects = dict(vacancy=[parse_site(spec, "vacancy") for spec in args.vacancy],
                   substitute=parse_substitutions(args.substitute), interstitial=parse_interstitials(args.interstitial))
    repeats = _series(args.series) if args.series else None
    crystal = load_crystal(args)
    if args.rank_vacancies:
        if args.vacancy or args.substitute or args.interstitial:
            raise InputError("--rank-vacancies ranks single vacancies; give it without other defects")
        ranking = vacancy_ranking(crystal, args.rank_vacancies, supercell=supercell,
                                  smallest_plane_spacing=args.smallest_plane_spacing, tol=args.tol)
        return _print_ranking(args, crystal, ranking)
    eps = _dielectric_from(args)
    result = defect_energy(crystal, **defects, supercell=supercell, smallest_plane_spacing=args.smallest_plane_spacing,
                           tol=args.tol, neighbour_radius=args.neighbour_radius, dielectric=eps)
    series = None
    if repeats:
        from ..analysis.defects import defect_series

        series = defect_series(crystal, repeats, supercell=supercell,
                               smallest_plane_spacing=args.smallest_plane_spacing, **defects, tol=args.tol)
    sc = result.supercell
    background_text = result.compensation
    if args.json:
        _print_json({"file": args.file, **result.to_dict(), "series": series})
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
        _print_json({"file": args.file, **ranking.to_dict()})
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
    _tol_option(parser, help="relative accuracy of the lattice sum")
    _json_option(parser)
    return parser


def _run_correction(args):
    from ..io.read import read_structure
    from ..analysis.defects import charged_cell_correction, correction_series, supercell_cell

    if (args.file is None) == (args.cell is None):
        raise InputError("give a structure file or --cell (one of them)")
    supercell = None if args.supercell is None else parse_supercell(args.supercell)
    repeats = _series(args.series)
    if args.file is not None:
        cell = np.array(read_structure(args.file).cell)
        source = args.file
    else:
        cell = parse_cell(args.cell)
        source = f"--cell {args.cell}"
    cell = supercell_cell(cell, supercell, args.smallest_plane_spacing)
    eps = _dielectric_from(args)
    main = charged_cell_correction(cell, args.charge, 1.0 if eps is None else eps, tol=args.tol)
    series = correction_series(cell, args.charge, main.dielectric, repeats, tol=args.tol)
    if args.json:
        _print_json({"cell_source": source, **main.to_dict(), **series.to_dict()})
        return 0
    lengths = np.linalg.norm(cell, axis=1)
    lines = [f"madelung correction  {source}",
             f"  cell        |a| {lengths[0]:.4f}, |b| {lengths[1]:.4f}, |c| {lengths[2]:.4f} Å; volume "
             f"{main.volume:.3f} Å^3; L = V^(1/3) = {main.length:.4f} Å",
             f"  dielectric  {_eps_text(main.dielectric)} (eigenvalues "
             f"{', '.join(f'{v:.4g}' for v in main.dielectric_eigenvalues)})",
             f"  charge      {args.charge:+g} e",
             "",
             f"  image correction      {main.energy:14.6f} eV   (add to the charged-supercell energy)",
             f"  Madelung potential    {main.madelung_potential:14.6f} V    (screened point-charge array with background, "
             "own charge left out)",
             f"  2 L E / (k_e q^2)     {main.effective_constant:14.6f}      (alpha_M / eps for a simple cube)"
             if main.charge else "  2 L E / (k_e q^2)     undefined for q = 0",
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
