"""Analysis built on the sums: Madelung constants, lattice energies, orderings, embedding, defects."""
