"""The structure model and what belongs to it alone: the immutable Crystal, lattice arithmetic, the
one supercell tiling, symmetry (spglib), element data and the bounds every input must satisfy."""
