"""The electrostatics core: Ewald sums of periodic point charges."""

from .direct import EwaldParameters, EwaldResult, ewald_direct, reciprocal_vectors, shortest_distance

__all__ = ["EwaldParameters", "EwaldResult", "ewald_direct", "reciprocal_vectors", "shortest_distance"]
