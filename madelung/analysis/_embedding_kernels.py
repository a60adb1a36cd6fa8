"""Numba kernel of the embedding: the potential of a finite array of point charges at points.

Arithmetic only; ``madelung.analysis.embedding`` validates and plans.
"""

import math

import numpy as np
from numba import njit, prange


@njit(parallel=True, cache=True)
def free_space_potentials(points, positions, charges, coincide):
    """sum_j q_j / |r - r_j| at each point r (no Coulomb constant), leaving out every charge that
    lies within ``coincide`` Å of the point (an ion's own charge at its own site)."""
    m = points.shape[0]
    n = positions.shape[0]
    out = np.zeros(m)
    for p in prange(m):
        x, y, z = points[p, 0], points[p, 1], points[p, 2]
        total = 0.0
        for j in range(n):
            dx = x - positions[j, 0]
            dy = y - positions[j, 1]
            dz = z - positions[j, 2]
            d = math.sqrt(dx * dx + dy * dy + dz * dz)
            if d > coincide:
                total += charges[j] / d
        out[p] = total
    return out
