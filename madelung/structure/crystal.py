"""The crystal model: a periodic cell of point charges, validated on construction.

A :class:`Crystal` holds the cell (rows are lattice vectors, Å), Cartesian
positions (Å), charges (e), element symbols, site labels and occupancies.
It is immutable; methods that change something return a new crystal.

Charges can be given as an array, as a map by element (``{"Na": 1, "Cl": -1}``),
as a map by site label (``{"O1": -2, "Fe1": 3}``), or read from the structure
itself (CIF ``_atom_type_oxidation_number`` or typed symbols such as ``Fe3+``;
ASE initial charges).
"""

from __future__ import annotations

import math
import sys
from typing import Mapping

import numpy as np

from .bounds import COINCIDENT_DISTANCE, check_cell, check_charges
from .lattice import reduced_cell
from ..defaults import MAX_ATOMS, MIN_DISTANCE
from ..errors import InputError

#: Ions closer than this (Å) are refused as overlapping unless told otherwise.
DEFAULT_MIN_DISTANCE = MIN_DISTANCE

#: Structure files with more sites than this are refused before any sum is attempted (memory and
#: time grow with the number of sites); raise it with ``max_atoms=`` or ``--max-atoms``. The
#: engines handle a million ions; crystals built in Python from arrays or ``ase.Atoms`` have no
#: limit unless one is given.
DEFAULT_MAX_ATOMS = MAX_ATOMS

#: Largest site charge (e) a crystal accepts: far above any ion, small enough that sums of
#: squares over millions of sites stay finite.
MAX_CHARGE = 1e6

#: Ways of getting charges named by a string: from the structure file, assigned oxidation
#: states (:mod:`madelung.charges.oxidation`), or charge equilibration (:mod:`madelung.charges.equilibrate`).
CHARGE_SOURCES = ("file", "auto", "equilibrate")

def _where(source):
    return f"{source}: " if source else ""


def default_labels(symbols):
    """Labels made of the symbol and a running number per element: Na1, Na2, Cl1, ..."""
    counts: dict[str, int] = {}
    labels = []
    for symbol in symbols:
        counts[symbol] = counts.get(symbol, 0) + 1
        labels.append(f"{symbol}{counts[symbol]}")
    return labels


class Crystal:
    """A periodic arrangement of point charges.

    Parameters
    ----------
    cell : (3, 3) array_like
        Lattice vectors as rows, Å.
    positions : (N, 3) array_like
        Cartesian positions, Å.
    charges : (N,) array_like, or mapping
        Ion charges in e; or a map from element symbol or site label to charge.
    symbols : sequence of str, optional
        Element symbols (default ``"X"`` for every site).
    labels : sequence of str, optional
        Site labels, e.g. CIF ``_atom_site_label`` (default: symbol and a running number).
    occupancies : (N,) array_like, optional
        Site occupancies in (0, 1] (default 1): for a mixed site, the total of its species.
    species : sequence, optional
        For partly occupied or mixed sites: per site a sequence of ``(element, occupancy)``
        pairs (e.g. ``(("Fe", 0.5), ("Ti", 0.5))``). A site is then one point charge carrying
        the occupancy-weighted mean charge of its species (the virtual-crystal average).
        Default: every site holds its symbol with its occupancy.
    species_states : sequence, optional
        Per site, the oxidation state of each species (``None`` where unknown), as the file gives
        them or the assignment chose them; shown in labels such as ``Mn3+0.7Mn4+0.3``.
    source : str, optional
        Where the structure came from; named in error messages.
    min_distance : float, optional
        Refuse ions closer than this, Å (default 0.5). Use 0 to switch the check off.
    info : mapping, optional
        Free-form metadata carried along (e.g. CIF tags).
    """

    def __init__(self, cell, positions, charges, symbols=None, labels=None, occupancies=None,
                 *, source=None, min_distance=DEFAULT_MIN_DISTANCE, info=None, species=None,
                 species_states=None):
        self.source = None if source is None else str(source)
        where = _where(self.source)

        try:
            cell = np.array(cell, dtype=np.float64)
            positions = np.array(positions, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{where}cell and positions must be numbers ({exc})") from None
        if cell.shape != (3, 3):
            raise InputError(f"{where}cell must be 3x3 (rows are lattice vectors), got shape {cell.shape}")
        if not np.all(np.isfinite(cell)):
            raise InputError(f"{where}cell contains a non-finite number")
        positions = positions.reshape(-1, 3) if positions.size % 3 == 0 and positions.ndim <= 2 else positions
        if positions.ndim != 2 or positions.shape[1] != 3:
            raise InputError(f"{where}positions must have shape (N, 3), got {positions.shape}")
        n = len(positions)
        if n == 0:
            raise InputError(f"{where}the structure has no atoms")
        bad = np.flatnonzero(~np.all(np.isfinite(positions), axis=1))
        if len(bad):
            raise InputError(f"{where}site {bad[0]} has a non-finite coordinate {positions[bad[0]].tolist()}")

        lengths = np.linalg.norm(cell, axis=1)
        volume = abs(float(np.linalg.det(cell)))
        if np.any(lengths < 1e-8) or volume < 1e-6 * float(np.prod(lengths)) or volume < 1e-8:
            raise InputError(f"{where}the cell is degenerate (volume {volume:.3g} Å^3); "
                             "three non-coplanar lattice vectors are needed")
        check_cell(cell, positions, self.source, min_distance)

        if symbols is None:
            symbols = ["X"] * n
        symbols = [str(s) for s in symbols]
        if len(symbols) != n:
            raise InputError(f"{where}{len(symbols)} symbols given for {n} sites")
        if labels is None:
            labels = default_labels(symbols)
        labels = [str(s) for s in labels]
        if len(labels) != n:
            raise InputError(f"{where}{len(labels)} labels given for {n} sites")

        if occupancies is None:
            occupancies = np.ones(n)
        occupancies = np.array(occupancies, dtype=np.float64).reshape(-1)
        if occupancies.shape != (n,):
            raise InputError(f"{where}{occupancies.size} occupancies given for {n} sites")
        bad = np.flatnonzero(~np.isfinite(occupancies) | (occupancies <= 0) | (occupancies > 1 + 1e-6))
        if len(bad):
            i = bad[0]
            raise InputError(f"{where}site {labels[i]} has occupancy {occupancies[i]:g}; "
                             "occupancies must lie in (0, 1]")

        species = _resolve_species(species, symbols, occupancies, labels, where)
        charges = _resolve_charges(charges, symbols, labels, where, species)
        check_charges(charges, labels, self.source)
        species_states = _resolve_states(species_states, symbols, species, labels, where)

        self.cell = cell
        self.positions = positions
        self.charges = charges
        self.symbols = tuple(symbols)
        self.labels = tuple(labels)
        self.occupancies = occupancies
        self.species = species
        self.species_states = species_states
        self.info = dict(info or {})
        for array in (self.cell, self.positions, self.charges, self.occupancies):
            array.setflags(write=False)

        self.min_distance = float(min_distance)
        # kept: the descriptors of one structure ask for them a dozen times
        self._volume = volume
        self._element_counts = None
        self._check_overlaps()

    # ------------------------------------------------------------------ basics
    def __len__(self):
        return len(self.positions)

    def __repr__(self):
        return (f"Crystal({self.formula}, {len(self)} sites, volume {self.volume:.3f} Å^3, "
                f"net charge {self.net_charge:+.6g} e)")

    @property
    def volume(self) -> float:
        """Cell volume, Å^3."""
        return self._volume

    @property
    def net_charge(self) -> float:
        """Total charge of the cell, e."""
        return float(np.sum(self.charges))

    @property
    def fractional_positions(self) -> np.ndarray:
        """Positions in fractional coordinates of the cell (not wrapped)."""
        return np.linalg.solve(self.cell.T, self.positions.T).T

    @property
    def formula(self) -> str:
        """Chemical formula of the cell, elements in order of first appearance."""
        counts = self.element_counts()
        return "".join(f"{el}{'' if c == 1 else c}" for el, c in counts.items())

    def element_counts(self) -> dict:
        """``{element: sites}`` in order of first appearance."""
        if self._element_counts is None:
            counts: dict[str, int] = {}
            for s in self.symbols:
                counts[s] = counts.get(s, 0) + 1
            self._element_counts = counts
        return dict(self._element_counts)

    @property
    def formula_units(self) -> int:
        """Number of formula units of the reduced composition in the cell."""
        return math.gcd(*self.element_counts().values())

    @property
    def reduced_formula(self) -> str:
        z = self.formula_units
        return "".join(f"{el}{'' if c // z == 1 else c // z}" for el, c in self.element_counts().items())

    def species_of(self, i) -> tuple:
        """``((element, occupancy), ...)`` of site ``i``."""
        if self.species is None:
            return ((self.symbols[i], float(self.occupancies[i])),)
        return self.species[i]

    def states_of(self, i) -> tuple:
        """The oxidation state of each species of site ``i`` (None where not known)."""
        if self.species_states is None:
            return (None,) * len(self.species_of(i))
        return self.species_states[i]

    def species_label(self, i) -> str:
        """The element of a fully occupied site, else all its rows (with their states where one element
        comes in several), e.g. ``"Fe0.5Ti0.5"``, ``"O0.8"``, ``"Mn3+0.7Mn4+0.3"``, ``"Fe2+0.85Fe3+0.1"``."""
        if self.species is None:       # every site plain: its element
            return self.symbols[i]
        parts = self.species_of(i)
        if len(parts) == 1 and parts[0][1] >= 1 - 1e-6:
            return parts[0][0]
        states = self.states_of(i)
        if len({el for el, _ in parts}) < len(parts):     # one element in several states: name them
            return "".join(f"{ion_text(el, st)}{occ:g}" for (el, occ), st in zip(parts, states))
        return "".join(f"{el}{occ:g}" for el, occ in parts)

    def is_averaged(self, i) -> bool:
        """True for a mixed or vacancy-bearing site (its charge is an occupancy average)."""
        parts = self.species_of(i)
        return len(parts) > 1 or parts[0][1] < 1 - 1e-6

    @property
    def averaged_sites(self) -> tuple:
        """Indices of the mixed or vacancy-bearing sites."""
        return tuple(i for i in range(len(self)) if self.is_averaged(i))

    def replace(self, **changes) -> "Crystal":
        """A copy with some fields changed (cell, positions, charges, symbols, labels, occupancies, species)."""
        fields = dict(cell=self.cell, positions=self.positions, charges=self.charges,
                      symbols=self.symbols, labels=self.labels, occupancies=self.occupancies,
                      species=self.species, species_states=self.species_states)
        if "symbols" in changes and "species" not in changes and self.species is not None:
            # a plain site follows its new symbol; a mixed site keeps its mixture
            fields["species"] = [((str(new), parts[0][1]),) if len(parts) == 1 else parts
                                 for new, parts in zip(changes["symbols"], self.species)]
        if "species_states" not in changes and ("species" in changes or "symbols" in changes):
            fields["species_states"] = None     # new species: the old states do not apply
        fields.update(changes)
        return Crystal(**fields, source=self.source, min_distance=self.min_distance, info=self.info)

    def with_charges(self, charges) -> "Crystal":
        """A copy with new charges (array or map by element / label)."""
        return self.replace(charges=charges)

    def repeat(self, repeats) -> "Crystal":
        """An n1 x n2 x n3 supercell."""
        reps = np.broadcast_to(np.asarray(repeats, dtype=int), (3,))
        if np.any(reps < 1):
            raise InputError(f"{_where(self.source)}supercell repeats must be positive, got {reps.tolist()}")
        shifts = np.array([(i, j, k) for i in range(reps[0]) for j in range(reps[1]) for k in range(reps[2])],
                          dtype=float) @ self.cell
        n_copies = len(shifts)
        positions = (self.positions[None, :, :] + shifts[:, None, :]).reshape(-1, 3)
        tile = lambda seq: [x for _ in range(n_copies) for x in seq]  # noqa: E731
        return Crystal(self.cell * reps[:, None], positions, np.tile(self.charges, n_copies),
                       tile(self.symbols), tile(self.labels), np.tile(self.occupancies, n_copies),
                       source=self.source, min_distance=self.min_distance, info=self.info,
                       species=None if self.species is None else tile(self.species),
                       species_states=None if self.species_states is None else tile(self.species_states))

    def in_basis(self, change) -> "Crystal":
        """The same crystal written with other lattice vectors: rows ``change @ cell``.

        ``change`` must be a 3x3 integer matrix of determinant ±1 (a unimodular change of basis,
        so the lattice and every result stay the same); atoms, charges and labels are unchanged.
        """
        try:
            matrix = np.array(change, dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"a change of basis must be a 3x3 matrix of whole numbers, got {change!r}") from None
        if matrix.shape != (3, 3) or not np.all(np.isfinite(matrix)) or np.any(matrix != np.round(matrix)):
            raise InputError(f"a change of basis must be a 3x3 matrix of whole numbers, got {change!r}")
        if round(abs(float(np.linalg.det(matrix)))) != 1:
            raise InputError(f"a change of basis must have determinant +1 or -1 (the same lattice), got "
                             f"{float(np.linalg.det(matrix)):g}")
        return self.replace(cell=matrix @ self.cell)

    def to_ase(self):
        """An ``ase.Atoms`` with the charges as initial charges and labels in ``arrays['labels']``."""
        from ase import Atoms

        symbols = [s if s != "X" else "X" for s in self.symbols]
        atoms = Atoms(symbols=symbols, positions=self.positions, cell=self.cell, pbc=True)
        atoms.set_initial_charges(np.array(self.charges))
        atoms.arrays["labels"] = np.array(self.labels, dtype=object).astype(str)
        return atoms

    # ------------------------------------------------------------- geometry
    @property
    def reduced(self):
        """The reduced basis of the lattice with its inverse, volume and plane spacings
        (:class:`madelung.structure.lattice.ReducedCell`), worked out once."""
        return self._reduced

    @property
    def shortest_distance(self) -> float:
        """Shortest interionic distance, periodic images included, Å (found once, when the crystal
        was checked)."""
        return self._shortest

    def nearest_distances(self):
        """Shortest distance from every ion to any other ion (images included) and to any ion of
        opposite charge sign (``inf`` where there is none). Returns ``(to_any, to_opposite, partner)``."""
        from ..sums.geometry import nearest_neighbour_distances

        return nearest_neighbour_distances(self.cell, self.positions, self.charges, reduced=self._reduced)

    def _check_overlaps(self):
        from ..sums.geometry import closest_pair_within, shortest_distance

        limit = max(self.min_distance, COINCIDENT_DISTANCE)   # coincident ions: always refused
        # one pass for the shortest distance (kept: the plan of every sum needs it); the pair is
        # looked for only when it is too short, to be named
        self._reduced = reduced_cell(self.cell)
        self._shortest = shortest_distance(self.cell, self.positions)
        if self._shortest >= limit:
            return
        pair = closest_pair_within(self.cell, self.positions, limit)
        if pair is not None:
            i, j, d = pair
            raise InputError(f"{_where(self.source)}sites {self.labels[i]} (#{i}) and {self.labels[j]} (#{j}) "
                             f"are {d:.3f} Å apart, closer than the {limit:g} Å allowed "
                             "(duplicate atoms? set min_distance to change the limit)")

    # --------------------------------------------------------- constructors
    @classmethod
    def from_ase(cls, atoms, charges=None, *, source=None, max_atoms=None, **options) -> "Crystal":
        """Build from an ``ase.Atoms`` through the one loader (:func:`madelung.io.read.load`).

        ``charges``: None or ``"file"`` (ASE initial charges), ``"auto"`` (assigned oxidation
        states), ``"equilibrate"``, an array, or a map by element or site label. ``source`` names
        the structure in messages; ``labels`` replaces the site labels; ``max_atoms`` sets a size
        limit (default none); the other
        options (``min_distance``, ``occupancy``, ``symmetry_tolerance``, ``allow_net_charge``, ...) are those
        of :func:`madelung.io.read.load`.
        """
        return _loader("ase")(cls, atoms, charges, source=source, max_atoms=max_atoms, **options)

    @classmethod
    def from_file(cls, path, charges=None, **options) -> "Crystal":
        """Read any structure file ASE reads (CIF, POSCAR, extended XYZ, ...) through the one loader
        (:func:`madelung.io.read.load`; options ``block``, ``format``, ``min_distance``, ``occupancy``,
        ``max_atoms``, ``symmetry_tolerance``, ``allow_net_charge``, ... as there).

        CIF rows that share a position form one site, whatever their elements or oxidation states;
        its charge is the occupancy-weighted sum of the rows' charges.
        """
        return _loader("file")(cls, path, charges, **options)


#: The loader behind :meth:`Crystal.from_file` and :meth:`Crystal.from_ase`. It lives in the io
#: layer (:mod:`madelung.io.read`), which imports this module and registers itself on import, so
#: the import arrow points one way only.
_LOADER = {}


def _loader(kind):
    """The registered loader; if the io layer was not imported yet, the package's public
    ``madelung.load`` is resolved, which imports and registers it (the package root loads its
    public names on first use and is always imported before this module)."""
    if kind not in _LOADER:
        getattr(sys.modules[__name__.split(".")[0]], "load")
    return _LOADER[kind]


def use_loader(from_file, from_ase):
    """Register the functions behind :meth:`Crystal.from_file` and :meth:`Crystal.from_ase`."""
    _LOADER["file"] = from_file
    _LOADER["ase"] = from_ase


def check_size(n_atoms, max_atoms, source=None):
    """Refuse a structure with more than ``max_atoms`` sites (before it can exhaust memory);
    ``None`` sets no limit."""
    if max_atoms is None:
        return
    try:
        limit = int(max_atoms)
    except (TypeError, ValueError):
        raise InputError(f"the atom limit must be a whole number, got {max_atoms!r}") from None
    if limit < 1:
        raise InputError(f"the atom limit must be positive, got {limit}")
    if n_atoms > limit:
        raise InputError(f"{_where(source)}the structure has {n_atoms} sites, more than the limit of {limit} "
                         "(raise it with --max-atoms / max_atoms= if you mean it)")


def _resolve_species(species, symbols, occupancies, labels, where):
    """Validate per-site ``(element, occupancy)`` mixtures; None when every site is plain."""
    if species is None:
        if np.all(occupancies >= 1 - 1e-6):
            return None
        species = [((symbol, occ),) for symbol, occ in zip(symbols, occupancies)]
    species = list(species)
    if len(species) != len(symbols):
        raise InputError(f"{where}{len(species)} species entries given for {len(symbols)} sites")
    result = []
    for i, parts in enumerate(species):
        try:
            parts = tuple((str(el), float(occ)) for el, occ in parts)
        except (TypeError, ValueError):
            raise InputError(f"{where}site {labels[i]}: species must be (element, occupancy) pairs") from None
        if not parts:
            raise InputError(f"{where}site {labels[i]} has no species")
        total = sum(occ for _, occ in parts)
        if any(not math.isfinite(occ) or occ <= 0 for _, occ in parts) or total > 1 + 1e-6:
            raise InputError(f"{where}site {labels[i]} has occupancies {'+'.join(f'{o:g}' for _, o in parts)} "
                             f"= {total:g}; occupancies must be positive and add up to at most 1")
        if abs(total - occupancies[i]) > 1e-6:
            raise InputError(f"{where}site {labels[i]}: species occupancies add up to {total:g}, "
                             f"but the site occupancy is {occupancies[i]:g}")
        result.append(parts)
    if all(len(parts) == 1 and parts[0][0] == symbol and parts[0][1] >= 1 - 1e-6
           for parts, symbol in zip(result, symbols)):
        return None  # every site plain: nothing to remember
    return tuple(result)


def ion_text(element, state):
    """``Mn3+``, ``O2-``, ``Cl-``, ``Fe2.5+``; the bare element when the state is unknown."""
    if state is None:
        return element
    magnitude = abs(float(state))
    return f"{element}{'' if magnitude == 1 else f'{magnitude:g}'}{'+' if state > 0 else '-'}"


def _resolve_states(states, symbols, species, labels, where):
    """Validate per-site species states; None when no state is known anywhere."""
    if states is None:
        return None
    states = list(states)
    if len(states) != len(symbols):
        raise InputError(f"{where}{len(states)} state entries given for {len(symbols)} sites")
    result = []
    for i, entry in enumerate(states):
        count = 1 if species is None else len(species[i])
        entry = (None,) * count if entry is None else tuple(entry)
        if len(entry) != count:
            raise InputError(f"{where}site {labels[i]}: {len(entry)} states given for {count} species")
        result.append(tuple(None if v is None or not math.isfinite(v) else float(v) for v in entry))
    if all(v is None for entry in result for v in entry):
        return None
    return tuple(result)


def _resolve_charges(charges, symbols, labels, where, species=None):
    """Turn an array or a map by element / site label into one charge per site.

    A map gives the charge of each ion; a partly occupied or mixed site gets the occupancy-
    weighted sum over its species (the virtual-crystal average). An array is taken as the site
    charges themselves.
    """
    n = len(symbols)
    if charges is None:
        raise InputError(f"{where}no charges given")
    if isinstance(charges, str):
        raise InputError(f"{where}charges {charges!r} not understood; give numbers, a map by element or label, "
                         f"or one of {', '.join(CHARGE_SOURCES)}")
    if isinstance(charges, Mapping):
        by_key = {}
        for key, value in charges.items():
            try:
                by_key[str(key)] = float(value)
            except (TypeError, ValueError):
                raise InputError(f"{where}charge {value!r} for {key} is not a number") from None
            if not np.isfinite(by_key[str(key)]):
                raise InputError(f"{where}charge for {key} is not finite")
            if abs(by_key[str(key)]) > MAX_CHARGE:
                raise InputError(f"{where}charge {by_key[str(key)]:g} for {key} is above {MAX_CHARGE:g} e in size")
        elements = set(symbols) | {el for parts in (species or ()) for el, _ in parts}
        known = elements | set(labels)
        unknown = sorted(set(by_key) - known)
        if unknown:
            raise InputError(f"{where}charge given for {unknown[0]}, which is neither an element nor a site "
                             f"label of this structure (elements: {', '.join(sorted(elements))})")
        result = np.empty(n)
        for i, (symbol, label) in enumerate(zip(symbols, labels)):
            parts = species[i] if species is not None else ((symbol, 1.0),)
            if label in by_key:          # a site label is more specific than an element
                result[i] = by_key[label] * sum(occ for _, occ in parts)
                continue
            total = 0.0
            for element, occ in parts:
                if element not in by_key:
                    raise InputError(f"{where}site {label} ({element}) has no charge; "
                                     f"add --charge {element}=VALUE")
                total += occ * by_key[element]
            result[i] = total
        return result
    try:
        result = np.array(charges, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where}charges must be numbers ({exc})") from None
    if result.shape != (n,):
        raise InputError(f"{where}{result.size} charges given for {n} sites")
    bad = np.flatnonzero(~np.isfinite(result))
    if len(bad):
        raise InputError(f"{where}site {labels[bad[0]]} has a non-finite charge")
    bad = np.flatnonzero(np.abs(result) > MAX_CHARGE)
    if len(bad):
        raise InputError(f"{where}site {labels[bad[0]]} has charge {result[bad[0]]:g}, above {MAX_CHARGE:g} e in size")
    return result
