"""Building crystals: from arrays, ASE and files, charges by element or label, validation."""

import numpy as np
import pytest
from ase.build import bulk

import madelung
from madelung import Crystal, InputError
from madelung.io.cif import parse_typed_symbol

from conftest import load


def test_from_ase_with_initial_charges():
    atoms = bulk("NaCl", "rocksalt", a=5.64)
    atoms.set_initial_charges([1, -1])
    crystal = Crystal.from_ase(atoms)
    assert crystal.charges.tolist() == [1.0, -1.0]
    # two-ion primitive cell: the rock-salt constant, OEIS A085469, r0 = a/2
    constants = madelung.madelung_constants(crystal, tol=1e-12)
    assert constants.handbook == pytest.approx(1.747564594633, abs=1e-9)
    assert constants.r0 == pytest.approx(2.82)


def test_charges_by_element_and_by_label():
    atoms = bulk("NaCl", "rocksalt", a=5.64)
    by_element = Crystal.from_ase(atoms, {"Na": 1, "Cl": -1})
    by_label = Crystal.from_ase(atoms, {"Na1": 1, "Cl1": -1})
    assert by_element.charges.tolist() == by_label.charges.tolist() == [1.0, -1.0]
    # a label is more specific than the element
    mixed = Crystal.from_ase(atoms, {"Na": 1, "Cl": -1, "Na1": 2})
    assert mixed.charges.tolist() == [2.0, -1.0]


def test_cif_oxidation_states_and_labels_are_read():
    spinel = load("spinel-MgAl2O4")
    charges = dict(zip(spinel.symbols, spinel.charges))
    assert charges == {"Mg": 2.0, "Al": 3.0, "O": -2.0}
    assert set(spinel.labels) == {"Mg1", "Al1", "O1"}
    assert len(spinel) == 56  # Fd-3m conventional cell: 8 Mg + 16 Al + 32 O (International Tables, Vol. A)


@pytest.mark.parametrize("text,expected", [
    ("Fe3+", ("Fe", 3.0)), ("O2-", ("O", -2.0)), ("Cl-", ("Cl", -1.0)), ("Na1+", ("Na", 1.0)),
    ("Fe", ("Fe", None)), ("Fe1", ("Fe", None)),
])
def test_typed_symbols(text, expected):
    assert parse_typed_symbol(text) == expected


@pytest.mark.parametrize("kwargs,fragment", [
    (dict(cell=np.eye(3)[:2]), "3x3"),
    (dict(cell=[[1, 0, 0], [0, 1, 0], [1, 1, 0]]), "degenerate"),
    (dict(cell=[[np.inf, 0, 0], [0, 1, 0], [0, 0, 1]]), "non-finite"),
    (dict(positions=[[0, 0, 0], [np.nan, 0, 0]]), "non-finite"),
    (dict(charges=[1.0]), "1 charges given for 2 sites"),
    (dict(charges=[1.0, np.nan]), "non-finite charge"),
    (dict(positions=[[0, 0, 0], [0.1, 0, 0]]), "apart"),
    (dict(occupancies=[1.0, 1.5]), "occupancy"),
    (dict(charges={"Na": 1}), "has no charge"),
])
def test_validation(kwargs, fragment):
    fields = dict(cell=4.0 * np.eye(3), positions=[[0, 0, 0], [2, 2, 2]], charges=[1.0, -1.0],
                  symbols=["Na", "Cl"], source="test-case")
    fields.update(kwargs)
    with pytest.raises(InputError, match="test-case") as error:
        Crystal(**fields)
    assert fragment in str(error.value)
    assert "\n" not in str(error.value)


def test_overlap_limit_can_be_lowered():
    crystal = Crystal(4.0 * np.eye(3), [[0, 0, 0], [0.3, 0, 0]], [1.0, -1.0], min_distance=0.2)
    assert len(crystal) == 2


def test_ions_close_only_through_a_periodic_image_are_refused():
    with pytest.raises(InputError, match="apart"):
        Crystal(4.0 * np.eye(3), [[0.05, 0, 0], [3.9, 0, 0]], [1.0, -1.0])


def test_supercell_and_formula():
    crystal = load("fluorite-CaF2")
    assert crystal.reduced_formula == "CaF2" and crystal.formula_units == 4
    big = crystal.repeat((2, 1, 1))
    assert len(big) == 24 and big.formula_units == 8
    assert big.volume == pytest.approx(2 * crystal.volume)


def test_crystal_is_read_only():
    crystal = load("rocksalt-NaCl")
    with pytest.raises(ValueError):
        crystal.charges[0] = 5.0
