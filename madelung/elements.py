"""Element data from a general-purpose periodic-table library (``mendeleev``, which ships its own
database), cached, in this project's units.

Sources as the library states them: oxidation states (main states of each element),
Pauling electronegativities, ionisation energies and electron affinities (NIST-based
tables), and Shannon's effective ionic radii (R. D. Shannon, Acta Cryst. A32 (1976) 751).
"""

from __future__ import annotations

from functools import lru_cache

from .errors import InputError


@lru_cache(maxsize=None)
def _element(symbol):
    from mendeleev import element

    try:
        return element(str(symbol))
    except Exception:
        raise InputError(f"unknown element symbol {symbol!r}") from None


def is_element(symbol) -> bool:
    """True if ``symbol`` names a chemical element."""
    try:
        _element(symbol)
        return True
    except InputError:
        return False


@lru_cache(maxsize=None)
def common_oxidation_states(symbol) -> tuple:
    """The element's main oxidation states (as the library lists them), e.g. Fe -> (2, 3)."""
    return tuple(int(x) for x in (_element(symbol).oxistates or ()))


@lru_cache(maxsize=None)
def all_oxidation_states(symbol) -> tuple:
    """Every oxidation state the library knows for the element."""
    states = _element(symbol).oxidation_states()
    return tuple(sorted(int(x) for x in states)) if states else ()


@lru_cache(maxsize=None)
def electronegativity(symbol) -> float | None:
    """Pauling electronegativity, or None where the library has none (noble gases)."""
    value = _element(symbol).electronegativity("pauling")
    return None if value is None else float(value)


@lru_cache(maxsize=None)
def ionisation_energies(symbol) -> dict:
    """Successive ionisation energies in eV, keyed by the charge reached (1 for M -> M+)."""
    return {int(k): float(v) for k, v in (_element(symbol).ionenergies or {}).items()}


@lru_cache(maxsize=None)
def electron_affinity(symbol) -> float | None:
    """First electron affinity in eV (energy released on X + e -> X-; positive when bound)."""
    value = _element(symbol).electron_affinity
    return None if value is None else float(value)


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
