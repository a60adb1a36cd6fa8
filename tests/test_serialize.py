"""The one JSON serializer, and the physics the command line used to do, now typed library functions."""

import io
import json
import math

import numpy as np
import pytest

import madelung
from madelung.analysis.lattice_energy import kapustinskii_of_ions, pressure_from_stress
from madelung.report.serialize import NonFiniteResult, to_jsonable, write_json
from madelung.structure.symmetry import crystal_symmetry
from madelung.units import EV_TO_KJ_PER_MOL

from conftest import load


def test_numpy_values_and_results_become_plain_json():
    data = {"array": np.arange(6.0).reshape(2, 3), "integer": np.int64(3), "flag": np.bool_(True),
            "tuple": (1, np.float32(0.5)), "nested": [{"x": np.array([1, 2])}], 7: "key made text"}
    plain = to_jsonable(data)
    assert plain == {"array": [[0.0, 1.0, 2.0], [3.0, 4.0, 5.0]], "integer": 3, "flag": True, "tuple": [1, 0.5],
                     "nested": [{"x": [1, 2]}], "7": "key made text"}
    assert type(plain["integer"]) is int and type(plain["flag"]) is bool
    stream = io.StringIO()
    write_json(data, stream)
    assert json.loads(stream.getvalue()) == plain and stream.getvalue().endswith("\n")


def test_non_finite_policy():
    with pytest.raises(NonFiniteResult, match="energy"):
        to_jsonable({"energy": math.nan})
    with pytest.raises(NonFiniteResult):
        to_jsonable(np.array([1.0, np.inf]))
    assert to_jsonable({"energy": math.nan, "values": np.array([np.inf, 1.0])}, non_finite="null") == \
        {"energy": None, "values": [None, 1.0]}
    stream = io.StringIO()
    with pytest.raises(NonFiniteResult):
        write_json({"a": 1.0, "b": math.nan}, stream)
    assert stream.getvalue() == ""         # nothing half-written


def test_a_result_is_written_through_its_to_dict():
    crystal = load("rocksalt-NaCl")
    constants = madelung.madelung_constants(crystal, tol=1e-10)
    plain = to_jsonable(constants)
    assert plain == json.loads(json.dumps(constants.to_dict()))
    # rock salt, handbook convention: 1.747564594633 (OEIS A085469)
    assert plain["handbook"] == pytest.approx(1.747564594633, abs=1e-8)
    assert not hasattr(constants, "as_dict")


def test_pressure_is_minus_a_third_of_the_trace():
    # a hydrostatic tension of 0.01 eV/Å^3 in ASE's sign is a pressure of -1.602 GPa
    # (1 eV/Å^3 = 160.2176634 GPa, CODATA)
    assert pressure_from_stress(0.01 * np.eye(3)) == pytest.approx(-1.602176634, rel=1e-9)
    assert pressure_from_stress(np.diag([-0.03, 0.0, 0.0])) == pytest.approx(1.602176634, rel=1e-9)
    with pytest.raises(madelung.InputError, match="3x3"):
        pressure_from_stress(np.zeros(3))


def test_kapustinskii_of_ions_for_rock_salt_and_fluorite():
    # Kapustinskii, Q. Rev. Chem. Soc. 10 (1956) 283: U = K nu z+ |z-| / d0 (1 - d / d0), K = 1.2025e-4 J m/mol,
    # d = 3.45e-11 m; Shannon (1976) VI radii Na+ 1.02, Cl- 1.81, Ca2+ 1.00, F- 1.33 Å
    def published(nu, zz, d0):
        return 1.2025e-4 * nu * zz / (d0 * 1e-10) * (1 - 3.45e-11 / (d0 * 1e-10)) / 1000.0   # kJ/mol
    nacl = kapustinskii_of_ions("Na", 1, 1, "Cl", -1, 1) * EV_TO_KJ_PER_MOL
    assert nacl == pytest.approx(published(2, 1, 2.83), rel=1e-4)
    # and within its known few-per-cent error of the Born–Haber value 787 kJ/mol (CRC Handbook, from memory)
    assert nacl == pytest.approx(787, rel=0.06)
    caf2 = kapustinskii_of_ions("Ca", 2, 1, "F", -1, 2) * EV_TO_KJ_PER_MOL
    assert caf2 == pytest.approx(published(3, 2, 2.33), rel=1e-4)
    assert caf2 == pytest.approx(2630, rel=0.08)    # Born–Haber value of CaF2, about 2630 kJ/mol (from memory)
    assert kapustinskii_of_ions("Na", 1, 1, "Xx", -1, 1) is None


def test_orbit_means_average_symmetry_equivalent_sites():
    crystal = load("spinel-MgAl2O4")
    symmetry = crystal_symmetry(crystal)
    potentials = madelung.ewald(crystal, tol=1e-10).potentials
    means, spreads = symmetry.orbit_means(potentials)
    assert len(means) == len(symmetry.orbits)
    for orbit, mean, spread in zip(symmetry.orbits, means, spreads):
        members = potentials[list(orbit.sites)]
        assert mean == pytest.approx(members.mean()) and spread < 1e-6   # equivalent sites, equal potentials
    with pytest.raises(madelung.InputError, match="one value per site"):
        symmetry.orbit_means(potentials[:-1])


def test_candidate_plot_is_a_real_image(tmp_path):
    """The demo's scatter plot decodes as a PNG of the figure's size with points drawn (the rows are
    invented, as the demo's candidates are)."""
    from matplotlib.image import imread

    from madelung.report.plots import save_candidate_plot

    rows = [{"prototype": p, "reduced_formula": f, "anion_potential_mean_V": phi, "energy_per_atom_eV": e}
            for p, f, phi, e in (("perovskite", "SrTiO3", -20.1, -12.3), ("spinel", "MgAl2O4", -25.4, -14.0),
                                 ("layered-rocksalt", "LiCoO2", -22.0, -10.8), ("perovskite", "KMgF3", -9.5, -4.1))]
    path = tmp_path / "candidates.png"
    save_candidate_plot(rows, str(path), ("perovskite", "spinel", "layered-rocksalt"),
                        lambda formula: {"O"} if "O" in formula else {"F"})
    image = imread(str(path))
    # Figure(figsize=(7.5, 5.0), dpi=120) saved whole: 900 x 600 pixels, RGBA values in [0, 1]
    assert image.shape[:2] == (600, 900) and image.shape[2] in (3, 4)
    assert 0.0 <= image.min() and image.max() <= 1.0
    assert len(np.unique(image[..., :3].reshape(-1, 3), axis=0)) > 20      # markers, text and grid drawn
    # the spinel colour (#c4572b) of the scatter is present
    spinel = np.array([0xc4, 0x57, 0x2b]) / 255
    assert np.any(np.all(np.abs(image[..., :3] - spinel) < 2 / 255, axis=-1))
