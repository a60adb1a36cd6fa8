"""Charges for the point-charge model: oxidation-state assignment, charge equilibration and the
handling of mixed or partly occupied sites.

``charges_for(crystal, "auto" | "equilibrate")`` is what :meth:`madelung.Crystal.from_ase` calls
for ``charges="auto"`` and ``charges="equilibrate"``.
"""

from .bond_valence import bond_valence_sums
from .equilibrate import EquilibrationResult, equilibrate
from .oxidation import Candidate, OxidationAssignment, SiteGroup, assign_oxidation_states


def charges_for(crystal, method, known_states=None, **options):
    """Site charges (e) of ``crystal`` by ``method``: ``"auto"`` (best oxidation-state assignment;
    ``known_states`` are kept) or ``"equilibrate"`` (charge equilibration)."""
    if method == "auto":
        return assign_oxidation_states(crystal, known_states=known_states, **options).charges
    if method == "equilibrate":
        return equilibrate(crystal, **options).charges
    from ..errors import InputError

    raise InputError(f"unknown charge method {method!r}; use 'auto' or 'equilibrate'")


__all__ = ["assign_oxidation_states", "OxidationAssignment", "Candidate", "SiteGroup", "equilibrate",
           "EquilibrationResult", "bond_valence_sums", "charges_for"]
