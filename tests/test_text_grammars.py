"""The command line's text grammars are read in madelung.cli.text only; the library takes typed values
and refuses text with one clear InputError."""

import numpy as np
import pytest

from madelung import Crystal
from madelung.analysis.cluster import resolve_center
from madelung.analysis.defects import defect_energy, plane_section, supercell_cell, tile_supercell
from madelung.cli.text import (
    parse_center, parse_interstitials, parse_miller, parse_site, parse_substitutions, parse_supercell)
from madelung.errors import InputError


def _rocksalt(a=4.0):
    # rock salt in its conventional cubic cell: cations on fcc points, anions shifted by a/2 (fact of the trade)
    fcc = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0]])
    frac = np.concatenate([fcc, fcc + [0.5, 0, 0]]) % 1.0
    return Crystal(a * np.eye(3), frac * a, [1.0] * 4 + [-1.0] * 4, ["Na"] * 4 + ["Cl"] * 4,
                   ["Na1"] * 4 + ["Cl1"] * 4)


def test_supercell_text():
    assert np.array_equal(parse_supercell("3x3x1"), np.diag([3, 3, 1]))
    assert np.array_equal(parse_supercell("2"), 2 * np.eye(3, dtype=int))
    assert np.array_equal(parse_supercell("1 1 0 -1 1 0 0 0 2"), [[1, 1, 0], [-1, 1, 0], [0, 0, 2]])
    for bad in ("3x3", "axbxc", "1x2x3x4"):
        with pytest.raises(InputError, match="supercell"):
            parse_supercell(bad)


def test_miller_text():
    assert parse_miller("001") == (0, 0, 1)
    assert parse_miller("1-10") == (1, -1, 0)
    assert parse_miller("1,-1,0") == (1, -1, 0)
    for bad in ("000", "01", "0a01", "1,2"):
        with pytest.raises(InputError, match="Miller"):
            parse_miller(bad)


def test_site_and_defect_text():
    assert parse_site("#12") == 12
    assert parse_site("O1") == "O1"
    label, point = parse_site("O1@0.5,0.5,0.25")
    assert label == "O1" and np.allclose(point, [0.5, 0.5, 0.25])
    with pytest.raises(InputError, match="#INDEX"):
        parse_site("#x")
    assert parse_substitutions(["Mg1=Al:+3", "#4=Li"]) == {"Mg1": ("Al", 3.0), 4: ("Li", None)}
    with pytest.raises(InputError, match="SITE=ELEMENT"):
        parse_substitutions(["Mg1"])
    with pytest.raises(InputError, match="element with an optional charge"):
        parse_substitutions(["Mg1=al"])
    ((point, element, charge),) = parse_interstitials(["0.5,0.5,0.5=Li:+1"])
    assert np.allclose(point, 0.5) and (element, charge) == ("Li", 1.0)
    with pytest.raises(InputError, match="three numbers"):
        parse_interstitials(["0.5,0.5=Li"])
    assert parse_center("#3") == 3 and parse_center("Na1") == "Na1"
    assert np.allclose(parse_center("0.25, 0.25, 0.25"), 0.25)


def test_library_takes_typed_values_and_refuses_text():
    crystal = _rocksalt()
    with pytest.raises(InputError, match="supercell"):
        tile_supercell(crystal, "2x2x2")
    with pytest.raises(InputError, match="Miller"):
        plane_section(crystal, "001")
    with pytest.raises(InputError, match="does not exist"):
        defect_energy(crystal, vacancy=["Cl1@0.5,0,0"])     # text is a label here, and no such label
    with pytest.raises(InputError, match="mapping"):
        defect_energy(crystal, substitute=["Na1=K"])
    with pytest.raises(InputError, match="not a site label"):
        resolve_center(crystal, "#0")
    # the typed forms name the same defects the text did
    by_label = defect_energy(crystal, vacancy=[("Cl1", (0.5, 0.0, 0.0))], tol=1e-10)
    by_index = defect_energy(crystal, vacancy=[4], tol=1e-10)
    assert by_label.defects[0].index == by_index.defects[0].index == 4
    assert by_label.defects[0].spec == "Cl1@0.5,0,0" and by_index.defects[0].spec == "#4"
    assert by_label.energy_change == pytest.approx(by_index.energy_change, abs=1e-9)
    # a substitution by a mapping: Na -> K keeps the charge, so only the ion's label changes
    same = defect_energy(crystal, substitute={"Na1": "K"}, tol=1e-10)
    assert same.defects[0].spec == "Na1=K" and same.energy_change == pytest.approx(0.0, abs=1e-9)


def test_supercell_cell_matches_the_tiling():
    crystal = _rocksalt()
    assert np.allclose(supercell_cell(crystal.cell, (2, 1, 3)), np.diag([8.0, 4.0, 12.0]))
    spaced = supercell_cell(crystal.cell, smallest_plane_spacing=7.0)
    assert np.allclose(spaced, tile_supercell(crystal, smallest_plane_spacing=7.0).crystal.cell)
    with pytest.raises(InputError, match="not both"):
        supercell_cell(crystal.cell, (2, 2, 2), 7.0)


def test_correction_command_with_a_supercell_and_no_charge(capsys):
    import json

    from madelung.cli import main

    # a 2x2x2 supercell of a 5 Å cube is a 10 Å cube: the image correction of q = 1 is
    # alpha_M k_e / (2 L) with alpha_M = 2.8372974794806 (simple cubic, Makov & Payne 1995)
    assert main(["correction", "--cell", "5", "--supercell", "2x2x2", "--charge", "1", "--series", "1,2",
                 "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert np.allclose(data["cell_angstrom"], 10 * np.eye(3)) and data["volume_angstrom3"] == pytest.approx(1000)
    assert data["effective_constant"] == pytest.approx(2.8372974794806, abs=1e-7)
    assert [entry["repeat"] for entry in data["series"]] == [1, 2]
    # no charge: no correction, and the effective constant is undefined (null), not a NaN crash
    assert main(["correction", "--cell", "5", "--charge", "0", "--series", "1,2", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["correction_eV"] == 0 and data["effective_constant"] is None
    assert main(["correction", "--cell", "5", "--supercell", "2x2", "--charge", "1"]) == 2
    assert "supercell '2x2'" in capsys.readouterr().err
