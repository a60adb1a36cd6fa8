"""The electrostatics core: Ewald sums of periodic point charges, all run from one sum plan."""

from .direct import EwaldParameters, EwaldResult, ewald_direct, shortest_distance
from .plan import SumPlan, plan_for, plan_sum, reciprocal_vectors

__all__ = ["EwaldParameters", "EwaldResult", "ewald_direct", "reciprocal_vectors", "shortest_distance",
           "SumPlan", "plan_for", "plan_sum"]
