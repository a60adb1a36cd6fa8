"""One accuracy contract in every basis: the same crystal written with other lattice vectors.

A unimodular change of basis (integer matrix of determinant ±1) describes the same lattice, so
energy, potentials, forces and stress must agree to the contract |dE| <= tol E_scale whatever
basis the user writes (a fact of the trade). Yardsticks from outside the engine: the
arbitrary-precision Ewald sum of tests/reference_mpmath.py (mpmath) and the rock-salt Madelung
constant 1.747564594633182 (OEIS A085469).
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import madelung
from ase.geometry import minkowski_reduce
from madelung.structure.lattice import niggli_reduced
from madelung.sums import tuning
from madelung.sums.matrix import coulomb_matrix, potentials_for_charge_sets
from madelung.sums.mesh import ewald_mesh
from madelung.units import COULOMB_CONSTANT

from conftest import load, random_crystal
from reference_mpmath import mp_ewald_energy

ROCK_SALT = 1.747564594633182  # OEIS A085469

OBLIQUE = ([[1, 0, 0], [3, 1, 0], [3, 3, 1]],
           [[1, 1, 0], [0, 1, 0], [1, 1, 1]],
           [[1, 0, 0], [-2, 1, 0], [-1, 3, 1]],
           [[2, 1, 0], [1, 1, 0], [1, 2, 1]])


def unimodular(rng, reach=3):
    while True:
        m = rng.integers(-reach, reach + 1, (3, 3))
        if round(abs(np.linalg.det(m))) == 1:
            return m


def rattled_rock_salt(repeat, seed=3, scale=0.05):
    base = load("rocksalt-NaCl").repeat(repeat)
    rng = np.random.default_rng(seed)
    return base.replace(positions=base.positions + rng.normal(0.0, scale, base.positions.shape))


def _agree(first, second, crystal, tol, forces=True):
    """Both results meet the contract against each other (each may err by tol E_scale)."""
    allowed = 2.0 * tol * first.energy_scale
    assert abs(first.energy - second.energy) <= allowed
    q_abs = float(np.abs(crystal.charges).sum())
    potential_allowed = 2.0 * allowed / q_abs
    assert np.sqrt(np.mean((first.potentials - second.potentials) ** 2)) <= potential_allowed
    if forces:
        force_allowed = 10.0 * potential_allowed * float(np.max(np.abs(crystal.charges))) / first.plan.d_min
        assert np.max(np.abs(first.forces - second.forces)) <= force_allowed
        stress_allowed = 10.0 * allowed / crystal.volume
        assert np.max(np.abs(first.stress - second.stress)) <= stress_allowed


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), tol=st.sampled_from([1e-4, 1e-6, 1e-8, 1e-10]),
       method=st.sampled_from(["direct", "mesh", "auto"]))
def test_every_basis_gives_the_same_sums(seed, tol, method):
    rng = np.random.default_rng(seed)
    crystal = random_crystal(rng, n_atoms=int(rng.integers(2, 9)))
    reference = madelung.ewald(crystal, tol=tol, forces=True, stress=True, method=method)
    other = madelung.ewald(crystal.in_basis(unimodular(rng)), tol=tol, forces=True, stress=True, method=method)
    _agree(reference, other, crystal, tol)


@pytest.mark.parametrize("tol", [1e-6, 1e-8])
def test_rock_salt_constant_from_an_oblique_supercell_with_the_default_method(tol):
    # 1728 rattled-free ions select the mesh engine by default; every basis must give OEIS A085469
    crystal = load("rocksalt-NaCl").repeat(6)
    r0 = float(crystal.nearest_distances()[1].min())
    exact = -ROCK_SALT * COULOMB_CONSTANT / r0 * crystal.formula_units
    engines = set()
    for matrix in OBLIQUE[:3]:
        result = madelung.ewald(crystal.in_basis(matrix), tol=tol)
        engines.add(result.params.method)
        assert abs(result.energy - exact) <= tol * result.energy_scale
        assert abs(result.energy - exact) <= result.error_estimate
    assert "mesh" in engines


def test_rattled_supercell_in_many_bases_matches_its_cubic_basis():
    crystal = rattled_rock_salt(6)
    tol = 1e-6
    reference = madelung.ewald(crystal, tol=tol * 1e-3, method="direct")
    rng = np.random.default_rng(11)
    for matrix in list(OBLIQUE) + [unimodular(rng) for _ in range(3)]:
        result = madelung.ewald(crystal.in_basis(matrix), tol=tol)
        error = abs(result.energy - reference.energy)
        assert error <= tol * result.energy_scale
        assert error <= result.error_estimate


@pytest.mark.parametrize("tol", [1e-4, 1e-7, 1e-10])
def test_estimate_never_below_the_achieved_error_in_oblique_bases(tol):
    rng = np.random.default_rng(5)
    for n_atoms in (2, 4):
        crystal = random_crystal(rng, n_atoms=n_atoms)
        exact, _ = mp_ewald_energy(crystal.cell, crystal.positions, crystal.charges, dps=25)
        for matrix in OBLIQUE:
            for method in ("direct", "mesh"):
                result = madelung.ewald(crystal.in_basis(matrix), tol=tol, method=method)
                error = abs(result.energy - float(exact))
                assert error <= tol * result.energy_scale
                assert error <= result.error_estimate


def test_mesh_supercell_in_an_oblique_basis_against_direct():
    # a supercell large enough that the mesh engine's check takes the proxy-cell form
    crystal = rattled_rock_salt(4).in_basis(OBLIQUE[0])
    tol = 1e-7
    mesh = ewald_mesh(crystal, tol=tol, forces=True, stress=True)
    direct = madelung.ewald(crystal, tol=tol * 1e-2, forces=True, stress=True, method="direct")
    _agree(mesh, direct, crystal, tol)
    assert mesh.params.extra["check"] is not None


def test_plan_works_in_the_reduced_basis_and_records_it():
    crystal = load("rocksalt-NaCl")
    matrix = np.array(OBLIQUE[0])
    plan = madelung.plan_for(crystal.in_basis(matrix), 1e-8)
    assert np.allclose(plan.cell, plan.basis_change @ plan.user_cell)
    assert round(abs(np.linalg.det(plan.basis_change))) == 1
    # the reduced vectors are as short as the conventional cell's primitive vectors (a / sqrt 2)
    assert np.max(np.linalg.norm(plan.cell, axis=1)) <= crystal.cell[0, 0] + 1e-9
    assert plan.to_dict()["method"] in ("direct", "mesh")


def test_tol_below_double_precision_is_refused_with_the_smallest_meaningful_value():
    crystal = load("rocksalt-NaCl")
    with pytest.raises(madelung.InputError, match="smallest meaningful tol here is about"):
        madelung.ewald(crystal, tol=1e-20)
    # the floor is part of every estimate
    result = madelung.ewald(crystal, tol=1e-12)
    assert result.plan.rounding_error >= tuning.EPSILON * result.energy_scale
    assert result.error_estimate >= result.plan.rounding_error


def test_every_driver_agrees_with_the_direct_engine_on_an_oblique_cell():
    crystal = load("fluorite-CaF2").in_basis(OBLIQUE[0])
    tol = 1e-9
    reference = madelung.ewald(crystal, tol=tol * 1e-2, method="direct")
    allowed_potential = 2.0 * tol * reference.energy_scale / float(np.abs(crystal.charges).sum())
    # the Coulomb matrix and the potentials of charge sets
    matrix = coulomb_matrix(crystal.cell, crystal.positions, tol=tol)
    assert np.max(np.abs(matrix @ crystal.charges - reference.potentials)) <= 10 * allowed_potential
    assert 0.5 * crystal.charges @ matrix @ crystal.charges == pytest.approx(reference.energy,
                                                                             abs=tol * reference.energy_scale)
    sets = potentials_for_charge_sets(crystal.cell, crystal.positions, crystal.charges[None, :], tol=tol)
    assert np.max(np.abs(sets[0] - reference.potentials)) <= 10 * allowed_potential
    # potentials at points: on the ions they are the site potentials
    points = madelung.potential_at(crystal, crystal.positions, tol=tol, exclude="coincident")
    assert np.max(np.abs(points.potentials - reference.potentials)) <= 10 * allowed_potential
    # the charged-cell correction does not depend on the basis either
    cubic = madelung.charged_cell_correction(load("fluorite-CaF2").cell, 1.0, dielectric=[[4, 0, 0], [0, 5, 0], [0, 0, 6]],
                                             tol=tol)
    oblique = madelung.charged_cell_correction(crystal.cell, 1.0, dielectric=[[4, 0, 0], [0, 5, 0], [0, 0, 6]], tol=tol)
    assert oblique.energy == pytest.approx(cubic.energy, abs=10 * tol * abs(cubic.energy) + 1e-12)
    assert math.isfinite(oblique.error_estimate)


def test_a_change_of_basis_must_keep_the_lattice():
    crystal = load("rocksalt-NaCl")
    with pytest.raises(madelung.InputError, match="determinant"):
        crystal.in_basis([[2, 0, 0], [0, 1, 0], [0, 0, 1]])  # a supercell, not the same lattice
    with pytest.raises(madelung.InputError, match="whole numbers"):
        crystal.in_basis([[1, 0.5, 0], [0, 1, 0], [0, 0, 1]])


def test_a_strongly_skewed_basis_gives_the_same_neighbours_and_sums():
    # entries up to 40: lattice vectors over 200 times longer than the reduced ones; the neighbour
    # walks lay their bins on the reduced basis, so distances and sums are those of the cubic cell
    crystal = load("fluorite-CaF2")
    skewed = crystal.in_basis([[1, 0, 0], [40, 1, 0], [37, 40, 1]])
    assert np.allclose(np.sort(skewed.nearest_distances()[0]), np.sort(crystal.nearest_distances()[0]), atol=1e-9)
    tol = 1e-8
    reference = madelung.ewald(crystal, tol=tol, forces=True)
    result = madelung.ewald(skewed, tol=tol, forces=True)
    assert abs(result.energy - reference.energy) <= 2 * tol * reference.energy_scale
    assert np.allclose(result.forces, reference.forces, atol=1e-6)


def test_niggli_cell_has_the_minkowski_lengths():
    """The cell checks take the reduced lengths from spglib's Niggli cell: they must be those of
    ASE's Minkowski reduction (reference library) for oblique and sheared bases alike."""
    rng = np.random.default_rng(11)
    for k in range(200):
        cell = rng.normal(size=(3, 3)) * rng.uniform(1.0, 10.0)
        if k % 2:
            cell = (np.eye(3, dtype=int) + np.triu(rng.integers(-4, 5, size=(3, 3)), 1)) @ cell
        niggli = niggli_reduced(cell)
        assert niggli is not None
        minkowski, _ = minkowski_reduce(cell)
        assert np.allclose(np.sort(np.linalg.norm(niggli, axis=1)), np.sort(np.linalg.norm(minkowski, axis=1)),
                           rtol=1e-9, atol=0)
