"""Options shared by several commands, declared here once, with their defaults."""

from __future__ import annotations

import argparse

import numpy as np

# the defaults straight from their one place: the structure modules would load spglib before parsing
from ..defaults import MAX_ATOMS as DEFAULT_MAX_ATOMS
from ..defaults import MIN_DISTANCE, SCREENING_TOL, SUM_TOL
from ..defaults import SYMMETRY_TOLERANCE as DEFAULT_SYMMETRY_TOLERANCE
from ..report.files import check_outputs

#: Defaults of the shared options, one place. ``--tol``: relative accuracy of the sums; ``charges``,
#: ``screen``, ``map`` and ``interstitials`` use the looser COARSE_TOL (they sum many candidates,
#: structures or grid points, and need far less to rank or draw them), every other command DEFAULT_TOL.
DEFAULT_TOL = SUM_TOL
COARSE_TOL = SCREENING_TOL
#: ``--min-distance``: ions closer than this (Å) are refused.
DEFAULT_MIN_DISTANCE = MIN_DISTANCE
CHARGES_FROM = ("file", "auto", "equilibrate")


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


def _overwrite_option(parser, help="replace output files that exist already"):
    parser.add_argument("--overwrite", action="store_true", help=help)


def _tol_option(parser, default=DEFAULT_TOL,
                help="wanted error of the energy relative to k_e*sum(q^2)/d_min (default %(default)g)"):
    parser.add_argument("--tol", type=_tolerance, default=default, metavar="TOL", help=help)


def _json_option(parser, help="print JSON instead of a report"):
    parser.add_argument("--json", action="store_true", help=help)


def _charge_option(parser,
                   help="charge of an element or a site label, e.g. Na=+1 or O1=-2 (repeat as needed)"):
    parser.add_argument("--charge", action="append", metavar="KEY=Q", default=[], help=help)


def _min_distance_option(parser,
                         help="refuse ions closer than this (default %(default)g Å; 0 switches the check off)"):
    parser.add_argument("--min-distance", type=float, default=DEFAULT_MIN_DISTANCE, metavar="Å", help=help)


def _max_atoms_option(parser, help="refuse structures with more sites than this (default %(default)d)"):
    parser.add_argument("--max-atoms", type=int, default=DEFAULT_MAX_ATOMS, metavar="N", help=help)


def _symmetry_tolerance_option(parser, help="symmetry tolerance (default %(default)g Å, suits experimental CIFs)"):
    parser.add_argument("--symmetry-tolerance", type=float, default=DEFAULT_SYMMETRY_TOLERANCE, metavar="Å", help=help)


def _charges_from_option(parser, help="where charges come from: the file (default), assigned oxidation states "
                                      "(auto; states in the file and --charge rules are kept) or charge equilibration"):
    parser.add_argument("--charges-from", choices=CHARGES_FROM, default="file", help=help)


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
    _charge_option(parser, help="charge of an element or a site label, e.g. Na=+1 or O1=-2 (repeat as needed); "
                                "overrides charges read from the file")
    _tol_option(parser)
    _min_distance_option(parser)
    parser.add_argument("--method", choices=("auto", "direct", "mesh"), default="auto",
                        help="Ewald engine: direct sum, particle mesh, or the one predicted faster (default auto)")
    _json_option(parser)
    parser.add_argument("--cell", choices=("input", "primitive", "conventional"), default="input",
                        help="use the cell as read (default) or spglib's standardized primitive or conventional "
                             "cell (same energy per formula unit)")
    _structure_options(parser)


def _structure_options(parser, charges_from=True):
    if charges_from:
        _charges_from_option(parser)
    parser.add_argument("--block", metavar="NAME|NUMBER", default=None,
                        help="the CIF data block (or frame) to read, by name or number counted from 1; needed "
                             "for a file with several structures")
    parser.add_argument("--allow-net-charge", action="store_true",
                        help="sum a cell the file's states and occupancies leave charged, with a uniform "
                             "neutralizing background (refused by default)")
    parser.add_argument("--occupancy", choices=("average", "error"), default="average",
                        help="mixed or partly occupied sites: occupancy-weighted mean charge with a warning "
                             "(average, default) or refuse the file (error)")
    _max_atoms_option(parser)
    _symmetry_tolerance_option(parser)


def _structure_defaults(args):
    """Fill the structure options for commands whose parser does not declare them."""
    for name, value in (("min_distance", DEFAULT_MIN_DISTANCE), ("occupancy", "average"),
                        ("max_atoms", DEFAULT_MAX_ATOMS), ("symmetry_tolerance", DEFAULT_SYMMETRY_TOLERANCE), ("charges_from", "file"),
                        ("cell", "input"),
                        ("block", None), ("allow_net_charge", False), ("charge", [])):
        if not hasattr(args, name):
            setattr(args, name, value)
    return args


def _crystal_options(args):
    """The loader's options from the command line (:func:`madelung.io.read.load`)."""
    _structure_defaults(args)
    return dict(block=args.block, min_distance=args.min_distance, occupancy=args.occupancy,
                max_atoms=args.max_atoms, symmetry_tolerance=args.symmetry_tolerance, allow_net_charge=args.allow_net_charge,
                mixing_denominator=getattr(args, "mixing_denominator", 2))


def _dielectric_options(parser):
    parser.add_argument("--dielectric", type=float, metavar="EPS", help="scalar dielectric constant")
    parser.add_argument("--dielectric-tensor", metavar="FILE",
                        help="text file with the dielectric tensor: 9 numbers (3 rows), 3 (diagonal) or 1")


def _supercell_options(parser):
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--supercell", metavar="NxMxK",
                       help="supercell repeats, e.g. 3x3x3 (or nine integers, the rows of a matrix)")
    group.add_argument("--smallest-plane-spacing", type=float, metavar="Å",
                       help="the smallest near-cubic supercell whose lattice-plane spacings all reach this length")


POLYATOMIC_CHOICES = ("centre", "formal", "equilibrated", "atoms")


def _polyatomic_option(parser):
    parser.add_argument("--polyatomic-ions", choices=POLYATOMIC_CHOICES, default="centre",
                        help="how polyatomic ions (carbonate, sulfate, nitrate, ammonium, hydroxide, ...) are "
                             "treated: found and summed as ions, with the whole charge at the ion's centre "
                             "(centre, default), spread over its atoms by formal states (formal) or by charge "
                             "equilibration within the ion (equilibrated); energies are then inter-ion energies "
                             "and Madelung constants take one charge per ion. 'atoms': no detection, every atom "
                             "a point charge")
