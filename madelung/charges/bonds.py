"""Covalent bonds between sites and the bonded groups they form, periodic images included.

Bond rule
---------
Two sites are bonded when

* both elements are non-metals or metalloids (:data:`GROUP_FORMING`), or the pair is one of the
  metal–ligand pairs named by the caller (the polyatomic-ion table names Al–Cl for AlCl4-), and
* their distance is at most ``r_a + r_b + tolerance``, with r the single-bond covalent radii of
  Cordero et al. (through :func:`madelung.structure.elements.covalent_radius`) and ``tolerance`` 0.40 Å by
  default (:data:`DEFAULT_BOND_TOLERANCE`).

Metals bond to nothing else: their contacts with anions are ionic, and the covalent-radius sum
of, say, Ca and O (2.42 Å) would otherwise join every carbonate into one network. The 0.40 Å
allowance takes in the long O–O bond of peroxides (1.49 Å against 2 x 0.66 Å) and keeps out
hydrogen bonds (H...O 1.5 Å and more against 0.31 + 0.66 + 0.40 = 1.37 Å). Hydrogen forms one bond:
where it has several partners within reach, only the nearest is kept.

Periodic images are found with the shared neighbour search (:func:`madelung.sums.geometry.neighbour_pairs`)
and the lattice shift of each bond is recovered exactly by enumerating every image within the bond
limit, so small cells and bonds across several cell lengths are handled. A group that is bonded to
its own periodic image (a chain, layer or framework) is marked ``extended``: it is not a molecule
or a molecular ion.

References
----------
B. Cordero, V. Gómez, A. E. Platero-Prats, M. Revés, J. Echeverría, E. Cremades, F. Barragán and
S. Alvarez, Dalton Trans. (2008) 2832 (covalent radii).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..structure import elements
from ..errors import InputError
from ..sums.geometry import neighbour_pairs, plane_spacings

#: Allowance added to the sum of covalent radii, Å (see the module docstring for the reasoning).
DEFAULT_BOND_TOLERANCE = 0.40

#: Non-metals and metalloids, the elements that form covalent groups (fact of the trade).
GROUP_FORMING = frozenset("H B C N O F Si P S Cl Ge As Se Br Sb Te I".split())


@dataclass(frozen=True)
class Bonds:
    """Covalent bonds of a crystal, each once.

    Attributes
    ----------
    first, second : (B,) site indices.
    shifts : (B, 3) integer lattice shift: the bond joins site ``first`` to site ``second``
        displaced by ``shifts @ cell``.
    lengths : (B,) bond lengths, Å.
    tolerance : allowance over the covalent-radius sum used, Å.
    """

    first: np.ndarray
    second: np.ndarray
    shifts: np.ndarray
    lengths: np.ndarray
    tolerance: float

    def to_dict(self):
        return {"first": self.first.tolist(), "second": self.second.tolist(), "shifts": self.shifts.tolist(),
                "lengths_angstrom": self.lengths.tolist(), "tolerance_angstrom": self.tolerance}


@dataclass(frozen=True)
class BondedGroup:
    """Sites joined by covalent bonds.

    Attributes
    ----------
    members : site indices, ascending.
    shifts : (k, 3) integer lattice shift of each member that puts the group in one connected piece
        (for an extended group: of a spanning tree).
    bonds : ((a, b), ...) bonded pairs as positions in ``members``.
    bond_lengths : the bonds' lengths, Å.
    extended : True when the group is bonded to its own periodic image (chain, layer, framework).
    """

    members: tuple
    shifts: np.ndarray
    bonds: tuple
    bond_lengths: tuple
    extended: bool

    def positions(self, crystal) -> np.ndarray:
        """Cartesian positions of the members as one connected piece, Å."""
        return crystal.positions[list(self.members)] + self.shifts @ crystal.cell

    def bond_counts(self):
        """Number of bonds of each member inside the group."""
        counts = [0] * len(self.members)
        for a, b in self.bonds:
            counts[a] += 1
            counts[b] += 1
        return counts


def _limit(a, b, tolerance):
    ra, rb = elements.covalent_radius(a), elements.covalent_radius(b)
    if ra is None or rb is None:
        return None
    return ra + rb + tolerance


def bonded_pairs(crystal, tolerance=DEFAULT_BOND_TOLERANCE, metal_ligands=()) -> Bonds:
    """Covalent bonds of ``crystal`` by the rule of the module docstring.

    Parameters
    ----------
    crystal : Crystal
    tolerance : float
        Allowance over the covalent-radius sum, Å (default 0.40).
    metal_ligands : iterable of (element, element)
        Extra pairs that bond although one of them is a metal (e.g. ``("Al", "Cl")``).

    Returns
    -------
    Bonds

    References
    ----------
    B. Cordero et al., Dalton Trans. (2008) 2832.
    """
    try:
        tolerance = float(tolerance)
    except (TypeError, ValueError):
        raise InputError(f"bond tolerance must be a number of Å, got {tolerance!r}") from None
    if not (0.0 <= tolerance <= 1.0):
        raise InputError(f"bond tolerance must lie between 0 and 1 Å, got {tolerance:g}")
    extra = {frozenset(pair) for pair in metal_ligands}
    symbols = crystal.symbols
    bonding = set(GROUP_FORMING) | {el for pair in extra for el in pair}
    sites = np.array([i for i, s in enumerate(symbols) if s in bonding], dtype=np.int64)
    empty = Bonds(np.zeros(0, int), np.zeros(0, int), np.zeros((0, 3), int), np.zeros(0), tolerance)
    if len(sites) == 0:
        return empty
    kinds = sorted({symbols[i] for i in sites})
    limits = {}
    for a in kinds:
        for b in kinds:
            if (a in GROUP_FORMING and b in GROUP_FORMING) or frozenset((a, b)) in extra:
                value = _limit(a, b, tolerance)
                if value is not None:
                    limits[(a, b)] = value
    if not limits:
        return empty
    cutoff = max(limits.values())
    if crystal.shortest_distance > cutoff * (1 + 1e-9):
        # no two atoms (nor an atom and its image) come within the longest bond: nothing to look
        # for (the crystal found its shortest distance when it was checked; most salts)
        return empty
    owner, partner, _ = neighbour_pairs(crystal.cell, crystal.positions, cutoff, sites)
    owner = sites[owner]
    wanted = [(int(i), int(j)) for i, j in zip(owner, partner)
              if i <= j and (symbols[i], symbols[j]) in limits]
    if not wanted:
        return empty
    frac = crystal.fractional_positions
    spacing = plane_spacings(crystal.cell)
    first, second, shifts, lengths = [], [], [], []
    for i, j in dict.fromkeys(wanted):  # each pair once; every image of it is enumerated below
        limit = limits[(symbols[i], symbols[j])]
        delta = frac[j] - frac[i]
        # every integer shift n with |(delta + n) . cell| <= limit lies in this box (exact, any cell)
        low = np.floor(-delta - limit / spacing).astype(int)
        high = np.ceil(-delta + limit / spacing).astype(int)
        grid = np.stack(np.meshgrid(*[np.arange(lo, hi + 1) for lo, hi in zip(low, high)], indexing="ij"),
                        axis=-1).reshape(-1, 3)
        distance = np.linalg.norm((delta + grid) @ crystal.cell, axis=1)
        for n, d in zip(grid[distance <= limit], distance[distance <= limit]):
            if i == j and (d == 0 or tuple(n) < (0, 0, 0)):
                continue  # a site and itself, or the same self-image bond seen from the other side
            first.append(i)
            second.append(j)
            shifts.append(n)
            lengths.append(d)
    first, second = np.array(first, dtype=int), np.array(second, dtype=int)
    shifts, lengths = np.array(shifts, dtype=int).reshape(-1, 3), np.array(lengths, dtype=float)
    keep = _one_bond_per_hydrogen(symbols, first, second, lengths)
    return Bonds(first[keep], second[keep], shifts[keep], lengths[keep], tolerance)


def _one_bond_per_hydrogen(symbols, first, second, lengths):
    """Mask keeping, for every hydrogen, only its shortest bond."""
    keep = np.ones(len(first), bool)
    best = {}
    for k, (a, b, d) in enumerate(zip(first, second, lengths)):
        for h in (a, b):
            if symbols[h] == "H" and (h not in best or d < lengths[best[h]]):
                best[h] = k
    for k, (a, b) in enumerate(zip(first, second)):
        for h in (a, b):
            if symbols[h] == "H" and best[h] != k:
                keep[k] = False
    return keep


def bonded_groups(crystal, bonds: Bonds) -> tuple:
    """The connected groups of ``bonds`` (two or more sites each), with the lattice shifts that make
    each one a connected piece; groups bonded to their own image are marked ``extended``."""
    adjacency = {}
    for k, (a, b, n) in enumerate(zip(bonds.first, bonds.second, bonds.shifts)):
        adjacency.setdefault(int(a), []).append((int(b), n, k))
        adjacency.setdefault(int(b), []).append((int(a), -n, k))
    seen = {}
    groups = []
    for start in sorted(adjacency):
        if start in seen:
            continue
        shift = {start: np.zeros(3, dtype=int)}
        order, stack, extended, used = [start], [start], False, set()
        seen[start] = True
        while stack:
            a = stack.pop()
            for b, n, k in adjacency[a]:
                used.add(k)
                wanted = shift[a] + n
                if b in shift:
                    extended |= bool(np.any(shift[b] != wanted))
                    continue
                shift[b] = wanted
                seen[b] = True
                order.append(b)
                stack.append(b)
        members = tuple(sorted(order))
        where = {m: p for p, m in enumerate(members)}
        pairs = tuple((where[int(bonds.first[k])], where[int(bonds.second[k])]) for k in sorted(used))
        groups.append(BondedGroup(members, np.array([shift[m] for m in members], dtype=int).reshape(-1, 3),
                                  pairs, tuple(float(bonds.lengths[k]) for k in sorted(used)), extended))
    return tuple(groups)
