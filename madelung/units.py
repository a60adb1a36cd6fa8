"""Physical constants (CODATA, through ``scipy.constants``) and unit conversions.

Every other module takes its constants from here. Internal units: Å, e, eV;
potentials in V (= eV per e), forces in eV/Å, stress in eV/Å^3.
"""

import numpy as np
from scipy import constants as _c

from .errors import InputError

#: Coulomb constant e^2 / (4 pi epsilon_0) in eV·Å (about 14.3996 eV·Å).
COULOMB_CONSTANT = _c.elementary_charge / (4.0 * _c.pi * _c.epsilon_0) / _c.angstrom

#: 1 eV per formula unit expressed in kJ/mol (about 96.485).
EV_TO_KJ_PER_MOL = _c.electron_volt * _c.Avogadro / 1000.0

#: 1 eV/Å^3 in GPa (about 160.2).
EV_PER_A3_TO_GPA = _c.electron_volt / _c.angstrom**3 / 1e9

#: Boltzmann constant in eV/K.
BOLTZMANN_EV = _c.Boltzmann / _c.electron_volt


def ev_to_kj_per_mol(value):
    """Convert eV (per formula unit) to kJ/mol."""
    return value * EV_TO_KJ_PER_MOL


def kj_per_mol_to_ev(value):
    """Convert kJ/mol to eV (per formula unit)."""
    return value / EV_TO_KJ_PER_MOL


def pressure_from_stress(stress) -> float:
    """Pressure, GPa, from a stress tensor in eV/Å^3 with ASE's sign (tension positive):
    P = -tr(sigma) / 3, positive when the structure wants to expand.

    References
    ----------
    O. H. Nielsen and R. M. Martin, Phys. Rev. B 32 (1985) 3780 (stress in a periodic solid; the
    pressure is minus a third of its trace).
    """
    stress = np.asarray(stress, dtype=float)
    if stress.shape != (3, 3):
        raise InputError(f"a stress tensor is 3x3, got shape {stress.shape}")
    return float(-np.trace(stress) / 3.0 * EV_PER_A3_TO_GPA)
