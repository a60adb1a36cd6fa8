"""The shared neighbour walk finds every pair within the cutoff exactly once: its counts and
distances against scipy.spatial.cKDTree (reference library) on the cell tiled with its images."""

import itertools

import numpy as np
import pytest
from scipy.spatial import cKDTree

from conftest import random_crystal
from madelung.structure.lattice import plane_spacings
from madelung.sums._kernels import kernels, point_kernels
from madelung.sums.geometry import build_bins, nearest_neighbour_distances, neighbour_pairs, shared_bins
from madelung.sums.shortrange import shortrange


def _images(cell, positions, cutoff):
    """Every atom and periodic image that can lie within ``cutoff`` of the cell, and the atom of each."""
    reach = np.ceil(cutoff / plane_spacings(cell)).astype(int) + 1
    shifts = np.array(list(itertools.product(*[range(-r, r + 1) for r in reach]))) @ cell
    tiled = (positions[None, :, :] + shifts[:, None, :]).reshape(-1, 3)
    return tiled, np.tile(np.arange(len(positions)), len(shifts))


def _reference_distances(cell, positions, origins, cutoff):
    """Sorted distances from each origin to every atom or image within ``cutoff`` (none zero)."""
    tiled, _ = _images(cell, positions, cutoff)
    tree = cKDTree(tiled)
    out = []
    for found, origin in zip(tree.query_ball_point(origins, cutoff), origins):
        d = np.linalg.norm(tiled[found] - origin, axis=1)
        out.append(np.sort(d[d > 1e-12]))
    return out


@pytest.mark.parametrize("seed", [3, 8])
def test_pairs_within_cutoff_found_once(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    cell = np.asarray(crystal.cell, float)
    positions = np.asarray(crystal.positions, float)
    cutoff = 1.7 * float(plane_spacings(cell).max())   # longer than the cell is thick: many images
    expected = _reference_distances(cell, positions, positions, cutoff)
    total = sum(len(d) for d in expected)

    bins = build_bins(cell, positions, cutoff)
    charges = bins.sorted_values(np.ones(len(positions)))
    *_, pairs = kernels.real_space_terms(bins.positions, charges, bins.cell, bins.counts, bins.offsets, bins.bin_of,
                                         bins.bin_start, 0.5, cutoff, False, False)
    assert pairs == total                                  # both orders of each pair, as in the double sum

    owner, partner, distance = neighbour_pairs(cell, positions, cutoff)
    assert len(owner) == total
    for i, reference in enumerate(expected):
        assert np.allclose(np.sort(distance[owner == i]), reference, rtol=1e-12, atol=0)

    symbols = sorted(set(crystal.symbols))
    model = {"madelung_repulsion": 1, "cutoff": cutoff, "switch_width": 1.0,
             "pairs": [{"ions": [a, b], "form": "born-mayer", "A": 100.0, "rho": 0.3}
                       for a, b in itertools.combinations_with_replacement(symbols, 2)]}
    assert shortrange(crystal, model).pairs == total


def test_points_see_every_ion_within_cutoff():
    rng = np.random.default_rng(5)
    crystal = random_crystal(rng)
    cell = np.asarray(crystal.cell, float)
    positions = np.asarray(crystal.positions, float)
    cutoff = 1.3 * float(plane_spacings(cell).max())
    bins = build_bins(cell, positions, cutoff)
    frac = rng.random((40, 3))
    points = frac @ bins.cell
    point_bin = np.minimum(np.floor(frac * bins.counts).astype(np.int64), bins.counts - 1)
    expected = _reference_distances(bins.cell, bins.positions, points, cutoff)
    _, _, nearest, _, pairs = point_kernels.real_space_at_points(
        points, point_bin, np.full(len(points), -1, dtype=np.int64), bins.positions,
        bins.sorted_values(np.ones(len(positions))), bins.cell, bins.counts, bins.offsets, bins.bin_start,
        0.5, 0.0, cutoff, 1e-4, False)
    assert pairs == sum(len(d) for d in expected)
    assert np.allclose(nearest, [d[0] for d in expected], rtol=1e-12, atol=0)


@pytest.mark.parametrize("seed", [4, 9])
def test_searches_sharing_bins_find_every_pair(seed):
    """Inside shared_bins a shorter search walks the bins of a longer one (kept from the first);
    its pairs and nearest distances still match scipy's cKDTree (reference library) on the tiled cell."""
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    cell = np.asarray(crystal.cell, float)
    positions = np.asarray(crystal.positions, float)
    long_cutoff = 1.5 * float(plane_spacings(cell).max())
    short_cutoff = 0.45 * long_cutoff
    with shared_bins():
        to_any, _, _ = nearest_neighbour_distances(cell, positions, crystal.charges)
        neighbour_pairs(cell, positions, long_cutoff)
        owner, partner, distance = neighbour_pairs(cell, positions, short_cutoff)
    expected = _reference_distances(cell, positions, positions, short_cutoff)
    assert len(owner) == sum(len(d) for d in expected)
    for i, reference in enumerate(expected):
        assert np.allclose(np.sort(distance[owner == i]), reference, rtol=1e-12, atol=0)
    nearest = _reference_distances(cell, positions, positions, long_cutoff)
    assert np.allclose(to_any, [d[0] for d in nearest], rtol=1e-12, atol=0)


def test_bins_given_must_cover_the_cutoff():
    crystal = random_crystal(np.random.default_rng(2))
    cell, positions = np.asarray(crystal.cell, float), np.asarray(crystal.positions, float)
    bins = build_bins(cell, positions, 2.0)
    with pytest.raises(ValueError):
        neighbour_pairs(cell, positions, 3.0, bins=bins)
