"""madelung: crystal electrostatics on the CPU.

Ewald sums, site potentials and Madelung constants of periodic point-charge crystals,
converged to an accuracy you state. Point charges are a model: with formal charges the
electrostatic energies overstate what a real, partly covalent solid holds.
"""

from .crystal import Crystal
from .errors import InputError, MadelungError, MadelungWarning
from .ewald import EwaldParameters, EwaldResult

__version__ = "0.1.0"


def ewald(crystal, tol=1e-10, forces=False, stress=False, alpha=None):
    """Electrostatic energy, site potentials and optionally forces and stress of a crystal.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and charges.
    tol : float, optional
        Wanted error of the energy relative to ``k_e * sum(q_i^2) / d_min``, with d_min the
        shortest interionic distance (default 1e-10).
    forces, stress : bool, optional
        Also compute forces (eV/Å) and the stress tensor (eV/Å^3, ASE sign convention).
    alpha : float, optional
        Fix the Ewald splitting parameter (1/Å); by default it is chosen for the least work.

    Returns
    -------
    EwaldResult
        ``energy`` (eV), ``potentials`` (V), ``forces``, ``stress``, ``params``,
        ``error_estimate`` (eV) and more; see :class:`EwaldResult`.

    Notes
    -----
    A cell with a net charge is summed with a uniform neutralizing background; the result's
    ``background`` flag says so and a :class:`MadelungWarning` is issued.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    """
    from .ewald.direct import ewald_direct

    if not isinstance(crystal, Crystal):
        raise InputError(f"ewald() needs a madelung.Crystal, got {type(crystal).__name__}")
    return ewald_direct(crystal, tol=tol, forces=forces, stress=stress, alpha=alpha)


from .constants import MadelungConstants, madelung_constants  # noqa: E402
from .defects import (charged_cell_correction, correction_series, defect_energy,  # noqa: E402
                      find_interstitials, potential_at, potential_grid, vacancy_ranking)
from .shortrange import PairPotential, RepulsionModel, shortrange  # noqa: E402
from .lattice import FitTarget, equation_of_state, fit_repulsion, lattice_energy  # noqa: E402
from .thermochemistry import born_haber_cycle  # noqa: E402
from .calculator import RigidIonCalculator, relax  # noqa: E402
from .descriptors import describe  # noqa: E402

__all__ = ["Crystal", "ewald", "EwaldResult", "EwaldParameters", "madelung_constants",
           "MadelungConstants", "describe", "InputError", "MadelungError", "MadelungWarning",
           "potential_at", "potential_grid", "find_interstitials", "defect_energy", "vacancy_ranking",
           "charged_cell_correction", "correction_series",
           "PairPotential", "RepulsionModel", "shortrange", "FitTarget", "fit_repulsion", "lattice_energy",
           "equation_of_state", "born_haber_cycle", "RigidIonCalculator", "relax"]
