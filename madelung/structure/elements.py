"""Element data, in this project's units, from a small table shipped inside the package.

``element_data.json`` (beside this module) is a copy of what this module needs from the
periodic-table library ``mendeleev`` (its own database), made by
``python -m madelung.structure.make_element_data``; reading it takes a millisecond where importing
the library took over a second. A test compares every value with the library itself.

Sources as the library states them: oxidation states (main states of each element),
Pauling electronegativities, covalent radii (Cordero et al. 2008), ionisation energies and electron affinities (NIST-based
tables), and Shannon's effective ionic radii (R. D. Shannon, Acta Cryst. A32 (1976) 751).

References
----------
B. Cordero et al., *Covalent radii revisited*, Dalton Trans. (2008) 2832.
R. D. Shannon, *Revised effective ionic radii*, Acta Cryst. A32 (1976) 751.
L. M. Mentel, *mendeleev — A Python resource for properties of chemical elements, ions and isotopes*.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path

from ..errors import InputError

DATA_FILE = Path(__file__).with_name("element_data.json")


@lru_cache(maxsize=None)
def _tables() -> dict:
    """Every element's record keyed by symbol, read once from the package's data file."""
    records = json.loads(DATA_FILE.read_text(encoding="utf-8"))
    records.pop("_about", None)
    return records


def _row(symbol) -> dict:
    record = _tables().get(str(symbol))
    if record is None:
        raise InputError(f"unknown element symbol {symbol!r}")
    return record


def is_element(symbol) -> bool:
    """True if ``symbol`` names a chemical element."""
    return str(symbol) in _tables()


def atomic_number(symbol) -> int:
    """The element's atomic number, e.g. Fe -> 26."""
    return int(_row(symbol)["atomic_number"])


@lru_cache(maxsize=None)
def common_oxidation_states(symbol) -> tuple:
    """The element's main oxidation states (as the library lists them), e.g. Fe -> (2, 3)."""
    return tuple(_row(symbol)["main_states"])


@lru_cache(maxsize=None)
def all_oxidation_states(symbol) -> tuple:
    """Every oxidation state the library knows for the element (its "main" and "extended" lists)."""
    return tuple(_row(symbol)["all_states"])


def electronegativity(symbol) -> float | None:
    """Pauling electronegativity, or None where the library has none (noble gases)."""
    return _row(symbol)["electronegativity"]


def covalent_radius(symbol) -> float | None:
    """Single-bond covalent radius in Å (B. Cordero et al., Dalton Trans. (2008) 2832, as the
    library lists it), or None where it has none."""
    value = _row(symbol)["covalent_radius_pm"]
    return None if value is None else value / 100.0  # pm -> Å


def ionisation_energies(symbol) -> dict:
    """Successive ionisation energies in eV, keyed by the charge reached (1 for M -> M+)."""
    return {int(charge): float(energy) for charge, energy in _row(symbol)["ionisation_energies_eV"]}


def electron_affinity(symbol) -> float | None:
    """First electron affinity in eV (energy released on X + e -> X-; positive when bound)."""
    return _row(symbol)["electron_affinity_eV"]


@lru_cache(maxsize=None)
def shannon_radius(symbol, charge, coordination=None, spin=None) -> float:
    """Shannon effective ionic radius in Å for an ion of given charge and coordination.

    ``coordination``: roman numeral such as "VI"; default VI if tabulated, else the first listed.
    ``spin``: "HS" or "LS" where the table lists both spin states of the ion in that coordination;
    default high spin, the usual state of 3d ions among oxide and halide ligands (weak field;
    common practice, e.g. Fe2+ in FeO, Mn2+ in MnO). Ions with one entry ignore ``spin``.

    References
    ----------
    R. D. Shannon, Acta Cryst. A32 (1976) 751 (the table, both spin states where known).
    """
    if spin is not None and str(spin).upper() not in ("HS", "LS"):
        raise InputError(f"spin {spin!r} must be 'HS' (high spin) or 'LS' (low spin)")
    radii = [(n, r, s) for c, n, r, s in _row(symbol)["shannon_radii_pm"] if c == int(charge)]
    if not radii:
        raise InputError(f"no Shannon radius is tabulated for {symbol}{int(charge):+d}")
    if coordination is not None:
        rows = [(r, s) for n, r, s in radii if n == str(coordination)]
        if not rows:
            raise InputError(f"no Shannon radius is tabulated for {symbol}{int(charge):+d} "
                             f"in coordination {coordination}")
    else:
        rows = [(r, s) for n, r, s in radii if n == "VI"] or [(r, s) for _, r, s in radii[:1]]
    wanted = "HS" if spin is None else str(spin).upper()
    chosen = [r for r, s in rows if s == wanted] or [r for r, _ in rows]
    return float(chosen[0]) / 100.0  # pm -> Å
