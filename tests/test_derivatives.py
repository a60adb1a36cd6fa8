"""Forces and stress against finite differences of the energy (central differences)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from madelung.sums.direct import ewald_direct

from conftest import random_crystal

seeds = st.integers(min_value=0, max_value=2**32 - 1)


def energy(crystal, alpha, d_min):
    # fixed alpha and d_min keep the cutoffs the same for every displaced copy
    return ewald_direct(crystal, tol=1e-13, alpha=alpha, d_min=d_min).energy


@settings(max_examples=10, deadline=None)
@given(seeds)
def test_forces_are_minus_the_gradient(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    d_min = crystal.shortest_distance
    result = ewald_direct(crystal, tol=1e-13, forces=True, d_min=d_min)
    alpha = result.params.alpha
    h = 1e-5
    i = int(rng.integers(len(crystal)))
    for axis in range(3):
        plus = crystal.positions.copy()
        minus = crystal.positions.copy()
        plus[i, axis] += h
        minus[i, axis] -= h
        numeric = -(energy(crystal.replace(positions=plus), alpha, d_min)
                    - energy(crystal.replace(positions=minus), alpha, d_min)) / (2 * h)
        assert result.forces[i, axis] == pytest.approx(numeric, abs=2e-6 * max(1.0, abs(numeric)))


@settings(max_examples=10, deadline=None)
@given(seeds, st.booleans())
def test_stress_is_the_strain_derivative(seed, charged):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    if charged:  # a net charge brings in the background term and its strain dependence
        crystal = crystal.with_charges(crystal.charges + 0.3)
    d_min = crystal.shortest_distance
    result = ewald_direct(crystal, tol=1e-13, stress=True, d_min=d_min)
    alpha = result.params.alpha
    h = 1e-6
    numeric = np.zeros((3, 3))
    for a in range(3):
        for b in range(3):
            strain = np.zeros((3, 3))
            strain[a, b] = strain[b, a] = h if a != b else h
            if a != b:
                strain *= 0.5
            energies = []
            for sign in (1, -1):
                deform = np.eye(3) + sign * strain
                energies.append(energy(crystal.replace(cell=crystal.cell @ deform,
                                                       positions=crystal.positions @ deform), alpha, d_min))
            numeric[a, b] = (energies[0] - energies[1]) / (2 * h) / crystal.volume
    assert np.allclose(result.stress, numeric, atol=1e-6 * max(1.0, np.abs(numeric).max()))
    assert np.allclose(result.stress, result.stress.T)
