"""The Birch–Murnaghan equation of state of the rigid-ion model: an energy–volume scan and its fit.

References
----------
F. Birch, Phys. Rev. 71 (1947) 809.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..sums.shortrange import load_repulsion
from ..units import EV_PER_A3_TO_GPA
from .lattice_energy import scaled, total_terms
from ..defaults import SUM_TOL

# ---------------------------------------------------------------- equation of state
def birch_murnaghan(volume, e0, v0, b0, b0_prime):
    """Third-order Birch–Murnaghan energy E(V) (eV, Å^3, B0 in eV/Å^3).

    ``E = E0 + 9 V0 B0 / 16 {[(V0/V)^(2/3) - 1]^3 B0' + [(V0/V)^(2/3) - 1]^2 [6 - 4 (V0/V)^(2/3)]}``

    References
    ----------
    F. Birch, Phys. Rev. 71 (1947) 809.
    """
    eta = (v0 / np.asarray(volume, dtype=float)) ** (2.0 / 3.0)
    return e0 + 9.0 * v0 * b0 / 16.0 * ((eta - 1.0) ** 3 * b0_prime + (eta - 1.0) ** 2 * (6.0 - 4.0 * eta))


@dataclass(frozen=True)
class EquationOfState:
    """An energy–volume scan and its Birch–Murnaghan fit (per cell).

    Attributes
    ----------
    volumes : (M,) Å^3.  energies : (M,) total model energy, eV.
    e0 : eV.  v0 : equilibrium volume, Å^3.  b0 : bulk modulus, GPa.  b0_prime : dB/dP.
    rms : root-mean-square misfit of the fit, eV.
    formula_units : Z of the cell.
    """

    volumes: np.ndarray
    energies: np.ndarray
    e0: float
    v0: float
    b0: float
    b0_prime: float
    rms: float
    formula_units: int
    formula: str = ""
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-ready: the scan (volumes Å^3, energies eV per cell) and the fit (E0 eV, V0 Å^3 per cell
        and per formula unit, B0 GPa, B0', rms misfit eV)."""
        return {"formula": self.formula, "formula_units": self.formula_units,
                "volumes_angstrom3": np.asarray(self.volumes).tolist(),
                "energies_eV": np.asarray(self.energies).tolist(), "e0_eV": self.e0, "v0_angstrom3": self.v0,
                "v0_per_formula_unit_angstrom3": self.v0 / self.formula_units, "b0_GPa": self.b0,
                "b0_prime": self.b0_prime, "rms_eV": self.rms}


def equation_of_state(crystal, repulsion, span=0.06, points=11, tol=SUM_TOL) -> EquationOfState:
    """Energy–volume scan under homogeneous scaling and a third-order Birch–Murnaghan fit.

    Parameters
    ----------
    crystal : Crystal
    repulsion : RepulsionModel or parameter-file path
    span : float
        Volumes from ``V (1 - span)`` to ``V (1 + span)`` (default 6 %).
    points : int
        Number of volumes (at least 5).
    tol : float
        Relative accuracy of the Ewald sums.

    Returns
    -------
    EquationOfState

    References
    ----------
    F. Birch, Phys. Rev. 71 (1947) 809.
    """
    from scipy.optimize import curve_fit

    model = load_repulsion(repulsion)
    if not (0 < span < 0.5):
        raise InputError(f"volume span must lie in (0, 0.5), got {span!r}")
    if int(points) < 5:
        raise InputError(f"an equation-of-state fit needs at least 5 volumes, got {points!r}")
    factors = np.linspace(1.0 - span, 1.0 + span, int(points))
    volumes, energies = [], []
    for f in factors:
        x = scaled(crystal, f ** (1.0 / 3.0))
        c, s = total_terms(x, model, tol)
        volumes.append(x.volume)
        energies.append(c.energy + s.energy)
    volumes, energies = np.array(volumes), np.array(energies)
    a, b, c0 = np.polyfit(volumes, energies, 2)
    if a <= 0:
        raise InputError(f"{crystal.source or crystal.reduced_formula}: the energy has no minimum in the scanned "
                         "volumes; the model is not bound there")
    v_guess = -b / (2 * a)
    guess = (float(np.polyval([a, b, c0], v_guess)), v_guess, 2 * a * v_guess, 4.0)
    try:
        popt, _ = curve_fit(birch_murnaghan, volumes, energies, p0=guess, maxfev=20000)
    except RuntimeError as exc:
        raise InputError(f"Birch–Murnaghan fit did not converge ({exc})") from None
    rms = float(np.sqrt(np.mean((birch_murnaghan(volumes, *popt) - energies) ** 2)))
    return EquationOfState(volumes, energies, float(popt[0]), float(popt[1]), float(popt[2] * EV_PER_A3_TO_GPA),
                           float(popt[3]), rms, crystal.formula_units, crystal.reduced_formula)
