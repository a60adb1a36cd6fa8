"""One plan, used many times: the closed-form tuning, a plan serving other charges on the same
sites, and plans kept between calls.

Outside values: the rock-salt Madelung constant 1.747564594633182 (OEIS A085469), the CsCl
constant 1.76267477307099 (OEIS A181152, r0 = a sqrt(3) / 2) and the fluorite constant 2.51939
in the handbook convention (CRC Handbook "Madelung constants", from memory).
"""

import math

import numpy as np
import pytest

import madelung
from madelung.sums import tuning
from madelung.sums.direct import run_direct
from madelung.sums.matrix import coulomb_matrix, potentials_for_charge_sets, site_plan
from madelung.sums.plan import plan_sum
from madelung.units import COULOMB_CONSTANT

from conftest import load

ROCK_SALT = 1.747564594633182   # OEIS A085469
CAESIUM_CHLORIDE = 1.76267477307099   # OEIS A181152
FLUORITE_HANDBOOK = 2.51939   # CRC Handbook, from memory


@pytest.mark.parametrize("n_atoms,volume_per_atom,tol,alpha", [
    (2, 22.4, 1e-8, None), (8, 22.4, 1e-12, None), (40, 12.0, 1e-4, None), (4096, 22.4, 1e-8, None),
    (10 ** 6, 18.0, 1e-6, None), (8, 22.4, 1e-8, 0.4)])
def test_closed_form_tuning_is_the_least_predicted_cost(n_atoms, volume_per_atom, tol, alpha):
    # no splitting parameter on a fine scan meets the target at a lower predicted cost of the same
    # model, and the chosen one meets it
    sums = tuning.ChargeSums(n_atoms, 2.5 * n_atoms, 1.5 * n_atoms, 0.0)
    volume = n_atoms * volume_per_atom
    target = tol * COULOMB_CONSTANT * sums.square_sum / 2.5
    choice = tuning.choose_direct(target, sums, volume, 2.5, COULOMB_CONSTANT, alpha=alpha)
    assert choice.real_error + choice.reciprocal_error <= target * (1 + 1e-9)
    if alpha is not None:
        assert choice.alpha == alpha
        return
    scan = choice.alpha * np.geomspace(0.1, 10.0, 4001)
    share = 0.5 * target * tuning.SAFETY
    r_cut, k_cut = tuning.cutoffs_for(scan, share, share, sums, volume, COULOMB_CONSTANT)
    assert choice.predicted_ns <= np.min(tuning.direct_cost_ns(r_cut, k_cut, n_atoms, volume)) * (1 + 1e-6)


@pytest.mark.parametrize("name,constant", [("rocksalt-NaCl", ROCK_SALT), ("fluorite-CaF2", FLUORITE_HANDBOOK)])
def test_a_plan_for_unit_charges_serves_the_crystals_own(name, constant):
    crystal = load(name)
    tol = 1e-10
    plan = site_plan(crystal.cell, crystal.positions, tol=tol).with_charges(crystal.charges)
    assert plan.error_estimate <= plan.target
    result = run_direct(crystal, plan)
    constants = madelung.madelung_constants(crystal, tol=tol, ewald_result=result)
    assert constants.handbook == pytest.approx(constant, rel=1e-5)   # the table's digits
    reference = madelung.ewald(crystal, tol=tol * 1e-3)
    assert abs(result.energy - reference.energy) <= tol * result.energy_scale
    if name == "rocksalt-NaCl":   # all the digits
        exact = -ROCK_SALT * COULOMB_CONSTANT / constants.r0 * crystal.formula_units
        assert abs(result.energy - exact) <= tol * result.energy_scale


def test_describe_reuses_one_plan_without_losing_accuracy():
    crystal = load("rocksalt-NaCl")
    row = madelung.describe(crystal, tol=1e-10).to_dict()
    assert row["madelung_handbook"] == pytest.approx(ROCK_SALT, abs=1e-9)
    matrix = coulomb_matrix(crystal.cell, crystal.positions, tol=1e-10)
    q = np.asarray(crystal.charges)
    # the spectrum's matrix and the energy agree: E = q J q / 2 for a neutral cell
    assert abs(0.5 * q @ matrix @ q - row["energy_eV"]) <= 1e-10 * COULOMB_CONSTANT * (q @ q) / row["r0_A"]


def test_a_kept_plan_does_not_follow_edits_of_the_callers_array():
    a = 4.12
    cell = np.eye(3) * a
    caesium_chloride = np.array([[0.0, 0.0, 0.0], [a / 2, a / 2, a / 2]])
    exact = -CAESIUM_CHLORIDE * COULOMB_CONSTANT / (a * math.sqrt(3) / 2)
    charges = np.array([[1.0, -1.0]])
    positions = caesium_chloride.copy()
    plan_sum(cell, positions, charges[0], tol=1e-10, method="direct")   # planned, nothing summed yet
    positions[1] = [0.3 * a, 0.1 * a, 0.2 * a]           # the caller edits its array in place
    potentials_for_charge_sets(cell, positions, charges, tol=1e-10)
    again = potentials_for_charge_sets(cell, caesium_chloride.copy(), charges, tol=1e-10)
    assert abs(0.5 * charges[0] @ again[0] - exact) <= 1e-10 * COULOMB_CONSTANT * 2 / (a * math.sqrt(3) / 2)


def test_moved_ions_in_the_same_cell_keep_the_contract():
    # the same cell with its ions moved reuses the cell's tuning and k-vectors; each sum still
    # meets tol against a fresh one at a tolerance 1000 times tighter, and the unmoved crystal
    # still gives the published constant
    crystal = load("rocksalt-NaCl")
    rng = np.random.default_rng(7)
    tol = 1e-8
    for _ in range(3):
        moved = crystal.replace(positions=crystal.positions + rng.normal(0.0, 0.02, crystal.positions.shape))
        result = madelung.ewald(moved, tol=tol, forces=True)
        reference = madelung.ewald(moved, tol=tol * 1e-3)
        assert abs(result.energy - reference.energy) <= tol * result.energy_scale
    result = madelung.ewald(crystal, tol=tol)
    _, to_opposite, _ = crystal.nearest_distances()
    exact = -ROCK_SALT * COULOMB_CONSTANT / float(to_opposite.min()) * crystal.formula_units
    assert abs(result.energy - exact) <= tol * result.energy_scale
