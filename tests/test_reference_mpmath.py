"""Checks of the arbitrary-precision Ewald yardstick against outside values.

The reference (tests/reference_mpmath.py) is itself checked here against
published Madelung constants and facts of the trade, so that the engine's
tests can lean on it.
"""

import os
import sys

import mpmath
import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))
from reference_mpmath import _coulomb_constant, mp_ewald_energy  # noqa: E402

MPF = mpmath.mpf

# Module constants are parsed at 40 digits (mpf keeps the precision it was
# created with); the checks below run at 30.
_parse = mpmath.workdps(40)
_parse.__enter__()
# Rock-salt Madelung constant referred to the nearest-neighbour distance
# r0 = a/2: 1.747564594633 (OEIS A085469).
NACL_MADELUNG = MPF("1.747564594633")
# More digits of the same constant, from memory of OEIS A085469.
NACL_MADELUNG_LONG = MPF("1.74756459463318219063621203554439740")
# CsCl Madelung constant referred to r0 = a*sqrt(3)/2: 1.762674773071
# (OEIS A181152).
CSCL_MADELUNG = MPF("1.762674773071")
# More digits of the same constant, from memory of OEIS A181152.
CSCL_MADELUNG_LONG = MPF("1.76267477307098839793567332063864429")
# Wigner-crystal (point charges in a uniform neutralising background)
# energies per charge, E = -M e^2 / (4 pi eps0 r_s) with r_s the Wigner-Seitz
# radius: bcc 0.895929255682, fcc 0.895873615195 (from memory; classic values
# tabulated e.g. by Coldwell-Horsfall and Maradudin, J. Math. Phys. 1 (1960)
# 395).
WIGNER_BCC = MPF("0.895929255682")
WIGNER_FCC = MPF("0.895873615195")

A_NACL = MPF("5.64")  # Å, lattice parameter; the constants do not depend on it
A_CSCL = MPF("4.12")  # Å
_parse.__exit__(None, None, None)


def nacl_primitive(a=A_NACL):
    with mpmath.workdps(40):
        half = a / 2
    cell = [[0, half, half], [half, 0, half], [half, half, 0]]
    return cell, [[0, 0, 0], [half, 0, 0]], [1, -1]


def cscl_cubic(a=A_CSCL):
    with mpmath.workdps(40):
        half = a / 2
    cell = [[a, 0, 0], [0, a, 0], [0, 0, a]]
    return cell, [[0, 0, 0], [half, half, half]], [1, -1]


def rel(x, y):
    return abs(x - y) / abs(y)


def test_coulomb_constant_value():
    # e/(4 pi eps0 Å) = 14.3996454784... eV·Å (CODATA 2018/2022; from memory)
    with mpmath.workdps(30):
        assert abs(_coulomb_constant() - MPF("14.39964548")) < MPF("1e-7")


def test_rocksalt_madelung_constant_and_site_potentials():
    cell, pos, q = nacl_primitive()
    with mpmath.workdps(30):
        energy, phi = mp_ewald_energy(cell, pos, q, dps=30)
        k_e = _coulomb_constant()
        r0 = A_NACL / 2
        madelung = -energy * r0 / k_e  # two-atom cell = one formula unit
        assert abs(madelung - NACL_MADELUNG) < MPF("5e-13")
        assert rel(madelung, NACL_MADELUNG_LONG) < MPF("1e-25")
        # The Madelung potential at a cation site is -M k_e / r0 and at an
        # anion site +M k_e / r0 (fact of the trade).
        assert rel(phi[0], -NACL_MADELUNG_LONG * k_e / r0) < MPF("1e-25")
        assert rel(phi[1], NACL_MADELUNG_LONG * k_e / r0) < MPF("1e-25")


def test_cesium_chloride_madelung_constant():
    a = A_CSCL
    cell, pos, q = cscl_cubic(a)
    with mpmath.workdps(30):
        energy, _ = mp_ewald_energy(cell, pos, q, dps=30)
        r0 = a * mpmath.sqrt(3) / 2
        madelung = -energy * r0 / _coulomb_constant()
        assert abs(madelung - CSCL_MADELUNG) < MPF("5e-13")
        assert rel(madelung, CSCL_MADELUNG_LONG) < MPF("1e-25")


@pytest.mark.parametrize(
    "cell, wigner",
    [
        ([[-0.5, 0.5, 0.5], [0.5, -0.5, 0.5], [0.5, 0.5, -0.5]], WIGNER_BCC),
        ([[0, 1.5, 1.5], [1.5, 0, 1.5], [1.5, 1.5, 0]], WIGNER_FCC),
    ],
)
def test_wigner_crystal_background_term(cell, wigner):
    # One charge per cell: the energy is set by the neutralising background.
    with mpmath.workdps(30):
        energy, phi = mp_ewald_energy(cell, [[0.3, -0.2, 0.7]], [1], dps=30)
        volume = abs(mpmath.det(mpmath.matrix(cell)))
        r_s = (3 * volume / (4 * mpmath.pi)) ** (MPF(1) / 3)
        madelung = -energy * r_s / _coulomb_constant()
        assert abs(madelung - wigner) < MPF("5e-13")
        assert rel(energy, phi[0] / 2) < MPF("1e-25")


def _triclinic_system():
    # A skewed cell with unequal charges, net charge +1.5, some atoms outside
    # the cell.
    cell = [[4.0, 0.0, 0.0], [3.5, 2.0, 0.0], [-1.5, 3.7, 1.1]]
    frac = [[0.1, 0.2, 0.3], [0.6, 0.4, 0.9], [0.35, 0.8, 0.15], [1.7, -0.3, 0.5], [0.9, 0.95, 0.05]]
    pos = (np.array(frac) @ np.array(cell)).tolist()
    return cell, pos, [2, -1, 1, -1, 0.5]


def test_alpha_independence():
    # The Ewald total does not depend on the splitting parameter (fact of
    # the trade); with the background term this holds for a net charge too.
    cell, pos, q = _triclinic_system()
    with mpmath.workdps(30):
        e1, phi1 = mp_ewald_energy(cell, pos, q, dps=30)
        e2, phi2 = mp_ewald_energy(cell, pos, q, dps=30, alpha=1.4)
        assert rel(e1, e2) < MPF("1e-20")
        for a, b in zip(phi1, phi2):
            assert abs(a - b) < MPF("1e-20") * abs(e1)
    cell, pos, q = nacl_primitive()
    with mpmath.workdps(30):
        e1, _ = mp_ewald_energy(cell, pos, q, dps=30, alpha=0.4)
        e2, _ = mp_ewald_energy(cell, pos, q, dps=30, alpha=1.9)
        assert rel(e1, e2) < MPF("1e-20")


def test_energy_is_half_sum_of_charge_times_potential():
    cell, pos, q = _triclinic_system()
    with mpmath.workdps(30):
        energy, phi = mp_ewald_energy(cell, pos, q, dps=30, alpha=0.9)
        half_sum = sum(MPF(qi) * p for qi, p in zip(q, phi)) / 2
        assert rel(half_sum, energy) < MPF("1e-25")


def test_same_crystal_in_skewed_and_larger_cells():
    # The lattice energy is a property of the crystal, not of the cell used to
    # describe it (fact of the trade): a strongly sheared unimodular cell and
    # a non-diagonal double supercell of rock salt give the same Madelung
    # constant.  This exercises the image enumeration in triclinic cells.
    with mpmath.workdps(30):
        cell, pos, q = nacl_primitive()
        prim = mpmath.matrix(cell)
        sheared = mpmath.matrix([[1, 2, 3], [0, 1, 4], [0, 0, 1]]) * prim
        e_sheared, _ = mp_ewald_energy(sheared.tolist(), pos, q, dps=30)
        double = mpmath.matrix([[1, 1, 0], [-1, 1, 0], [0, 0, 1]]) * prim  # det 2
        a1 = [prim[0, c] for c in range(3)]
        pos2 = pos + [[p[c] + a1[c] for c in range(3)] for p in pos]
        e_double, _ = mp_ewald_energy(double.tolist(), pos2, q + q, dps=30)
        r0 = A_NACL / 2
        k_e = _coulomb_constant()
        assert rel(-e_sheared * r0 / k_e, NACL_MADELUNG_LONG) < MPF("1e-25")
        assert rel(-e_double / 2 * r0 / k_e, NACL_MADELUNG_LONG) < MPF("1e-25")


def test_lattice_translation_and_rigid_shift_invariance():
    cell, pos, q = _triclinic_system()
    c = np.array(cell)
    with mpmath.workdps(30):
        e0, phi0 = mp_ewald_energy(cell, pos, q, dps=30)
        moved = [list(p) for p in pos]
        moved[2] = (np.array(moved[2]) + 3 * c[0] - 2 * c[1] + c[2]).tolist()
        shifted = (np.array(moved) + np.array([0.37, -1.1, 2.3])).tolist()
        e1, phi1 = mp_ewald_energy(cell, shifted, q, dps=30)
        # float shifts change the geometry by ~1e-16 relative
        assert rel(e1, e0) < MPF("1e-13")
        for a, b in zip(phi0, phi1):
            assert abs(a - b) < MPF("1e-13") * abs(e0)


def test_precision_convergence():
    # Asking for more digits changes only digits beyond the lower request.
    cell, pos, q = _triclinic_system()
    e20, _ = mp_ewald_energy(cell, pos, q, dps=20)
    e40, _ = mp_ewald_energy(cell, pos, q, dps=40)
    with mpmath.workdps(40):
        assert rel(e20, e40) < MPF("1e-17")
