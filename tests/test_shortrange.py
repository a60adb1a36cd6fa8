"""Short-range pair terms: derivatives against finite differences, the pair sum against a plain
image-by-image sum, smooth cutoff, invariances, and the parameter file."""

import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from madelung import Crystal, InputError
from madelung.sums.shortrange import PairPotential, RepulsionModel, shortrange

NACL = str(Path(__file__).resolve().parent.parent / "structures" / "rocksalt-NaCl.cif")

# A mixed model (every form once), parameters of plausible size only; nothing here is a fitted value.
MODEL = RepulsionModel((
    PairPotential(("Cl", "Na"), "buckingham", {"A": 1200.0, "rho": 0.32, "C": 5.0}),
    PairPotential(("Cl", "Cl"), "born-lande", {"B": 4000.0, "n": 9.0}),
    PairPotential(("Na", "Na"), "born-mayer", {"A": 400.0, "rho": 0.3}),
), cutoff=6.0, switch_width=1.5)


def _rattled(seed=0, strain=0.03):
    """A primitive rock-salt cell, sheared and with displaced ions (triclinic, thinner than the cutoff)."""
    rng = np.random.default_rng(seed)
    a = 5.64
    cell = 0.5 * a * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0]], float)
    cell = cell @ (np.eye(3) + strain * rng.standard_normal((3, 3)))
    frac = np.array([[0, 0, 0], [0.5, 0.5, 0.5], [0.25, 0.1, 0.6], [0.7, 0.8, 0.2]])
    positions = frac @ cell + 0.05 * rng.standard_normal((4, 3))
    return Crystal(cell, positions, [1, -1, 1, -1], ["Na", "Cl", "Na", "Cl"])


def _brute_force(crystal, model):
    """Plain sum over pairs and explicit lattice images, in numpy, with the same switching function."""
    r_cut, r_on = model.cutoff, model.cutoff - model.switch_width
    cell = crystal.cell
    spacing = abs(np.linalg.det(cell)) / np.linalg.norm(np.cross(cell[[1, 2, 0]], cell[[2, 0, 1]]), axis=1)
    reach = np.ceil(r_cut / spacing).astype(int) + 1
    shifts = np.array([(i, j, k) for i in range(-reach[0], reach[0] + 1) for j in range(-reach[1], reach[1] + 1)
                       for k in range(-reach[2], reach[2] + 1)]) @ cell
    total = 0.0
    for i, si in enumerate(crystal.symbols):
        for j, sj in enumerate(crystal.symbols):
            d = np.linalg.norm(crystal.positions[i] - crystal.positions[j] - shifts, axis=1)
            d = d[(d > 1e-9) & (d < r_cut)]
            x = np.clip((d - r_on) / (r_cut - r_on), 0, 1)
            switch = 1 - 10 * x**3 + 15 * x**4 - 6 * x**5
            total += 0.5 * np.sum(model.pair(si, sj).energy(d) * switch)
    return total


def test_pair_sum_matches_plain_image_sum():
    crystal = _rattled(1)
    assert shortrange(crystal, MODEL).energy == pytest.approx(_brute_force(crystal, MODEL), rel=1e-12)


@pytest.mark.parametrize("seed", [0, 3])
def test_forces_match_finite_differences(seed):
    crystal = _rattled(seed)
    result = shortrange(crystal, MODEL, forces=True)
    h = 1e-5
    numeric = np.zeros_like(result.forces)
    for i in range(len(crystal)):
        for a in range(3):
            energies = []
            for sign in (1, -1):
                p = crystal.positions.copy()
                p[i, a] += sign * h
                energies.append(shortrange(crystal.replace(positions=p), MODEL).energy)
            numeric[i, a] = -(energies[0] - energies[1]) / (2 * h)
    np.testing.assert_allclose(result.forces, numeric, atol=1e-6)
    np.testing.assert_allclose(result.forces.sum(axis=0), 0, atol=1e-9)  # Newton's third law


def test_stress_matches_finite_differences():
    crystal = _rattled(2)
    result = shortrange(crystal, MODEL, stress=True)
    h = 1e-6
    numeric = np.zeros((3, 3))
    for a in range(3):
        for b in range(3):
            energies = []
            for sign in (1, -1):
                strain = np.eye(3)
                strain[a, b] += sign * h
                energies.append(shortrange(crystal.replace(cell=crystal.cell @ strain,
                                                           positions=crystal.positions @ strain), MODEL).energy)
            numeric[a, b] = (energies[0] - energies[1]) / (2 * h) / crystal.volume
    numeric = 0.5 * (numeric + numeric.T)
    np.testing.assert_allclose(result.stress, numeric, atol=1e-7)


def test_energy_is_smooth_across_the_cutoff():
    # two ions in a large cell: E(r) and dE/dr go continuously to zero at the cutoff
    model = RepulsionModel((PairPotential(("Cl", "Na"), "born-mayer", {"A": 1000.0, "rho": 0.5}),
                            PairPotential(("Na", "Na"), "none", {}), PairPotential(("Cl", "Cl"), "none", {})),
                           cutoff=5.0, switch_width=1.0)

    def energy(r):
        return shortrange(Crystal(np.eye(3) * 30, [[0, 0, 0], [r, 0, 0]], [1, -1], ["Na", "Cl"]), model).energy

    assert energy(3.99) == pytest.approx(float(model.pairs[0].energy(3.99)), rel=1e-12)   # unswitched inside
    assert energy(5.0 - 1e-4) < 1e-12 * model.pairs[0].params["A"]
    assert energy(5.0 + 1e-4) == 0.0
    slope_left = (energy(5.0 - 1e-3) - energy(5.0 - 2e-3)) / 1e-3
    assert abs(slope_left) < 1e-4


@settings(max_examples=10, deadline=None)
@given(shift=st.lists(st.floats(-3, 3), min_size=3, max_size=3), seed=st.integers(0, 50),
       angles=st.lists(st.floats(0, 2 * np.pi), min_size=3, max_size=3))
def test_translation_rotation_and_supercell_invariance(shift, seed, angles):
    crystal = _rattled(seed)
    base = shortrange(crystal, MODEL).energy
    moved = crystal.replace(positions=crystal.positions + np.array(shift))
    assert shortrange(moved, MODEL).energy == pytest.approx(base, rel=1e-10)
    a, b, c = angles
    rz = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
    rx = np.array([[1, 0, 0], [0, np.cos(b), -np.sin(b)], [0, np.sin(b), np.cos(b)]])
    ry = np.array([[np.cos(c), 0, np.sin(c)], [0, 1, 0], [-np.sin(c), 0, np.cos(c)]])
    rotation = rz @ rx @ ry
    turned = crystal.replace(cell=crystal.cell @ rotation.T, positions=crystal.positions @ rotation.T)
    assert shortrange(turned, MODEL).energy == pytest.approx(base, rel=1e-10)
    assert shortrange(crystal.repeat((2, 1, 1)), MODEL).energy == pytest.approx(2 * base, rel=1e-10)


def test_threaded_kernel_on_a_large_supercell():
    # 6 x 6 x 6 copies (864 ions) run on every thread; the small cell on one (geometry.thread_budget): same sums
    crystal = _rattled(5)
    base = shortrange(crystal, MODEL, forces=True, stress=True)
    big = shortrange(crystal.repeat((6, 6, 6)), MODEL, forces=True, stress=True)
    assert big.energy == pytest.approx(216 * base.energy, rel=1e-10)
    np.testing.assert_allclose(big.forces[:4], base.forces, atol=1e-9)
    np.testing.assert_allclose(big.stress, base.stress, atol=1e-12)


def test_parameter_file_round_trip(tmp_path):
    path = tmp_path / "p.json"
    MODEL.save(path)
    again = RepulsionModel.load(path)
    assert again.cutoff == MODEL.cutoff and again.switch_width == MODEL.switch_width
    crystal = _rattled(4)
    assert shortrange(crystal, again).energy == shortrange(crystal, MODEL).energy


def test_missing_pair_is_named():
    model = RepulsionModel((PairPotential(("Cl", "Na"), "born-mayer", {"A": 1000.0, "rho": 0.3}),))
    with pytest.raises(InputError, match="Cl-Cl"):
        shortrange(_rattled(0), model)


@pytest.mark.parametrize("document, message", [
    ([1, 2, 3], "JSON object"),
    ({"pairs": []}, "madelung_repulsion"),
    ({"madelung_repulsion": 1, "pairs": {"Na": 1}}, "non-empty list"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na"], "form": "born-mayer"}]}, "two element symbols"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "lennard"}]}, "not one of"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": 1.0}]}, "needs rho"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": 1.0, "rho": -1}]},
     "rho must be positive"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": "x", "rho": 1}]},
     "finite number"),
    ({"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": 1, "rho": 1, "n": 8}]},
     "not a parameter"),
])
def test_bad_parameter_files(tmp_path, document, message):
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(document))
    with pytest.raises(InputError, match=message):
        RepulsionModel.load(path)


def test_cli_reports_bad_parameter_file_with_exit_2(tmp_path, capsys):
    from madelung.cli import main

    path = tmp_path / "bad.json"
    path.write_text('{"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer"}]}')
    code = main(["energy", NACL, "--repulsion", str(path)])
    err = capsys.readouterr().err
    assert code == 2 and "needs A" in err and len(err.strip().splitlines()) == 1
    path.write_text('{"madelung_repulsion": 1, "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", '
                    '"A": 1000, "rho": 0.3}]}')
    code = main(["energy", NACL, "--repulsion", str(path)])
    err = capsys.readouterr().err
    assert code == 2 and "Cl-Cl" in err
