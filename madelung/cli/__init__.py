"""The ``madelung`` command line: parsing and printing only; the work is done by the public API.

Every command takes a structure file (anything ASE reads: CIF, POSCAR, extended XYZ, ...),
prints a readable report by default and JSON with ``--json``. :mod:`.main` holds the parser and the
command table; :mod:`.options` the options shared by several commands; :mod:`.text` the text grammars;
one module per command or small group of related commands.
"""

from .main import COMMANDS, build_parser, main

__all__ = ["COMMANDS", "build_parser", "main"]
