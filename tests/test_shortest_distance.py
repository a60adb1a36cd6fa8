"""The one-pass shortest interionic distance against facts of the trade and a brute-force search."""

import itertools

import numpy as np
import pytest
from ase.build import bulk

from conftest import random_crystal
from madelung.sums.geometry import nearest_neighbour_distances, shortest_distance


def _brute_force(cell, positions, reach=3):
    best = np.inf
    for shift in itertools.product(range(-reach, reach + 1), repeat=3):
        offset = np.array(shift) @ cell
        d = np.linalg.norm(positions[:, None, :] - positions[None, :, :] - offset, axis=2)
        if shift == (0, 0, 0):
            d[np.diag_indices(len(positions))] = np.inf
        best = min(best, d.min())
    return best


@pytest.mark.parametrize("structure, a, expected", [
    ("rocksalt", 5.64, 0.5),                # NaCl: cation-anion distance a/2 (fact of the trade)
    ("cesiumchloride", 4.12, 3 ** 0.5 / 2),  # CsCl: body diagonal a sqrt(3)/2 (fact of the trade)
    ("fcc", 4.05, 2 ** -0.5),               # fcc: a / sqrt(2) (fact of the trade)
])
def test_prototypes(structure, a, expected):
    symbols = {"rocksalt": "NaCl", "cesiumchloride": "CsCl", "fcc": "Al"}[structure]
    atoms = bulk(symbols, structure, a=a)
    assert shortest_distance(atoms.cell[:], atoms.positions) == pytest.approx(expected * a, rel=1e-12)
    supercell = atoms.repeat((3, 2, 2))
    assert shortest_distance(supercell.cell[:], supercell.positions) == pytest.approx(expected * a, rel=1e-12)


def test_random_triclinic_cells_against_brute_force():
    rng = np.random.default_rng(11)
    for _ in range(25):
        crystal = random_crystal(rng)
        expected = _brute_force(crystal.cell, crystal.positions)
        assert shortest_distance(crystal.cell, crystal.positions) == pytest.approx(expected, rel=1e-12)
        to_any, _, _ = nearest_neighbour_distances(crystal.cell, crystal.positions, crystal.charges)
        assert to_any.min() == pytest.approx(expected, rel=1e-12)


def test_single_atom_sees_its_images():
    cell = np.array([[3.0, 0.0, 0.0], [0.5, 4.0, 0.0], [0.0, 0.0, 5.0]])
    assert shortest_distance(cell, np.zeros((1, 3))) == pytest.approx(3.0, rel=1e-12)


@pytest.mark.parametrize("pair_list", [True, False], ids=["pair list", "nearest kernel"])
def test_both_search_paths_against_brute_force(monkeypatch, pair_list):
    """Small cells reduce the shared walk's pair list, large ones use the nearest-partner kernel;
    both must give the brute-force nearest distances (per atom, of any and of opposite sign) and a
    partner at that distance, and agree with the one-pass shortest distance."""
    from madelung.sums import geometry
    monkeypatch.setattr(geometry, "PAIR_LIST_MAX_ATOMS", 10 ** 9 if pair_list else 0)
    monkeypatch.setattr(geometry, "_SHORTEST", {})
    rng = np.random.default_rng(29)
    for _ in range(12):
        crystal = random_crystal(rng)
        cell, positions, charges = crystal.cell, crystal.positions, crystal.charges
        to_any, to_opposite, partner = nearest_neighbour_distances(cell, positions, charges)
        for i in range(len(positions)):
            best, best_opposite = np.inf, np.inf
            for shift in itertools.product(range(-3, 4), repeat=3):
                d = np.linalg.norm(positions[i] - positions - np.array(shift) @ cell, axis=1)
                if shift == (0, 0, 0):
                    d[i] = np.inf
                best = min(best, d.min())
                unlike = charges * charges[i] < 0
                if unlike.any():
                    best_opposite = min(best_opposite, d[unlike].min())
            assert to_any[i] == pytest.approx(best, rel=1e-12)
            assert to_opposite[i] == pytest.approx(best_opposite, rel=1e-12)
            # the partner named is one at that distance
            gap = positions[i] - positions[partner[i]]
            images = [np.linalg.norm(gap - np.array(s) @ cell) for s in itertools.product(range(-3, 4), repeat=3)]
            assert min(images, key=lambda d: abs(d - best)) == pytest.approx(best, rel=1e-12)
        assert shortest_distance(cell, positions) == pytest.approx(to_any.min(), rel=1e-12)
