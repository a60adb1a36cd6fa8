"""Rebuild ``element_data.json`` (beside this module) from the periodic-table library ``mendeleev``.

Run ``python -m madelung.structure.make_element_data`` after upgrading that library (it is a test
dependency, not a run-time one: the package reads only the generated file). The file holds exactly
what :mod:`madelung.structure.elements` looks up, per element symbol:

* ``atomic_number``;
* ``main_states`` and ``all_states``: oxidation states in the library's "main" list, and in its
  "main" and "extended" lists together (sorted, unique);
* ``electronegativity``: Pauling scale, or null;
* ``covalent_radius_pm``: single-bond covalent radius, pm (B. Cordero et al., Dalton Trans. (2008) 2832), or null;
* ``electron_affinity_eV``: first electron affinity, eV, or null;
* ``ionisation_energies_eV``: ``[charge reached, energy]`` pairs (1 for M -> M+), NIST-based tables;
* ``shannon_radii_pm``: ``[charge, coordination, effective ionic radius]`` in the library's order
  (R. D. Shannon, Acta Cryst. A32 (1976) 751).

Floats are written with Python's shortest round-trip repr, so the file holds the library's values
exactly (the test compares them one by one).

References
----------
L. M. Mentel, *mendeleev — A Python resource for properties of chemical elements, ions and
isotopes* (2014-), the database this file is copied from.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

DATA_FILE = Path(__file__).with_name("element_data.json")


def _number(x):
    return None if x is None or (isinstance(x, float) and math.isnan(x)) else float(x)


def element_records() -> dict:
    """Every element's record, keyed by symbol, read from the library's whole tables."""
    from mendeleev.fetch import fetch_table  # the generator's own dependency, not the package's

    elements = fetch_table("elements").sort_values("atomic_number")
    states = fetch_table("oxidationstates")
    energies = fetch_table("ionizationenergies")
    radii = fetch_table("ionicradii").sort_values("id")
    records = {}
    for row in elements.itertuples():
        number = int(row.atomic_number)
        own_states = states[states["atomic_number"] == number]
        own_energies = energies[(energies["atomic_number"] == number) & energies["ionization_energy"].notna()]
        own_radii = radii[radii["atomic_number"] == number]
        records[str(row.symbol)] = {
            "atomic_number": number,
            "main_states": sorted(int(x) for x in own_states[own_states["category"] == "main"]["oxidation_state"]),
            "all_states": sorted({int(x) for x in own_states["oxidation_state"]}),
            "electronegativity": _number(row.en_pauling),
            "covalent_radius_pm": _number(row.covalent_radius_cordero),
            "electron_affinity_eV": _number(row.electron_affinity),
            "ionisation_energies_eV": [[int(k) + 1, float(v)] for k, v in
                                       zip(own_energies["ion_charge"], own_energies["ionization_energy"])],
            "shannon_radii_pm": [[int(c), str(n), float(r), "" if s is None or s != s else str(s)]
                                 for c, n, r, s in zip(own_radii["charge"], own_radii["coordination"],
                                                       own_radii["ionic_radius"], own_radii["spin"])
                                 if _number(r) is not None],
        }
    return records


def write(path=DATA_FILE) -> Path:
    """Write the records to ``path`` (the package's own data file by default), one element a line."""
    import mendeleev

    records = element_records()
    lines = [f"  {json.dumps(symbol)}: {json.dumps(record, separators=(',', ':'))}"
             for symbol, record in records.items()]
    header = {"source": f"mendeleev {mendeleev.__version__}",
              "rebuild": "python -m madelung.structure.make_element_data"}
    text = "{\n  \"_about\": " + json.dumps(header) + ",\n" + ",\n".join(lines) + "\n}\n"
    Path(path).write_text(text, encoding="utf-8")
    return Path(path)


if __name__ == "__main__":
    print(f"wrote {write(sys.argv[1] if len(sys.argv) > 1 else DATA_FILE)}")
