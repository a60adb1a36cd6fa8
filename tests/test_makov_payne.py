"""A point charge in a neutralizing background: the energies of Makov & Payne's lattices."""

import numpy as np
import pytest

import madelung
from madelung.units import COULOMB_CONSTANT

# Makov & Payne, Phys. Rev. B 51 (1995) 4014, Table I: alpha = 2.8373 (sc), 3.6392 (bcc),
# 4.5848 (fcc) with E = -q^2 alpha / (2 L) per charge, L the cubic lattice constant.
CASES = {
    "sc": (2.8373, np.eye(3)),
    "bcc": (3.6392, 0.5 * np.array([[-1.0, 1, 1], [1, -1, 1], [1, 1, -1]])),
    "fcc": (4.5848, 0.5 * np.array([[0.0, 1, 1], [1, 0, 1], [1, 1, 0]])),
}


@pytest.mark.parametrize("lattice", sorted(CASES))
@pytest.mark.parametrize("length", [5.0, 10.0])
def test_point_charge_energy(lattice, length):
    alpha, primitive = CASES[lattice]
    crystal = madelung.Crystal(primitive * length, [[0.0, 0.0, 0.0]], [1.0])
    with pytest.warns(madelung.MadelungWarning, match="net charge"):
        result = madelung.ewald(crystal, tol=1e-10)
    assert result.background
    computed = -2.0 * length * result.energy / COULOMB_CONSTANT
    assert computed == pytest.approx(alpha, abs=1e-4)


def test_charge_squared_scaling():
    # E = -q^2 alpha / (2 L): doubling the charge quadruples the energy (Makov & Payne, as above)
    one = madelung.ewald(madelung.Crystal(6.0 * np.eye(3), [[1.0, 2.0, 3.0]], [1.0]), tol=1e-10)
    two = madelung.ewald(madelung.Crystal(6.0 * np.eye(3), [[1.0, 2.0, 3.0]], [2.0]), tol=1e-10)
    assert two.energy == pytest.approx(4.0 * one.energy, rel=1e-9)
