"""The accuracy contract against an Ewald sum written independently here, on random crystals.

Reference: the Ewald (1921) split written out plainly with NumPy and ``scipy.special.erfc`` (real
and reciprocal cutoffs where the erfc and Gaussian tails are below 1e-20, self term, and the
neutralizing-background term of a charged cell, Hummer, Pratt & Garcia, J. Phys. Chem. 100 (1996)
1206), with the Coulomb constant from ``scipy.constants`` (CODATA). It shares no code with the
package. The contract (the README's): |E - E_exact| <= tol x E_scale, in every basis of the crystal
and with every engine.
"""

import itertools
import warnings

import numpy as np
import pytest
import scipy.constants as c
from scipy.special import erfc

import madelung
from madelung import Crystal

COULOMB = c.e / (4 * c.pi * c.epsilon_0) / c.angstrom   # eV Å per e^2


def reference_energy(cell, positions, charges):
    cell = np.asarray(cell, float)
    volume = abs(np.linalg.det(cell))
    n = len(charges)
    alpha = (np.pi * n / volume ** 2) ** (1 / 6)
    r_cut, k_cut = 7.0 / alpha, 14.0 * alpha        # erfc(7) and exp(-49): below 1e-20
    inverse = np.linalg.inv(cell)
    reach = [int(np.ceil(r_cut * np.linalg.norm(inverse[:, a]))) + 1 for a in range(3)]
    d = positions[:, None, :] - positions[None, :, :]
    qq = charges[:, None] * charges[None, :]
    real = 0.0
    for shift in itertools.product(*[range(-m, m + 1) for m in reach]):
        r = np.linalg.norm(d + np.array(shift) @ cell, axis=2)
        if shift == (0, 0, 0):
            np.fill_diagonal(r, np.inf)
        inside = r < r_cut
        real += 0.5 * np.sum((qq * erfc(alpha * r) / r)[inside])
    reciprocal_cell = 2 * np.pi * inverse.T
    k_reach = [int(np.ceil(k_cut / np.linalg.norm(reciprocal_cell[a]))) + 1 for a in range(3)]
    recip = 0.0
    for h in itertools.product(*[range(-m, m + 1) for m in k_reach]):
        if h == (0, 0, 0):
            continue
        k = np.array(h) @ reciprocal_cell
        k2 = k @ k
        if k2 > k_cut ** 2:
            continue
        s = np.sum(charges * np.exp(1j * positions @ k))
        recip += np.exp(-k2 / (4 * alpha ** 2)) / k2 * abs(s) ** 2
    recip *= 2 * np.pi / volume
    self_term = -alpha / np.sqrt(np.pi) * np.sum(charges ** 2)
    background = -np.pi / (2 * volume * alpha ** 2) * np.sum(charges) ** 2
    return COULOMB * (real + recip + self_term + background)


def _random_crystal(rng, neutral):
    from ase.geometry import cellpar_to_cell
    while True:
        lengths = rng.uniform(3.0, 7.0, 3)
        angles = rng.uniform(65.0, 115.0, 3)
        cell = cellpar_to_cell([*lengths, *angles])
        if abs(np.linalg.det(cell)) < 0.4 * np.prod(lengths):
            continue
        n = int(rng.integers(2, 7))
        charges = rng.integers(-3, 4, n).astype(float)
        if neutral:
            charges[-1] -= charges.sum()
        if not np.any(charges):
            continue
        positions = rng.random((n, 3)) @ cell
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return Crystal(cell, positions, charges)
        except madelung.InputError:   # ions drawn too close together: draw again
            continue


def _oblique(rng):
    change = np.eye(3, dtype=int)
    for _ in range(3):
        i, j = rng.choice(3, 2, replace=False)
        change[i] += int(rng.integers(-2, 3)) * change[j]
    return change


@pytest.mark.parametrize("seed,neutral", [(1, True), (2, True), (3, False)])
def test_random_crystals_in_random_bases_meet_the_contract(seed, neutral):
    rng = np.random.default_rng(seed)
    for _ in range(2):
        crystal = _random_crystal(rng, neutral)
        exact = reference_energy(crystal.cell, crystal.positions, crystal.charges)
        for basis in (crystal, crystal.in_basis(_oblique(rng))):
            for tol in (1e-2, 1e-6, 1e-10):
                for method in ("auto", "direct", "mesh"):
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")   # the background warning of charged cells
                        result = madelung.ewald(basis, tol=tol, method=method)
                    assert abs(result.energy - exact) <= tol * result.energy_scale, (tol, method)


@pytest.mark.parametrize("seed", [4, 5])
def test_sum_from_the_coulomb_matrix_meets_the_contract(seed):
    """The screening descriptors take a crystal's energy and potentials as J q from its Coulomb
    matrix (madelung.sums.matrix.matrix_and_sum): the same contract against the independent sum,
    in two bases; the direct engine on the same layout to rounding; madelung.ewald within tol."""
    from madelung.sums.direct import run_direct
    from madelung.sums.matrix import matrix_and_sum, site_plan
    rng = np.random.default_rng(seed)
    for _ in range(2):
        crystal = _random_crystal(rng, neutral=True)
        exact = reference_energy(crystal.cell, crystal.positions, crystal.charges)
        for basis in (crystal, crystal.in_basis(_oblique(rng))):
            for tol in (1e-4, 1e-8):
                plan = site_plan(basis.cell, basis.positions, tol=tol, d_min=basis.shortest_distance)
                matrix, result = matrix_and_sum(basis, plan)
                assert result is not None      # a unit-charge layout serves any neutral charges
                assert abs(result.energy - exact) <= tol * result.energy_scale, tol
                assert result.energy == pytest.approx(0.5 * basis.charges @ matrix @ basis.charges, rel=1e-12)
                same_layout = run_direct(basis, plan.with_charges(basis.charges))
                assert result.energy == pytest.approx(same_layout.energy, rel=1e-12)
                assert np.allclose(result.potentials, same_layout.potentials, rtol=0, atol=1e-11)
                direct = madelung.ewald(basis, tol=tol, method="direct")
                scale = np.abs(direct.potentials).max()
                assert np.abs(result.potentials - direct.potentials).max() <= 2 * tol * scale
