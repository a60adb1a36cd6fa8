"""Potentials at arbitrary points and on grids (madelung.potential_at, madelung.analysis.defects.potential_grid)."""

import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import madelung
from madelung import Crystal, InputError, MadelungWarning, potential_at
from madelung.analysis.defects import gaussian_charge_density, potential_grid, write_gaussian_cube
from madelung.units import COULOMB_CONSTANT as K_E

STRUCTURES = Path(__file__).resolve().parent.parent / "structures"

# Point charge in a neutralizing background on a simple cubic lattice: alpha = 2.8373 with
# E = -q^2 alpha / (2 L) (G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014).
ALPHA_SC = 2.8373


def _nacl():
    return Crystal.from_file(STRUCTURES / "rocksalt-NaCl.cif")


def _triclinic():
    cell = [[5.1, 0.0, 0.0], [1.2, 4.7, 0.0], [-0.8, 0.9, 6.3]]
    frac = [[0.0, 0.0, 0.0], [0.5, 0.45, 0.52], [0.21, 0.77, 0.13], [0.7, 0.2, 0.8]]
    return Crystal(cell, np.array(frac) @ np.array(cell), [2.0, -1.5, 0.5, -1.0])


@pytest.mark.parametrize("make", [_nacl, _triclinic,
                                  lambda: Crystal.from_file(STRUCTURES / "fluorite-CaF2.cif")])
def test_site_potential_with_ion_left_out_equals_engine(make):
    crystal = make()
    engine = madelung.ewald(crystal, tol=1e-12)
    # the engine's site potential leaves out the ion's own charge: leave out exactly that ion here
    at = potential_at(crystal, crystal.positions, exclude=np.arange(len(crystal)), tol=1e-12)
    assert np.allclose(at.potentials, engine.potentials, rtol=0, atol=1e-9)
    # points given anywhere in space (a lattice translation away) give the same numbers
    moved = crystal.positions + np.array([2, -1, 3]) @ crystal.cell
    again = potential_at(crystal, moved, exclude="coincident", tol=1e-12)
    assert np.allclose(again.potentials, engine.potentials, rtol=0, atol=1e-9)


def test_removed_ion_site_potential_differs_by_its_own_images():
    # CsCl: one Cs on a simple cubic lattice of side L. Removing the Cs ion and evaluating at its
    # site drops its periodic images plus their background, worth q * (-ALPHA_SC k_e / L)
    # (Makov & Payne 1995, the lone-charge lattice), so phi_removed = phi_site + q ALPHA_SC k_e / L.
    crystal = Crystal.from_file(STRUCTURES / "caesium-chloride-CsCl.cif")
    i = crystal.symbols.index("Cs")
    q = crystal.charges[i]
    length = crystal.cell[0, 0]
    site = madelung.ewald(crystal, tol=1e-12).potentials[i]
    keep = [j for j in range(len(crystal)) if j != i]
    removed = Crystal(crystal.cell, crystal.positions[keep], crystal.charges[keep])
    with pytest.warns(MadelungWarning):
        value = potential_at(removed, crystal.positions[i], tol=1e-12).potentials[0]
    expected = site + q * ALPHA_SC * K_E / length
    assert value == pytest.approx(expected, abs=2e-4 * K_E / length)  # alpha given to 4 decimals


@settings(max_examples=15, deadline=None)
@given(st.lists(st.floats(-3, 3), min_size=3, max_size=3), st.lists(st.integers(-3, 3), min_size=3, max_size=3))
def test_potential_and_field_are_periodic(frac, shift):
    crystal = _triclinic()
    point = np.array(frac) @ crystal.cell
    if np.min(np.linalg.norm(crystal.positions - point, axis=1)) < 1e-3:
        return
    try:
        a = potential_at(crystal, point, field=True, tol=1e-10)
    except InputError:  # landed on an ion image
        return
    b = potential_at(crystal, point + np.array(shift) @ crystal.cell, field=True, tol=1e-10)
    # rounding of the folded coordinates grows with the potential's size near an ion
    assert b.potentials[0] == pytest.approx(a.potentials[0], rel=1e-10, abs=1e-8)
    assert np.allclose(b.field, a.field, rtol=1e-8, atol=1e-8)


@pytest.mark.parametrize("smearing", [0.0, 0.4])
def test_field_is_minus_gradient(smearing):
    crystal = _triclinic()
    rng = np.random.default_rng(3)
    points = rng.random((4, 3)) @ crystal.cell
    base = potential_at(crystal, points, field=True, tol=1e-12, smearing=smearing)
    h = 1e-4
    for axis in range(3):
        step = np.zeros(3)
        step[axis] = h
        plus = potential_at(crystal, points + step, tol=1e-12, smearing=smearing).potentials
        minus = potential_at(crystal, points - step, tol=1e-12, smearing=smearing).potentials
        assert np.allclose(-(plus - minus) / (2 * h), base.field[:, axis], atol=2e-6)


def test_splitting_parameter_does_not_change_the_potential():
    crystal = _triclinic()
    points = np.random.default_rng(5).random((6, 3)) @ crystal.cell
    a = potential_at(crystal, points, tol=1e-12, alpha=0.45, field=True)
    b = potential_at(crystal, points, tol=1e-12, alpha=1.1, field=True)
    assert np.allclose(a.potentials, b.potentials, atol=1e-9)
    assert np.allclose(a.field, b.field, atol=1e-8)


def test_smeared_ions_match_point_ions_far_away():
    crystal = _nacl()
    point = np.array([0.25, 0.25, 0.25]) @ crystal.cell  # 2.44 Å from every ion
    exact = potential_at(crystal, point, tol=1e-12).potentials[0]
    smeared = potential_at(crystal, point, tol=1e-12, smearing=0.3).potentials[0]
    # erfc(2.44 / (sqrt(2) 0.3)) ~ 1e-15: the Gaussians are invisible at this distance
    assert smeared == pytest.approx(exact, abs=1e-9)


def _laplacian(values, spacing):
    total = np.zeros_like(values)
    for axis in range(3):
        total += (np.roll(values, 1, axis) + np.roll(values, -1, axis) - 2 * values) / spacing ** 2
    return total


def test_poisson_equation_on_the_grid():
    # Poisson's equation for the Gaussian-smeared charges: laplacian(phi) = -4 pi k_e rho_sigma
    # (Gaussian units with k_e; fact of the trade). The 7-point Laplacian errs by O(h^2).
    crystal = _nacl()
    sigma = 0.5
    errors = []
    for n in (20, 40):
        grid = potential_grid(crystal, shape=(n, n, n), smearing=sigma, tol=1e-10)
        h = crystal.cell[0, 0] / n
        density = gaussian_charge_density(crystal, grid.cartesian_points(), sigma).reshape(grid.shape)
        target = -4 * math.pi * K_E * density
        lap = _laplacian(np.asarray(grid.values), h)
        errors.append(np.sqrt(np.mean((lap - target) ** 2)) / np.sqrt(np.mean(target ** 2)))
    assert errors[1] < 0.01
    assert errors[0] / errors[1] == pytest.approx(4.0, rel=0.15)  # second order


def test_grid_average_is_zero_for_a_neutral_cell():
    crystal = Crystal.from_file(STRUCTURES / "fluorite-CaF2.cif")
    smeared = potential_grid(crystal, 0.25, smearing=0.3)
    assert abs(float(np.mean(smeared.values))) < 1e-8
    # point ions: the grid samples the 1/r peaks; the average still tends to zero (within 1 % of the range)
    point = potential_grid(crystal, 0.2, smearing=0.0)
    values = np.asarray(point.values)
    assert abs(float(values.mean())) < 0.01 * float(values.max() - values.min())


def test_charged_cell_grid_average():
    # With a neutralizing background the point-ion potential averages to zero over the cell (the
    # k = 0 term is left out). Smeared ions are point ions minus q erfc(d / sqrt(2) sigma) / d, whose
    # cell integral is 2 pi sigma^2 q (derived: 4 pi int_0^inf r erfc(r / sqrt(2) sigma) dr), so the
    # smeared average is -2 pi sigma^2 k_e Q / V; the far field stays that of point ions.
    crystal = Crystal([[4.0, 0, 0], [0, 4.0, 0], [0, 0, 4.0]], [[0, 0, 0]], [1.0])
    sigma = 0.6
    with pytest.warns(MadelungWarning):
        grid = potential_grid(crystal, shape=(16, 16, 16), smearing=sigma)
    expected = -2 * math.pi * sigma ** 2 * K_E * 1.0 / crystal.volume
    assert float(np.mean(grid.values)) == pytest.approx(expected, rel=1e-6)


def test_point_on_an_ion_is_refused():
    crystal = _nacl()
    with pytest.raises(InputError, match="point 1 .* sits on ion"):
        potential_at(crystal, [[1.0, 1.0, 1.0], crystal.positions[3]])
    with pytest.raises(InputError, match="is not on ion"):
        potential_at(crystal, [[1.0, 1.0, 1.0]], exclude=[0])
    with pytest.raises(InputError):
        potential_at(crystal, [[1.0, np.nan, 1.0]])
    # smeared ions have a finite potential on the ion
    value = potential_at(crystal, crystal.positions[3], smearing=0.3).potentials[0]
    assert np.isfinite(value)


def test_cube_file_round_trip(tmp_path):
    from ase.io.cube import read_cube_data

    crystal = _nacl()
    grid = potential_grid(crystal, 0.6, smearing=0.3)
    path = tmp_path / "nacl.cube"
    write_gaussian_cube(path, grid)
    data, atoms = read_cube_data(str(path))
    assert data.shape == grid.shape
    assert np.allclose(data, grid.values, rtol=1e-5, atol=1e-5)
    assert np.allclose(atoms.cell, crystal.cell, atol=1e-4)
