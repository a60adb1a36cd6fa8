"""madelung: crystal electrostatics on the CPU.

Ewald sums, site potentials and Madelung constants of periodic point-charge crystals,
converged to an accuracy you state. Point charges are a model: with formal charges the
electrostatic energies overstate what a real, partly covalent solid holds.
"""

from .crystal import Crystal
from .errors import InputError, MadelungError, MadelungWarning
from .ewald import EwaldParameters, EwaldResult
from .ewald.direct import run_direct
from .ewald.mesh import run_mesh
from .ewald.plan import METHODS, SumPlan, plan_for

__version__ = "0.1.0"


def ewald(crystal, tol=1e-10, forces=False, stress=False, alpha=None, method="auto"):
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
    method : {"auto", "direct", "mesh"}, optional
        "direct": the Ewald sum over k-vectors (cost about N^1.5); "mesh": smooth particle-mesh
        Ewald (about N log N), checked against an independent direct reciprocal sum (see
        :mod:`madelung.ewald.mesh`); "auto" (default): the one predicted to be faster at this
        ``tol``. One sum plan (``result.plan``) decides everything once, in the reduced basis
        of the lattice, so the result does not depend on the basis the cell is written in.
        ``result.params.method`` says which ran and ``result.params.extra["predicted_seconds_by_method"]``
        the predictions (None for an engine not considered).

    Returns
    -------
    EwaldResult
        ``energy`` (eV), ``potentials`` (V), ``forces``, ``stress``, ``params``,
        ``error_estimate`` (eV) and more; see :class:`EwaldResult`.

    Notes
    -----
    ``error_estimate`` includes a rounding floor: double precision resolves the energy only to
    about eps * E_scale * sqrt(terms per ion); a ``tol`` below that is refused with an InputError
    that names the smallest meaningful value.

    A cell with a net charge is summed with a uniform neutralizing background; the result's
    ``background`` flag says so and a :class:`MadelungWarning` is issued.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577 (smooth particle-mesh Ewald).
    """
    if not isinstance(crystal, Crystal):
        raise InputError(f"ewald() needs a madelung.Crystal, got {type(crystal).__name__}")
    plan = plan_for(crystal, tol, method=method, alpha=alpha)
    if plan.method == "mesh":
        return run_mesh(crystal, plan, forces=forces, stress=stress)
    return run_direct(crystal, plan, forces=forces, stress=stress)


from .constants import MadelungConstants, madelung_constants  # noqa: E402
from .defects import (charged_cell_correction, correction_series, defect_energy,  # noqa: E402
                      find_interstitials, potential_at, potential_grid, vacancy_ranking)
from .shortrange import PairPotential, RepulsionModel, shortrange  # noqa: E402
from .lattice import FitTarget, equation_of_state, fit_repulsion, lattice_energy  # noqa: E402
from .thermochemistry import born_haber_cycle  # noqa: E402
from .calculator import RigidIonCalculator, relax  # noqa: E402
from .descriptors import describe  # noqa: E402
from .analysis.embedding import Embedding, embedding  # noqa: E402
from .analysis.orderings import OrderingRanking, rank_orderings  # noqa: E402
from .io.read import Loaded, load, read_crystal  # noqa: E402  (also registers Crystal.from_file / from_ase)

__all__ = ["Crystal", "load", "read_crystal", "Loaded", "ewald", "EwaldResult", "EwaldParameters", "SumPlan",
           "plan_for", "madelung_constants",
           "MadelungConstants", "describe", "InputError", "MadelungError", "MadelungWarning",
           "potential_at", "potential_grid", "find_interstitials", "defect_energy", "vacancy_ranking",
           "charged_cell_correction", "correction_series",
           "PairPotential", "RepulsionModel", "shortrange", "FitTarget", "fit_repulsion", "lattice_energy",
           "equation_of_state", "born_haber_cycle", "RigidIonCalculator", "relax", "embedding", "Embedding",
           "rank_orderings", "OrderingRanking"]
