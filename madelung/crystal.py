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

from .bounds import COINCIDENT_DISTANCE, check_cell, check_charges, precheck_file
from .errors import InputError, MadelungWarning

#: Ions closer than this (Å) are refused as overlapping unless told otherwise.
DEFAULT_MIN_DISTANCE = 0.5

#: Structure files with more sites than this are refused before any sum is attempted (memory and
#: time grow with the number of sites); raise it with ``max_atoms=`` or ``--max-atoms``. The
#: engines handle a million ions; crystals built in Python from arrays or ``ase.Atoms`` have no
#: limit unless one is given.
DEFAULT_MAX_ATOMS = 2_000_000

#: Ways of getting charges named by a string: from the structure file, assigned oxidation
#: states (:mod:`madelung.charges.oxidation`), or charge equilibration (:mod:`madelung.charges.equilibrate`).
CHARGE_SOURCES = ("file", "auto", "equilibrate")

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
        Site occupancies in (0, 1] (default 1): for a mixed site, the total of its species.
    species : sequence, optional
        For partly occupied or mixed sites: per site a sequence of ``(element, occupancy)``
        pairs (e.g. ``(("Fe", 0.5), ("Ti", 0.5))``). A site is then one point charge carrying
        the occupancy-weighted mean charge of its species (the virtual-crystal average).
        Default: every site holds its symbol with its occupancy.
    source : str, optional
        Where the structure came from; named in error messages.
    min_distance : float, optional
        Refuse ions closer than this, Å (default 0.5). Use 0 to switch the check off.
    info : mapping, optional
        Free-form metadata carried along (e.g. CIF tags).
    """

    def __init__(self, cell, positions, charges, symbols=None, labels=None, occupancies=None,
                 *, source=None, min_distance=DEFAULT_MIN_DISTANCE, info=None, species=None):
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

        species = _resolve_species(species, symbols, occupancies, labels, where)
        charges = _resolve_charges(charges, symbols, labels, where, species)
        check_charges(charges, labels, self.source)

        self.cell = cell
        self.positions = positions
        self.charges = charges
        self.symbols = tuple(symbols)
        self.labels = tuple(labels)
        self.occupancies = occupancies
        self.species = species
        self.info = dict(info or {})
        for array in (self.cell, self.positions, self.charges, self.occupancies):
            array.setflags(write=False)

        self.min_distance = float(min_distance)
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

    def species_of(self, i) -> tuple:
        """``((element, occupancy), ...)`` of site ``i``."""
        if self.species is None:
            return ((self.symbols[i], float(self.occupancies[i])),)
        return self.species[i]

    def species_label(self, i) -> str:
        """The element of a fully occupied site, else its mixture, e.g. ``"Fe0.5Ti0.5"`` or ``"O0.8"``."""
        parts = self.species_of(i)
        if len(parts) == 1 and parts[0][1] >= 1 - 1e-6:
            return parts[0][0]
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
                      species=self.species)
        if "symbols" in changes and "species" not in changes and self.species is not None:
            # a plain site follows its new symbol; a mixed site keeps its mixture
            fields["species"] = [((str(new), parts[0][1]),) if len(parts) == 1 else parts
                                 for new, parts in zip(changes["symbols"], self.species)]
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
                       species=None if self.species is None else tile(self.species))

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
    def nearest_distances(self):
        """Shortest distance from every ion to any other ion (images included) and to any ion of
        opposite charge sign (``inf`` where there is none). Returns ``(to_any, to_opposite, partner)``."""
        from .geometry import nearest_neighbour_distances

        return nearest_neighbour_distances(self.cell, self.positions, self.charges)

    def _check_overlaps(self):
        from .geometry import closest_pair_within

        limit = max(self.min_distance, COINCIDENT_DISTANCE)   # coincident ions: always refused
        pair = closest_pair_within(self.cell, self.positions, limit)
        if pair is not None:
            i, j, d = pair
            raise InputError(f"{_where(self.source)}sites {self.labels[i]} (#{i}) and {self.labels[j]} (#{j}) "
                             f"are {d:.3f} Å apart, closer than the {limit:g} Å allowed "
                             "(duplicate atoms? set min_distance to change the limit)")

    # --------------------------------------------------------- constructors
    @classmethod
    def from_ase(cls, atoms, charges=None, *, labels=None, source=None, min_distance=DEFAULT_MIN_DISTANCE,
                 occupancy="average", max_atoms=None, **charge_options):
        """Build from an ``ase.Atoms``.

        Parameters
        ----------
        atoms : ase.Atoms
        charges : None, "file", "auto", "equilibrate", array or mapping
            ``None`` or ``"file"`` takes the charges the structure carries: CIF oxidation states
            read by :meth:`from_file`, else ASE initial charges if any is non-zero.
            ``"auto"`` assigns oxidation states (:func:`madelung.charges.assign_oxidation_states`;
            states given in the file are kept). ``"equilibrate"`` computes partial charges by
            charge equilibration (:func:`madelung.charges.equilibrate`). Otherwise give an array
            or a map by element or site label.
        occupancy : "average" or "error"
            What to do with mixed or partly occupied sites: give them the occupancy-weighted mean
            charge with a warning (the virtual-crystal average), or refuse the structure.
        max_atoms : int, optional
            Refuse structures with more sites than this (default: no limit; files read with
            :meth:`from_file` default to :data:`DEFAULT_MAX_ATOMS`).
        **charge_options
            Passed on to the charge assignment or equilibration (e.g. ``symprec``).
        """
        where = _where(source)
        if not all(atoms.pbc):
            raise InputError(f"{where}the structure is not periodic in all three directions "
                             f"(pbc={list(map(bool, atoms.pbc))}); a crystal needs a 3D cell")
        check_size(len(atoms), max_atoms, source)
        if occupancy not in ("average", "error"):
            raise InputError(f"occupancy must be 'average' or 'error', got {occupancy!r}")
        symbols = atoms.get_chemical_symbols()
        if labels is None and "labels" in atoms.arrays:
            labels = [str(x) for x in atoms.arrays["labels"]]
        occupancies = atoms.arrays.get("occupancies")
        entries = atoms.arrays.get("site_species")
        species = None if entries is None else [tuple((el, occ) for el, occ, _ in e) for e in entries]
        info = {k: v for k, v in atoms.info.items() if isinstance(v, (str, int, float))}
        method = charges if isinstance(charges, str) else None
        if method is not None and method not in CHARGE_SOURCES:
            raise InputError(f"{where}charges {charges!r} not understood; use one of {', '.join(CHARGE_SOURCES)}, "
                             "numbers, or a map by element or label")
        if method in ("auto", "equilibrate"):
            base = cls(np.array(atoms.cell), atoms.get_positions(), np.zeros(len(atoms)), symbols, labels,
                       occupancies, source=source, min_distance=min_distance, info=info, species=species)
            _check_averaged(base, occupancy)
            from .charges import charges_for

            return base.with_charges(charges_for(base, method, known_states=file_states(atoms), **charge_options))
        if charges is None or method == "file":
            charges = charges_in_structure(atoms)
            if charges is None:
                elements = list(dict.fromkeys(symbols))
                raise InputError(f"{where}no charges found in the structure; give them, e.g. "
                                 + " ".join(f"--charge {el}=Q" for el in elements)
                                 + ", or let madelung assign them (--charges-from auto)")
            missing = [i for i in range(len(charges)) if not np.isfinite(charges[i])]
            if missing:
                names = list(dict.fromkeys(labels[i] if labels is not None else symbols[i] for i in missing))
                raise InputError(f"{where}the file gives no oxidation state for site "
                                 f"{', '.join(names)}; give it, e.g. --charge {names[0]}=Q, "
                                 "or let madelung assign it (--charges-from auto)")
        crystal = cls(np.array(atoms.cell), atoms.get_positions(), charges, symbols, labels, occupancies,
                      source=source, min_distance=min_distance, info=info, species=species)
        _check_averaged(crystal, occupancy)
        return crystal

    @classmethod
    def from_file(cls, path, charges=None, *, index=-1, format=None, min_distance=DEFAULT_MIN_DISTANCE,
                  occupancy="average", max_atoms=DEFAULT_MAX_ATOMS, **charge_options):
        """Read any structure file ASE reads (CIF, POSCAR, extended XYZ, ...).

        CIF files keep their site labels (``_atom_site_label``), occupancies and oxidation states
        (``_atom_type_oxidation_number`` or typed symbols such as ``O2-``). Mixed sites (several
        species on one position) become one site with their mixture; see :meth:`from_ase` for
        ``charges``, ``occupancy`` and ``max_atoms``.
        """
        atoms = read_structure(path, index=index, format=format, max_atoms=max_atoms)
        return cls.from_ase(atoms, charges, source=str(path), min_distance=min_distance, occupancy=occupancy,
                            max_atoms=max_atoms, **charge_options)


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


def _check_averaged(crystal, policy):
    """Refuse, or warn about, sites whose charge is an occupancy average."""
    averaged = crystal.averaged_sites
    if not averaged:
        return
    seen = []
    for i in averaged:
        entry = f"{crystal.labels[i]} ({crystal.species_label(i)})"
        if entry not in seen:
            seen.append(entry)
    shown = ", ".join(seen[:4]) + (f" and {len(seen) - 4} more" if len(seen) > 4 else "")
    if policy == "error":
        raise InputError(f"{_where(crystal.source)}mixed or partly occupied sites: {shown}; refused "
                         "(occupancy policy 'error'; use 'average' for occupancy-weighted mean charges)")
    warn(f"{_where(crystal.source)}mixed or partly occupied sites {shown} carry occupancy-weighted mean charges "
         "(virtual-crystal average): one averaged point charge per site, not the real ions")


def file_states(atoms):
    """Per site, the oxidation state the file gives to each species (None where it gives none)."""
    entries = atoms.arrays.get("site_species")
    if entries is not None:
        return [tuple(state for _, _, state in e) for e in entries]
    if "oxidation_states" in atoms.arrays:
        return [(float(q),) for q in atoms.arrays["oxidation_states"]]
    return [(None,) for _ in range(len(atoms))]


def charges_in_structure(atoms):
    """Charges an ``ase.Atoms`` carries: CIF oxidation states (NaN where a site has none), else ASE
    initial charges if any is non-zero, else None."""
    if "oxidation_states" in atoms.arrays:
        return np.array(atoms.arrays["oxidation_states"], dtype=float)
    initial = atoms.get_initial_charges()
    return np.array(initial, dtype=float) if np.any(initial != 0) else None


def read_structure(path, index=-1, format=None, max_atoms=DEFAULT_MAX_ATOMS):
    """Read one structure with ASE and attach CIF labels, occupancies, mixtures and oxidation states.

    Every failure becomes an :class:`InputError` naming the file.
    """
    import ase.io

    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a folder, not a structure file")
    precheck_file(path, format, max_atoms)
    is_cif = (format or "").lower() == "cif" or path.lower().endswith((".cif", ".mcif"))
    if is_cif:
        _precheck_cif(path, max_atoms)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            if is_cif:
                atoms = ase.io.read(path, index=index, format="cif", store_tags=True)
            else:
                atoms = ase.io.read(path, index=index, format=format)
    except InputError:
        raise
    except StopIteration:
        raise InputError(f"{path}: cannot read structure (no complete data block with atoms found)") from None
    except KeyError as exc:  # ASE's symbol lookup
        name = str(exc.args[0]) if exc.args else "?"
        raise InputError(f"{path}: unknown element symbol {name!r}") from None
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
    positions = atoms.get_positions()
    if not np.all(np.isfinite(positions)) or not np.all(np.isfinite(np.array(atoms.cell))):
        raise InputError(f"{path}: the structure contains a non-finite coordinate or cell length")
    check_size(len(atoms), max_atoms, path)
    if is_cif:
        try:
            _attach_cif_sites(atoms, path)
        except InputError:
            raise
        except (ValueError, TypeError, KeyError, IndexError, AttributeError) as exc:
            message = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(f"{path}: malformed atom-site table ({message[:160]})") from None
    return atoms


_NUMBER = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?(\(\d+\))?$")


def _precheck_cif(path, max_atoms):
    """Cheap checks ASE does not make before it expands a CIF: a cell, finite numbers, and a
    bound on the expanded size (sites x symmetry operations) so a huge cell fails fast."""
    try:
        with open(path, "r", encoding="utf-8", errors="replace") as handle:
            text = handle.read()
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None
    if "data_" not in text:
        raise InputError(f"{path}: not a CIF (no data_ block)")
    for tag in ("_cell_length_a", "_cell_length_b", "_cell_length_c"):
        match = re.search(rf"^\s*{tag}\s+(\S+)", text, flags=re.MULTILINE | re.IGNORECASE)
        if match is None:
            raise InputError(f"{path}: no unit cell ({tag} missing)")
        value = match.group(1)
        if not _NUMBER.match(value) or not np.isfinite(float(value.split("(")[0])) or float(value.split("(")[0]) <= 0:
            raise InputError(f"{path}: {tag} is {value!r}, not a positive number")
    if re.search(r"(?<![A-Za-z])(nan|inf)(?![A-Za-z])", text, flags=re.IGNORECASE):
        raise InputError(f"{path}: contains a NaN or infinite number")


def _attach_cif_sites(atoms, path):
    """Labels, occupancies, mixtures and oxidation states of the expanded CIF atoms.

    ASE keeps one atom per position: several asymmetric-unit sites on one position (a mixed
    site, or a line written twice) become one atom whose ``occupancy`` entry lists every
    species. We keep that as one site with its mixture; a species named twice on one position
    is a duplicate and is merged with a warning.
    """
    info = atoms.info
    kinds = atoms.arrays.get("spacegroup_kinds")
    site_labels = _as_list(info.get("_atom_site_label"))
    if kinds is None or site_labels is None:
        return
    kinds = np.asarray(kinds, dtype=int)
    if kinds.max(initial=0) >= len(site_labels):
        return
    type_symbols = _as_list(info.get("_atom_site_type_symbol"))
    if type_symbols is None or len(type_symbols) != len(site_labels):
        type_symbols = None
    occupancy = info.get("occupancy") if isinstance(info.get("occupancy"), dict) else {}
    raw_occ = _as_list(info.get("_atom_site_occupancy"))
    if raw_occ is not None:
        for label, value in zip(site_labels, raw_occ):
            try:
                number = float(value)
            except (TypeError, ValueError):
                continue  # "?" or "." mean unknown: ASE takes 1
            if not np.isfinite(number) or number <= 0 or number > 1 + 1e-6:
                raise InputError(f"{path}: site {label} has occupancy {value}; occupancies must lie in (0, 1]")

    table = {}
    type_names = _as_list(info.get("_atom_type_symbol"))
    numbers = _as_list(info.get("_atom_type_oxidation_number"))
    if type_names is not None and numbers is not None:
        for name, number in zip(type_names, numbers):
            try:
                table[str(name)] = float(number)
            except (TypeError, ValueError):
                raise InputError(f"{path}: oxidation number {number!r} of type {name} is not a number") from None

    def element_of(k):
        return parse_typed_symbol(type_symbols[k])[0] if type_symbols is not None else None

    def state_of(k):
        if type_symbols is None:
            return None
        name = str(type_symbols[k])
        value = table.get(name)
        return value if value is not None else parse_typed_symbol(name)[1]

    present = set(int(k) for k in kinds)
    mixtures = {}
    for kind in sorted(present):
        entry = occupancy.get(str(kind), {})
        if not isinstance(entry, dict) or not entry:
            entry = {element_of(kind) or atoms.get_chemical_symbols()[int(np.flatnonzero(kinds == kind)[0])]: 1.0}
        # which asymmetric-unit sites went into this position: this kind, and absent kinds with
        # the same mixture (ASE drops the later lines of a mixed position)
        members = [kind] + [k for k in range(len(site_labels)) if k not in present
                            and occupancy.get(str(k)) == entry and k != kind]
        parts = []
        used = set()
        for element, occ in entry.items():
            source = next((k for k in members if k not in used and element_of(k) == element), None)
            if source is None:
                source = next((k for k in members if element_of(k) == element), kind)
            used.add(source)
            parts.append((str(element), float(occ), state_of(source), str(site_labels[source])))
        total = sum(p[1] for p in parts)
        if total > 1 + 1e-6:
            names = "+".join(f"{p[0]}{p[1]:g}" for p in parts)
            raise InputError(f"{path}: site {'/'.join(p[3] for p in parts)} holds {names}, total occupancy "
                             f"{total:g} above 1")
        duplicates = [k for k in range(len(site_labels)) if k not in present and k not in used
                      and occupancy.get(str(k)) == entry and element_of(k) in entry]
        for k in duplicates:
            warn(f"{path}: site {site_labels[k]} lies on site {site_labels[kind]} with the same species; "
                 "merged as a duplicate")
            used.add(k)
        mixtures[kind] = tuple(parts)
    entries = np.empty(len(atoms), dtype=object)
    labels = []
    for i, kind in enumerate(kinds):
        parts = mixtures[int(kind)]
        entries[i] = tuple((el, occ, state) for el, occ, state, _ in parts)
        labels.append("/".join(dict.fromkeys(label for *_, label in parts)))
    atoms.arrays["labels"] = np.array(labels, dtype=object).astype(str)
    atoms.arrays["occupancies"] = np.array([sum(p[1] for p in e) for e in entries], dtype=float)
    atoms.arrays["site_species"] = entries
    if any(state is not None for e in entries for _, _, state in e):
        # NaN marks a site the file gives no oxidation state for (for a mixed site: any of its species)
        atoms.arrays["oxidation_states"] = np.array(
            [np.nan if any(state is None for _, _, state in e) else sum(occ * state for _, occ, state in e)
             for e in entries], dtype=float)


def _as_list(value):
    if value is None:
        return None
    return value if isinstance(value, list) else [value]


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
        if any(not np.isfinite(occ) or occ <= 0 for _, occ in parts) or total > 1 + 1e-6:
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
    return result


def parse_key_values(rules: Sequence[str] | None, what="option", shape="KEY=VALUE", number=True) -> dict:
    """Parse command-line ``KEY=VALUE`` options into a map (values as floats unless ``number`` is
    False); a malformed one is an InputError naming it and the ``shape`` wanted."""
    result = {}
    for rule in rules or []:
        key, sep, value = str(rule).partition("=")
        key = key.strip()
        if not sep or not key:
            raise InputError(f"{what} {rule!r} must look like {shape}")
        if not number:
            result[key] = value.strip()
            continue
        try:
            result[key] = float(value)
        except ValueError:
            raise InputError(f"{what} {rule!r}: {value!r} is not a number") from None
    return result


def parse_charge_rules(rules: Sequence[str] | None) -> dict:
    """Parse command-line rules such as ``Na=+1`` or ``O1=-2`` into a map."""
    return parse_key_values(rules, "charge rule", "ELEMENT=CHARGE or LABEL=CHARGE, e.g. Na=+1")


def warn(message):
    warnings.warn(message, MadelungWarning, stacklevel=3)
