"""The mesh part's one-array memory layout against scipy's transforms, and the tuner's mesh memory
bound against the plan's."""

import numpy as np
import pytest
import scipy.fft

from madelung.structure.bounds import MAX_MESH_BYTES, MESH_BYTES_PER_POINT, check_mesh
from madelung.sums import mesh as mesh_module
from madelung.sums import tuning
from madelung.sums._kernels import mesh_kernels
from madelung.units import COULOMB_CONSTANT


# the last shape is large enough for the mesh to live in memory of ordinary pages
@pytest.mark.parametrize("shape", [(12, 10, 9), (8, 6, 10), (5, 7, 16), (80, 80, 80)])
def test_in_place_transforms_match_scipy(shape, rng):
    values = rng.normal(size=shape)
    spectrum, real = mesh_module.mesh_buffer(shape)
    assert np.shares_memory(spectrum, real) and real.shape == shape[:2] + (2 * (shape[2] // 2 + 1),)
    real[:, :, :shape[2]] = values
    mesh_module.forward_transform(spectrum, real, shape, 1)
    # scipy's n-dimensional real transform as the reference library
    assert np.allclose(spectrum, scipy.fft.rfftn(values), rtol=0, atol=1e-11)
    mesh_module.inverse_transform(spectrum, real, shape, 2)
    # the inverse is unnormalised: forward then inverse multiplies by the number of points
    assert np.allclose(real[:, :, :shape[2]], np.prod(shape) * values, rtol=0,
                       atol=1e-13 * np.prod(shape) * np.abs(values).max())


def test_spreading_into_the_padded_view_matches_a_plain_mesh(rng):
    frac = rng.random((300, 3))
    charges = rng.normal(size=300)
    shape = np.array([16, 12, 9], np.int64)
    plain = mesh_kernels.spread_charges(frac, charges, np.arange(300), np.array([0, 300]), 1, shape, 6)
    spectrum, real = mesh_module.mesh_buffer(shape)
    atoms = rng.permutation(300)
    order_of_atoms, start, slabs = mesh_module._slabs(frac[:, 0], 16, 6, 2, atoms)
    mesh_kernels.spread_into(real, frac, charges, order_of_atoms, start, slabs, shape, 6)
    assert np.allclose(real[:, :, :9], plain, rtol=0, atol=1e-12)
    assert not np.any(real[:, :, 9:])  # the padding is left alone
    # B-splines are a partition of unity: the mesh holds the total charge
    assert plain.sum() == pytest.approx(charges.sum(), abs=1e-10)
    recip = np.eye(3)
    phi, force = mesh_kernels.interpolate(frac, charges, real, shape, 6, recip, True, atoms)
    phi_plain, force_plain = mesh_kernels.mesh_site_terms(frac, charges, np.ascontiguousarray(plain), shape, 6,
                                                          recip, True)
    assert np.allclose(phi, phi_plain, rtol=1e-12, atol=1e-12)
    assert np.allclose(force, force_plain, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("tol", [1e-6, 1e-8, 1e-10])
def test_tuner_picks_no_mesh_the_plan_refuses(tol):
    # 10^6 ions of rock salt (a = 5.64 Å, 50^3 cubic cells, d_min about 2.5 Å): the cheapest mesh
    # at these tolerances is above the memory bound unless the tuner knows the bound
    n, length, d_min = 1_000_000, 50 * 5.64, 2.48
    sums = tuning.ChargeSums(n, float(n), float(n), 0.0)
    target = tol * COULOMB_CONSTANT * sums.square_sum / d_min
    choice = tuning.choose_mesh(target, sums, length ** 3, np.full(3, length), d_min, COULOMB_CONSTANT)
    assert MESH_BYTES_PER_POINT * np.prod(choice.shape) <= MAX_MESH_BYTES
    check_mesh(choice.shape)
