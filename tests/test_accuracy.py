"""The requested accuracy is met: achieved error <= tol * k_e sum(q^2) / d_min.

Yardsticks from outside the engine: the arbitrary-precision Ewald sum of
tests/reference_mpmath.py (mpmath, an independent implementation) for random triclinic
cells, and the published rock-salt and caesium-chloride constants (OEIS A085469, A181152).
"""

import numpy as np
import pytest

import madelung
from madelung.units import COULOMB_CONSTANT

from conftest import load, random_crystal
from reference_mpmath import mp_ewald_energy

TOLERANCES = [1e-4, 1e-6, 1e-8, 1e-10, 1e-12]


@pytest.fixture(scope="module")
def random_cells():
    rng = np.random.default_rng(7)
    cells = []
    for n_atoms in (2, 3, 4):
        crystal = random_crystal(rng, n_atoms=n_atoms)
        energy, potentials = mp_ewald_energy(crystal.cell, crystal.positions, crystal.charges, dps=25)
        cells.append((crystal, float(energy), np.array([float(p) for p in potentials])))
    return cells


@pytest.mark.parametrize("tol", TOLERANCES)
def test_random_cells_against_mpmath(random_cells, tol):
    for crystal, reference, reference_potentials in random_cells:
        result = madelung.ewald(crystal, tol=tol)
        assert abs(result.energy - reference) <= tol * result.energy_scale
        # the site potentials converge with the energy (a potential scale is k_e |q| / d_min)
        assert np.max(np.abs(result.potentials - reference_potentials)) <= \
            10 * tol * result.energy_scale / np.sum(np.abs(crystal.charges))


@pytest.mark.parametrize("tol", TOLERANCES)
@pytest.mark.parametrize("name,constant", [
    ("rocksalt-NaCl", 1.747564594633182),          # OEIS A085469
    ("caesium-chloride-CsCl", 1.76267477307099),   # OEIS A181152
])
def test_published_constants_at_every_tolerance(name, constant, tol):
    crystal = load(name)
    result = madelung.ewald(crystal, tol=tol)
    _, to_opposite, _ = crystal.nearest_distances()
    r0 = float(to_opposite.min())
    exact = -constant * COULOMB_CONSTANT / r0 * crystal.formula_units
    assert abs(result.energy - exact) <= tol * result.energy_scale
    assert result.error_estimate <= tol * result.energy_scale * (1 + 1e-9)


@pytest.mark.parametrize("tol", [1e-6, 1e-10])
def test_rattled_supercell_against_mpmath_scaled(tol):
    # a rattled 2x1x1 rock-salt supercell (16 ions): the ordered-crystal case in which errors add up
    rng = np.random.default_rng(3)
    crystal = load("rocksalt-NaCl").repeat((2, 1, 1))
    crystal = crystal.replace(positions=crystal.positions + rng.normal(scale=0.05, size=crystal.positions.shape))
    reference, _ = mp_ewald_energy(crystal.cell, crystal.positions, crystal.charges, dps=20)
    result = madelung.ewald(crystal, tol=tol)
    assert abs(result.energy - float(reference)) <= tol * result.energy_scale
