"""The element table shipped in the package against its source, the periodic-table library itself.

Source of every expected value here: ``mendeleev`` (L. M. Mentel, its own database of element
properties: Pauling electronegativities, Cordero covalent radii, NIST-based ionisation energies and
electron affinities, Shannon's ionic radii), read afresh in the test, for every element it lists;
plus a few facts of the trade named where they are used.
"""

import math

import pytest

from madelung import InputError
from madelung.structure import elements

mendeleev_fetch = pytest.importorskip("mendeleev.fetch")


def _missing(x):
    return x is None or (isinstance(x, float) and math.isnan(x))


@pytest.fixture(scope="module")
def library():
    """The library's whole tables (its documented bulk interface), each grouped by atomic number."""
    tables = {name: mendeleev_fetch.fetch_table(name)
              for name in ("elements", "oxidationstates", "ionizationenergies", "ionicradii")}
    grouped = {name: dict(tuple(table.groupby("atomic_number"))) for name, table in tables.items() if name != "elements"}
    return tables["elements"], grouped


def test_every_element_of_the_library_is_in_the_file_and_nothing_else(library):
    table, _ = library
    assert set(table["symbol"]) == set(elements._tables())
    assert len(table) == 118  # elements 1..118 (fact of the trade)


def test_every_value_matches_the_library(library):
    table, grouped = library
    empty = table.iloc[:0]
    mismatches = []
    for row in table.itertuples():
        symbol, number = row.symbol, int(row.atomic_number)
        states = grouped["oxidationstates"].get(number, empty)
        energies = grouped["ionizationenergies"].get(number, empty)
        radii = grouped["ionicradii"].get(number, empty)
        expected = {
            "atomic number": number,
            "main states": tuple(sorted(int(s) for s, c in zip(states.get("oxidation_state", []),
                                                                states.get("category", [])) if c == "main")),
            "all states": tuple(sorted(set(int(s) for s in states.get("oxidation_state", [])))),
            "electronegativity": None if _missing(row.en_pauling) else float(row.en_pauling),
            "covalent radius": None if _missing(row.covalent_radius_cordero) else row.covalent_radius_cordero / 100,
            "electron affinity": None if _missing(row.electron_affinity) else float(row.electron_affinity),
            "ionisation energies": {int(k) + 1: float(v) for k, v in zip(energies.get("ion_charge", []),
                                                                        energies.get("ionization_energy", []))
                                    if not _missing(v)},
        }
        found = {
            "atomic number": elements.atomic_number(symbol),
            "main states": elements.common_oxidation_states(symbol),
            "all states": elements.all_oxidation_states(symbol),
            "electronegativity": elements.electronegativity(symbol),
            "covalent radius": elements.covalent_radius(symbol),
            "electron affinity": elements.electron_affinity(symbol),
            "ionisation energies": elements.ionisation_energies(symbol),
        }
        # every tabulated Shannon radius, by charge, coordination and spin state where one is given;
        # by default the high-spin value where the library lists both
        for charge, coordination, radius, spin in zip(radii.get("charge", []), radii.get("coordination", []),
                                                      radii.get("ionic_radius", []), radii.get("spin", [])):
            if _missing(radius):
                continue
            spin = None if _missing(spin) or not spin else str(spin)
            key = f"Shannon {int(charge):+d} {coordination} {spin}"
            expected.setdefault(key, radius / 100)
            found[key] = elements.shannon_radius(symbol, int(charge), coordination, spin)
            default = f"Shannon {int(charge):+d} {coordination} default"
            if spin == "HS" or default not in expected:
                expected[default] = radius / 100
            found[default] = elements.shannon_radius(symbol, int(charge), coordination)
        mismatches += [f"{symbol} {k}: file {found[k]!r}, library {v!r}" for k, v in expected.items() if found[k] != v]
    assert not mismatches, "; ".join(mismatches[:10])


@pytest.mark.parametrize("symbol", ["O", "Fe", "Mg"])
def test_the_file_matches_the_library_element_objects(symbol):
    # the library's per-element interface, in its own order (spin states included), for a few elements
    element = pytest.importorskip("mendeleev").element(symbol)
    assert elements.common_oxidation_states(symbol) == tuple(sorted(element.oxidation_states("main")))
    assert elements.ionisation_energies(symbol) == {int(k): float(v) for k, v in element.ionenergies.items()}
    record = elements._row(symbol)["shannon_radii_pm"]
    assert record == [[int(r.charge), str(r.coordination), float(r.ionic_radius), r.spin or ""]
                      for r in element.ionic_radii if r.ionic_radius is not None]


def test_facts_of_the_trade():
    # Shannon (1976): O2- in VI 1.40 Å, Na+ in VI 1.02 Å; Pauling: F 3.98; NaCl-type values from memory
    assert elements.shannon_radius("O", -2) == pytest.approx(1.40)
    assert elements.shannon_radius("Na", 1, "VI") == pytest.approx(1.02)
    # Shannon (1976), from memory: Fe2+ in VI is 0.78 Å high spin and 0.61 Å low spin; FeO is high spin
    assert elements.shannon_radius("Fe", 2) == pytest.approx(0.78)
    assert elements.shannon_radius("Fe", 2, spin="LS") == pytest.approx(0.61)
    assert elements.electronegativity("F") == pytest.approx(3.98)
    assert elements.ionisation_energies("Na")[1] == pytest.approx(5.139, abs=1e-3)  # NIST, from memory
    assert elements.common_oxidation_states("Fe") == (2, 3)
    assert elements.electronegativity("Ne") is None


def test_unknown_symbols_and_ions_are_input_errors():
    assert not elements.is_element("Xx") and elements.is_element("Fe")
    with pytest.raises(InputError, match="unknown element symbol 'Xx'"):
        elements.electronegativity("Xx")
    with pytest.raises(InputError, match="no Shannon radius is tabulated for Na\\+5"):
        elements.shannon_radius("Na", 5)
    with pytest.raises(InputError, match="in coordination XIV"):
        elements.shannon_radius("Na", 1, "XIV")


def test_the_package_does_not_import_the_library_at_run_time():
    import subprocess
    import sys

    code = ("import sys; from madelung.structure import elements; elements.shannon_radius('O', -2); "
            "elements.ionisation_energies('Mg'); print('mendeleev' in sys.modules)")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert done.stdout.strip() == "False", done.stderr[-2000:]
