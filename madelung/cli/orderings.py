"""Command ``orderings``: rank the orderings of mixed or partly occupied sites by energy."""

from __future__ import annotations

import warnings

from ..errors import InputError
from .loading import _ion_charges_of
from .options import (
    _charge_option, _charges_from_option, _crystal_options, _json_option, _max_atoms_option, _min_distance_option,
    _overwrite_option, _structure_defaults, _symmetry_tolerance_option, _tol_option)
from .output import _print_json
from .text import parse_charge_rules, parse_supercell


def _add_orderings(sub):
    from ..analysis.orderings import DEFAULT_MAX_DISTINCT

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
    _overwrite_option(parser, help="allow writing into a folder that holds files")
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
    _charge_option(parser, help="charge of an ion by element (or site label), e.g. Li=+1 or Mg=+2 (repeat as needed)")
    _charges_from_option(parser, help="where charges come from: the file (default), assigned oxidation states "
                                      "(auto) or charge equilibration")
    _tol_option(parser, help="accuracy of the Coulomb matrix, relative to k_e*sum(q^2)/d_min (default %(default)g)")
    _min_distance_option(parser)
    _max_atoms_option(parser)
    _symmetry_tolerance_option(parser)
    _json_option(parser)
    return parser


def _run_orderings(args):
    from ..analysis.ordering_output import check_output_folder, write_ranking
    from ..analysis.orderings import rank_orderings
    from ..io.read import load

    check_output_folder(args.out, args.overwrite)
    if args.keep < 1:
        raise InputError(f"--keep must be a positive whole number, got {args.keep}")
    rules = parse_charge_rules(args.charge)
    _structure_defaults(args)
    options = {**_crystal_options(args), "allow_net_charge": args.background}
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*virtual-crystal average.*")  # the point of this command
        crystal = load(args.file, args.charges_from, rules=rules, **options).crystal
    ranking = rank_orderings(crystal, parse_supercell(args.supercell), keep=args.keep,
                             ion_charges=_ion_charges_of(args, crystal), method=args.strategy,
                             max_distinct=args.max_distinct, restarts=args.restarts, sweeps=args.sweeps,
                             seed=args.seed, workers=args.workers, scheduler=args.scheduler,
                             background=args.background, tol=args.tol, symmetry_tolerance=args.symmetry_tolerance)
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
