"""madelung: crystal electrostatics on the CPU.

Ewald sums, site potentials and Madelung constants of periodic point-charge crystals,
converged to an accuracy you state. Point charges are a model: with formal charges the
electrostatic energies overstate what a real, partly covalent solid holds.
"""

from .structure.crystal import Crystal
from .errors import InputError, MadelungError, MadelungWarning
from .sums.direct import EwaldParameters, EwaldResult
from .sums.dispatch import ewald
from .sums.plan import METHODS, SumPlan, plan_for

__version__ = "0.1.0"


from .analysis.madelung_constants import MadelungConstants, madelung_constants  # noqa: E402
from .analysis.defects import (charged_cell_correction, correction_series, defect_energy,  # noqa: E402
                      find_interstitials, potential_at, potential_grid, vacancy_ranking)
from .sums.shortrange import PairPotential, RepulsionModel, shortrange  # noqa: E402
from .analysis.fitting import FitTarget, fit_repulsion  # noqa: E402
from .analysis.equation_of_state import equation_of_state  # noqa: E402
from .analysis.lattice_energy import lattice_energy  # noqa: E402
from .analysis.thermochemistry import born_haber_cycle  # noqa: E402
from .analysis.calculator import RigidIonCalculator, relax  # noqa: E402
from .analysis.descriptors import describe  # noqa: E402
from .analysis.embedding import Embedding, embedding  # noqa: E402
from .analysis.orderings import OrderingRanking, rank_orderings  # noqa: E402
from .io.read import Loaded, load, read_crystal  # noqa: E402  (also registers Crystal.from_file / from_ase)

__all__ = ["Crystal", "load", "read_crystal", "Loaded", "ewald", "EwaldResult", "EwaldParameters", "SumPlan",
           "plan_for", "METHODS", "madelung_constants",
           "MadelungConstants", "describe", "InputError", "MadelungError", "MadelungWarning",
           "potential_at", "potential_grid", "find_interstitials", "defect_energy", "vacancy_ranking",
           "charged_cell_correction", "correction_series",
           "PairPotential", "RepulsionModel", "shortrange", "FitTarget", "fit_repulsion", "lattice_energy",
           "equation_of_state", "born_haber_cycle", "RigidIonCalculator", "relax", "embedding", "Embedding",
           "rank_orderings", "OrderingRanking"]
