"""Command ``compile``: compile every numerical kernel into the on-disk cache."""

from __future__ import annotations

from .options import _json_option
from .output import _print_json


def _add_compile(sub):
    parser = sub.add_parser("compile", help="compile every numerical kernel now, into the on-disk cache",
                            description="Run each engine once on a two-ion cell so that every numerical kernel "
                                        "is compiled and cached before the first real job (about a minute on a "
                                        "new machine; a second or two once cached). For cluster images, "
                                        "containers and CI.")
    _json_option(parser, help="print the steps and their times as JSON")
    return parser


def _run_compile(args):
    from ..precompile import compile_kernels

    def progress(index, count, name):
        if not args.json:
            print(f"  [{index + 1}/{count}] compiling {name} ...", flush=True)

    result = compile_kernels(progress)
    if args.json:
        _print_json(result.to_dict())
        return 0
    print(f"compiled and cached in {result.total_seconds:.1f} s")
    return 0
