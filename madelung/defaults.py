"""Every default tolerance and limit, in one place.

The library's functions and the command line's options take their defaults from here, so an
entry point cannot drift from another. Each value is a choice of this project (common practice
where said), not a physical constant.
"""

from __future__ import annotations

#: Relative accuracy of an energy, potential or force sum: the achieved error is at most
#: ``SUM_TOL x E_scale`` (see :mod:`madelung.sums.plan`). Ten digits: far below any difference
#: a point-charge model can resolve, and cheap for cells of up to some thousand ions.
SUM_TOL = 1e-10

#: Relative accuracy for work that sums many candidates, structures or grid points to rank, fit or
#: draw them (descriptors, screening, charge assignment, potential maps, interstitial searches).
SCREENING_TOL = 1e-8

#: Distance (Å) within which two positions count as the same under a symmetry operation (spglib's
#: tolerance); 0.01 Å is common practice for structures from diffraction databases.
SYMMETRY_TOLERANCE = 1e-2

#: Ions closer than this (Å) are refused as overlapping unless told otherwise; real interionic
#: distances are above 1.5 Å apart from hydrogen bonds (fact of the trade), so 0.5 Å catches
#: duplicated or misplaced sites and nothing real.
MIN_DISTANCE = 0.5

#: Largest number of ions a structure (after tiling) may hold before it is refused.
MAX_ATOMS = 2_000_000

#: Number of eigenvalues in the Ewald-sum-matrix spectrum descriptor.
SPECTRUM_LENGTH = 40
