"""Bond-valence sums: V_i = sum_j exp((R0_ij - r_ij) / b), a check on assigned oxidation states.

The bond-valence model says the valences of the bonds an ion forms add up to its oxidation
state; R0 is tabulated per cation (in its oxidation state) and anion, and b = 0.37 Å is the
usual universal constant. A sum far from the assigned state means the assignment, or the
structure, is doubtful. Agreement within 10-15 % is what one expects for ordinary ionic solids
(common practice); strained or strongly covalent structures do worse.

Parameters
----------
:data:`R0` holds bond-valence parameters for the common cation–anion pairs, from
I. D. Brown and D. Altermatt, Acta Cryst. B41 (1985) 244 (oxides) and N. E. Brese and
M. O'Keeffe, Acta Cryst. B47 (1991) 192 (halides, sulfides, nitrides and the rest).
**Every value was typed in from memory of those tables** and should be checked against the
printed papers before being relied on for more than a plausibility check.

Where a state lies between two tabulated states (a mixed-valence average such as Fe 2.5+),
R0 is interpolated linearly between them (our choice, stated here).

References
----------
I. D. Brown and D. Altermatt, Acta Cryst. B41 (1985) 244.
N. E. Brese and M. O'Keeffe, Acta Cryst. B47 (1991) 192.
"""

from __future__ import annotations

import math

import numpy as np

from ..geometry import neighbour_pairs

#: The universal softness parameter b, Å (Brown & Altermatt 1985).
B = 0.37

#: Bonds longer than R0 + this (Å) are left out (their valence is below exp(-1.5/0.37) = 0.017).
BOND_REACH = 1.5

#: (cation, oxidation state, anion) -> R0 in Å. Oxides from Brown & Altermatt (1985), the rest
#: from Brese & O'Keeffe (1991); all typed in from memory.
R0 = {
    # oxides
    ("Li", 1, "O"): 1.466, ("Na", 1, "O"): 1.803, ("K", 1, "O"): 2.132, ("Rb", 1, "O"): 2.263,
    ("Cs", 1, "O"): 2.417, ("Ag", 1, "O"): 1.805, ("Cu", 1, "O"): 1.593,
    ("Be", 2, "O"): 1.381, ("Mg", 2, "O"): 1.693, ("Ca", 2, "O"): 1.967, ("Sr", 2, "O"): 2.118,
    ("Ba", 2, "O"): 2.285, ("Zn", 2, "O"): 1.704, ("Cd", 2, "O"): 1.904, ("Pb", 2, "O"): 2.112,
    ("Mn", 2, "O"): 1.790, ("Fe", 2, "O"): 1.734, ("Co", 2, "O"): 1.692, ("Ni", 2, "O"): 1.654,
    ("Cu", 2, "O"): 1.679, ("Sn", 2, "O"): 1.984,
    ("B", 3, "O"): 1.371, ("Al", 3, "O"): 1.651, ("Ga", 3, "O"): 1.730, ("In", 3, "O"): 1.902,
    ("Sc", 3, "O"): 1.849, ("Y", 3, "O"): 2.019, ("La", 3, "O"): 2.172, ("Ce", 3, "O"): 2.151,
    ("Ti", 3, "O"): 1.791, ("V", 3, "O"): 1.743, ("Cr", 3, "O"): 1.724, ("Mn", 3, "O"): 1.760,
    ("Fe", 3, "O"): 1.759, ("Co", 3, "O"): 1.70, ("Bi", 3, "O"): 2.094, ("Ni", 3, "O"): 1.686,
    ("Si", 4, "O"): 1.624, ("Ge", 4, "O"): 1.748, ("Ti", 4, "O"): 1.815, ("Zr", 4, "O"): 1.937,
    ("Hf", 4, "O"): 1.923, ("Sn", 4, "O"): 1.905, ("Ce", 4, "O"): 2.028, ("Mn", 4, "O"): 1.753,
    ("V", 4, "O"): 1.784, ("Pb", 4, "O"): 2.042,
    ("P", 5, "O"): 1.617, ("V", 5, "O"): 1.803, ("Nb", 5, "O"): 1.911, ("Ta", 5, "O"): 1.920,
    ("S", 6, "O"): 1.624, ("Mo", 6, "O"): 1.907, ("W", 6, "O"): 1.921, ("Cr", 6, "O"): 1.794,
    # fluorides
    ("Li", 1, "F"): 1.360, ("Na", 1, "F"): 1.677, ("K", 1, "F"): 1.992, ("Rb", 1, "F"): 2.160,
    ("Cs", 1, "F"): 2.330, ("Mg", 2, "F"): 1.578, ("Ca", 2, "F"): 1.842, ("Sr", 2, "F"): 2.019,
    ("Ba", 2, "F"): 2.188, ("Al", 3, "F"): 1.545,
    # chlorides
    ("Li", 1, "Cl"): 1.910, ("Na", 1, "Cl"): 2.150, ("K", 1, "Cl"): 2.519, ("Rb", 1, "Cl"): 2.652,
    ("Cs", 1, "Cl"): 2.791, ("Mg", 2, "Cl"): 2.080, ("Ca", 2, "Cl"): 2.370, ("Sr", 2, "Cl"): 2.510,
    ("Ba", 2, "Cl"): 2.690,
    # bromides and iodides
    ("Li", 1, "Br"): 2.020, ("Na", 1, "Br"): 2.330, ("K", 1, "Br"): 2.660, ("Rb", 1, "Br"): 2.780,
    ("Cs", 1, "Br"): 2.950,
    ("Li", 1, "I"): 2.220, ("Na", 1, "I"): 2.560, ("K", 1, "I"): 2.880, ("Cs", 1, "I"): 3.180,
    # sulfides and nitrides
    ("Zn", 2, "S"): 2.090,
    ("Li", 1, "N"): 1.610, ("Mg", 2, "N"): 1.850, ("Ca", 2, "N"): 2.140, ("B", 3, "N"): 1.470,
    ("Al", 3, "N"): 1.790, ("Ga", 3, "N"): 1.840, ("Sc", 3, "N"): 1.980, ("Ti", 3, "N"): 1.930,
    ("Si", 4, "N"): 1.770,
}


def r0(cation, state, anion):
    """R0 (Å) for a cation in oxidation state ``state`` bonded to ``anion``, or None if not tabulated.

    A non-integer state between two tabulated states gets the linear interpolation of their R0.
    """
    state = float(state)
    if state <= 0:
        return None
    whole = round(state)
    if abs(state - whole) < 1e-9:
        return R0.get((cation, int(whole), anion))
    low, high = math.floor(state), math.ceil(state)
    a, b = R0.get((cation, low, anion)), R0.get((cation, high, anion))
    if a is None or b is None:
        return None
    return a + (b - a) * (state - low)


def neighbour_lists(crystal, sites, r_cut):
    """Partners (indices) and distances (Å) within ``r_cut`` of each site in ``sites``, images included."""
    sites = np.asarray(sites, dtype=np.int64)
    owner, partner, distance = neighbour_pairs(crystal.cell, crystal.positions, r_cut, sites)
    return [(partner[owner == s], distance[owner == s]) for s in range(len(sites))]


def search_radius(elements):
    """Neighbour search radius, Å, long enough for every tabulated bond between these elements."""
    values = [v for (c, _, a), v in R0.items() if c in elements and a in elements]
    return (max(values) if values else 3.0) + BOND_REACH


def site_sum(element, state, partner_elements, partner_states, distances):
    """Bond-valence sum of one ion from its partners of opposite sign; None if a bond lacks R0.

    ``state`` and ``partner_states`` are signed oxidation states (cations positive).
    """
    total = 0.0
    for other, other_state, r in zip(partner_elements, partner_states, distances):
        if state * other_state >= 0:
            continue
        if state > 0:
            value = r0(element, state, other)
        else:
            value = r0(other, other_state, element)
        if value is None:
            return None
        if r <= value + BOND_REACH:
            total += math.exp((value - r) / B)
    return total


def bond_valence_sums(crystal, charges=None):
    """Bond-valence sum (valence units) of every site, NaN where a bond's R0 is not tabulated or
    the site is mixed or partly occupied.

    Parameters
    ----------
    crystal : Crystal
    charges : (N,) oxidation states to use (default: the crystal's charges).

    References
    ----------
    I. D. Brown and D. Altermatt, Acta Cryst. B41 (1985) 244.
    N. E. Brese and M. O'Keeffe, Acta Cryst. B47 (1991) 192.
    """
    charges = np.asarray(crystal.charges if charges is None else charges, dtype=float)
    elements = set(crystal.symbols)
    lists = neighbour_lists(crystal, np.arange(len(crystal)), search_radius(elements))
    result = np.full(len(crystal), np.nan)
    for i, (partners, distances) in enumerate(lists):
        if crystal.is_averaged(i) or any(crystal.is_averaged(int(j)) for j in partners):
            continue
        value = site_sum(crystal.symbols[i], charges[i], [crystal.symbols[j] for j in partners],
                         charges[partners], distances)
        if value is not None:
            result[i] = value
    return result
