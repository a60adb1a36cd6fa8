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

import os
import re
import warnings
from typing import Mapping, Sequence

import numpy as np

from .errors import InputError, MadelungWarning

#: Ions closer than this (Å) are refused as overlapping unless told otherwise.
DEFAULT_MIN_DISTANCE = 0.5

_TYPED_SYMBOL = re.compile(r"^([A-Z][a-z]?)(\d*(?:\.\d+)?)([+-])$")


def _where(source):
    return f"{source}: " if source else ""


def parse_typed_symbol(text):
    """Split a CIF type symbol such as ``Fe3+``, ``O2-`` or ``Cl-`` into (element, charge).

    Returns ``(element, None)`` when the symbol carries no charge (``Fe``, ``Fe1``).
    """
    text = str(text).strip()
    match = _TYPED_SYMBOL.match(text)
    if match:
        element, magnitude, sign = match.groups()
        value = float(magnitude) if magnitude else 1.0
        return element, (value if sign == "+" else -value)
    element = re.match(r"^([A-Z][a-z]?)", text)
    return (element.group(1) if element else text), None


def _default_labels(symbols):
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
        Site occupancies in (0, 1] (default 1).
    source : str, optional
        Where the structure came from; named in error messages.
    min_distance : float, optional
        Refuse ions closer than this, Å (default 0.5). Use 0 to switch the check off.
    info : mapping, optional
        Free-form metadata carried along (e.g. CIF tags).
    """

    def __init__(self, cell, positions, charges, symbols=None, labels=None, occupancies=None,
                 *, source=None, min_distance=DEFAULT_MIN_DISTANCE, info=None):
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

        if symbols is None:
            symbols = ["X"] * n
        symbols = [str(s) for s in symbols]
        if len(symbols) != n:
            raise InputError(f"{where}{len(symbols)} symbols given for {n} sites")
        if labels is None:
            labels = _default_labels(symbols)
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

        charges = _resolve_charges(charges, symbols, labels, where)

        self.cell = cell
        self.positions = positions
        self.charges = charges
        self.symbols = tuple(symbols)
        self.labels = tuple(labels)
        self.occupancies = occupancies
        self.info = dict(info or {})
        for array in (self.cell, self.positions, self.charges, self.occupancies):
            array.setflags(write=False)

        self.min_distance = float(min_distance)
        if self.min_distance > 0:
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
        return abs(float(np.linalg.det(self.cell)))

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
        counts: dict[str, int] = {}
        for s in self.symbols:
            counts[s] = counts.get(s, 0) + 1
        return counts

    @property
    def formula_units(self) -> int:
        """Number of formula units of the reduced composition in the cell."""
        return int(np.gcd.reduce(np.array(list(self.element_counts().values()), dtype=np.int64)))

    @property
    def reduced_formula(self) -> str:
        z = self.formula_units
        return "".join(f"{el}{'' if c // z == 1 else c // z}" for el, c in self.element_counts().items())

    def replace(self, **changes) -> "Crystal":
        """A copy with some fields changed (cell, positions, charges, symbols, labels, occupancies)."""
        fields = dict(cell=self.cell, positions=self.positions, charges=self.charges,
                      symbols=self.symbols, labels=self.labels, occupancies=self.occupancies)
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
                       source=self.source, min_distance=self.min_distance, info=self.info)

    def to_ase(self):
        """An ``ase.Atoms`` with the charges as initial charges and labels in ``arrays['labels']``."""
        from ase import Atoms

        symbols = [s if s != "X" else "X" for s in self.symbols]
        atoms = Atoms(symbols=symbols, positions=self.positions, cell=self.cell, pbc=True)
        atoms.set_initial_charges(np.array(self.charges))
        atoms.arrays["labels"] = np.array(self.labels, dtype=object).astype(str)
        return atoms

    # ------------------------------------------------------------- geometry
    def nearest_distances(self):
        """Shortest distance from every ion to any other ion (images included) and to any ion of
        opposite charge sign (``inf`` where there is none). Returns ``(to_any, to_opposite, partner)``."""
        from .geometry import nearest_neighbour_distances

        return nearest_neighbour_distances(self.cell, self.positions, self.charges)

    def _check_overlaps(self):
        from .geometry import closest_pair_within

        pair = closest_pair_within(self.cell, self.positions, self.min_distance)
        if pair is not None:
            i, j, d = pair
            raise InputError(f"{_where(self.source)}sites {self.labels[i]} (#{i}) and {self.labels[j]} (#{j}) "
                             f"are {d:.3f} Å apart, closer than the {self.min_distance:g} Å allowed "
                             "(duplicate atoms? set min_distance to change the limit)")

    # --------------------------------------------------------- constructors
    @classmethod
    def from_ase(cls, atoms, charges=None, *, labels=None, source=None, min_distance=DEFAULT_MIN_DISTANCE):
        """Build from an ``ase.Atoms``.

        ``charges=None`` takes the charges the structure carries: CIF oxidation states read by
        :meth:`from_file`, else ASE initial charges if any is non-zero. Otherwise give an array or
        a map by element or site label.
        """
        where = _where(source)
        if not all(atoms.pbc):
            raise InputError(f"{where}the structure is not periodic in all three directions "
                             f"(pbc={list(map(bool, atoms.pbc))}); a crystal needs a 3D cell")
        symbols = atoms.get_chemical_symbols()
        if labels is None and "labels" in atoms.arrays:
            labels = [str(x) for x in atoms.arrays["labels"]]
        occupancies = atoms.arrays.get("occupancies")
        if charges is None:
            charges = charges_in_structure(atoms)
            if charges is None:
                elements = list(dict.fromkeys(symbols))
                raise InputError(f"{where}no charges found in the structure; give them, e.g. "
                                 + " ".join(f"--charge {el}=Q" for el in elements))
            missing = [i for i in range(len(charges)) if not np.isfinite(charges[i])]
            if missing:
                names = list(dict.fromkeys(labels[i] if labels is not None else symbols[i] for i in missing))
                raise InputError(f"{where}the file gives no oxidation state for site "
                                 f"{', '.join(names)}; give it, e.g. --charge {names[0]}=Q")
        info = {k: v for k, v in atoms.info.items() if isinstance(v, (str, int, float))}
        return cls(np.array(atoms.cell), atoms.get_positions(), charges, symbols, labels, occupancies,
                   source=source, min_distance=min_distance, info=info)

    @classmethod
    def from_file(cls, path, charges=None, *, index=-1, format=None, min_distance=DEFAULT_MIN_DISTANCE):
        """Read any structure file ASE reads (CIF, POSCAR, extended XYZ, ...).

        CIF files keep their site labels (``_atom_site_label``), occupancies and oxidation states
        (``_atom_type_oxidation_number`` or typed symbols such as ``O2-``).
        """
        atoms = read_structure(path, index=index, format=format)
        return cls.from_ase(atoms, charges, source=str(path), min_distance=min_distance)


def charges_in_structure(atoms):
    """Charges an ``ase.Atoms`` carries: CIF oxidation states (NaN where a site has none), else ASE
    initial charges if any is non-zero, else None."""
    if "oxidation_states" in atoms.arrays:
        return np.array(atoms.arrays["oxidation_states"], dtype=float)
    initial = atoms.get_initial_charges()
    return np.array(initial, dtype=float) if np.any(initial != 0) else None


def read_structure(path, index=-1, format=None):
    """Read one structure with ASE and attach CIF labels, occupancies and oxidation states.

    Every failure becomes an :class:`InputError` naming the file.
    """
    import ase.io

    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a folder, not a structure file")
    is_cif = (format or "").lower() == "cif" or path.lower().endswith((".cif", ".mcif"))
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if is_cif:
                atoms = ase.io.read(path, index=index, format="cif", store_tags=True)
            else:
                atoms = ase.io.read(path, index=index, format=format)
    except InputError:
        raise
    except Exception as exc:  # ASE raises many kinds; all mean the file could not be read
        message = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: cannot read structure ({message[:200]})") from None
    if isinstance(atoms, list):
        if not atoms:
            raise InputError(f"{path}: contains no structure")
        atoms = atoms[-1]
    if len(atoms) == 0:
        raise InputError(f"{path}: contains no atoms")
    if atoms.cell.rank < 3:
        raise InputError(f"{path}: has no complete unit cell (cell rank {atoms.cell.rank})")
    if is_cif:
        _attach_cif_sites(atoms, path)
    return atoms


def _attach_cif_sites(atoms, path):
    """Labels, occupancies and oxidation states of the expanded CIF atoms, by asymmetric-unit site."""
    info = atoms.info
    kinds = atoms.arrays.get("spacegroup_kinds")
    site_labels = info.get("_atom_site_label")
    if kinds is None or site_labels is None:
        return
    if not isinstance(site_labels, list):
        site_labels = [site_labels]
    kinds = np.asarray(kinds, dtype=int)
    if kinds.max(initial=0) >= len(site_labels):
        return
    atoms.arrays["labels"] = np.array([str(site_labels[k]) for k in kinds], dtype=object).astype(str)

    occupancy = info.get("occupancy")
    if isinstance(occupancy, dict):
        occ = np.ones(len(atoms))
        for i, (kind, symbol) in enumerate(zip(kinds, atoms.get_chemical_symbols())):
            entry = occupancy.get(str(kind), {})
            occ[i] = float(entry.get(symbol, 1.0)) if isinstance(entry, dict) else 1.0
        atoms.arrays["occupancies"] = occ

    type_symbols = info.get("_atom_site_type_symbol")
    if type_symbols is None:
        return
    if not isinstance(type_symbols, list):
        type_symbols = [type_symbols]
    table = {}
    type_names = info.get("_atom_type_symbol")
    numbers = info.get("_atom_type_oxidation_number")
    if type_names is not None and numbers is not None:
        type_names = type_names if isinstance(type_names, list) else [type_names]
        numbers = numbers if isinstance(numbers, list) else [numbers]
        for name, number in zip(type_names, numbers):
            try:
                table[str(name)] = float(number)
            except (TypeError, ValueError):
                raise InputError(f"{path}: oxidation number {number!r} of type {name} is not a number") from None
    site_charges = []
    for name in type_symbols:
        value = table.get(str(name))
        if value is None:
            value = parse_typed_symbol(name)[1]
        site_charges.append(value)
    if any(v is not None for v in site_charges) and len(site_charges) == len(site_labels):
        # NaN marks a site the file gives no oxidation state for
        values = [np.nan if v is None else v for v in site_charges]
        atoms.arrays["oxidation_states"] = np.array([values[k] for k in kinds], dtype=float)


def _resolve_charges(charges, symbols, labels, where):
    """Turn an array or a map by element / site label into one charge per site."""
    n = len(symbols)
    if charges is None:
        raise InputError(f"{where}no charges given")
    if isinstance(charges, str):
        raise InputError(f"{where}charges {charges!r} not understood; give numbers or a map by element or label")
    if isinstance(charges, Mapping):
        by_key = {}
        for key, value in charges.items():
            try:
                by_key[str(key)] = float(value)
            except (TypeError, ValueError):
                raise InputError(f"{where}charge {value!r} for {key} is not a number") from None
            if not np.isfinite(by_key[str(key)]):
                raise InputError(f"{where}charge for {key} is not finite")
        known = set(symbols) | set(labels)
        unknown = sorted(set(by_key) - known)
        if unknown:
            raise InputError(f"{where}charge given for {unknown[0]}, which is neither an element nor a site "
                             f"label of this structure (elements: {', '.join(sorted(set(symbols)))})")
        result = np.empty(n)
        for i, (symbol, label) in enumerate(zip(symbols, labels)):
            if label in by_key:          # a site label is more specific than an element
                result[i] = by_key[label]
            elif symbol in by_key:
                result[i] = by_key[symbol]
            else:
                raise InputError(f"{where}site {label} ({symbol}) has no charge; "
                                 f"add --charge {symbol}=VALUE")
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
    return result


def parse_charge_rules(rules: Sequence[str] | None) -> dict:
    """Parse command-line rules such as ``Na=+1`` or ``O1=-2`` into a map."""
    result = {}
    for rule in rules or []:
        key, sep, value = str(rule).partition("=")
        key = key.strip()
        if not sep or not key:
            raise InputError(f"charge rule {rule!r} must look like ELEMENT=CHARGE or LABEL=CHARGE, e.g. Na=+1")
        try:
            result[key] = float(value)
        except ValueError:
            raise InputError(f"charge rule {rule!r}: {value!r} is not a number") from None
    return result


def warn(message):
    warnings.warn(message, MadelungWarning, stacklevel=3)
