"""Charged-supercell image correction with scalar and tensor dielectric constants."""

import json
import warnings

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

import madelung
from madelung import Crystal, InputError, MadelungWarning
from madelung.cli import main
from madelung.analysis.defects import charged_cell_correction, correction_series, dielectric_tensor
from madelung.units import COULOMB_CONSTANT as K_E

# Point charge in a neutralizing background, E_image = q^2 alpha / (2 eps L), L the cubic lattice
# constant: alpha = 2.8373 (sc), 3.6392 (bcc), 4.5848 (fcc)
# (G. Makov and M. C. Payne, Phys. Rev. B 51 (1995) 4014, Table I).
MAKOV_PAYNE = {"sc": 2.8373, "bcc": 3.6392, "fcc": 4.5848}
SHAPES = {"sc": np.eye(3), "bcc": 0.5 * (np.ones((3, 3)) - 2 * np.eye(3)), "fcc": 0.5 * (np.ones((3, 3)) - np.eye(3))}

TRICLINIC = np.array([[6.0, 0.0, 0.0], [1.5, 7.0, 0.0], [0.8, -1.0, 9.0]])
EPS = np.array([[8.0, 1.0, 0.5], [1.0, 11.0, -0.7], [0.5, -0.7, 6.0]])


def _lone_charge_energy(cell, q, alpha=None):
    """Ewald energy of one charge with its background, from the engine (it warns about the net charge)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        return madelung.ewald(Crystal(cell, [[0.0, 0.0, 0.0]], [q]), tol=1e-12, alpha=alpha).energy


@pytest.mark.parametrize("lattice", ["sc", "bcc", "fcc"])
@pytest.mark.parametrize("q,eps", [(1.0, 1.0), (2.0, 10.0), (-3.0, 4.5)])
def test_makov_payne_cubic_supercells(lattice, q, eps):
    length = 9.3
    result = charged_cell_correction(length * SHAPES[lattice], q, eps)
    expected = q * q * MAKOV_PAYNE[lattice] * K_E / (2 * eps * length)
    assert result.energy == pytest.approx(expected, rel=2e-5)  # the table gives 5 digits


def test_image_energy_is_minus_the_lone_charge_lattice_energy():
    with pytest.warns(MadelungWarning):
        engine = madelung.ewald(Crystal(TRICLINIC, [[0, 0, 0]], [2.0]), tol=1e-12)
    assert engine.background
    result = charged_cell_correction(TRICLINIC, 2.0, 1.0, tol=1e-12)
    assert result.energy == pytest.approx(-engine.energy, rel=1e-10)


@pytest.mark.parametrize("eps", [1.0, 2.5, 13.0])
def test_tensor_eps_identity_reduces_to_isotropic_and_scales_as_one_over_eps(eps):
    vacuum = -_lone_charge_energy(TRICLINIC, 1.0)
    scalar = charged_cell_correction(TRICLINIC, 1.0, eps, tol=1e-12)
    tensor = charged_cell_correction(TRICLINIC, 1.0, eps * np.eye(3), tol=1e-12)
    assert tensor.energy == pytest.approx(scalar.energy, rel=1e-12)
    assert scalar.energy == pytest.approx(vacuum / eps, rel=1e-10)


def test_anisotropic_sum_equals_isotropic_sum_of_the_scaled_lattice():
    # Derived identity: with n' = eps^-1/2 n and k' = eps^1/2 k, s_n = |n'|, k.eps.k = |k'|^2 and
    # V' = V / sqrt(det eps), so v_M(eps, cell) = v_M(isotropic, cell eps^-1/2) / sqrt(det eps).
    # The right side comes from the engine's isotropic Ewald sum, at a different splitting parameter.
    values, vectors = np.linalg.eigh(EPS)
    scaled = TRICLINIC @ (vectors @ np.diag(values ** -0.5) @ vectors.T)
    expected = -_lone_charge_energy(scaled, 1.0, alpha=0.9) / np.sqrt(np.linalg.det(EPS))
    result = charged_cell_correction(TRICLINIC, 1.0, EPS, tol=1e-12)
    assert result.energy == pytest.approx(expected, rel=1e-9)


@settings(max_examples=10, deadline=None)
@given(st.lists(st.floats(-np.pi, np.pi), min_size=3, max_size=3))
def test_rotating_cell_and_tensor_together_changes_nothing(angles):
    from scipy.spatial.transform import Rotation

    rotation = Rotation.from_euler("xyz", angles).as_matrix()
    base = charged_cell_correction(TRICLINIC, 1.0, EPS, tol=1e-11).energy
    turned = charged_cell_correction(TRICLINIC @ rotation.T, 1.0, rotation @ EPS @ rotation.T, tol=1e-11).energy
    assert turned == pytest.approx(base, rel=1e-8)


def test_cube_with_a_diagonal_tensor_does_not_care_which_axis_is_which():
    # a cube is mapped onto itself by permuting its axes, so permuting the eigenvalues of a
    # diagonal tensor cannot change the energy (symmetry); an uneven tensor differs from its mean
    cube = 8.0 * np.eye(3)
    energies = [charged_cell_correction(cube, 1.0, np.diag(p)).energy
                for p in ([4.0, 7.0, 12.0], [12.0, 4.0, 7.0], [7.0, 12.0, 4.0])]
    assert np.allclose(energies, energies[0], rtol=1e-11)
    assert abs(energies[0] - charged_cell_correction(cube, 1.0, 23.0 / 3).energy) > 1e-4


def test_series_falls_as_one_over_length():
    series = correction_series(TRICLINIC, 2.0, EPS, repeats=(1, 2, 3))
    assert series.spread < 1e-8
    assert abs(series.intercept) < 1e-8
    assert series.slope == pytest.approx(series.energies[0] * series.lengths[0], rel=1e-8)


@pytest.mark.parametrize("tensor, message", [
    (np.diag([5.0, 0.0, 3.0]), "singular"),
    (np.diag([5.0, -2.0, 3.0]), "not positive definite"),
    ([[5.0, 1.0, 0.0], [0.0, 5.0, 0.0], [0.0, 0.0, 5.0]], "not symmetric"),
    ([1.0, 2.0], "1, 3"),
])
def test_bad_tensors_are_refused(tensor, message):
    with pytest.raises(InputError, match=message):
        dielectric_tensor(tensor)


def test_cli_correction_non_cubic_cell_with_tensor(tmp_path, capsys):
    path = tmp_path / "eps.txt"
    path.write_text("# dielectric tensor\n" + "\n".join(" ".join(str(x) for x in row) for row in EPS) + "\n")
    cell_spec = ",".join(str(x) for x in TRICLINIC.ravel())
    code = main(["correction", "--cell", cell_spec, "--charge", "2", "--dielectric-tensor", str(path), "--json"])
    assert code == 0
    data = json.loads(capsys.readouterr().out)
    assert data["correction_eV"] == pytest.approx(charged_cell_correction(TRICLINIC, 2, EPS).energy, rel=1e-12)
    assert len(data["series"]) == 4


def test_cli_correction_scalar_on_a_structure_supercell(capsys):
    from pathlib import Path

    cif = Path(__file__).resolve().parent.parent / "structures" / "rutile-TiO2.cif"
    code = main(["correction", str(cif), "--supercell", "2x2x3", "--charge", "2", "--dielectric", "10"])
    out = capsys.readouterr().out
    assert code == 0 and "image correction" in out


@pytest.mark.parametrize("content, message", [("5 0 0\n0 0 0\n0 0 3\n", "singular"),
                                              ("5 0 0\n0 -1 0\n0 0 3\n", "not positive definite")])
def test_cli_bad_tensor_exit_code_2(tmp_path, capsys, content, message):
    path = tmp_path / "eps.txt"
    path.write_text(content)
    code = main(["correction", "--cell", "10", "--charge", "1", "--dielectric-tensor", str(path)])
    err = capsys.readouterr().err
    assert code == 2
    assert message in err and len(err.strip().splitlines()) == 1


def test_cli_correction_needs_a_cell(capsys):
    assert main(["correction", "--charge", "1"]) == 2
    assert "give a structure file or --cell" in capsys.readouterr().err
