"""Interstitial search, point-defect energetics and vacancy ranking."""

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
from ase.io.cube import read_cube_data
from matplotlib.image import imread

import madelung
from madelung import Crystal, InputError, MadelungWarning
from madelung.cli import main
from madelung.analysis.defects import (defect_energy, find_interstitials, tile_supercell, near_cubic_matrix,
                                       potential_at, vacancy_ranking)
from madelung.sums.geometry import plane_spacings
from madelung.units import COULOMB_CONSTANT as K_E

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"

# Point charge in a neutralizing background on a simple cubic lattice of side L:
# E = -q^2 alpha / (2 L), alpha = 2.8373 (G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014).
ALPHA_SC = 2.8373


def _load(name):
    return Crystal.from_file(STRUCTURES / name)


def _lone_charge(cell, q):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        return madelung.ewald(Crystal(cell, [[0.0, 0.0, 0.0]], [q]), tol=1e-12).energy


# ----------------------------------------------------------------------------- interstitials
def _same_site(cell, frac, target):
    diff = np.asarray(frac) - np.asarray(target)
    return np.linalg.norm((diff - np.round(diff)) @ cell) < 1e-3


def test_fluorite_cation_interstitial_is_the_empty_cube_centre():
    # In fluorite the cation interstitial sits in the empty F8 cube, the 4b site (1/2, 1/2, 1/2)
    # with Ca on 4a, a*sqrt(3)/4 from eight F (fact of the trade).
    crystal = _load("fluorite-CaF2.cif")
    search = find_interstitials(crystal, +1)
    assert len(search.sites) >= 1
    best = search.sites[0]
    assert _same_site(crystal.cell, best.fractional, [0.5, 0.5, 0.5])
    assert best.multiplicity == 4
    assert best.nearest_label == "F1"
    assert best.nearest_distance == pytest.approx(crystal.cell[0, 0] * math.sqrt(3) / 4, abs=1e-4)


def test_rock_salt_interstitial_is_the_tetrahedral_hole():
    # In rock salt every octahedral hole is filled by the other ion; the empty holes are the
    # tetrahedral 8c sites (1/4, 1/4, 1/4), a*sqrt(3)/4 from four Na and four Cl (fact of the trade).
    crystal = _load("rocksalt-NaCl.cif")
    search = find_interstitials(crystal, +1)
    assert len(search.sites) == 1
    site = search.sites[0]
    assert any(_same_site(crystal.cell, site.fractional, t) for t in ([0.25] * 3, [0.75] * 3))
    assert site.multiplicity == 8
    assert site.nearest_distance == pytest.approx(crystal.cell[0, 0] * math.sqrt(3) / 4, abs=1e-4)
    # by symmetry (cations and anions swap under a/2 translations) the potential there is zero
    assert abs(site.potential) < 1e-7


def test_interstitial_energies_are_probe_times_potential():
    crystal = _load("fluorite-CaF2.cif")
    search = find_interstitials(crystal, -1.0, spacing=0.3)
    for site in search.sites:
        phi = potential_at(crystal, site.position).potentials[0]
        assert site.electrostatic_energy == pytest.approx(-phi, abs=1e-6)
        assert site.total_energy == pytest.approx(site.electrostatic_energy + site.contact_energy, abs=1e-12)


def test_interstitial_search_bad_input():
    crystal = _load("rocksalt-NaCl.cif")
    with pytest.raises(InputError):
        find_interstitials(crystal, 0.0)
    with pytest.raises(InputError):
        find_interstitials(crystal, 1.0, spacing=-0.1)


# ----------------------------------------------------------------------------- supercells
def test_near_cubic_supercell_reaches_the_length_with_few_cells():
    from ase.build import bulk

    fcc = Crystal.from_ase(bulk("NaCl", "rocksalt", a=5.64), {"Na": 1, "Cl": -1})
    matrix = near_cubic_matrix(fcc.cell, 10.0)
    assert plane_spacings(matrix @ fcc.cell).min() >= 10.0
    # never more cells than the plain diagonal repeat that reaches the length
    diagonal = np.ceil(10.0 / plane_spacings(fcc.cell))
    assert round(abs(np.linalg.det(matrix))) <= np.prod(diagonal)
    sc = tile_supercell(fcc, smallest_plane_spacing=10.0)
    assert len(sc.crystal) == 2 * sc.size
    # the energy per ion of a supercell is the parent's (supercell invariance)
    per_ion = madelung.ewald(sc.crystal).energy / len(sc.crystal)
    assert per_ion == pytest.approx(madelung.ewald(fcc).energy / len(fcc), rel=1e-9)


# ----------------------------------------------------------------------------- vacancies
def test_vacancy_energy_is_minus_q_phi_plus_the_background_term():
    # Derived in madelung.analysis.defects: removing ion v (charge q) from a supercell changes the energy
    # by -q phi_v + E_point(q), E_point the Ewald energy of a lone charge q with its background.
    crystal = _load("rocksalt-MgO.cif")
    result = defect_energy(crystal, vacancy=["O1"], supercell=(2, 2, 2), tol=1e-12)
    sc = result.supercell.crystal
    q = -2.0
    phi = madelung.ewald(sc, tol=1e-12).potentials[result.defects[0].index]
    expected = -q * phi + _lone_charge(sc.cell, q)
    assert result.energy_change == pytest.approx(expected, abs=1e-8)
    assert abs(result.identity_residual) < 1e-8
    assert result.background
    # the supercell is a cube of side 2a: the background term is -q^2 alpha_sc k_e / (2 L) (Makov & Payne)
    length = sc.cell[0, 0]
    assert result.defect_array_energy == pytest.approx(-q * q * ALPHA_SC * K_E / (2 * length), rel=2e-5)
    # the eps = 1 image correction brings the supercell value to the dilute-limit estimate
    assert result.energy_change + result.image_correction == pytest.approx(result.madelung_estimate, abs=1e-8)
    assert result.madelung_estimate == pytest.approx(-q * phi, abs=1e-9)


def test_symmetric_sites_give_identical_numbers():
    crystal = _load("spinel-MgAl2O4.cif")
    a = defect_energy(crystal, vacancy=["O1"], tol=1e-11, neighbour_radius=2.5)
    b = defect_energy(crystal, vacancy=[("O1", (0.74, 0.74, 0.74))], tol=1e-11, neighbour_radius=2.5)
    assert a.defects[0].index != b.defects[0].index
    assert b.energy_change == pytest.approx(a.energy_change, abs=1e-8)
    assert b.defects[0].potential == pytest.approx(a.defects[0].potential, abs=1e-9)
    assert np.allclose(sorted(n.change for n in a.neighbours), sorted(n.change for n in b.neighbours), atol=1e-8)


def test_neighbour_potential_change_is_the_defect_charge_potential():
    # Delta phi_j at a remaining site is the potential there of the periodic defect charge
    # (Dq = -q at the vacancy, with its background): superposition, derived.
    crystal = _load("rocksalt-MgO.cif")
    result = defect_energy(crystal, vacancy=["Mg1"], supercell=(2, 2, 2), tol=1e-12, neighbour_radius=3.0)
    sc = result.supercell.crystal
    d = result.defects[0]
    defect_charge = Crystal(sc.cell, [d.position], [d.delta_charge], min_distance=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        expected = potential_at(defect_charge, sc.positions[[n.index for n in result.neighbours]], tol=1e-12)
    assert len(result.neighbours) == 6 + 12  # first shell O (a/2) and second shell Mg (a/sqrt(2))
    assert np.allclose([n.change for n in result.neighbours], expected.potentials, atol=1e-8)


def test_substitution_and_interstitial_identities():
    crystal = _load("rocksalt-MgO.cif")
    sub = defect_energy(crystal, substitute={"Mg1": "Al"}, supercell=2, tol=1e-12)
    assert sub.defects[0].charge_after == 3.0  # Al's only common oxidation state (mendeleev)
    sc = sub.supercell.crystal
    phi = madelung.ewald(sc, tol=1e-12).potentials[sub.defects[0].index]
    assert sub.energy_change == pytest.approx(1.0 * phi + _lone_charge(sc.cell, 1.0), abs=1e-8)
    inter = defect_energy(crystal, interstitial=[((0.25, 0.25, 0.25), "Li")], supercell=2, tol=1e-12)
    phi_i = potential_at(sc, inter.defects[0].position, tol=1e-12).potentials[0]
    assert inter.energy_change == pytest.approx(1.0 * phi_i + _lone_charge(sc.cell, 1.0), abs=1e-8)


def test_neutral_schottky_pair_needs_no_background():
    crystal = _load("rocksalt-MgO.cif")
    result = defect_energy(crystal, vacancy=["Mg1", ("O1", (0.5, 0.5, 0.5))], supercell=(2, 2, 2), tol=1e-12)
    assert not result.background
    assert result.defect_charge == 0
    assert result.image_correction == 0
    assert abs(result.identity_residual) < 1e-8
    # two separated vacancies attract: the pair costs less than the two isolated estimates
    assert result.energy_change < result.madelung_estimate


def test_vacancy_ranking_of_the_layered_perovskite():
    crystal = _load("layered-perovskite-Sr2TiO4.cif")
    ranking = vacancy_ranking(crystal, "anions", supercell=(2, 2, 1), tol=1e-11)
    assert [r.label for r in ranking.rows] == sorted([r.label for r in ranking.rows],
                                                    key=lambda lab: dict((r.label, r.madelung_estimate)
                                                                         for r in ranking.rows)[lab])
    assert {r.label for r in ranking.rows} == {"O1", "O2"}
    assert all(r.multiplicity == 4 for r in ranking.rows)
    first, second = ranking.rows
    assert first.madelung_estimate < second.madelung_estimate - 1.0
    for r in ranking.rows:
        # the direct supercell value is the estimate plus the lone-charge background term
        assert r.supercell_energy == pytest.approx(r.madelung_estimate + r.image_term, abs=1e-7)
        assert r.image_term == pytest.approx(_lone_charge(ranking.supercell.crystal.cell, r.charge), abs=1e-8)


# ----------------------------------------------------------------------------- bad input and CLI
def test_bad_defect_input():
    crystal = _load("rocksalt-MgO.cif")
    with pytest.raises(InputError, match="does not exist"):
        defect_energy(crystal, vacancy=["Q1"])
    with pytest.raises(InputError, match="on top of an existing ion"):
        defect_energy(crystal, interstitial=[((0.5, 0.5, 0.5), "Li")])
    with pytest.raises(InputError, match="same site"):
        defect_energy(crystal, vacancy=["O1"], substitute={"O1": ("F", -1)})
    with pytest.raises(InputError, match="give the charge"):
        defect_energy(crystal, substitute={"Mg1": "Fe"})
    with pytest.raises(InputError):
        defect_energy(crystal)


@pytest.mark.parametrize("argv, message", [
    (["defect", "rocksalt-MgO.cif", "--vacancy", "Xx7"], "does not exist"),
    (["defect", "rocksalt-MgO.cif", "--interstitial", "0,0,0=Li"], "on top of an existing ion"),
    (["interstitials", "rocksalt-MgO.cif", "--probe", "0"], "probe charge"),
])
def test_cli_bad_input_exit_code_2(argv, message, capsys):
    argv = [argv[0], str(STRUCTURES / argv[1])] + argv[2:]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1


def test_cli_defect_rank_and_interstitials(capsys):
    cif = str(STRUCTURES / "layered-perovskite-Sr2TiO4.cif")
    assert main(["defect", cif, "--rank-vacancies", "anions", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert [s["label"] for s in data["sites"]] == [r.label for r in vacancy_ranking(_load(
        "layered-perovskite-Sr2TiO4.cif")).rows]
    fluorite = str(STRUCTURES / "fluorite-CaF2.cif")
    assert main(["interstitials", fluorite, "--probe", "+1", "--grid", "0.3", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert np.allclose(np.asarray(data["sites"][0]["fractional"]) % 1.0, 0.5, atol=1e-4)


def test_cli_defect_report_and_map(tmp_path, capsys):
    mgo = str(STRUCTURES / "rocksalt-MgO.cif")
    assert main(["defect", mgo, "--vacancy", "O1", "--supercell", "2x2x2", "--dielectric", "9.8", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["energy_change_plus_image_correction_eV"] == pytest.approx(data["madelung_estimate_eV"], abs=1e-7)
    assert data["dielectric_correction_eV"] == pytest.approx(data["image_correction_vacuum_eV"] / 9.8, rel=1e-9)
    prefix = tmp_path / "mgo"
    assert main(["map", mgo, "--grid", "0.5", "--plane", "001", "--offset", "0.5", "--output", str(prefix)]) == 0
    capsys.readouterr()
    _check_map_files(tmp_path / "mgo.cube", tmp_path / "mgo.png", _load("rocksalt-MgO.cif"), grid=0.5)


def _check_map_files(cube_path, png_path, crystal, grid):
    """The map command's files read back: the cube holds the library's grid, the PNG is a real image."""
    values, atoms = read_cube_data(str(cube_path))
    expected = madelung.potential_grid(crystal, grid, smearing=0.3, tol=1e-8)
    assert values.shape == tuple(expected.shape)
    # the cube format keeps six significant digits
    scale = np.abs(expected.values).max()
    assert np.abs(values - expected.values).max() < 1e-5 * scale
    assert np.allclose(atoms.cell[:], crystal.cell, atol=1e-5)
    assert np.allclose(atoms.positions, crystal.positions, atol=1e-5)
    # grid point (i, j, k) of the file is the fractional point (i/n1, j/n2, k/n3): spot-check it against
    # the potential at that point computed directly, and the Ewald convention (zero cell average)
    i, j, k = (n // 3 for n in values.shape)
    point = (np.array([i, j, k]) / np.array(values.shape)) @ crystal.cell
    direct = madelung.potential_at(crystal, point[None, :], smearing=0.3, tol=1e-10)
    assert values[i, j, k] == pytest.approx(float(direct.potentials[0]), abs=1e-5 * scale)
    assert abs(values.mean()) < 1e-4 * scale
    image = imread(str(png_path))
    # figure 6.4 x 5.2 in at 120 dpi, trimmed to its drawing: a few hundred pixels each way, RGBA in [0, 1]
    assert image.ndim == 3 and image.shape[2] in (3, 4)
    assert 300 < image.shape[0] < 700 and 400 < image.shape[1] < 850
    assert image.min() >= 0.0 and image.max() <= 1.0
    # a heat map, not a blank page: many distinct colours, dark axes and text present
    assert len(np.unique(image[..., :3].reshape(-1, 3), axis=0)) > 50
    assert image[..., :3].min() < 0.2


def test_defect_series_extrapolates_to_the_madelung_estimate():
    # In cubic supercells of side L the charged vacancy's energy is E_dilute - q^2 alpha_sc k_e / (2 L)
    # (Makov & Payne 1995, alpha_sc = 2.8373): the 1/L fit recovers both numbers.
    from madelung.analysis.defects import defect_series

    crystal = _load("rocksalt-MgO.cif")
    series = defect_series(crystal, (1, 2, 3), vacancy=["O1"], tol=1e-11)
    assert series.dilute_limit == pytest.approx(series.madelung_estimate, abs=1e-6)
    assert series.slope == pytest.approx(-4.0 * ALPHA_SC * K_E / 2.0, rel=2e-5)
    assert np.allclose(series.corrected, series.madelung_estimate, atol=1e-6)


def test_a_site_at_a_point_is_the_same_site_in_every_supercell():
    # (label, point) is read in the input cell's fractional coordinates, as interstitial points are,
    # so a series over growing supercells follows one site (rock salt: O at (1/2, 1/2, 1/2) of the
    # conventional cell, a fact of the trade)
    crystal = _load("rocksalt-MgO.cif")
    target = np.array([0.5, 0.5, 0.5]) @ crystal.cell
    for repeats in (1, 2, 3):
        result = defect_energy(crystal, vacancy=[("O1", (0.5, 0.5, 0.5))], supercell=repeats, tol=1e-8)
        assert np.allclose(result.defects[0].position, target, atol=1e-9)
