"""Files of an ordering ranking: the kept orderings as CIF files carrying oxidation states, and the
energy of every distinct ordering as a Parquet or CSV table.

The CIF files are written in space group P1 with each ion's charge twice, as a typed symbol
(``Li1+``, ``O2-``) and in ``_atom_type_oxidation_number``, so :meth:`madelung.Crystal.from_file`
reads them back with the same charges.

References
----------
S. R. Hall, F. H. Allen and I. D. Brown, Acta Cryst. A47 (1991) 655 (the CIF format).
"""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputError
from ..report.files import cif_text, make_folder, write_text, write_with

TABLE_FORMATS = ("parquet", "csv")


def write_cif(path, crystal, title="ordering", comment=None):
    """Write an ordered crystal as a P1 CIF with oxidation states (see :func:`madelung.report.files.cif_text`)."""
    write_text(path, cif_text(crystal.cell, crystal.positions, crystal.symbols, crystal.charges, title=title,
                              comment=comment))


def energy_table(ranking) -> dict:
    """Columns of the full energy table: one row per distinct ordering enumerated (or found), lowest
    first. Energies in eV per supercell and per formula unit; above the lowest in meV per formula unit."""
    energies = np.asarray(ranking.energies, dtype=float)
    per_unit = energies / ranking.formula_units
    columns = {"rank": np.arange(1, len(energies) + 1, dtype=np.int64), "energy_eV": energies,
               "energy_per_formula_unit_eV": per_unit,
               "energy_above_lowest_meV_per_formula_unit": 1000.0 * (per_unit - (per_unit[0] if len(per_unit) else 0)),
               "degeneracy": np.asarray(ranking.degeneracies, dtype=np.int64)}
    if ranking.indices is not None:
        columns["ordering_index"] = np.asarray(ranking.indices, dtype=np.int64)
    else:
        columns["occupation"] = [ranking.occupation_text(row) for row in ranking.found]
    return columns


def check_output_folder(folder, overwrite=False):
    """Refuse a folder that is a file, or holds files already, unless ``overwrite``; before any work."""
    folder = os.fspath(folder)
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise InputError(f"{folder}: exists and is not a folder")
    if os.path.isdir(folder) and os.listdir(folder) and not overwrite:
        raise InputError(f"{folder}: folder is not empty; choose another or allow replacing its files (--overwrite)")
    parent = os.path.dirname(os.path.abspath(folder))
    if not os.path.isdir(folder) and not os.path.isdir(parent):
        raise InputError(f"{folder}: its parent folder {parent} does not exist (create it first)")


def write_ranking(ranking, folder, table_format="parquet", overwrite=False) -> dict:
    """Write the kept orderings (``ordering_001.cif``, ...) and ``energies.parquet`` / ``.csv`` into
    ``folder``. Returns ``{"cif": [paths], "table": path}``."""
    if table_format not in TABLE_FORMATS:
        raise InputError(f"table format must be one of {', '.join(TABLE_FORMATS)}, got {table_format!r}")
    check_output_folder(folder, overwrite)
    make_folder(folder)
    cifs = []
    for ordering in ranking.orderings:
        path = os.path.join(folder, f"ordering_{ordering.rank:03d}.cif")
        comment = (f"rank {ordering.rank} of {ranking.formula} orderings in a {ranking.supercell} supercell "
                   f"({ranking.method}); electrostatic energy {ordering.energy:.8f} eV per cell, "
                   f"{1000 * ordering.energy_above_lowest:.3f} meV per formula unit above the lowest; "
                   f"degeneracy {ordering.degeneracy}; {ordering.space_group}.\n{ranking.NOTE}")
        write_cif(path, ranking.crystal(ordering.rank), title=f"ordering_{ordering.rank:03d}", comment=comment)
        cifs.append(path)
    import pyarrow as pa

    table = pa.table(energy_table(ranking))
    path = os.path.join(folder, f"energies.{table_format}")
    if table_format == "parquet":
        import pyarrow.parquet as pq

        write_with(path, lambda temporary: pq.write_table(table, temporary), binary=True)
    else:
        import pyarrow.csv as pcsv

        write_with(path, lambda temporary: pcsv.write_csv(table, temporary), binary=True)
    return {"cif": cifs, "table": path}
