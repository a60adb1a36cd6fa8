"""Reading structures: the one loader (path or ase.Atoms + charge options -> Crystal) and CIF details."""
