"""The ``madelung`` command line: the parser, the command table, error mapping and exit codes.

Exit codes: 0 every input done; 2 a problem with an input (one line on stderr; with several inputs
after all the others were done, with a summary line); 1 an internal error; 141 the reader of the
output closed the pipe. No command writes over an existing file without ``--overwrite``.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings

from .. import __version__
from ..errors import InputError
from ..errors import MadelungWarning
from .charges import _add_charges, _run_charges
from .compile import _add_compile, _run_compile
from .defects import (
    _add_correction, _add_defect, _add_interstitials, _add_map, _run_correction, _run_defect, _run_interstitials,
    _run_map)
from .embed import _add_embed, _run_embed
from .energy import _add_constant, _add_energy, _add_sites, _run_constant, _run_energy, _run_sites
from .lattice import _add_cycle, _add_eos, _add_fit, _add_relax, _run_cycle, _run_eos, _run_fit, _run_relax
from .orderings import _add_orderings, _run_orderings
from .output import _FiniteOutput
from .screen import _add_demo, _add_screen, _run_demo, _run_screen


DESCRIPTION = """\
Electrostatics of ionic crystals: Ewald sums, site potentials and Madelung constants
of a periodic array of point charges, converged to the accuracy you ask for.

Charges come from the file (CIF oxidation states such as O2- or _atom_type_oxidation_number,
ASE initial charges) or from --charge rules by element or site label, e.g.
  madelung energy NaCl.cif --charge Na=+1 --charge Cl=-1
"""


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage mistakes as one line and exit code 2."""

    def error(self, message):
        command = self.prog.split()[-1]
        self.exit(2, f"madelung: {message} (see {'madelung' if command == 'madelung' else 'madelung ' + command} "
                     "--help)\n")


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
