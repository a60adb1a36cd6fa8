"""madelung: crystal electrostatics on the CPU.

Ewald sums, site potentials and Madelung constants of periodic point-charge crystals,
converged to an accuracy you state. Point charges are a model: with formal charges the
electrostatic energies overstate what a real, partly covalent solid holds.
"""

from .crystal import Crystal
from .errors import InputError, MadelungError, MadelungWarning
from .ewald import EwaldParameters, EwaldResult

__version__ = "0.1.0"


METHODS = ("auto", "direct", "mesh")


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
        Ewald (about N log N); "auto" (default): the one predicted to be faster at this ``tol``,
        each with its own tuned parameters. ``result.params.method`` says which ran, and for
        "auto" ``result.params.extra["predicted_seconds_by_method"]`` holds both predictions
        (the mesh's is None for sums too small to be worth tuning it).

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
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577 (smooth particle-mesh Ewald).
    """
    from .ewald.direct import ewald_direct, shortest_distance
    from .ewald.mesh import ewald_mesh, predicted_seconds

    if not isinstance(crystal, Crystal):
        raise InputError(f"ewald() needs a madelung.Crystal, got {type(crystal).__name__}")
    if method not in METHODS:
        raise InputError(f"method must be one of {', '.join(METHODS)}, got {method!r}")
    d_min = shortest_distance(crystal)
    predictions = None
    if method == "auto":
        predictions = predicted_seconds(crystal, tol, alpha=alpha, d_min=d_min)
        method = min(predictions, key=predictions.get)
    run = ewald_mesh if method == "mesh" else ewald_direct
    result = run(crystal, tol=tol, forces=forces, stress=stress, alpha=alpha, d_min=d_min)
    if predictions is not None:  # None: not predicted (the mesh is not tuned for small sums)
        result.params.extra["predicted_seconds_by_method"] = {
            name: (None if seconds == float("inf") else seconds) for name, seconds in predictions.items()}
    return result


from .constants import MadelungConstants, madelung_constants  # noqa: E402
from .defects import (charged_cell_correction, correction_series, defect_energy,  # noqa: E402
                      find_interstitials, potential_at, potential_grid, vacancy_ranking)
from .shortrange import PairPotential, RepulsionModel, shortrange  # noqa: E402
from .lattice import FitTarget, equation_of_state, fit_repulsion, lattice_energy  # noqa: E402
from .thermochemistry import born_haber_cycle  # noqa: E402
from .calculator import RigidIonCalculator, relax  # noqa: E402
from .descriptors import describe  # noqa: E402
from .analysis.orderings import OrderingRanking, rank_orderings  # noqa: E402

__all__ = ["Crystal", "ewald", "EwaldResult", "EwaldParameters", "madelung_constants",
           "MadelungConstants", "describe", "InputError", "MadelungError", "MadelungWarning",
           "potential_at", "potential_grid", "find_interstitials", "defect_energy", "vacancy_ranking",
           "charged_cell_correction", "correction_series",
           "PairPotential", "RepulsionModel", "shortrange", "FitTarget", "fit_repulsion", "lattice_energy",
           "equation_of_state", "born_haber_cycle", "RigidIonCalculator", "relax",
           "rank_orderings", "OrderingRanking"]
