"""Which oxidation states are common and which are known: the prior of the oxidation-state search.

Two lists per element:

``common``
    The states an inorganic chemist expects in ionic solids (oxides, halides, chalcogenides,
    nitrides). **Typed in from memory** of the element chapters of N. N. Greenwood and
    A. Earnshaw, *Chemistry of the Elements*, 2nd ed. (Butterworth-Heinemann, 1997), to be
    checked against the book before being relied on. The periodic-table library's "main" list
    (mendeleev) misses states that are everyday in solids (Mn3+, Cu+, Ti3+, V3+/V4+, Ni3+);
    this table is why they are found. Elements not in the table fall back to the library's
    main states.
``known``
    Every state the periodic-table library lists (mendeleev, category "all"), plus the common ones.

The prior is a two-level one, and it is a search order as much as a ranking key: common states
are tried first; the known-but-rare states are tried only when no charge-neutral assignment of
common states exists or the best one fits its bond-valence sums badly (see
:mod:`madelung.charges.oxidation`), and an assignment that needs rare states ranks below one that
does not, other evidence being equal.
"""

from __future__ import annotations

from functools import lru_cache

from ..structure import elements
from ..errors import InputError

#: Common oxidation states in ionic solids, from memory of Greenwood & Earnshaw (1997).
COMMON = {
    "H": (1, -1), "Li": (1,), "Na": (1,), "K": (1,), "Rb": (1,), "Cs": (1,),
    "Be": (2,), "Mg": (2,), "Ca": (2,), "Sr": (2,), "Ba": (2,), "Ra": (2,),
    "B": (3,), "Al": (3,), "Ga": (3,), "In": (3, 1), "Tl": (1, 3),
    "C": (4, -4), "Si": (4, -4), "Ge": (4, 2), "Sn": (2, 4), "Pb": (2, 4),
    "N": (-3, 3, 5), "P": (-3, 3, 5), "As": (-3, 3, 5), "Sb": (-3, 3, 5), "Bi": (3, 5),
    "O": (-2,), "S": (-2, 4, 6), "Se": (-2, 4, 6), "Te": (-2, 4, 6),
    "F": (-1,), "Cl": (-1, 1, 3, 5, 7), "Br": (-1, 5), "I": (-1, 5, 7),
    "Sc": (3,), "Y": (3,), "La": (3,), "Ce": (3, 4), "Pr": (3, 4), "Nd": (3,), "Pm": (3,), "Sm": (2, 3),
    "Eu": (2, 3), "Gd": (3,), "Tb": (3, 4), "Dy": (3,), "Ho": (3,), "Er": (3,), "Tm": (3,), "Yb": (2, 3),
    "Lu": (3,),
    "Ti": (2, 3, 4), "Zr": (4,), "Hf": (4,),
    "V": (2, 3, 4, 5), "Nb": (3, 4, 5), "Ta": (5,),
    "Cr": (2, 3, 6), "Mo": (3, 4, 6), "W": (4, 6),
    "Mn": (2, 3, 4, 7), "Tc": (4, 7), "Re": (4, 6, 7),
    "Fe": (2, 3), "Ru": (3, 4), "Os": (4, 8),
    "Co": (2, 3), "Rh": (3,), "Ir": (3, 4),
    "Ni": (2, 3), "Pd": (2, 4), "Pt": (2, 4),
    "Cu": (1, 2), "Ag": (1,), "Au": (1, 3),
    "Zn": (2,), "Cd": (2,), "Hg": (1, 2),
    "Th": (4,), "U": (3, 4, 5, 6), "Np": (4, 5, 6), "Pu": (3, 4),
}


@lru_cache(maxsize=None)
def common_states(element) -> tuple:
    """Common non-zero oxidation states of ``element`` (sorted)."""
    if element in COMMON:
        return tuple(sorted(COMMON[element]))
    try:
        return tuple(sorted(int(s) for s in elements.common_oxidation_states(element) if int(s) != 0))
    except InputError:
        raise
    except Exception:  # the library has no entry
        return ()


@lru_cache(maxsize=None)
def known_states(element) -> tuple:
    """Every non-zero oxidation state known for ``element``: the library's full list and the common ones."""
    return tuple(sorted({int(s) for s in elements.all_oxidation_states(element) if int(s) != 0}
                        | set(common_states(element))))


def is_common(element, state) -> bool:
    """True if ``state`` (an integer or a mixed-valence average of two adjacent states) uses only
    common states of ``element``."""
    common = common_states(element)
    value = float(state)
    if value == int(value):
        return int(value) in common
    low, high = adjacent_pair(element, value)
    return low in common and high in common


def adjacent_pair(element, value):
    """The two neighbouring integer states a non-integer ``value`` lies between (Mn 3.5 -> (3, 4))."""
    low = int(value // 1)
    return low, low + 1
