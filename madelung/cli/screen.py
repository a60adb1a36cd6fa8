"""Commands ``screen`` and ``demo``: descriptors of many structures into one table."""

from __future__ import annotations

from ..errors import InputError
from .options import (
    COARSE_TOL, _charge_option, _json_option, _min_distance_option, _overwrite_option, _structure_options,
    _tol_option)
from .output import _batch_code, _print_json
from .text import parse_charge_rules


def _add_screen(sub):
    from ..analysis.descriptors import SPECTRUM_LENGTH

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
    _charge_option(parser, help="charge of an element or a site label for every structure, e.g. O=-2 (repeat)")
    _tol_option(parser, default=COARSE_TOL, help="relative accuracy of every sum (default %(default)g)")
    parser.add_argument("--workers", type=int, metavar="N", help="worker processes (default: every core)")
    parser.add_argument("--scheduler", metavar="ADDRESS",
                        help="run on this Dask distributed scheduler (e.g. tcp://10.0.0.5:8786) instead of the "
                             "local pool; needs pip install 'madelung[dask]'. The cluster must be trusted: "
                             "results come back by its serialisation, so a hostile worker can run code here")
    parser.add_argument("--timeout", type=float, metavar="S", help="seconds allowed per structure")
    parser.add_argument("--resume", action="store_true", help="keep rows already ok in --out, screen the rest")
    _overwrite_option(parser, help="replace an existing --out (and --sites) table instead of refusing it")
    parser.add_argument("--chunk", type=int, default=256, metavar="N", help="rows written at once, at least "
                                                                             "(default 256)")
    parser.add_argument("--spectrum-length", type=int, default=SPECTRUM_LENGTH, metavar="L",
                        help=f"padded length of the Ewald-sum-matrix spectrum (default {SPECTRUM_LENGTH})")
    _min_distance_option(parser)
    parser.add_argument("--no-progress", action="store_true", help="no progress bar or progress lines")
    _json_option(parser, help="print the summary as JSON")
    _structure_options(parser)
    return parser


def _run_screen(args):
    from ..batch import screen

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
                     spectrum_length=args.spectrum_length, symmetry_tolerance=args.symmetry_tolerance, min_distance=args.min_distance,
                     max_atoms=args.max_atoms, occupancy=args.occupancy, allow_net_charge=args.allow_net_charge,
                     overwrite=args.overwrite)
    code = _batch_code(summary.failed, summary.ok + summary.failed, f"structures ({summary.out})")
    if args.json:
        _print_json(summary.to_dict())
        return code()
    for source, status in summary.failures[:10]:
        print(f"  failed  {status if source in status else f'{source}: {status}'}")
    if len(summary.failures) > 10:
        print(f"  ... and {summary.failed - 10} more failed rows (status column of {summary.out})")
    print(summary.line())
    return code()


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
    _json_option(parser, help="print the ranked rows as JSON")
    return parser


def _run_demo(args):
    from ..demo import run_demo

    result = run_demo(args.out_dir, workers=args.workers, top=args.top, progress=not args.json,
                      parents=args.parents, overwrite=args.overwrite)
    code = _batch_code(result.summary.failed, result.summary.ok + result.summary.failed, "demo structures")
    if args.json:
        _print_json(result.to_dict())
        return code()
    print(result.report())
    return code()
