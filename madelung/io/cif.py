"""CIF details: data blocks, atom-site rows, symmetry expansion, occupancies and oxidation states.

Structure databases write a crystal as an asymmetric unit: one row per (site, species), with its
own type symbol (``Fe2+``, ``Cs+1``), occupancy and fractional position, plus the symmetry
operators (``_space_group_symop_operation_xyz`` or ``_symmetry_equiv_pos_as_xyz``) or a space
group name/number. This module expands the rows with the operators and gathers **every row that
lands on one position** (within :data:`SITE_TOLERANCE`) into one site, whatever their elements
or oxidation states: wüstite's Fe2+ 0.85 and Fe3+ 0.10 at 4a become one site holding both.

Only the tag parser of ASE is used (:func:`ase.io.cif.parse_cif`); rows, operators and sites are
read here so that nothing of a row is lost. Oxidation states come from ``_atom_type_oxidation_number``
(by type symbol) or from the type symbol itself.

References
----------
S. R. Hall, F. H. Allen and I. D. Brown, Acta Cryst. A47 (1991) 655 (the CIF format).
International Tables for Crystallography, Vol. A (symmetry operators, space groups).
"""

from __future__ import annotations

import functools
import io
import math
import os
import re
import sys
import warnings
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from ase.data import chemical_symbols

from ..structure.crystal import ion_text
from ..errors import InputError, MadelungWarning
from .cif_fast import fast_blocks

#: Rows (and symmetry images) closer than this, Å, are one site.
SITE_TOLERANCE = 0.05

#: Occupancies of one site may add up to this much above 1 (rounding in the file, e.g. 0.34 + 0.67);
#: such a site is scaled back to 1. Above it the file is refused.
OCCUPANCY_SLACK = 0.011

_TYPED = re.compile(r"^([A-Z][a-z]?)(?:(\d+(?:\.\d+)?)?([+-])|([+-])(\d+(?:\.\d+)?)?)$")
_ELEMENT = re.compile(r"^([A-Za-z]{1,2})")
_CHEMICAL_SYMBOLS = frozenset(chemical_symbols[1:])
_DATA_LINE = re.compile(r"^\s*data_", flags=re.MULTILINE | re.IGNORECASE)


@functools.lru_cache(maxsize=4096)   # the same few symbols and labels in every file of a batch
def element_of(text):
    """The element a CIF type symbol or site label names (``Fe3+`` -> Fe, ``O1`` -> O, ``CL2`` -> Cl),
    or None."""
    match = _ELEMENT.match(str(text).strip())
    if not match:
        return None
    letters = match.group(1)
    two = letters[:1].upper() + letters[1:].lower()
    if len(two) == 2 and two in _CHEMICAL_SYMBOLS:
        return two
    return two[0] if two[0] in _CHEMICAL_SYMBOLS else None


@functools.lru_cache(maxsize=4096)
def parse_typed_symbol(text):
    """Split a CIF type symbol such as ``Fe3+``, ``O2-``, ``Cl-``, ``Cs+1`` or ``Cl-1`` into
    (element, charge); ``(element, None)`` when the symbol carries no charge (``Fe``, ``Fe1``)."""
    text = str(text).strip()
    if len(text) > 1 and text[1].isalpha():
        text = text[0].upper() + text[1].lower() + text[2:]      # "FE3+" and "fe3+" mean Fe3+
    else:
        text = text[:1].upper() + text[1:]
    match = _TYPED.match(text)
    if match:
        element, magnitude, sign, sign_first, magnitude_after = match.groups()
        sign = sign or sign_first
        magnitude = magnitude or magnitude_after
        value = float(magnitude) if magnitude else 1.0
        return element, (value if sign == "+" else -value)
    element = element_of(text)
    return (element if element else text), None


@dataclass(frozen=True)
class SiteTable:
    """The sites of one structure as read, before any charge is decided.

    Attributes
    ----------
    cell : (3, 3) lattice vectors as rows, Å.
    positions : (N, 3) Cartesian positions, Å.
    labels : per site, the file's label(s) of the rows on it (``"Fe1/Fe2"``).
    species : per site, ``((element, occupancy, state or None), ...)``: one entry per row.
    initial_charges : (N,) charges the file gives per atom (ASE initial charges), or None.
    block : name of the data block (CIF) or frame number, or None.
    info : scalar tags of the block (strings and numbers).
    """

    cell: np.ndarray
    positions: np.ndarray
    labels: tuple
    species: tuple
    initial_charges: np.ndarray | None = None
    block: str | None = None
    info: dict | None = None

    def __len__(self):
        return len(self.positions)

    @property
    def symbols(self):
        """The element of each site (of its largest-occupancy row)."""
        return tuple(max(parts, key=lambda p: p[1])[0] for parts in self.species)


# ---------------------------------------------------------------- blocks
def read_text(path):
    """The text of a CIF; a UTF-8 byte-order mark is dropped, other bytes read as Latin-1."""
    try:
        with open(path, "rb") as handle:
            data = handle.read()
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        return data.decode("latin-1")


def cif_block_count(path):
    """How many ``data_`` lines a CIF has (a quick scan, no parsing; 0 for an unreadable file)."""
    try:
        return len(re.findall(r"^[ \t]*data_", read_text(path), flags=re.MULTILINE | re.IGNORECASE))
    except InputError:
        return 0


#: CIF tag readers: "fast" (gemmi where it reads the file as the general parser would, see
#: :mod:`madelung.io.cif_fast`; the general parser otherwise) or "general" (ASE's tag parser only).
CIF_READERS = ("fast", "general")


def cif_reader(reader=None):
    """The CIF tag reader to use: ``reader``, else the environment variable ``MADELUNG_CIF_READER``
    (read at each call, so worker processes follow their parent), else "fast"."""
    chosen = reader if reader is not None else (os.environ.get("MADELUNG_CIF_READER") or "fast")
    if chosen not in CIF_READERS:
        raise InputError(f"CIF reader {chosen!r} not known; use one of {', '.join(CIF_READERS)}")
    return chosen


def cif_blocks(path, reader=None):
    """``[(name, block), ...]`` of the data blocks with atom sites, in file order.

    ``reader``: "fast" or "general" (see :func:`cif_reader`); both give the same blocks."""
    text = read_text(path)
    if not _DATA_LINE.search(text):
        raise InputError(f"{path}: not a CIF (no data_ block)")
    blocks = fast_blocks(text) if cif_reader(reader) == "fast" else None
    if blocks is None:
        # imported here: any ase.io module runs ase.io/__init__ (about 0.2 s), which the fast reader avoids
        from ase.io.cif import parse_cif
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                blocks = list(parse_cif(io.StringIO(text)))
        except Exception as exc:  # ASE's parser raises many kinds; all mean a malformed file
            message = " ".join(str(exc).split()) or type(exc).__name__
            raise InputError(f"{path}: cannot read structure (malformed CIF: {message[:160]})") from None
    found = [(block.name, block) for block in blocks if _has_sites(block)]
    if not found:
        raise InputError(f"{path}: cannot read structure (no data block with atom sites: "
                         "_atom_site_label and fractional coordinates)")
    return found


def _has_sites(block):
    return "_atom_site_fract_x" in block or "_atom_site_cartn_x" in block


def choose_block(blocks, block, path, kind="data blocks"):
    """The one block of ``blocks`` named by ``block``: a block name (``data_NAME`` without ``data_``)
    or a number counted from 1 (negative from the end). Without ``block``, a file with several
    blocks (or frames: ``kind``) is refused with their names."""
    names = [name for name, _ in blocks]
    if block is None:
        if len(blocks) == 1:
            return blocks[0]
        raise InputError(f"{path}: {len(blocks)} {kind} ({', '.join(names[:8])}"
                         f"{', ...' if len(names) > 8 else ''}); choose one with --block NAME or --block NUMBER")
    text = str(block).strip()
    if text.lower().startswith("data_"):
        text = text[5:]
    for name, entry in blocks:
        if name == text:
            return name, entry
    for name, entry in blocks:
        if name.lower() == text.lower():
            return name, entry
    try:
        number = int(text)
    except ValueError:
        raise InputError(f"{path}: no data block {block!r}; blocks: {', '.join(names)}") from None
    if number == 0 or abs(number) > len(blocks):
        raise InputError(f"{path}: block number {number} out of range; the file has {len(blocks)} block(s), "
                         "counted from 1")
    return blocks[number - 1 if number > 0 else number]


# ---------------------------------------------------------------- symmetry
_TERM = re.compile(r"([+-]?)(\d*\.?\d*(?:/\d+)?)\*?([xyz]?)")


def parse_operator(text):
    """``(rotation (3, 3), translation (3,))`` of a symmetry operator such as ``'-y+1/2, x-y, z+1/3'``
    (read-only arrays: the same operator text gives the same arrays, read once)."""
    return _parsed_operator(str(text))


@functools.lru_cache(maxsize=4096)
def _parsed_operator(text):
    parts = str(text).replace(" ", "").lower().split(",")
    if len(parts) != 3:
        raise ValueError(f"symmetry operator {text!r} does not have three parts")
    rotation = np.zeros((3, 3))
    translation = np.zeros(3)
    for row, part in enumerate(parts):
        position = 0
        if not part:
            raise ValueError(f"symmetry operator {text!r} has an empty part")
        while position < len(part):
            match = _TERM.match(part, position)
            if match is None or match.end() == position:
                raise ValueError(f"symmetry operator {text!r} not understood")
            sign, number, axis = match.groups()
            factor = -1.0 if sign == "-" else 1.0
            try:
                value = float(Fraction(number)) if number else 1.0
            except (ZeroDivisionError, OverflowError, ValueError):
                raise ValueError(f"symmetry operator {text!r} not understood (the number {number!r})") from None
            if axis:
                rotation[row, "xyz".index(axis)] += factor * value
            elif number:
                translation[row] += factor * value
            else:
                raise ValueError(f"symmetry operator {text!r} not understood")
            position = match.end()
    rotation.setflags(write=False)
    translation.setflags(write=False)
    return rotation, translation


#: Tags that list a block's symmetry operators, in the order the general reader looks for them.
_OPERATOR_TAGS = ("_space_group_symop_operation_xyz", "_space_group_symop.operation_xyz", "_symmetry_equiv_pos_as_xyz")


def _operators(block, path):
    """The symmetry operators of a block: listed ones, else those of its space group (via ASE's tables)."""
    listed = next((block[tag] for tag in _OPERATOR_TAGS if tag in block), None)
    if isinstance(listed, str):
        listed = [listed]
    if listed:
        try:
            ops = [parse_operator(op) for op in listed]
        except (ValueError, ZeroDivisionError) as exc:
            raise InputError(f"{path}: {exc}") from None
        # a symmetry operation of a lattice has an integer rotation part of determinant +-1
        valid = [bool(np.all(np.abs(op[0] - np.rint(op[0])) < 1e-9) and abs(abs(np.linalg.det(op[0])) - 1) < 1e-6)
                 for op in ops]
        dropped = [text for text, ok in zip(listed, valid) if not ok]
        if dropped:
            warnings.warn(f"{path}: {len(dropped)} symmetry operator(s) left out, not operations of a lattice "
                          f"(the rotation part must be an integer matrix of determinant +-1): "
                          f"{', '.join(repr(str(x)) for x in dropped[:3])}", MadelungWarning, stacklevel=2)
        return [op for op, ok in zip(ops, valid) if ok] or [(np.eye(3), np.zeros(3))]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            group = block.get_spacegroup(True)
            rotations, translations = group.get_op()
    except Exception as exc:
        message = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: space group not understood ({message[:120]})") from None
    return list(zip(np.asarray(rotations, dtype=float), np.asarray(translations, dtype=float)))


# ---------------------------------------------------------------- rows
def _column(block, tag, n=None):
    value = block.get(tag)
    if value is None:
        return None
    values = value if isinstance(value, list) else [value]
    if n is not None and len(values) != n:
        raise InputError(f"loop column {tag} has {len(values)} values for {n} rows")
    return values


def _number(value, what):
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    text = str(value).strip()
    if text in ("?", "."):
        raise InputError(f"{what} is {text!r} (unknown)")
    try:
        return float(text)   # no uncertainty in parentheses (float() takes none): most values
    except ValueError:
        pass
    try:
        return float(re.sub(r"\(\d+\)$", "", text))
    except ValueError:
        raise InputError(f"{what} is {text!r}, not a number") from None


def _rows(block, cell):
    """Per asymmetric-unit row: (label, element, occupancy, state, fractional position)."""
    labels = _column(block, "_atom_site_label")
    type_symbols = None
    fractional = "_atom_site_fract_x" in block
    axes = ("_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z") if fractional else \
        ("_atom_site_cartn_x", "_atom_site_cartn_y", "_atom_site_cartn_z")
    n = len(_column(block, axes[0]))
    if labels is None:
        type_symbols = _column(block, "_atom_site_type_symbol", n)
        if type_symbols is None:
            raise InputError("the atom-site loop has neither _atom_site_label nor _atom_site_type_symbol")
        labels = [str(s) for s in type_symbols]
    labels = [str(x) for x in labels]
    if len(labels) != n:
        raise InputError(f"the atom-site loop has {len(labels)} labels for {n} coordinates")
    type_symbols = type_symbols or _column(block, "_atom_site_type_symbol", n)
    columns = [_column(block, axis, n) for axis in axes]
    for axis, column in zip(axes, columns):
        if column is None:
            raise InputError(f"the atom-site loop has no {axis}")
    occupancies = _column(block, "_atom_site_occupancy", n)
    table = {}
    names, numbers = _column(block, "_atom_type_symbol"), _column(block, "_atom_type_oxidation_number")
    if names is not None and numbers is not None and len(names) == len(numbers):
        for name, number in zip(names, numbers):
            if str(number).strip() in ("?", "."):
                continue
            table[str(name).strip()] = _number(number, f"oxidation number of type {name}")
    rows = []
    for k, label in enumerate(labels):
        symbol = str(type_symbols[k]) if type_symbols is not None else label
        element = element_of(symbol)
        if element is None:
            raise InputError(f"site {label}: unknown element symbol {symbol!r}")
        state = table.get(symbol.strip())
        if state is None and type_symbols is not None:
            typed_element, state = parse_typed_symbol(symbol)
            element = typed_element if typed_element in _CHEMICAL_SYMBOLS else element
        point = [_number(columns[a][k], f"site {label}: coordinate {axes[a][-1]}") for a in range(3)]
        if not (math.isfinite(point[0]) and math.isfinite(point[1]) and math.isfinite(point[2])):
            raise InputError(f"site {label} has a NaN or infinite coordinate")
        point = np.array(point) if fractional else np.linalg.solve(cell.T, point)
        occupancy = 1.0
        if occupancies is not None and str(occupancies[k]).strip() not in ("?", "."):
            occupancy = _number(occupancies[k], f"site {label}: occupancy")
            if not math.isfinite(occupancy) or occupancy <= 0 or occupancy > 1 + OCCUPANCY_SLACK:
                raise InputError(f"site {label} has occupancy {occupancies[k]}; occupancies must lie in (0, 1]")
        rows.append((label, element, occupancy, state, point))
    return rows


def _cell(block, path):
    values = []
    for tag in ("_cell_length_a", "_cell_length_b", "_cell_length_c",
                "_cell_angle_alpha", "_cell_angle_beta", "_cell_angle_gamma"):
        value = block.get(tag)
        if value is None:
            if "angle" in tag:
                values.append(90.0)
                continue
            raise InputError(f"{path}: no unit cell ({tag} missing)")
        number = _number(value, f"{path}: {tag}")
        if not np.isfinite(number) or number <= 0:
            raise InputError(f"{path}: {tag} is {value!r}, not a positive number")
        values.append(number)
    a, b, c, alpha, beta, gamma = values
    ca, cb, cg = (np.cos(np.radians(x)) for x in (alpha, beta, gamma))
    sg = np.sin(np.radians(gamma))
    cz = 1 - ca ** 2 - cb ** 2 - cg ** 2 + 2 * ca * cb * cg
    if cz <= 0 or sg <= 0:
        raise InputError(f"{path}: cell angles {alpha:g}, {beta:g}, {gamma:g} do not make a cell")
    # a along x, b in the xy plane (the usual orientation)
    return np.array([[a, 0, 0], [b * cg, b * sg, 0],
                     [c * cb, c * (ca - cb * cg) / sg, c * np.sqrt(cz) / sg]])


#: Up to this many points the close pairs may be found by comparing every pair (a symmetry orbit
#: has at most 192 images), see :func:`_by_all_pairs`.
ALL_PAIRS_UP_TO = 400

#: From this many points the k-d tree is faster than comparing every pair (0.24 ms against 1.5 ms
#: for an orbit of 192 images), below it slower.
TREE_FROM = 50

#: Whether a long run (a screening worker) loads the k-d tree at the first set of points where it
#: pays, instead of comparing every pair up to ALL_PAIRS_UP_TO (see :func:`use_tree_when_faster`).
_TREE_WHEN_FASTER = False


def use_tree_when_faster():
    """Let this process load scipy.spatial at the first set of points where the k-d tree is faster
    (a batch of files: the 0.07-0.15 s import is paid once, and only by a batch that has such
    sets; P1 files never do)."""
    global _TREE_WHEN_FASTER
    _TREE_WHEN_FASTER = True


def _by_all_pairs(n):
    """Whether to compare all pairs of ``n`` points rather than build a k-d tree: below
    TREE_FROM points always (it is faster); up to ALL_PAIRS_UP_TO points also until something has
    loaded the tree, because importing it (scipy.spatial, about 0.15 s) is most of the start-up of
    a one-structure command, unless :func:`use_tree_when_faster` was called (a batch run). Both
    ways find the same pairs."""
    if n < TREE_FROM:
        return True
    return n <= ALL_PAIRS_UP_TO and "scipy.spatial" not in sys.modules and not _TREE_WHEN_FASTER


def _close_pairs(frac, cell, tolerance):
    """``(m, 2)`` index pairs ``i < j`` of ``frac`` whose nearest periodic images lie within
    ``tolerance`` Å (each fractional difference taken to its nearest integer shift)."""
    n = len(frac)
    if _by_all_pairs(n):
        first, second = np.triu_indices(n, 1)
    else:
        from scipy.spatial import cKDTree   # only for a large set of points (see ALL_PAIRS_UP_TO)
        spacing = 1.0 / np.linalg.norm(np.linalg.inv(cell).T, axis=1)
        radius = tolerance / float(np.min(spacing))   # no fractional component of a close pair exceeds it
        tree = cKDTree(np.mod(frac, 1.0) % 1.0, boxsize=1.0 + 1e-12)
        pairs = tree.query_pairs(radius, p=np.inf, output_type="ndarray").reshape(-1, 2)
        first, second = pairs[:, 0], pairs[:, 1]
    delta = frac[first] - frac[second]
    delta -= np.round(delta)
    close = np.linalg.norm(delta @ cell, axis=1) <= tolerance
    return np.stack([first[close], second[close]], axis=1)


def _gather(frac, cell, tolerance):
    """Groups of indices of ``frac`` (wrapped) that lie within ``tolerance`` Å of each other (linked
    through chains of such pairs), each group in increasing order, the groups by their first index."""
    n = len(frac)
    if n <= 1:
        return [[0]] if n else []
    pairs = _close_pairs(frac, cell, tolerance)
    if not len(pairs):
        return [[i] for i in range(n)]
    # connected components: every point takes the smallest index it is linked to, until none changes
    owner = np.arange(n)
    while True:
        lowest = owner.copy()
        np.minimum.at(lowest, pairs[:, 0], owner[pairs[:, 1]])
        np.minimum.at(lowest, pairs[:, 1], owner[pairs[:, 0]])
        lowest = lowest[lowest]                # follow each new owner one step further
        if np.array_equal(lowest, owner):
            break
        owner = lowest
    order = np.argsort(owner, kind="stable")
    groups = np.split(order, np.flatnonzero(np.diff(owner[order])) + 1)
    groups.sort(key=lambda group: group[0])
    return [group.tolist() for group in groups]


def _orbits(rows, rotations, translations, cell, tolerance, max_atoms, where):
    """Fractional positions of each row's orbit (images closer than ``tolerance`` kept once) and the
    row each position comes from."""
    points, owners = [], []
    for k, (*_, point) in enumerate(rows):
        images = np.mod(np.einsum("oij,j->oi", rotations, point) + translations, 1.0)
        keep = [group[0] for group in _gather(images, cell, tolerance)]
        points.append(images[sorted(keep)])
        owners.extend([k] * len(keep))
        if max_atoms is not None and len(owners) > 8 * max_atoms + 1000:   # rows sharing sites merge below
            raise InputError(f"{where}the structure expands to more than {len(owners)} sites, more than the limit "
                             f"of {max_atoms} (raise it with --max-atoms / max_atoms= if you mean it)")
    return np.concatenate(points), np.array(owners)


def block_sites(block, path, max_atoms=None, tolerance=SITE_TOLERANCE) -> SiteTable:
    """The expanded sites of one data block (see the module docstring)."""
    try:
        return _block_sites(block, path, max_atoms, tolerance)
    except InputError:
        raise
    except (ValueError, TypeError, KeyError, IndexError, AttributeError, ZeroDivisionError) as exc:
        message = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: malformed atom-site table ({message[:160]})") from None


def _block_sites(block, path, max_atoms, tolerance):
    where = f"{path}: "
    cell = _cell(block, path)
    try:
        rows = _rows(block, cell)
    except InputError as exc:
        raise InputError(f"{where}{exc}") from None
    operators = _operators(block, path)
    if max_atoms is not None and len(rows) > max_atoms:
        raise InputError(f"{where}{len(rows)} atom-site rows, more than the limit of {max_atoms} sites")
    # each row's orbit, duplicates within the orbit removed
    rotations = np.array([op[0] for op in operators])
    translations = np.array([op[1] for op in operators])
    if rows and len(operators) == 1 and np.array_equal(rotations[0], np.eye(3)) and not np.any(translations[0]):
        # P1 as written (the identity only): every row is one image of itself
        frac = np.mod(np.array([row[-1] for row in rows]).reshape(-1, 3) + translations[0], 1.0)
        owners = np.arange(len(rows))
    else:
        frac, owners = _orbits(rows, rotations, translations, cell, tolerance, max_atoms, where)
    groups = sorted(_gather(frac, cell, tolerance), key=min)
    firsts, labels, species = [], [], []
    merged_once = set()
    owner_of = owners.tolist()
    for group in groups:
        members = sorted(owner_of[i] for i in group)
        parts, names, seen = [], [], {}
        for k in dict.fromkeys(members):
            label, element, occupancy, state, _ = rows[k]
            key = (element, state, round(occupancy, 6))
            if key in seen:                     # the same species written twice at one position
                if (label, seen[key]) not in merged_once:
                    merged_once.add((label, seen[key]))
                    warnings.warn(f"{where}site {label} lies on site {seen[key]} with the same species; merged "
                                  "as a duplicate", MadelungWarning, stacklevel=2)
                continue
            seen[key] = label
            parts.append((element, occupancy, state))
            names.append(label)
        total = sum(p[1] for p in parts)
        name = "/".join(names)
        if total > 1 + OCCUPANCY_SLACK:
            shown = " + ".join(f"{ion_text(el, st)} {occ:g}" for el, occ, st in parts)
            raise InputError(f"{where}site {name} holds {shown}: total occupancy {total:g}, above 1")
        if total > 1:
            parts = [(el, occ / total, st) for el, occ, st in parts]
        firsts.append(group[0])
        labels.append(name)
        species.append(tuple(parts))
    info = {str(k): v for k, v in block.items() if isinstance(v, (str, int, float))}
    positions = frac[firsts] - np.floor(frac[firsts] + 1e-9)     # each group's first image, wrapped
    return SiteTable(cell=cell, positions=positions.reshape(-1, 3) @ cell, labels=tuple(labels),
                     species=tuple(species), block=block.name, info=info)
