"""Shared fixtures: the bundled structures and random neutral crystals for property tests."""

import os
import warnings

import numpy as np
import pytest

import madelung
from madelung.errors import InputError

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
STRUCTURES = os.path.join(ROOT, "structures")


def structure(name):
    """Path of a bundled prototype CIF, e.g. structure("rocksalt-NaCl")."""
    return os.path.join(STRUCTURES, f"{name}.cif")


def load(name, **kwargs):
    return madelung.Crystal.from_file(structure(name), **kwargs)


def random_crystal(rng, n_atoms=None, min_distance=1.0, max_tries=200):
    """A random triclinic cell with random neutral charges and no two ions closer than min_distance."""
    for _ in range(max_tries):
        n = int(rng.integers(2, 7)) if n_atoms is None else n_atoms
        lengths = rng.uniform(3.0, 6.0, size=3)
        angles = np.radians(rng.uniform(65.0, 115.0, size=3))
        from ase.geometry import cellpar_to_cell

        cell = cellpar_to_cell(np.concatenate([lengths, np.degrees(angles)]))
        if abs(np.linalg.det(cell)) < 0.3 * np.prod(lengths):
            continue
        frac = rng.random((n, 3))
        charges = rng.uniform(-2.0, 2.0, size=n)
        charges -= charges.mean()
        try:
            return madelung.Crystal(cell, frac @ cell, charges, min_distance=min_distance)
        except InputError:
            continue
    raise RuntimeError("could not draw a random crystal")


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(autouse=True)
def _quiet_background_warnings():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", madelung.MadelungWarning)
        yield
