"""Results do not depend on the number of threads: the kernels split work into a fixed number
of chunks and add the chunks in a fixed order (agreement to ~1e-13 relative; the expected
results themselves are checked against references in the other tests)."""

import numba
import numpy as np
import pytest
from ase.build import bulk

import madelung
from madelung.sums._kernels import kernels
from madelung.sums.plan import reciprocal_vectors
from madelung.sums.geometry import build_bins, wrapped_fractional

pytestmark = pytest.mark.skipif(numba.config.NUMBA_NUM_THREADS < 2, reason="needs two threads")


def _rattled_rock_salt(repeats, seed=3):
    atoms = bulk("NaCl", "rocksalt", a=5.64, cubic=True).repeat(repeats)
    atoms.positions += np.random.default_rng(seed).normal(scale=0.1, size=atoms.positions.shape)
    charges = np.where(np.array(atoms.get_chemical_symbols()) == "Na", 1.0, -1.0)
    return madelung.Crystal.from_ase(atoms, charges)


def _on_threads(count, function):
    previous = numba.get_num_threads()
    numba.set_num_threads(count)
    try:
        return function()
    finally:
        numba.set_num_threads(previous)


def _close(a, b, rtol=1e-13):
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    return np.max(np.abs(a - b)) <= rtol * max(np.max(np.abs(b)), 1e-300)


def test_real_space_kernel_same_on_one_and_two_threads():
    crystal = _rattled_rock_salt(4)
    bins = build_bins(crystal.cell, crystal.positions, 10.0)
    args = (bins.positions, bins.sorted_values(crystal.charges), bins.cell, bins.counts, bins.offsets,
            bins.bin_of, bins.bin_start, 0.32, 10.0, True, True)
    one = _on_threads(1, lambda: kernels.real_space_terms(*args))
    two = _on_threads(2, lambda: kernels.real_space_terms(*args))
    for a, b in zip(one[:3], two[:3]):
        assert _close(a, b)
    assert one[3] == two[3]


def test_reciprocal_kernels_same_on_one_and_two_threads():
    crystal = _rattled_rock_salt(3)
    cell = np.ascontiguousarray(crystal.cell)
    charges = np.ascontiguousarray(crystal.charges)
    hkl, kvectors, hmax = reciprocal_vectors(cell, 2.0)
    frac = wrapped_fractional(cell, crystal.positions)
    weights = np.ascontiguousarray(np.exp(-np.einsum("ij,ij->i", kvectors, kvectors) / 0.4))

    def run():
        s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
        return (s_re, s_im) + kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights,
                                                               s_re, s_im, True)

    for a, b in zip(_on_threads(1, run), _on_threads(2, run)):
        assert _close(a, b)


@pytest.mark.parametrize("method", ["direct", "mesh"])
def test_ewald_same_on_one_and_two_threads(method):
    crystal = _rattled_rock_salt(4)
    one = _on_threads(1, lambda: madelung.ewald(crystal, tol=1e-8, forces=True, stress=True, method=method))
    two = _on_threads(2, lambda: madelung.ewald(crystal, tol=1e-8, forces=True, stress=True, method=method))
    assert abs(one.energy - two.energy) <= 1e-13 * abs(one.energy)
    assert _close(one.potentials, two.potentials)
    assert _close(one.forces, two.forces, 1e-12)
    assert _close(one.stress, two.stress, 1e-12)
