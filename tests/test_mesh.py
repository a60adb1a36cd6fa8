"""Smooth particle-mesh Ewald against the direct Ewald sum, published constants, its own
derivatives, convergence with mesh and spline order, and the choice of engine."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import madelung
from madelung.sums import mesh as mesh_module
from madelung.sums._kernels import mesh_kernels
from madelung.sums import tuning
from madelung.sums.direct import ewald_direct
from madelung.sums.mesh import ewald_mesh
from madelung.units import COULOMB_CONSTANT

from conftest import load, random_crystal


def _compare(crystal, tol, forces=True, stress=True):
    reference = ewald_direct(crystal, tol=tol * 1e-3, forces=forces, stress=stress)
    mesh = ewald_mesh(crystal, tol=tol, forces=forces, stress=stress, check=False)
    # allowances implied by the contract |dE| <= tol E_scale (see madelung.ewald): potential
    # errors of root-mean-square dphi add up coherently to at most 1/2 sum|q| dphi, so the
    # matching allowance on the rms potential error is 2 tol E_scale / sum|q| (and 3 times that
    # on the largest); forces and stress get that over d_min and V, with a factor 10 for the
    # derivative of the error (its shortest wavelength is the mesh step)
    charges = np.asarray(crystal.charges)
    energy_allowed = tol * reference.energy_scale
    potential_allowed = 2.0 * energy_allowed / float(np.abs(charges).sum())
    d_min = crystal.shortest_distance
    assert mesh.params.method == "mesh"
    assert abs(mesh.energy - reference.energy) <= energy_allowed
    potential_error = mesh.potentials - reference.potentials
    assert np.sqrt(np.mean(potential_error ** 2)) <= potential_allowed
    assert np.max(np.abs(potential_error)) <= 3.0 * potential_allowed
    if forces:
        force_allowed = 10.0 * potential_allowed * float(np.max(np.abs(charges))) / d_min
        assert np.max(np.abs(mesh.forces - reference.forces)) <= force_allowed
    if stress:
        stress_allowed = 10.0 * energy_allowed / crystal.volume
        assert np.max(np.abs(mesh.stress - reference.stress)) <= stress_allowed
    return mesh, reference


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), tol=st.sampled_from([1e-5, 1e-7]))
def test_mesh_agrees_with_direct_on_random_triclinic_cells(seed, tol):
    crystal = random_crystal(np.random.default_rng(seed), n_atoms=int(np.random.default_rng(seed).integers(4, 12)))
    _compare(crystal, tol)


def test_mesh_agrees_with_direct_on_a_rattled_supercell(rng):
    base = load("rocksalt-NaCl").repeat(2)
    crystal = base.replace(positions=base.positions + rng.normal(0.0, 0.1, base.positions.shape))
    mesh, _ = _compare(crystal, 1e-8)
    assert mesh.params.extra["order"] in tuning.TUNED_ORDERS


def test_net_charge_is_summed_with_the_same_background(rng):
    crystal = random_crystal(rng, n_atoms=6)
    charged = crystal.with_charges(np.asarray(crystal.charges) + 0.3)
    mesh, reference = _compare(charged, 1e-6)
    assert mesh.background and reference.background
    # energy of the uniform neutralizing background, -k_e pi Q^2 / (2 V alpha^2) with Q = 6 x 0.3 e
    # (fact of the trade)
    assert mesh.components["background"] == pytest.approx(
        -COULOMB_CONSTANT * math.pi * (1.8 ** 2) / (2 * charged.volume * mesh.params.alpha ** 2), rel=1e-6)


# handbook convention E_fu = -M z+ |z-| k_e / r0, through method="mesh" at tol 1e-8
PUBLISHED = [
    ("rocksalt-NaCl", 1.747564594633, 1e-12),          # OEIS A085469
    ("caesium-chloride-CsCl", 1.762674773071, 1e-12),  # OEIS A181152
    # CRC Handbook of Chemistry and Physics, "Madelung constants": 1.63806; 1.6380550533 from memory
    ("zincblende-ZnS", 1.6380550533, 1e-10),
    ("fluorite-CaF2", 2.51939, 1e-5),                  # CRC Handbook, same table
]


@pytest.mark.parametrize("name,value,published_digits", PUBLISHED)
def test_published_constants_through_the_mesh(name, value, published_digits):
    tol = 1e-8
    constants = madelung.madelung_constants(load(name), tol=tol, method="mesh")
    result = constants.ewald
    assert result.params.method == "mesh"
    zp, zm = constants.handbook_charges
    # the contract |dE| <= tol E_scale turned into the constant's units
    allowed = tol * result.energy_scale / constants.formula_units * constants.r0 / (COULOMB_CONSTANT * zp * zm)
    assert abs(constants.handbook - value) <= allowed + published_digits


def test_mesh_forces_and_stress_are_the_derivatives_of_the_mesh_energy(rng):
    # fixed alpha, mesh and order: the mesh energy is a smooth function of positions and strain,
    # so central differences must reproduce the analytic forces and stress whatever the mesh error
    crystal = random_crystal(rng, n_atoms=5)
    fixed = dict(alpha=1.1, mesh=(12, 15, 14), order=6, check=False)
    result = ewald_mesh(crystal, tol=1e-6, forces=True, stress=True, **fixed)
    step = 1e-5
    for atom, axis in ((0, 0), (3, 2)):
        moved = []
        for sign in (1, -1):
            positions = np.array(crystal.positions)
            positions[atom, axis] += sign * step
            moved.append(ewald_mesh(crystal.replace(positions=positions), tol=1e-6, **fixed).energy)
        assert -(moved[0] - moved[1]) / (2 * step) == pytest.approx(result.forces[atom, axis], abs=2e-6)
    for a, b in ((0, 0), (1, 2)):
        strained = []
        for sign in (1, -1):
            strain = np.eye(3)
            strain[a, b] += sign * step
            strained.append(ewald_mesh(crystal.replace(cell=crystal.cell @ strain, positions=crystal.positions @ strain),
                                       tol=1e-6, **fixed).energy)
        # ASE sign: stress = (1/V) dE/d(strain)
        derivative = (strained[0] - strained[1]) / (2 * step) / crystal.volume
        assert derivative == pytest.approx(0.5 * (result.stress[a, b] + result.stress[b, a]) if a != b
                                           else result.stress[a, b], abs=2e-7)


def test_error_falls_with_mesh_size_and_spline_order(rng):
    # not timed: the mesh error at a fixed alpha falls as a power of the mesh step set by the
    # spline order (Essmann et al. 1995), and higher orders converge faster. The ions are
    # displaced: ions sitting on mesh points of a commensurate mesh are interpolated exactly.
    base = load("rocksalt-NaCl")
    crystal = base.replace(positions=base.positions + rng.normal(0.0, 0.15, base.positions.shape))
    alpha = 1.2
    reference = ewald_direct(crystal, tol=1e-13, alpha=alpha)
    errors = {}
    for order in (4, 6, 8):
        for size in (12, 18, 27):
            result = ewald_mesh(crystal, tol=1e-12, alpha=alpha, mesh=size, order=order, check=False)
            errors[order, size] = abs(result.energy - reference.energy) / reference.energy_scale
    for order in (4, 6, 8):
        e = [errors[order, k] for k in (12, 18, 27)]
        assert e[0] > e[1] > e[2]
        # a 1.5x finer mesh gains at least 1.5^(order - 1)
        assert e[0] / e[1] > 1.5 ** (order - 1)
    for size in (12, 18):
        assert errors[4, size] > errors[6, size] > errors[8, size]


def test_slab_spreading_matches_serial_spreading(rng):
    frac = rng.random((400, 3))
    charges = rng.normal(size=400)
    shape = np.array([20, 9, 11], np.int64)
    order_of_atoms, start, n_slabs = mesh_module._slabs(frac[:, 0], 20, 6, threads=2)
    assert n_slabs >= 2 and n_slabs % 2 == 0
    parallel = mesh_kernels.spread_charges(frac, charges, order_of_atoms, start, n_slabs, shape, 6)
    serial = mesh_kernels.spread_charges(frac, charges, np.arange(400, dtype=np.int64),
                                         np.array([0, 400], np.int64), 1, shape, 6)
    assert np.allclose(parallel, serial, rtol=0, atol=1e-12)
    # B-splines are a partition of unity: the mesh holds the total charge
    assert parallel.sum() == pytest.approx(charges.sum(), abs=1e-10)


def test_spline_weights_against_scipy():
    from scipy.interpolate import BSpline

    values = np.empty(6)
    slopes = np.empty(6)
    mesh_kernels._spline_row.py_func(0.37, 6, values, slopes)
    element = BSpline.basis_element(np.arange(7), extrapolate=False)  # cardinal B-spline of order 6
    expected = np.array([float(element(0.37 + j)) for j in range(6)])
    expected_slopes = np.array([float(element.derivative()(0.37 + j)) for j in range(6)])
    assert np.allclose(values, expected, rtol=0, atol=1e-14)
    assert np.allclose(slopes, expected_slopes, rtol=0, atol=1e-14)


def test_method_choice(rng):
    small = load("rocksalt-NaCl")
    auto = madelung.ewald(small, tol=1e-8)
    predictions = auto.params.extra["predicted_seconds_by_method"]
    # a small sum takes the direct engine without tuning the mesh (its prediction is None)
    assert predictions["mesh"] is None and auto.params.method == "direct"
    assert madelung.ewald(small, tol=1e-6, method="mesh").params.method == "mesh"
    assert madelung.ewald(small, tol=1e-6, method="direct").params.method == "direct"
    # the direct sum grows as N^1.5, the mesh as N log N: for a large cell the mesh is predicted faster
    big = load("rocksalt-NaCl").repeat(10)
    predicted = madelung.plan_for(big, 1e-8).predicted_seconds
    assert predicted["mesh"] < predicted["direct"]
    with pytest.raises(madelung.InputError):
        madelung.ewald(small, method="fastest")


def test_check_reports_the_measured_error_within_the_estimate():
    crystal = load("zincblende-ZnS")
    result = ewald_mesh(crystal, tol=1e-7, check=True)
    check = result.params.extra["check"]
    assert check["sample"] == len(crystal)
    assert check["energy_error_bound_eV"] <= result.params.extra["mesh_error_eV"]
    assert result.error_estimate <= 1e-7 * result.energy_scale


def test_bad_mesh_options_are_input_errors():
    crystal = load("rocksalt-NaCl")
    with pytest.raises(madelung.InputError):
        ewald_mesh(crystal, tol=1e-6, order=11)
    with pytest.raises(madelung.InputError):
        ewald_mesh(crystal, tol=1e-6, mesh=3, order=6)
    with pytest.raises(madelung.InputError):
        ewald_mesh(crystal, tol=1e-6, check="sometimes")


def test_failed_check_refines_the_mesh(monkeypatch, rng):
    # an estimate 10^4 times too optimistic picks too coarse a mesh; the subsample check must
    # catch it and refine the mesh until the measured error meets the target
    optimistic = {n: (a * 1e-4, s) for n, (a, s) in tuning.MESH_ERROR_MODEL.items()}
    monkeypatch.setattr(tuning, "MESH_ERROR_MODEL", optimistic)
    base = load("rocksalt-NaCl")
    crystal = base.replace(positions=base.positions + rng.normal(0.0, 0.1, base.positions.shape))
    tol = 1e-7
    coarse = ewald_mesh(crystal, tol=tol, check=False)
    refined = ewald_mesh(crystal, tol=tol, check=True)
    reference = ewald_direct(crystal, tol=1e-12)
    assert abs(coarse.energy - reference.energy) > tol * reference.energy_scale  # the trap is real
    assert len(refined.params.extra["checks"]) >= 2 and refined.params.extra["check"]["kind"] == "subsample"
    assert np.prod(refined.params.extra["mesh"]) > np.prod(coarse.params.extra["mesh"])
    assert abs(refined.energy - reference.energy) <= tol * reference.energy_scale


def test_proxy_check_catches_an_optimistic_estimate(monkeypatch, rng):
    # with the subsample check priced out, the proxy cell (same splitting parameter and mesh step,
    # random ions) must expose an estimate 10^4 times too optimistic and refine the mesh
    optimistic = {n: (a * 1e-4, s) for n, (a, s) in tuning.MESH_ERROR_MODEL.items()}
    monkeypatch.setattr(tuning, "MESH_ERROR_MODEL", optimistic)
    monkeypatch.setattr(mesh_module, "CHECK_SHARE", 0.0)
    base = load("rocksalt-NaCl").repeat(3)
    crystal = base.replace(positions=base.positions + rng.normal(0.0, 0.1, base.positions.shape))
    tol = 1e-6
    coarse = ewald_mesh(crystal, tol=tol, check=False)
    checked = ewald_mesh(crystal, tol=tol)
    reference = ewald_direct(crystal, tol=1e-10)
    assert abs(coarse.energy - reference.energy) > tol * reference.energy_scale  # the trap is real
    assert checked.params.extra["check"]["kind"] == "proxy cell"
    assert checked.params.extra["checks"][0]["measured_over_predicted"] > 10.0
    assert np.prod(checked.params.extra["mesh"]) > np.prod(coarse.params.extra["mesh"])
    assert abs(checked.energy - reference.energy) <= tol * reference.energy_scale
    assert abs(checked.energy - reference.energy) <= checked.error_estimate
