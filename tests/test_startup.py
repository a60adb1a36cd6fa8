"""Quick starts: what ``import madelung`` and the command line load before any work.

Source of the expectations: project convention (the quick-start task: ``import madelung`` and argument
errors must not load NumPy, SciPy, Numba or ASE; a command loads its own module only). No timing
is asserted here; benchmarks/startup.py prints the times.
"""

import subprocess
import sys

import pytest

import madelung
from madelung.cli.main import COMMANDS, SUMMARIES, build_parser

HEAVY = ("numpy", "scipy", "numba", "ase", "spglib", "mendeleev", "pandas")


def _loaded_after(code):
    """The heavy libraries a fresh interpreter has imported after running ``code``."""
    probe = f"{code}\nimport sys\nprint('loaded:', *[m for m in {HEAVY!r} if m in sys.modules])"
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout.splitlines()[-1].split()[1:]


def test_import_madelung_loads_no_numerical_library():
    assert _loaded_after("import madelung; madelung.InputError; madelung.__version__") == []


@pytest.mark.parametrize("argv", [["--help"], ["--version"], ["no-such-command"], []])
def test_help_version_and_unknown_commands_load_no_command_module(argv):
    code = (f"import sys\nfrom madelung.cli import main\ntry:\n    main({argv!r})\nexcept SystemExit:\n    pass\n"
            "assert not any(m.startswith('madelung.cli.energy') or m.startswith('madelung.sums') for m in sys.modules)")
    assert _loaded_after(code) == []


def test_every_public_name_resolves_and_is_listed():
    for name in madelung.__all__:
        assert getattr(madelung, name) is not None
    assert set(madelung.__all__) <= set(dir(madelung))
    with pytest.raises(AttributeError, match="no attribute 'not_a_name'"):
        madelung.not_a_name
    from madelung import Crystal, ewald  # noqa: F401  (the usual spelling works)

    # the loader registers itself when Crystal is reached through the package
    assert callable(madelung.Crystal.from_file)


def test_the_command_list_names_each_command_as_its_own_parser_does():
    # the summaries shown by `madelung --help` are kept beside the table, without the command
    # modules; the full parser (every module imported) must say the same words
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    helps = {choice.dest: choice.help for choice in sub._choices_actions}
    assert set(helps) == set(COMMANDS) == set(SUMMARIES)
    assert helps == SUMMARIES


def test_a_command_parser_declares_only_that_command_in_full():
    parser = build_parser("constant", every=False)
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    assert any(a.dest == "tol" for a in sub.choices["constant"]._actions)
    assert not any(a.dest == "tol" for a in sub.choices["energy"]._actions)


def test_crystal_reads_files_when_imported_from_its_own_module():
    # the structure model does not import the io layer; its from_file still reaches the one loader
    code = ("import pathlib\nfrom madelung.structure.crystal import Crystal\n"
            f"c = Crystal.from_file(pathlib.Path({str(__import__('pathlib').Path(__file__).parent.parent / 'structures' / 'rocksalt-NaCl.cif')!r}))\n"
            "assert len(c) == 8, len(c)")   # conventional rock-salt cell: 4 Na + 4 Cl (fact of the trade)
    assert "numpy" in _loaded_after(code)
