"""Descriptors of one crystal: published Madelung constants, the engine's own energies, and the
invariances of the Ewald-sum-matrix spectrum."""

import itertools
import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import madelung
from madelung.analysis.descriptors import (COLUMNS, SITE_COLUMNS, SPECTRUM_LENGTH, column_types, describe, empty_row,
                                  ewald_matrix_spectrum, ewald_sum_matrix, spectrum_columns)
from madelung.errors import InputError

from conftest import load, random_crystal

EIGENVALUES = spectrum_columns()

# rock salt 1.747564594633..., OEIS A085469; CsCl 1.762674773071..., OEIS A181152 (both in the
# handbook convention E_fu = -M z+ |z-| k_e / r0 with r0 the nearest cation-anion distance)
PUBLISHED = [("rocksalt-NaCl", 1.747564594633), ("rocksalt-MgO", 1.747564594633),
             ("caesium-chloride-CsCl", 1.762674773071)]


@pytest.mark.parametrize("name, value", PUBLISHED)
def test_published_madelung_constants(name, value):
    description = describe(load(name), tol=1e-10)
    assert description.madelung_handbook == pytest.approx(value, abs=1e-8)
    # one cation and one anion kind with charges +-Z: the common-factor convention is the same number
    assert description.madelung_common_factor == pytest.approx(value, abs=1e-8)


@pytest.mark.parametrize("name", ["rocksalt-NaCl", "fluorite-CaF2", "spinel-MgAl2O4", "perovskite-SrTiO3"])
def test_energies_agree_with_the_engine(name):
    crystal = load(name)
    row = describe(crystal, tol=1e-9).to_dict()
    result = madelung.ewald(crystal, tol=1e-10)
    scale = result.energy_scale
    assert row["energy_eV"] == pytest.approx(result.energy, abs=1e-8 * scale)
    assert row["energy_per_atom_eV"] == pytest.approx(result.energy / len(crystal), abs=1e-8 * scale)
    z = crystal.formula_units
    assert row["energy_per_formula_unit_eV"] == pytest.approx(result.energy / z, abs=1e-8 * scale)
    # kJ/mol from CODATA constants: 1 eV per formula unit = 96.485332 kJ/mol (fact of the trade)
    assert row["energy_per_formula_unit_kJ_mol"] == pytest.approx(result.energy / z * 96.485332, rel=1e-7)
    # site-potential statistics are those of the engine's own potentials
    phi = result.potentials
    q = crystal.charges
    assert row["anion_potential_mean_V"] == pytest.approx(float(np.mean(phi[q < 0])), abs=1e-7)
    assert row["cation_potential_min_V"] == pytest.approx(float(np.min(phi[q > 0])), abs=1e-7)
    species = json.loads(row["species_potentials_V"])
    for element in set(crystal.symbols):
        mine = phi[np.array(crystal.symbols) == element]
        assert species[element][1] == pytest.approx(float(mine.mean()), abs=1e-7)
    assert row["charge_rms_e"] == pytest.approx(math.sqrt(float(np.mean(q * q))))


def test_row_has_the_documented_columns_in_order():
    description = describe(load("rutile-TiO2"))
    row = description.to_dict()
    assert tuple(row) == COLUMNS
    kinds = column_types()
    for name, value in row.items():
        assert isinstance(value, {"int": int, "float": float, "str": str}[kinds[name]]), name
    assert tuple(empty_row()) == COLUMNS
    # rutile has one cation and one anion kind: the handbook convention is defined
    assert math.isfinite(row["madelung_handbook"])
    # the named fields and the flat row hold the same values; the spectrum field is the padded spectrum
    assert description.energy_eV == row["energy_eV"] and description.r0_A == row["r0_A"]
    assert description.spectrum.shape == (SPECTRUM_LENGTH,)
    assert [row[name] for name in EIGENVALUES] == description.spectrum.tolist()
    assert description.sites is None


def test_sites_are_a_field_of_the_description():
    crystal = load("rocksalt-NaCl")
    description = describe(crystal, tol=1e-10, spectrum_length=0, sites=True)
    assert tuple(description.to_dict()) == tuple(column_types(0))
    assert len(description.sites) == len(crystal)
    assert set(description.sites[0]) == set(SITE_COLUMNS)
    # rock salt: every site constant is the handbook value 1.747564594633 (OEIS A085469)
    for site in description.sites:
        assert site["site_constant"] == pytest.approx(1.747564594633, abs=1e-8)


def test_ewald_sum_matrix_entries_add_up_to_twice_the_energy():
    crystal = load("spinel-MgAl2O4")
    matrix = ewald_sum_matrix(crystal, tol=1e-10)
    assert np.allclose(matrix, matrix.T)
    energy = madelung.ewald(crystal, tol=1e-10).energy
    assert 0.5 * matrix.sum() == pytest.approx(energy, rel=1e-8)


def test_spectrum_padding_and_truncation():
    crystal = load("rocksalt-NaCl")            # 8 sites
    values, note = ewald_matrix_spectrum(crystal, length=12)
    assert note == "" and np.all(values[8:] == 0.0) and np.all(values[:8] != 0.0)
    assert np.all(np.diff(np.abs(values[:8])) <= 1e-9)          # decreasing magnitude
    short, note = ewald_matrix_spectrum(crystal, length=5)
    assert note.startswith("truncated") and np.allclose(short, values[:5])
    big = crystal.repeat((3, 3, 3)).repeat((1, 1, 3))  # 648 sites: beyond the matrix limit
    values, note = ewald_matrix_spectrum(big, length=4)
    assert np.all(np.isnan(values)) and note.startswith("not computed")


def test_charged_cell_is_refused():
    crystal = load("rocksalt-NaCl").with_charges({"Na": 1, "Cl": -2})
    with pytest.raises(InputError, match="net charge"):
        describe(crystal)


def _spectrum(crystal):
    values, _ = ewald_matrix_spectrum(crystal, length=SPECTRUM_LENGTH, tol=1e-10)
    return values


@settings(max_examples=12, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_spectrum_invariant_to_permutation(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    order = rng.permutation(len(crystal))
    shuffled = madelung.Crystal(crystal.cell, crystal.positions[order], crystal.charges[order],
                                [crystal.symbols[i] for i in order])
    scale = np.max(np.abs(_spectrum(crystal)))
    assert np.allclose(_spectrum(shuffled), _spectrum(crystal), atol=1e-7 * scale)


@settings(max_examples=12, deadline=None)
@given(seed=st.integers(0, 10_000))
def test_spectrum_invariant_to_the_choice_of_unit_cell(seed):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng)
    # another basis of the same lattice (integer matrix of determinant +-1), another origin,
    # positions wrapped into the new cell
    while True:
        transform = np.eye(3, dtype=int) + np.triu(rng.integers(-1, 2, size=(3, 3)), 1)
        transform = transform[rng.permutation(3)]
        if abs(round(np.linalg.det(transform))) == 1:
            break
    cell = transform @ crystal.cell
    shifted = crystal.positions + rng.uniform(-2, 2, size=3)
    frac = np.linalg.solve(cell.T, shifted.T).T
    frac -= np.floor(frac)
    other = madelung.Crystal(cell, frac @ cell, crystal.charges, crystal.symbols)
    scale = np.max(np.abs(_spectrum(crystal)))
    assert np.allclose(_spectrum(other), _spectrum(crystal), atol=1e-7 * scale)


@pytest.mark.parametrize("name", ["rocksalt-NaCl", "spinel-MgAl2O4", "perovskite-SrTiO3"])
def test_nearest_distances_from_the_sum_pairs_or_a_search_give_the_same_row(name, monkeypatch):
    """describe takes the nearest distances from the real-space pairs of its sum when they reach far
    enough, else searches (Crystal.nearest_distances): both give the same row (to rounding)."""
    from madelung.analysis import descriptors
    crystal = load(name)
    usual = describe(crystal).to_dict()
    monkeypatch.setattr(descriptors, "nearest_from_pairs", lambda *args, **kwargs: None)
    searched = describe(crystal).to_dict()
    for key, value in usual.items():
        if key.startswith("seconds"):
            continue
        if isinstance(value, float):
            assert searched[key] == pytest.approx(value, rel=1e-12, abs=1e-12, nan_ok=True), key
        else:
            assert searched[key] == value, key
    # and the nearest cation-anion distance is the one a brute-force search over images finds
    q = crystal.charges
    best = min(np.linalg.norm(crystal.positions[i] - crystal.positions[j] - np.array(shift) @ crystal.cell)
               for i in np.flatnonzero(q > 0) for j in np.flatnonzero(q < 0)
               for shift in itertools.product((-1, 0, 1), repeat=3))
    assert usual["r0_A"] == pytest.approx(best, rel=1e-12)
