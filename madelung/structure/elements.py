"""Element data from a general-purpose periodic-table library (``mendeleev``, which ships its own
database), cached, in this project's units.

Sources as the library states them: oxidation states (main states of each element),
Pauling electronegativities, covalent radii (Cordero et al. 2008), ionisation energies and electron affinities (NIST-based
tables), and Shannon's effective ionic radii (R. D. Shannon, Acta Cryst. A32 (1976) 751).
"""

from __future__ import annotations

from functools import lru_cache

from ..errors import InputError


@lru_cache(maxsize=None)
def _element(symbol):
    from mendeleev import element

    try:
        return element(str(symbol))
    except Exception:
        raise InputError(f"unknown element symbol {symbol!r}") from None


@lru_cache(maxsize=None)
def _tables():
    """The library's element, oxidation-state and ionisation-energy tables, read once.

    Reading whole tables costs about as much as looking up two elements one by one, and every
    later look-up is then free; the values are the ones ``mendeleev.element`` returns.
    """
    from mendeleev.fetch import fetch_table

    elements = fetch_table("elements").set_index("symbol")
    return elements, fetch_table("oxidationstates"), fetch_table("ionizationenergies")


def _row(symbol):
    elements = _tables()[0]
    if str(symbol) not in elements.index:
        raise InputError(f"unknown element symbol {symbol!r}")
    return elements.loc[str(symbol)]


def _value(x):
    import math

    return None if x is None or (isinstance(x, float) and math.isnan(x)) else float(x)


def is_element(symbol) -> bool:
    """True if ``symbol`` names a chemical element."""
    try:
        _row(symbol)
        return True
    except InputError:
        return False


@lru_cache(maxsize=None)
def common_oxidation_states(symbol) -> tuple:
    """The element's main oxidation states (as the library lists them), e.g. Fe -> (2, 3)."""
    number = int(_row(symbol)["atomic_number"])
    table = _tables()[1]
    rows = table[(table["atomic_number"] == number) & (table["category"] == "main")]
    return tuple(sorted(int(x) for x in rows["oxidation_state"]))


@lru_cache(maxsize=None)
def all_oxidation_states(symbol) -> tuple:
    """Every oxidation state the library knows for the element (its "main" and "extended" lists)."""
    number = int(_row(symbol)["atomic_number"])
    table = _tables()[1]
    rows = table[table["atomic_number"] == number]
    return tuple(sorted({int(x) for x in rows["oxidation_state"]}))


@lru_cache(maxsize=None)
def electronegativity(symbol) -> float | None:
    """Pauling electronegativity, or None where the library has none (noble gases)."""
    return _value(_row(symbol)["en_pauling"])


@lru_cache(maxsize=None)
def covalent_radius(symbol) -> float | None:
    """Single-bond covalent radius in Å (B. Cordero et al., Dalton Trans. (2008) 2832, as the
    library lists it), or None where it has none."""
    value = _value(_row(symbol)["covalent_radius_cordero"])
    return None if value is None else value / 100.0  # pm -> Å


@lru_cache(maxsize=None)
def ionisation_energies(symbol) -> dict:
    """Successive ionisation energies in eV, keyed by the charge reached (1 for M -> M+)."""
    number = int(_row(symbol)["atomic_number"])
    table = _tables()[2]
    rows = table[(table["atomic_number"] == number) & table["ionization_energy"].notna()]
    return {int(k) + 1: float(v) for k, v in zip(rows["ion_charge"], rows["ionization_energy"])}


@lru_cache(maxsize=None)
def electron_affinity(symbol) -> float | None:
    """First electron affinity in eV (energy released on X + e -> X-; positive when bound)."""
    return _value(_row(symbol)["electron_affinity"])


@lru_cache(maxsize=None)
def shannon_radius(symbol, charge, coordination=None) -> float:
    """Shannon effective ionic radius in Å for an ion of given charge and coordination
    (roman numeral such as "VI"; default: VI if tabulated, else the first listed)."""
    radii = [r for r in _element(symbol).ionic_radii if int(r.charge) == int(charge)]
    if not radii:
        raise InputError(f"no Shannon radius is tabulated for {symbol}{int(charge):+d}")
    if coordination is not None:
        chosen = [r for r in radii if str(r.coordination) == str(coordination)]
        if not chosen:
            raise InputError(f"no Shannon radius is tabulated for {symbol}{int(charge):+d} "
                             f"in coordination {coordination}")
    else:
        chosen = [r for r in radii if str(r.coordination) == "VI"] or radii
    return float(chosen[0].ionic_radius) / 100.0  # pm -> Å
