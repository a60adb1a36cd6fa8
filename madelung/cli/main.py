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

from importlib import import_module

from .. import __version__
from ..errors import InputError
from ..errors import MadelungWarning


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


class _Deferred:
    """A function of a command module, imported on its first call.

    Each command module loads what its work needs (NumPy, the sums, ASE, ...); importing only the
    one command that runs keeps ``--help``, ``--version`` and argument errors of the other commands
    from paying for every command's imports.
    """

    def __init__(self, module, name):
        self.module, self.name = module, name

    def __call__(self, *args, **kwargs):
        return getattr(import_module(f"{__package__}.{self.module}"), self.name)(*args, **kwargs)

    def __repr__(self):
        return f"<{__package__}.{self.module}.{self.name}, imported on first call>"


def _command(module, add, run):
    return _Deferred(module, add), _Deferred(module, run)


#: Command -> (declare its options, run it), each from its own module, imported when used.
COMMANDS = {
    "energy": _command("energy", "_add_energy", "_run_energy"),
    "sites": _command("energy", "_add_sites", "_run_sites"),
    "charges": _command("charges", "_add_charges", "_run_charges"),
    "constant": _command("energy", "_add_constant", "_run_constant"),
    "screen": _command("screen", "_add_screen", "_run_screen"),
    "demo": _command("screen", "_add_demo", "_run_demo"),
    "map": _command("defects", "_add_map", "_run_map"),
    "interstitials": _command("defects", "_add_interstitials", "_run_interstitials"),
    "defect": _command("defects", "_add_defect", "_run_defect"),
    "correction": _command("defects", "_add_correction", "_run_correction"),
    "fit": _command("lattice", "_add_fit", "_run_fit"),
    "cycle": _command("lattice", "_add_cycle", "_run_cycle"),
    "relax": _command("lattice", "_add_relax", "_run_relax"),
    "eos": _command("lattice", "_add_eos", "_run_eos"),
    "embed": _command("embed", "_add_embed", "_run_embed"),
    "orderings": _command("orderings", "_add_orderings", "_run_orderings"),
    "compile": _command("compile", "_add_compile", "_run_compile"),
}

#: The one-line summary of each command in ``madelung --help`` (the same words as the ``help`` of
#: its own sub-parser; a test keeps the two alike), so that the list needs no command module.
SUMMARIES = {
    "energy": "electrostatic energy of a crystal",
    "sites": "electrostatic potential at every crystallographic site",
    "charges": "assign oxidation states or equilibrate partial charges",
    "constant": "Madelung constants in each named convention",
    "screen": "descriptors of many structures into one table",
    "demo": "screen the bundled candidate coatings and plot them",
    "map": "potential on a grid (cube file) and a plane heat map (PNG)",
    "interstitials": "candidate interstitial sites of a probe charge",
    "defect": "vacancy, substitution and interstitial electrostatics in a supercell",
    "correction": "charged-supercell image correction with a dielectric constant or tensor",
    "fit": "fit short-range parameters to observed structures",
    "cycle": "Born–Haber cycle lattice energy from enthalpies",
    "relax": "relax a structure in the rigid-ion model",
    "eos": "energy–volume scan with a Birch–Murnaghan fit",
    "embed": "a cluster and a fitted point-charge field for embedded-cluster calculations",
    "orderings": "rank the orderings of mixed or partly occupied sites by energy",
    "compile": "compile every numerical kernel now, into the on-disk cache",
}


def _command_named(argv):
    """The command an argument list names (its first word that is not an option), or None."""
    for word in argv:
        if not word.startswith("-"):
            return word if word in COMMANDS else None
    return None


def build_parser(command=None, *, every=True):
    """The parser. ``command`` set: that command is declared in full and the others by name and
    summary only (their modules are not imported); ``every`` false with no command: all by name only."""
    parser = _Parser(prog="madelung", description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="Units: Å, e, eV, V; kJ/mol per formula unit. Exit codes: 0 every input done, "
                            "2 an input failed (the others still done), 1 internal error. Existing files are "
                            "replaced only with --overwrite.")
    parser.add_argument("--version", action="version", version=f"madelung {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a full traceback on internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, (add, _) in COMMANDS.items():
        if name == command or (command is None and every):
            add(sub)
        else:
            sub.add_parser(name, help=SUMMARIES[name], add_help=False)
    return parser


#: What a first run costs, said in the notice: the kernels of one small command, compiled on one
#: core of this project's reference machine (benchmarks/startup.py measures it).
FIRST_COMPILE_TEXT = "about 10 to 30 s"


def _check_input_file(args):
    """A structure file named on the command line that does not exist: refused before the command's
    libraries load (the loader says the same later; with several files each gets its own row)."""
    path = getattr(args, "file", None)
    if isinstance(path, str) and not getattr(args, "more_files", None) and not os.path.exists(path):
        raise InputError(f"{path}: no such file")


def _compile_notice(stream):
    """Say once, on ``stream`` if it is a terminal, when Numba starts compiling a kernel its cache
    lacks (a first run on this machine); returns a function that stops listening."""
    if not getattr(stream, "isatty", lambda: False)():
        return lambda: None
    from numba.core import event   # the library's own event hook; loaded only for a command that runs

    class Notice(event.Listener):
        said = False

        def on_start(self, data):
            if not self.said:
                self.said = True
                print(f"madelung: compiling the numerical kernels for first use (once per machine, "
                      f"{FIRST_COMPILE_TEXT}; 'madelung compile' does them all ahead)...", file=stream, flush=True)

        def on_end(self, data):
            pass

    notice = Notice()
    event.register("numba:compile", notice)
    return lambda: event.unregister("numba:compile", notice)


def _quiet_stdout():
    """The reader closed the pipe: point stdout at /dev/null so the final flush stays silent."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass


def main(argv=None):
    argv = sys.argv[1:] if argv is None else list(argv)
    command = _command_named(argv)
    parser = build_parser(command, every=False)
    args = parser.parse_args(argv)
    if not args.command:
        parser.print_help()
        return 2
    _, run = COMMANDS[args.command]
    stdout = sys.stdout
    stop_notice = lambda: None  # noqa: E731
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", MadelungWarning)
        try:
            _check_input_file(args)
            if args.command != "compile":
                stop_notice = _compile_notice(sys.stderr)
            sys.stdout = import_module(f"{__package__}.output")._FiniteOutput(stdout)
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
            stop_notice()
            for w in caught:
                if issubclass(w.category, MadelungWarning):
                    print(f"madelung: warning: {w.message}", file=sys.stderr)
    return code
