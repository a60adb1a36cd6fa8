"""Charges for the point-charge model: oxidation-state assignment, bond valence and charge
equilibration. Deciding which of them a structure gets is the loader's job (:mod:`madelung.io.read`).
"""

from .bond_valence import bond_valence_sums
from .equilibrate import EquilibrationResult, equilibrate
from .oxidation import Candidate, OxidationAssignment, SiteGroup, assign_oxidation_states

__all__ = ["assign_oxidation_states", "OxidationAssignment", "Candidate", "SiteGroup", "equilibrate",
           "EquilibrationResult", "bond_valence_sums"]
