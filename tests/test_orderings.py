"""Orderings of disordered sites: matrix energies against full Ewald sums, orbit counts against
Burnside's lemma and brute force, the classic lowest orderings of ±1 charges, and the command line."""

import json
import os

import numpy as np
import pytest

import madelung
from madelung import Crystal, InputError, rank_orderings
from madelung.analysis.ordering_symmetry import burnside_count, canonical_form
from madelung.analysis.orderings import ordering_problem
from madelung.cli import main
from madelung.units import COULOMB_CONSTANT

DATA = os.path.join(os.path.dirname(__file__), "data")
LICOO2 = os.path.join(DATA, "Li0.5CoO2_half_lithiated.cif")
SPINEL = os.path.join(DATA, "MgAl2O4_half_inverse.cif")
PLUS_MINUS = {"Na": 1.0, "Cl": -1.0}

# Madelung constants referred to the nearest-neighbour distance (fact of the trade; e.g. Kittel,
# Introduction to Solid State Physics, and every table of Madelung constants).
ROCK_SALT = 1.747564594633
CESIUM_CHLORIDE = 1.762674773070


def simple_cubic(a=2.82):
    """One site per cube corner, half Na+ and half Cl- (the charges of the ions, not the average)."""
    return Crystal(np.eye(3) * a, [[0, 0, 0]], [0.0], ["Na"], species=[(("Na", 0.5), ("Cl", 0.5))])


def body_centred_cubic(a=4.11):
    cell = 0.5 * a * (np.ones((3, 3)) - 2 * np.eye(3))
    return Crystal(cell, [[0, 0, 0]], [0.0], ["Cs"], species=[(("Na", 0.5), ("Cl", 0.5))])


def _ewald_check(ranking, rows, tol=1e-10):
    """Matrix energy of each ordering equals a full Ewald sum of the ordered crystal to the contract."""
    problem = ranking.problem
    for row in rows:
        ordered = problem.crystal_of(row)
        reference = madelung.ewald(ordered, tol=1e-12)
        assert abs(problem.energy_of(row) - reference.energy) <= tol * reference.energy_scale


def test_every_ordering_energy_equals_ewald_rock_salt():
    ranking = rank_orderings(simple_cubic(), (2, 2, 2), keep=100, ion_charges=PLUS_MINUS)
    assert ranking.method == "enumeration" and len(ranking.orderings) == ranking.enumerated_distinct
    _ewald_check(ranking, [o.codes for o in ranking.orderings])
    # the table energies are the matrix energies of the orderings they name
    for index, energy in zip(ranking.indices, ranking.energies):
        assert ranking.problem.energy_of(ranking.problem.ordering_at(index)) == pytest.approx(energy, abs=1e-9)


def test_every_ordering_energy_equals_ewald_with_vacancies_and_fixed_ions():
    crystal = Crystal.from_file(LICOO2)
    ranking = rank_orderings(crystal, (2, 1, 1), keep=100)
    assert {o for row in ranking.orderings for o in row.occupation} == {"Li", "vacancy"}
    _ewald_check(ranking, [o.codes for o in ranking.orderings])


def test_mixed_cations_on_two_sublattices_energy_equals_ewald():
    crystal = Crystal.from_file(SPINEL)
    ranking = rank_orderings(crystal, 1, keep=12, ion_charges={"Mg": 2, "Al": 3})
    assert len(ranking.sublattices) == 2
    _ewald_check(ranking, [o.codes for o in ranking.orderings])


def _brute_force_orbits(problem):
    forms = set()
    for index in range(problem.total_orderings):
        form, _ = canonical_form(problem.ordering_at(index), problem.inverse_ops)
        forms.add(form.tobytes())
    return len(forms)


@pytest.mark.parametrize("crystal, supercell, charges", [
    (simple_cubic(), (2, 2, 2), PLUS_MINUS),
    (body_centred_cubic(), (2, 2, 2), PLUS_MINUS),
    (simple_cubic(), (2, 2, 3), PLUS_MINUS),
])
def test_distinct_counts_burnside_brute_force_and_enumeration(crystal, supercell, charges):
    ranking = rank_orderings(crystal, supercell, keep=1, ion_charges=charges)
    problem = ranking.problem
    brute = _brute_force_orbits(problem)
    perms = np.argsort(problem.inverse_ops, axis=1)
    assert burnside_count(perms, problem.segments, problem.counts) == brute
    assert ranking.distinct_orderings == brute == ranking.enumerated_distinct
    # orbit sizes add up to every ordering
    assert int(ranking.degeneracies.sum()) == ranking.total_orderings


def test_distinct_counts_with_vacancies():
    problem = ordering_problem(Crystal.from_file(LICOO2), (2, 2, 1))
    ranking = rank_orderings(Crystal.from_file(LICOO2), (2, 2, 1), keep=1)
    assert ranking.distinct_orderings == _brute_force_orbits(problem) == ranking.enumerated_distinct
    assert ranking.total_orderings == 924  # C(12, 6)


def test_plus_minus_on_simple_cubic_gives_rock_salt():
    # fact of the trade: ±1 charges on a simple-cubic lattice order as rock salt
    a = 2.82
    ranking = rank_orderings(simple_cubic(a), (2, 2, 2), keep=3, ion_charges=PLUS_MINUS)
    best = ranking.orderings[0]
    assert best.space_group == "Fm-3m (225)"
    assert best.degeneracy == 2
    assert best.energy_per_formula_unit == pytest.approx(-ROCK_SALT * COULOMB_CONSTANT / a, rel=1e-9)
    assert ranking.orderings[1].energy_above_lowest > 0


def test_plus_minus_on_body_centred_cubic_gives_cesium_chloride():
    # fact of the trade: ±1 charges on a body-centred-cubic lattice order as CsCl
    a = 4.11
    ranking = rank_orderings(body_centred_cubic(a), (2, 2, 2), keep=2, ion_charges=PLUS_MINUS)
    best = ranking.orderings[0]
    assert best.space_group == "Pm-3m (221)"
    nearest = a * np.sqrt(3) / 2
    assert best.energy_per_formula_unit == pytest.approx(-CESIUM_CHLORIDE * COULOMB_CONSTANT / nearest, rel=1e-9)


def test_search_finds_rock_salt_in_4x4x4():
    a = 2.82
    ranking = rank_orderings(simple_cubic(a), (4, 4, 4), keep=3, ion_charges=PLUS_MINUS, restarts=4)
    assert ranking.method == "search" and ranking.indices is None
    assert ranking.total_orderings == 1832624140942590534  # C(64, 32)
    best = ranking.orderings[0]
    assert best.space_group == "Fm-3m (225)"
    assert best.energy_per_formula_unit == pytest.approx(-ROCK_SALT * COULOMB_CONSTANT / a, rel=1e-9)
    _ewald_check(ranking, [best.codes])


def test_workers_give_the_same_ranking():
    one = rank_orderings(simple_cubic(), (2, 2, 3), keep=5, ion_charges=PLUS_MINUS)
    two = rank_orderings(simple_cubic(), (2, 2, 3), keep=5, ion_charges=PLUS_MINUS, workers=2)
    assert np.array_equal(np.sort(one.indices), np.sort(two.indices))  # the same orbit minima
    assert np.allclose(np.sort(one.energies), np.sort(two.energies), rtol=0, atol=1e-9)


def test_refusals():
    crystal = Crystal.from_file(LICOO2)
    with pytest.raises(InputError, match=r"multiple of 2, e.g. 2x1x1"):
        rank_orderings(crystal, 1)
    with pytest.raises(InputError, match="net charge"):
        rank_orderings(crystal, (2, 1, 1), ion_charges={"Li": 2.0})
    assert rank_orderings(crystal, (2, 1, 1), ion_charges={"Li": 2.0}, background=True).net_charge == pytest.approx(3.0)
    with pytest.raises(InputError, match="nothing to order"):
        rank_orderings(Crystal(np.eye(3) * 3, [[0, 0, 0]], [0.0]), 2)
    mixed = Crystal(np.eye(3) * 3, [[0, 0, 0]], [2.5], ["Mg"], species=[(("Mg", 0.5), ("Al", 0.5))])
    with pytest.raises(InputError, match="give the charge of each ion"):
        rank_orderings(mixed, 2)


def test_command_line_end_to_end(tmp_path, capsys):
    out = tmp_path / "li"
    assert main(["orderings", LICOO2, "--supercell", "2x2x1", "--keep", "4", "--out", str(out), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["method"] == "enumeration" and report["distinct_orderings_found"] == report[
        "distinct_orderings_burnside"]
    assert len(report["files"]["cif"]) == 4 and os.path.exists(report["files"]["table"])
    import pyarrow.parquet as pq

    table = pq.read_table(report["files"]["table"]).to_pydict()
    assert len(table["rank"]) == report["distinct_orderings_found"]
    for entry, path in zip(report["orderings"], report["files"]["cif"]):
        # the CIF reads back through the tool with the same charges and the same energy
        back = Crystal.from_file(path)
        assert sorted(np.unique(back.charges)) == [-2.0, 1.0, 3.5]
        assert back.net_charge == pytest.approx(0, abs=1e-9)
        assert madelung.ewald(back).energy == pytest.approx(entry["energy_eV"], abs=1e-7)
    before = os.path.getmtime(report["files"]["cif"][0])
    assert main(["orderings", LICOO2, "--supercell", "2x2x1", "--out", str(out)]) == 2
    assert "not empty" in capsys.readouterr().err
    assert os.path.getmtime(report["files"]["cif"][0]) == before
    assert main(["orderings", LICOO2, "--out", str(tmp_path / "odd")]) == 2
    assert "multiple of 2" in capsys.readouterr().err


def test_command_line_mixed_sites_text_report(tmp_path, capsys):
    assert main(["orderings", SPINEL, "--keep", "3", "--out", str(tmp_path / "sp"), "--table", "csv"]) == 0
    text = capsys.readouterr().out
    assert "equal to Burnside's count" in text and "first filter" in text
    assert os.path.exists(tmp_path / "sp" / "energies.csv")


def test_search_finds_the_lowest_distinct_orderings_the_enumeration_finds():
    crystal = Crystal.from_file(LICOO2)
    exact = rank_orderings(crystal, (2, 2, 1), keep=10, method="enumeration")
    search = rank_orderings(crystal, (2, 2, 1), keep=5, method="search", restarts=4)
    assert search.method == "search" and len(search.orderings) == 5
    assert np.allclose([o.energy for o in search.orderings], [o.energy for o in exact.orderings[:5]], rtol=0,
                       atol=1e-8)
    # orderings of equal energy (mirror-image pairs) may come in either order: each found ordering
    # is one the enumeration has at that energy, with the same degeneracy
    for found in search.orderings:
        assert any(abs(o.energy - found.energy) <= 1e-8 and o.degeneracy == found.degeneracy
                   for o in exact.orderings)


def test_matrix_supercell_keeps_the_mixed_sites():
    # a √2 x √2 x 2 supercell given as a matrix: 4 sites, C(4, 2) = 6 orderings, rock salt among them
    ranking = rank_orderings(simple_cubic(), [[1, 1, 0], [-1, 1, 0], [0, 0, 2]], keep=10, ion_charges=PLUS_MINUS)
    assert ranking.total_orderings == 6 and ranking.distinct_orderings == ranking.enumerated_distinct
    assert ranking.orderings[0].space_group == "Fm-3m (225)"
    _ewald_check(ranking, [o.codes for o in ranking.orderings])
