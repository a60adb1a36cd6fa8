"""Crystal symmetry through spglib: space group, Wyckoff orbits, standardized cells.

Plain functions over arrays (cell rows are lattice vectors, fractional positions, integer
site types) with frozen-dataclass results, and thin conveniences for a :class:`~madelung.Crystal`.

Two sites are of the same type when they hold the same species (element, or the mixture of a
partly occupied site) and, where charges are given, the same charge; so a charge ordering
lowers the symmetry found, as it should.

References
----------
A. Togo and I. Tanaka, "Spglib: a software library for crystal symmetry search",
arXiv:1808.01590 (2018) (the library).
International Tables for Crystallography, Vol. A (space-group symbols, Wyckoff letters).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..defaults import SYMMETRY_TOLERANCE
from ..errors import InputError

#: Default tolerance for symmetry search, Å: loose enough for experimental CIFs whose
#: coordinates are printed to four decimals (0.0001 of a 10 Å axis is 0.001 Å, and
#: refined structures are rarely symmetric to better than about 0.01 Å).
DEFAULT_SYMMETRY_TOLERANCE = SYMMETRY_TOLERANCE

#: Origin shifts tried when naming Wyckoff letters (see :func:`analyse`).
_ORIGIN_SHIFTS = ((0, 0, 0), (0.5, 0.5, 0.5), (0.25, 0.25, 0.25), (0.75, 0.75, 0.75),
                  (0.5, 0, 0), (0, 0.5, 0), (0, 0, 0.5), (0.5, 0.5, 0), (0.5, 0, 0.5), (0, 0.5, 0.5))


@dataclass(frozen=True)
class Orbit:
    """One set of symmetry-equivalent sites (a crystallographic orbit).

    Attributes
    ----------
    index : running number of the orbit (order of first appearance in the cell).
    sites : indices of the member sites in the analysed cell.
    wyckoff : Wyckoff letter (International Tables, Vol. A).
    multiplicity : Wyckoff multiplicity, sites per conventional cell.
    site_symmetry : oriented site-symmetry symbol, e.g. ``"m-3m"``.
    """

    index: int
    sites: tuple
    wyckoff: str
    multiplicity: int
    site_symmetry: str

    @property
    def representative(self) -> int:
        return self.sites[0]

    @property
    def wyckoff_label(self) -> str:
        """Multiplicity and letter, e.g. ``"16d"``."""
        return f"{self.multiplicity}{self.wyckoff}"

    def to_dict(self) -> dict:
        """JSON-ready: the orbit's number, member sites, Wyckoff letter and multiplicity, site symmetry."""
        return {"index": self.index, "sites": [int(i) for i in self.sites], "wyckoff": self.wyckoff,
                "multiplicity": self.multiplicity, "site_symmetry": self.site_symmetry}


@dataclass(frozen=True)
class SymmetryInfo:
    """Space group and orbits of one structure.

    Attributes
    ----------
    number : International Tables number (1-230).
    symbol : Hermann-Mauguin symbol as spglib writes it, e.g. ``"Fd-3m"``.
    hall_number : spglib's Hall number of the standard setting used.
    symmetry_tolerance : the tolerance used, Å.
    orbit_of : (N,) orbit index of every site.
    orbits : the orbits in order of first appearance.
    operations : number of symmetry operations found in the analysed cell.
    conventional_volume : volume of the standardized conventional cell, Å^3.
    """

    number: int
    symbol: str
    hall_number: int
    symmetry_tolerance: float
    orbit_of: np.ndarray
    orbits: tuple
    operations: int
    conventional_volume: float

    @property
    def wyckoffs(self) -> tuple:
        """Wyckoff letter of every site."""
        return tuple(self.orbits[o].wyckoff for o in self.orbit_of)

    def orbit_means(self, values) -> tuple:
        """``(mean, spread)`` of per-site ``values`` over each orbit, in orbit order: the orbit
        average (equal by symmetry in an exact calculation) and the largest minus the smallest
        member value (zero up to the accuracy of the values and of the symmetry tolerance)."""
        values = np.asarray(values, dtype=float)
        if values.shape[:1] != self.orbit_of.shape:
            raise InputError(f"orbit averages need one value per site ({len(self.orbit_of)}), got {values.shape}")
        members = [values[list(orbit.sites)] for orbit in self.orbits]
        return (np.array([float(m.mean()) for m in members]), np.array([float(np.ptp(m)) for m in members]))

    def to_dict(self) -> dict:
        """JSON-ready: space group (number, symbol, Hall number), the tolerance Å, each site's orbit,
        the orbits, the operations and the conventional cell's volume Å^3."""
        return {"space_group_number": self.number, "space_group": self.symbol, "hall_number": self.hall_number,
                "symmetry_tolerance_angstrom": self.symmetry_tolerance,
                "orbit_of": np.asarray(self.orbit_of).tolist(), "orbits": [o.to_dict() for o in self.orbits],
                "operations": self.operations, "conventional_volume_angstrom3": self.conventional_volume}


def _dataset(cell, frac, types, symmetry_tolerance, angle_tolerance=-1.0):
    """spglib's dataset, or None where spglib finds none (its errors raised, not printed)."""
    import warnings

    import spglib

    try:
        import spglib.error as spglib_error

        spglib_error.OLD_ERROR_HANDLING = False
        failure = spglib_error.SpglibError
    except (ImportError, AttributeError):  # older spglib: failures return None
        failure = RuntimeError
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DeprecationWarning)
            return spglib.get_symmetry_dataset((cell, frac, types), symprec=symmetry_tolerance, angle_tolerance=angle_tolerance)
    except failure:
        return None


def analyse(cell, frac_positions, types, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE, angle_tolerance=-1.0) -> SymmetryInfo:
    """Space group, Wyckoff letters and orbits of a periodic structure.

    Parameters
    ----------
    cell : (3, 3) array_like
        Lattice vectors as rows, Å.
    frac_positions : (N, 3) array_like
        Fractional coordinates.
    types : (N,) array_like of int
        Site types: equal integers mean the same kind of site.
    symmetry_tolerance : float, optional
        Distance tolerance, Å (default :data:`DEFAULT_SYMMETRY_TOLERANCE`).
    angle_tolerance : float, optional
        Angle tolerance in degrees (-1: spglib's own choice).

    Returns
    -------
    SymmetryInfo

    Notes
    -----
    Wyckoff letters are defined only up to the origin choices that leave the space group
    unchanged (for a spinel, cations on 8a and 16d or on 8b and 16c describe the same crystal).
    We analyse the structure with the origin shifted by a few such candidate translations and
    keep the description with the alphabetically lowest letters, the earliest site breaking
    ties; this is the usual practice when a structure type is written in standard form, and it
    gives the familiar descriptions (rock salt 4a/4b, spinel 8a/16d/32e).

    References
    ----------
    A. Togo and I. Tanaka, arXiv:1808.01590 (2018) (spglib).
    E. Parthé and L. M. Gelato, Acta Cryst. A40 (1984) 169 (standardization of structure
    descriptions; cited from memory).
    """
    cell = np.ascontiguousarray(cell, dtype=np.float64)
    frac = np.ascontiguousarray(frac_positions, dtype=np.float64)
    types = np.ascontiguousarray(types, dtype=np.int64).reshape(-1)
    if not (np.isfinite(symmetry_tolerance) and symmetry_tolerance > 0):
        raise InputError(f"symmetry tolerance must be a positive length in Å, got {symmetry_tolerance!r}")
    best = None
    for shift in _ORIGIN_SHIFTS:
        data = _dataset(cell, frac + np.asarray(shift), types, symmetry_tolerance, angle_tolerance)
        if data is None:
            raise InputError(f"spglib found no symmetry at tolerance {symmetry_tolerance:g} Å "
                             "(positions overlapping or the cell is degenerate?)")
        letters = list(data.wyckoffs)
        equivalent = np.asarray(data.equivalent_atoms)
        firsts = sorted(set(equivalent.tolist()), key=lambda i: int(np.flatnonzero(equivalent == i)[0]))
        key = (sorted(letters[i] for i in firsts), [letters[i] for i in firsts])
        if best is None or key < best[0]:
            best = (key, data)
    data = best[1]
    equivalent = np.asarray(data.equivalent_atoms, dtype=np.int64)
    n = len(types)
    conventional_volume = abs(float(np.linalg.det(np.asarray(data.std_lattice))))
    ratio = conventional_volume / abs(float(np.linalg.det(cell)))
    orbit_of = np.empty(n, dtype=np.int64)
    first_of = {}
    orbits = []
    for i in range(n):
        root = int(equivalent[i])
        if root not in first_of:
            first_of[root] = len(first_of)
        orbit_of[i] = first_of[root]
    for root, o in first_of.items():
        members = tuple(int(i) for i in np.flatnonzero(orbit_of == o))
        multiplicity = int(round(len(members) * ratio))
        orbits.append(Orbit(index=o, sites=members, wyckoff=str(data.wyckoffs[members[0]]),
                            multiplicity=multiplicity, site_symmetry=str(data.site_symmetry_symbols[members[0]])))
    orbit_of.setflags(write=False)
    return SymmetryInfo(number=int(data.number), symbol=str(data.international), hall_number=int(data.hall_number),
                        symmetry_tolerance=float(symmetry_tolerance), orbit_of=orbit_of, orbits=tuple(orbits),
                        operations=int(len(data.rotations)), conventional_volume=conventional_volume)


def symmetry_operations(cell, frac_positions, types, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE):
    """Space-group operations of a periodic structure as ``(rotations, translations)``: integer
    (M, 3, 3) matrices and (M, 3) vectors acting on fractional coordinates, ``f' = R f + t``; every
    operation that maps the structure (with its site types) onto itself in this cell, pure
    translations of a supercell included.

    References
    ----------
    A. Togo and I. Tanaka, arXiv:1808.01590 (2018) (spglib).
    """
    cell = np.ascontiguousarray(cell, dtype=np.float64)
    frac = np.ascontiguousarray(frac_positions, dtype=np.float64)
    types = np.ascontiguousarray(types, dtype=np.int64).reshape(-1)
    if not (np.isfinite(symmetry_tolerance) and symmetry_tolerance > 0):
        raise InputError(f"symmetry tolerance must be a positive length in Å, got {symmetry_tolerance!r}")
    data = _dataset(cell, frac, types, symmetry_tolerance)
    if data is None:
        raise InputError(f"spglib found no symmetry at tolerance {symmetry_tolerance:g} Å "
                         "(positions overlapping or the cell is degenerate?)")
    return np.asarray(data.rotations, dtype=np.int64), np.asarray(data.translations, dtype=np.float64)


def site_types(crystal, by_charge=True) -> np.ndarray:
    """Integer type of every site: same species (element or mixture) and, if ``by_charge``, same charge."""
    keys = {}
    result = np.empty(len(crystal), dtype=np.int64)
    for i in range(len(crystal)):
        key = (crystal.species_label(i),)
        if by_charge:
            key += (round(float(crystal.charges[i]), 6),)
        result[i] = keys.setdefault(key, len(keys) + 1)
    return result


def crystal_symmetry(crystal, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE, by_charge=True) -> SymmetryInfo:
    """:func:`analyse` for a :class:`~madelung.Crystal` (types from :func:`site_types`)."""
    return analyse(crystal.cell, crystal.fractional_positions, site_types(crystal, by_charge), symmetry_tolerance)


#: Conventional-to-primitive transformations P (columns: primitive vectors in units of the
#: conventional ones) for each centring, as in International Tables Vol. A, Table 5.1.3.1
#: (rhombohedral: obverse setting on hexagonal axes).
_CENTRING = {
    "P": np.eye(3),
    "A": np.array([[1, 0, 0], [0, 0.5, -0.5], [0, 0.5, 0.5]]),
    "B": np.array([[0.5, 0, -0.5], [0, 1, 0], [0.5, 0, 0.5]]),
    "C": np.array([[0.5, 0.5, 0], [-0.5, 0.5, 0], [0, 0, 1]]),
    "I": np.array([[-0.5, 0.5, 0.5], [0.5, -0.5, 0.5], [0.5, 0.5, -0.5]]),
    "F": np.array([[0, 0.5, 0.5], [0.5, 0, 0.5], [0.5, 0.5, 0]]),
    "R": np.array([[2 / 3, -1 / 3, -1 / 3], [1 / 3, 1 / 3, -2 / 3], [1 / 3, 1 / 3, 1 / 3]]),
}


def standard_cell(crystal, kind="conventional", symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE):
    """The crystal in spglib's standardized conventional or primitive cell.

    Charges, labels, occupancies and species follow their sites; positions are symmetrized
    (idealized within ``symmetry_tolerance``) and the cell may be rotated to the standard orientation.

    Parameters
    ----------
    crystal : Crystal
    kind : ``"conventional"``, ``"primitive"`` or ``"input"`` (the crystal unchanged).
    symmetry_tolerance : float, optional
        Symmetry tolerance, Å.

    References
    ----------
    A. Togo and I. Tanaka, arXiv:1808.01590 (2018) (spglib standardization).
    International Tables for Crystallography, Vol. A, Table 5.1.3.1 (centring transformations).
    """
    if kind == "input":
        return crystal
    if kind not in ("conventional", "primitive"):
        raise InputError(f"cell kind must be 'input', 'conventional' or 'primitive', got {kind!r}")
    types = site_types(crystal, by_charge=True)
    data = _dataset(np.ascontiguousarray(crystal.cell), np.ascontiguousarray(crystal.fractional_positions),
                    types, symmetry_tolerance)
    if data is None:
        raise InputError(f"{crystal.source or 'structure'}: spglib found no symmetry at tolerance {symmetry_tolerance:g} Å")
    # one input site for every primitive-cell site
    to_primitive = np.asarray(data.mapping_to_primitive)
    source_of = {}
    for i, p in enumerate(to_primitive):
        source_of.setdefault(int(p), i)
    std_lattice = np.asarray(data.std_lattice, dtype=float)
    std_frac = np.asarray(data.std_positions, dtype=float)
    std_map = np.asarray(data.std_mapping_to_primitive)
    if kind == "conventional":
        lattice, frac, picked = std_lattice, std_frac, [source_of[int(p)] for p in std_map]
    else:
        centring = data.international[0]
        matrix = _CENTRING.get(centring)
        if matrix is None:
            raise InputError(f"unknown centring {centring!r} of space group {data.international}")
        lattice = matrix.T @ std_lattice
        frac_all = std_frac @ np.linalg.inv(matrix.T)
        chosen = {}
        for k, p in enumerate(std_map):
            chosen.setdefault(int(p), k)
        order = sorted(chosen)
        frac = frac_all[[chosen[p] for p in order]]
        picked = [source_of[p] for p in order]
        expected = abs(np.linalg.det(std_lattice)) / abs(np.linalg.det(lattice))
        if len(frac) * round(expected) != len(std_frac):
            raise InputError(f"{crystal.source or 'structure'}: primitive cell of {data.international} "
                             f"has {len(frac)} sites, expected {len(std_frac) / expected:g}")
    frac = frac - np.floor(frac + 1e-9)
    positions = frac @ lattice
    species = None if crystal.species is None else [crystal.species[i] for i in picked]
    states = None if crystal.species_states is None else [crystal.species_states[i] for i in picked]
    return crystal.replace(cell=lattice, positions=positions, charges=crystal.charges[picked],
                           symbols=[crystal.symbols[i] for i in picked], labels=[crystal.labels[i] for i in picked],
                           occupancies=crystal.occupancies[picked], species=species, species_states=states)
