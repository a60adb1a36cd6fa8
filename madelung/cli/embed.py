"""Command ``embed``: a cluster and a fitted point-charge field for embedded-cluster calculations."""

from __future__ import annotations

from ..analysis.embedding import OFFSETS as EMBEDDING_OFFSETS
from ..analysis.embedding import embedding
from ..analysis.embedding_files import FILES as EMBEDDING_FILES
from ..analysis.embedding_files import check_output_folder
from ..analysis.embedding_files import embedding_report
from ..analysis.embedding_files import write_embedding
from .loading import load_crystal
from .options import (
    _charge_option, _json_option, _min_distance_option, _overwrite_option, _structure_options, _tol_option)
from .output import _print_json
from .text import parse_center


def _add_embed(sub):
    parser = sub.add_parser("embed", help="a cluster and a fitted point-charge field for embedded-cluster calculations",
                            description="Cut a cluster of whole ions around a site or point and surround it with point "
                                        "charges out to a field radius; the charges of the outermost layer are fitted "
                                        "(zero total charge and dipole) so that the potential inside the cluster "
                                        "matches the periodic crystal's. Writes " + ", ".join(EMBEDDING_FILES.values())
                                        + " into the output folder, centre at the origin (Å, e).")
    parser.add_argument("file", metavar="FILE", help="structure file: CIF, POSCAR, extended XYZ, ... (read by ASE)")
    _charge_option(parser)
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
    _overwrite_option(parser, help="replace files of an earlier run in the folder")
    _tol_option(parser,
                help="accuracy of the periodic potentials, relative to k_e*sum(q^2)/d_min (default %(default)g)")
    _min_distance_option(parser)
    parser.add_argument("--cell", choices=("input", "primitive", "conventional"), default="input",
                        help="use the cell as read (default) or spglib's standardized cell")
    _json_option(parser)
    _structure_options(parser)
    return parser


def _run_embed(args):
    check_output_folder(args.out, args.overwrite)
    crystal = load_crystal(args)
    result = embedding(crystal, parse_center(args.center), args.cluster_radius, args.field_radius,
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
