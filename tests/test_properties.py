"""Invariances of the Ewald sum on random triclinic cells with random neutral charges.

Each is a property of the exact lattice sum (facts of the trade): the energy does not depend on
where the origin is, how the crystal is oriented, how the ions are numbered, which unit cell is
used, or the splitting parameter; it scales with the square of the charges; E = 1/2 sum q_i phi_i.
"""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.transform import Rotation

import madelung

from conftest import random_crystal

TOL = 1e-10
seeds = st.integers(min_value=0, max_value=2**32 - 1)
few = settings(max_examples=15, deadline=None)


def close(a, b, result):
    """Two energies agree within the requested accuracy of ``result`` (both sums err by up to tol)."""
    return abs(a - b) <= 2.0 * result.tol * result.energy_scale


@few
@given(seeds)
def test_translation(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    moved = crystal.replace(positions=crystal.positions + rng.normal(scale=3.0, size=3))
    a, b = madelung.ewald(crystal, tol=TOL), madelung.ewald(moved, tol=TOL)
    assert close(a.energy, b.energy, a)
    assert np.allclose(a.potentials, b.potentials, atol=1e-7)


@few
@given(seeds)
def test_rotation(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    rotation = Rotation.random(random_state=seed % (2**31)).as_matrix()
    turned = crystal.replace(cell=crystal.cell @ rotation.T, positions=crystal.positions @ rotation.T)
    a = madelung.ewald(crystal, tol=TOL, forces=True)
    b = madelung.ewald(turned, tol=TOL, forces=True)
    assert close(a.energy, b.energy, a)
    assert np.allclose(a.forces @ rotation.T, b.forces, atol=1e-6)


@few
@given(seeds)
def test_permutation(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    order = rng.permutation(len(crystal))
    shuffled = crystal.replace(positions=crystal.positions[order], charges=crystal.charges[order],
                               symbols=[crystal.symbols[i] for i in order],
                               labels=[crystal.labels[i] for i in order],
                               occupancies=crystal.occupancies[order])
    a, b = madelung.ewald(crystal, tol=TOL), madelung.ewald(shuffled, tol=TOL)
    assert close(a.energy, b.energy, a)
    assert np.allclose(a.potentials[order], b.potentials, atol=1e-7)


@few
@given(seeds, st.tuples(st.integers(1, 3), st.integers(1, 2), st.integers(1, 2)))
def test_supercell(seed, repeats):
    crystal = random_crystal(np.random.default_rng(seed))
    big = crystal.repeat(repeats)
    a, b = madelung.ewald(crystal, tol=TOL), madelung.ewald(big, tol=TOL)
    assert abs(b.energy - np.prod(repeats) * a.energy) <= 2.0 * TOL * b.energy_scale
    assert np.allclose(np.tile(a.potentials, int(np.prod(repeats))), b.potentials, atol=1e-7)


@few
@given(seeds, st.floats(0.2, 5.0))
def test_charge_scaling(seed, factor):
    crystal = random_crystal(np.random.default_rng(seed))
    a = madelung.ewald(crystal, tol=TOL)
    b = madelung.ewald(crystal.with_charges(factor * crystal.charges), tol=TOL)
    assert abs(b.energy - factor**2 * a.energy) <= 2.0 * TOL * b.energy_scale


@few
@given(seeds, st.floats(0.5, 2.0))
def test_splitting_parameter_independence(seed, ratio):
    crystal = random_crystal(np.random.default_rng(seed))
    tuned = madelung.ewald(crystal, tol=TOL)
    other = madelung.ewald(crystal, tol=TOL, alpha=tuned.params.alpha * ratio)
    assert close(tuned.energy, other.energy, tuned)


@few
@given(seeds)
def test_energy_is_half_sum_of_charge_times_potential(seed):
    crystal = random_crystal(np.random.default_rng(seed))
    result = madelung.ewald(crystal, tol=TOL)
    assert 0.5 * np.dot(crystal.charges, result.potentials) == pytest.approx(result.energy, rel=1e-11, abs=1e-11)


def test_forces_sum_to_zero(rng):
    # Newton's third law for the periodic sum: the total force on the cell vanishes (fact of the trade)
    crystal = random_crystal(rng, n_atoms=6)
    result = madelung.ewald(crystal, tol=1e-12, forces=True)
    assert np.abs(result.forces.sum(axis=0)).max() < 1e-8
