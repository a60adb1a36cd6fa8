"""The fast CIF reader (gemmi) against the general one (ASE's tag parser): the same crystals, the same
block choice, the same errors and warnings, for every CIF the project ships or tests, for layouts
where the two parsers could read a file differently, and for corrupted files.

The reference here is the general reader, ASE's :func:`ase.io.cif.parse_cif` (a reference library),
read through the same site expansion; the crystals it gives for the bundled files are checked
against published values elsewhere (test_madelung_constants.py, test_structures_as_written.py).
"""

import random
import warnings
from pathlib import Path

import numpy as np
import pytest

import fuzz_corpus
from madelung import Crystal, InputError
from madelung.cli import main
from madelung.io import cif as cif_module
from madelung.io.cif_fast import fast_blocks, plain_layout
from madelung.io.read import read_sites, structure_names
from test_hostile_input import HOSTILE

HERE = Path(__file__).resolve().parent
STRUCTURES = HERE.parent / "structures"
EVERY_CIF = sorted(STRUCTURES.rglob("*.cif")) + sorted(HERE.rglob("*.cif"))
NACL = (STRUCTURES / "rocksalt-NaCl.cif").read_text()
NA_LINE = "Na1   Na1+     4 a          0.0         0.0         0.0  1.0"
CL_LINE = "Cl1   Cl1-     4 b          0.5         0.5         0.5  1.0"
assert NA_LINE in NACL and CL_LINE in NACL


def outcome(path, reader, block=None):
    """What reading ``path`` gives: the site table or the error text, and the warnings raised."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = read_sites(path, block=block, reader=reader)
        except InputError as exc:
            result = str(exc)
    return result, [str(w.message) for w in caught]


def blocks_of(path):
    """Each block of a file with several (as the general reader names them), else [None]."""
    try:
        names = structure_names(path, reader="general")
    except InputError:
        return [None]
    return names if len(names) > 1 else [None]


def sorted_sites(table):
    """The order of the sites by position (Å, rounded for sorting)."""
    return np.lexsort(np.round(table.positions, 6).T[::-1])


def assert_same(general, fast):
    (a, warned_a), (b, warned_b) = general, fast
    assert warned_a == warned_b
    if isinstance(a, str) or isinstance(b, str):
        assert a == b
        return
    assert np.array_equal(a.cell, b.cell)
    assert len(a) == len(b)
    ia, ib = sorted_sites(a), sorted_sites(b)
    assert np.max(np.abs(a.positions[ia] - b.positions[ib]), initial=0.0) <= 1e-10
    assert [a.labels[i] for i in ia] == [b.labels[i] for i in ib]
    assert [a.species[i] for i in ia] == [b.species[i] for i in ib]
    assert [a.symbols[i] for i in ia] == [b.symbols[i] for i in ib]
    assert a.block == b.block and a.info == b.info


@pytest.mark.parametrize("path", EVERY_CIF, ids=lambda p: str(p.relative_to(HERE.parent)))
def test_every_shipped_cif_reads_the_same_both_ways(path):
    for block in blocks_of(path):
        assert_same(outcome(path, "general", block), outcome(path, "fast", block))


def test_the_shipped_prototypes_take_the_fast_path():
    # they are plainly laid out; if the scan refused them the fast reader would never be used
    for path in sorted(STRUCTURES.glob("*.cif")):
        assert fast_blocks(cif_module.read_text(path)) is not None, path


def test_the_fast_path_gives_the_same_crystal_through_the_loader(tmp_path, monkeypatch):
    path = STRUCTURES / "spinel-MgAl2O4.cif"     # 56 sites from Fd-3m special positions
    monkeypatch.setenv("MADELUNG_CIF_READER", "general")
    general = Crystal.from_file(path)
    monkeypatch.setenv("MADELUNG_CIF_READER", "fast")
    fast = Crystal.from_file(path)
    assert np.array_equal(general.positions, fast.positions) and np.array_equal(general.charges, fast.charges)
    assert general.labels == fast.labels and general.symbols == fast.symbols


# Layouts where a line-based parser and a token-stream parser could part ways: each must read the same
# both ways (the scan sends the doubtful ones to the general reader).
ROWS = NACL[NACL.index("loop_\n_atom_site_label"):]
LAYOUTS = {
    "two rows on one line": NACL.replace(NA_LINE + "\n" + CL_LINE, NA_LINE + "  " + CL_LINE),
    "a row over two lines": NACL.replace(NA_LINE, NA_LINE.replace("4 a", "4 a\n")),
    "one-column operators unquoted with spaces": NACL.replace("'x,y,z'", "x, y, z"),
    "comment after a value": NACL.replace("_cell_length_a                         5.6402",
                                          "_cell_length_a 5.6402 # from memory"),
    "comment after a row": NACL.replace(NA_LINE, NA_LINE + " # sodium"),
    "blank line of spaces in a loop": NACL.replace(NA_LINE + "\n", NA_LINE + "\n   \n"),
    "empty line in a loop": NACL.replace(NA_LINE + "\n", NA_LINE + "\n\n"),
    "windows line ends": NACL.replace("\n", "\r\n"),
    "tabs between values": NACL.replace(NA_LINE, NA_LINE.replace("   ", "\t")),
    "uncertainties": NACL.replace("5.6402", "5.6402(3)"),
    "quoted numbers": NACL.replace("_cell_length_b                         5.6402",
                                   "_cell_length_b                         '5.6402'"),
    "label with a prime": NACL.replace("Cl1   Cl1-", "Cl1'  Cl1-"),
    "value on the next line": NACL.replace("_cell_length_c                         5.6402",
                                           "_cell_length_c\n5.6402"),
    "text field": NACL.replace("_cell_volume", "_publ_section_title\n;\n NaCl  \n\n  again\n;\n_cell_volume"),
    "text field closed late": NACL.replace("_cell_volume", "_publ_section_title\n;\nNaCl\n ;\n;\n_cell_volume"),
    "duplicated tag": NACL.replace("_cell_volume", "_cell_length_a 5.0\n_cell_volume"),
    "upper-case tags and block": NACL.replace("_cell_length_a", "_CELL_LENGTH_A").replace("data_", "DATA_"),
    "escapes and subscripts": NACL.replace("'NaCl, rock-salt structure'", "'NaCl~2~ \\a-phase &amp;'"),
    "dashes and plus-minus signs": NACL.replace("'x,y,z'", "'x,y,z+-1/2'").replace("'-x,-y,-z'", "'--x,-y,-z'"),
    "text before the first block": "stray words\n" + NACL,
    "no rows in the site loop": NACL[:NACL.index(NA_LINE)],
    "two blocks": NACL + "\n" + NACL.replace("data_rocksalt_NaCl", "data_second"),
    "save frame": NACL.replace("_cell_volume", "save_x\n_a 1\nsave_\n_cell_volume"),
    "loop headers on one line": NACL.replace("loop_\n_atom_type_symbol\n_atom_type_oxidation_number",
                                             "loop_\n_atom_type_symbol _atom_type_oxidation_number"),
    "second row of an operator line": NACL.replace("'x,y,z'", "'x,y,z' 'x,y,z'"),
    "only a header": "data_empty\n_cell_length_a 4\n",
}


@pytest.mark.parametrize("name", sorted(LAYOUTS))
def test_doubtful_layouts_read_the_same_both_ways(tmp_path, name):
    path = tmp_path / "layout.cif"
    path.write_text(LAYOUTS[name], encoding="utf-8")
    for block in blocks_of(path):
        assert_same(outcome(path, "general", block), outcome(path, "fast", block))


def test_the_scan_sends_line_bound_layouts_to_the_general_reader():
    for name in ("two rows on one line", "a row over two lines", "one-column operators unquoted with spaces",
                 "comment after a value", "blank line of spaces in a loop", "escapes and subscripts",
                 "dashes and plus-minus signs",
                 "duplicated tag", "save frame", "loop headers on one line", "text field closed late"):
        assert plain_layout(LAYOUTS[name]) is None, name
    for name in ("windows line ends", "uncertainties", "quoted numbers", "value on the next line", "text field",
                 "upper-case tags and block", "two blocks", "empty line in a loop"):
        assert fast_blocks(LAYOUTS[name]) is not None, name


@pytest.mark.parametrize("name", sorted(HOSTILE))
def test_malformed_files_give_the_same_one_line_error_both_ways(tmp_path, name):
    text, message = HOSTILE[name]
    path = tmp_path / f"{name}.cif"
    path.write_text(text)
    general, fast = outcome(path, "general"), outcome(path, "fast")
    assert_same(general, fast)
    if isinstance(fast[0], str):
        assert str(path) in fast[0] and "\n" not in fast[0]


def test_a_truncated_file_is_a_one_line_error_on_the_command_line(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("MADELUNG_CIF_READER", "fast")
    path = tmp_path / "cut.cif"
    path.write_text(NACL[:NACL.index(CL_LINE) + 20])
    assert main(["energy", str(path)]) == 2
    err = [line for line in capsys.readouterr().err.strip().splitlines() if "warning:" not in line]
    assert len(err) == 1 and str(path) in err[0]


def test_corrupted_files_read_the_same_both_ways(tmp_path):
    rng = random.Random(7)
    checked = 0
    while checked < 40:
        case = fuzz_corpus.make_case(rng)
        if case["kind"] != "cif":
            continue
        path = tmp_path / f"case{checked}.cif"
        path.write_bytes(case["data"])
        assert_same(outcome(path, "general"), outcome(path, "fast"))
        checked += 1


def test_an_unknown_reader_is_refused():
    with pytest.raises(InputError, match="CIF reader"):
        read_sites(STRUCTURES / "rocksalt-NaCl.cif", reader="quick")
