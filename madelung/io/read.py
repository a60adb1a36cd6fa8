"""The one loader: a structure file or an ``ase.Atoms`` plus charge options -> a charged Crystal.

The Python API (:meth:`madelung.Crystal.from_file`, :meth:`madelung.Crystal.from_ase`), every
command and the batch runner read through :func:`load`, so one file with one set of options
gives the same crystal and the same charges everywhere.

Where charges come from (``charges=``)
--------------------------------------
``"file"`` (or None)
    The states the file gives each species (CIF ``_atom_type_oxidation_number`` or typed symbols
    such as ``Fe3+``; for other formats, ASE initial charges). Charge rules (a map by element or
    site label) replace them for the species they name. A mixed or partly occupied site carries
    the occupancy-weighted sum of its rows' charges.
``"auto"``
    Assigned oxidation states (:func:`madelung.charges.assign_oxidation_states`); the file's states
    and the rules are kept as known states (``ignore_file_states=True`` keeps only the rules).
``"equilibrate"``
    Charge equilibration (:func:`madelung.charges.equilibrate`); rules are not allowed.
an array
    The site charges themselves.

A cell that comes out charged from the file's own states and occupancies (a net charge above
:data:`NET_CHARGE_SLACK` of the total ionic charge) is refused unless ``allow_net_charge=True``,
which sums it with a uniform neutralizing background.
"""

from __future__ import annotations

import os
import warnings
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from ..structure.bounds import precheck_file
from ..charges import EquilibrationResult, assign_oxidation_states, equilibrate
from ..charges.oxidation import OxidationAssignment
from ..structure.crystal import (CHARGE_SOURCES, DEFAULT_MAX_ATOMS, DEFAULT_MIN_DISTANCE, Crystal, check_size,
                       default_labels, use_loader)
from ..errors import InputError, MadelungWarning
from ..structure.symmetry import DEFAULT_SYMMETRY_TOLERANCE
from .cif import SiteTable, block_sites, choose_block, cif_block_count, cif_blocks

#: A file's net charge up to this fraction of sum |q| is taken as rounding of its occupancies
#: (summed with a background and a warning); above it the cell is refused unless allowed.
NET_CHARGE_SLACK = 1e-3

#: Largest ion charge (e) a file or a rule may give; larger ones are refused before any sum.
MAX_ION_CHARGE = 20.0


def _where(source):
    return f"{source}: " if source else ""


def _is_cif(path, format):
    return (format or "").lower() == "cif" or str(path).lower().endswith((".cif", ".mcif"))


# ---------------------------------------------------------------- reading sites
def _check_path(path):
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a folder, not a structure file")


def _read_frames(path, format, max_atoms):
    precheck_file(path, format, max_atoms)   # numbers and claimed sizes no reader should trust
    import ase.io   # here: ase.io takes about 0.2 s to import, and a CIF read by the fast reader needs none of it
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            frames = ase.io.read(path, index=":", format=format)
    except InputError:
        raise
    except StopIteration:
        raise InputError(f"{path}: cannot read structure (no complete structure found)") from None
    except KeyError as exc:  # ASE's symbol lookup
        name = str(exc.args[0]) if exc.args else "?"
        raise InputError(f"{path}: unknown element symbol {name!r}") from None
    except Exception as exc:  # ASE raises many kinds; all mean the file could not be read
        message = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: cannot read structure ({message[:200]})") from None
    frames = frames if isinstance(frames, list) else [frames]
    if not frames:
        raise InputError(f"{path}: contains no structure")
    for atoms in frames:
        check_size(len(atoms), max_atoms, path)
    return frames


def structure_names(path, *, format=None, reader=None) -> list:
    """Names of the structures in a file: CIF data-block names, or frame numbers ("1", "2", ...)
    of other formats. One entry for a file with one structure. ``reader``: the CIF tag reader
    (see :func:`madelung.io.cif.cif_reader`)."""
    path = os.fspath(path)
    _check_path(path)
    if _is_cif(path, format):
        return [name for name, _ in cif_blocks(path, reader)]
    return [str(k + 1) for k in range(len(_read_frames(path, format, None)))]


#: File endings that may hold several frames (read frame by frame by ``constant`` and ``screen``).
MULTI_FRAME_ENDINGS = (".traj", ".xyz", ".extxyz")


def structures_to_read(path) -> list:
    """For a command that takes many structures: the block (or frame) names of a file holding several,
    else ``[None]`` (one structure; a file that cannot be read is left to the reading, which says why)."""
    path = os.fspath(path)
    lower = path.lower()
    try:
        if lower.endswith((".cif", ".mcif")):
            if cif_block_count(path) < 2:
                return [None]
        elif not lower.endswith(MULTI_FRAME_ENDINGS):
            return [None]
        names = structure_names(path)
    except InputError:
        return [None]
    return names if len(names) > 1 else [None]


def read_sites(path, *, block=None, format=None, max_atoms=DEFAULT_MAX_ATOMS, reader=None) -> SiteTable:
    """The sites of one structure in a file (no charges decided yet).

    ``block`` names a CIF data block (or a frame of a multi-structure file) by name or by number
    counted from 1; a file with several structures and no ``block`` is refused with their names.
    ``reader`` chooses the CIF tag reader, "fast" or "general" (default: :func:`madelung.io.cif.cif_reader`);
    both give the same sites.
    """
    path = os.fspath(path)
    _check_path(path)
    if _is_cif(path, format):
        precheck_file(path, "cif", max_atoms)
        name, entry = choose_block(cif_blocks(path, reader), block, path)
        table = block_sites(entry, path, max_atoms=max_atoms)
        check_size(len(table), max_atoms, path)
        return table
    frames = _read_frames(path, format, max_atoms)
    names = [str(k + 1) for k in range(len(frames))]
    chosen = choose_block(list(zip(names, frames)), block, path, kind="structures (frames)")
    table = sites_from_atoms(chosen[1], path)
    return SiteTable(table.cell, table.positions, table.labels, table.species, table.initial_charges,
                     block=chosen[0] if len(frames) > 1 else None, info=table.info)


def sites_from_atoms(atoms, source=None) -> SiteTable:
    """The sites of an ``ase.Atoms`` (labels from ``arrays['labels']``, occupancies from
    ``arrays['occupancies']``, ASE initial charges as the file's charges)."""
    where = _where(source)
    if len(atoms) == 0:
        raise InputError(f"{where}contains no atoms")
    if not all(atoms.pbc):
        raise InputError(f"{where}the structure is not periodic in all three directions "
                         f"(pbc={list(map(bool, atoms.pbc))}); a crystal needs a 3D cell")
    if atoms.cell.rank < 3:
        raise InputError(f"{where}has no complete unit cell (cell rank {atoms.cell.rank})")
    positions = atoms.get_positions()
    if not np.all(np.isfinite(positions)) or not np.all(np.isfinite(np.array(atoms.cell))):
        raise InputError(f"{where}the structure contains a non-finite coordinate or cell length")
    symbols = atoms.get_chemical_symbols()
    labels = atoms.arrays.get("labels")
    labels = tuple(str(x) for x in labels) if labels is not None else tuple(default_labels(symbols))
    occupancies = atoms.arrays.get("occupancies")
    occupancies = np.ones(len(atoms)) if occupancies is None else np.asarray(occupancies, dtype=float)
    initial = np.array(atoms.get_initial_charges(), dtype=float)
    species = tuple(((el, float(occ), None),) for el, occ in zip(symbols, occupancies))
    info = {k: v for k, v in atoms.info.items() if isinstance(v, (str, int, float))}
    return SiteTable(np.array(atoms.cell, dtype=float), positions, labels, species,
                     initial if np.any(initial != 0) else None, None, info)


# ---------------------------------------------------------------- charges
@dataclass(frozen=True)
class Loaded:
    """A structure read and charged.

    Attributes
    ----------
    crystal : the Crystal, charges in e.
    assignment : the ranked oxidation-state assignment for ``charges="auto"``, else None.
    block : the CIF data block (or frame number) read, or None for a one-structure file.
    charges_from : where the charges came from ("file", "auto", "equilibrate", "given").
    equilibration : the charge-equilibration result for ``charges="equilibrate"``, else None.
    """

    crystal: Crystal
    assignment: OxidationAssignment | None
    block: str | None
    charges_from: str
    equilibration: EquilibrationResult | None = None

    def to_dict(self) -> dict:
        c = self.crystal
        return {"source": c.source, "block": self.block, "formula": c.formula, "charges_from": self.charges_from,
                "charges_e": c.charges.tolist(), "labels": list(c.labels), "net_charge_e": c.net_charge}


def _bounded(value, what, where):
    if value is not None and abs(value) > MAX_ION_CHARGE:
        raise InputError(f"{where}charge {value:g} for {what} is not an ion charge (|q| above {MAX_ION_CHARGE:g} e)")
    return value


def _known_states(table, rules, use_file, where):
    """Per site and species, the state given by a rule (label first, then element), the file, or None."""
    file_has_states = any(st is not None for parts in table.species for *_, st in parts)
    initial = table.initial_charges if (use_file and not file_has_states) else None
    known = []
    for i, (label, parts) in enumerate(zip(table.labels, table.species)):
        entry = []
        for el, _, state in parts:
            if label in rules:
                value = rules[label]
            elif el in rules:
                value = rules[el]
            elif use_file and state is not None:
                value = state
            elif initial is not None and len(parts) == 1:
                value = float(initial[i])
            else:
                value = None
            entry.append(_bounded(value, f"site {label} ({el})", where))
        known.append(tuple(entry))
    return known


def _check_rules(rules, table, where):
    checked = {}
    for key, value in dict(rules or {}).items():
        try:
            number = float(value)
        except (TypeError, ValueError):
            raise InputError(f"{where}charge {value!r} for {key} is not a number") from None
        if not np.isfinite(number):
            raise InputError(f"{where}charge for {key} is not finite")
        checked[str(key)] = _bounded(number, str(key), where)
    named = set(table.labels) | {el for parts in table.species for el, *_ in parts}
    unknown = sorted(set(checked) - named)
    if unknown:
        elements = sorted({el for parts in table.species for el, *_ in parts})
        raise InputError(f"{where}charge given for {unknown[0]}, which is neither an element nor a site label "
                         f"of this structure (elements: {', '.join(elements)})")
    return checked


def _crystal(table, charges, states, source, min_distance, max_atoms):
    check_size(len(table), max_atoms, source)
    symbols = table.symbols
    species = [tuple((el, occ) for el, occ, _ in parts) for parts in table.species]
    occupancies = [sum(occ for _, occ in parts) for parts in species]
    info = dict(table.info or {})
    if table.block is not None:
        info["block"] = table.block
    return Crystal(table.cell, table.positions, charges, symbols, table.labels, occupancies, source=source,
                   min_distance=min_distance, info=info, species=species, species_states=states)


def _charged_cell(crystal, where):
    """Refuse a cell the file's states and occupancies leave charged (see NET_CHARGE_SLACK)."""
    net = crystal.net_charge
    scale = float(np.sum(np.abs(crystal.charges)))
    if abs(net) <= NET_CHARGE_SLACK * max(scale, 1e-300):
        return
    rows = {}
    for i in range(len(crystal)):
        key = (crystal.labels[i], crystal.species_label(i), float(crystal.charges[i]))
        rows[key] = rows.get(key, 0) + 1
    averaged = [k for k in rows if any(crystal.is_averaged(i) for i in range(len(crystal))
                                       if crystal.labels[i] == k[0])]
    shown = averaged or list(rows)
    text = ", ".join(f"{label} ({species}) {q:+.4g} e x{rows[(label, species, q)]}"
                     for label, species, q in shown[:4]) + (f" and {len(shown) - 4} more" if len(shown) > 4 else "")
    raise InputError(f"{where}the file's oxidation states and occupancies give a net charge of {net:+.4g} e per "
                     f"cell (sites {text}); refused. Give charges (--charge / --charges-from auto), or sum it with "
                     "a neutralizing background (--allow-net-charge / allow_net_charge=True)")


def _check_averaged(crystal, policy):
    """Refuse, or warn about, sites whose charge is an occupancy average."""
    averaged = crystal.averaged_sites
    if not averaged:
        return
    seen = list(dict.fromkeys(f"{crystal.labels[i]} ({crystal.species_label(i)})" for i in averaged))
    shown = ", ".join(seen[:4]) + (f" and {len(seen) - 4} more" if len(seen) > 4 else "")
    if policy == "error":
        raise InputError(f"{_where(crystal.source)}mixed or partly occupied sites: {shown}; refused "
                         "(occupancy policy 'error'; use 'average' for occupancy-weighted mean charges)")
    warnings.warn(f"{_where(crystal.source)}mixed or partly occupied sites {shown} carry occupancy-weighted mean "
                  "charges (virtual-crystal average): one averaged point charge per site, not the real ions",
                  MadelungWarning, stacklevel=3)


def charge_table(table, charges="file", *, rules=None, source=None, min_distance=DEFAULT_MIN_DISTANCE,
                 occupancy="average", max_atoms=None, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE, mixing_denominator=2,
                 ignore_file_states=False, allow_net_charge=False, **charge_options) -> Loaded:
    """Decide the charges of a :class:`~madelung.io.cif.SiteTable` (see the module docstring)."""
    where = _where(source)
    if occupancy not in ("average", "error"):
        raise InputError(f"occupancy must be 'average' or 'error', got {occupancy!r}")
    if isinstance(charges, Mapping):
        rules, charges = {**dict(charges), **dict(rules or {})}, "file"
    if charges is None:
        charges = "file"
    if isinstance(charges, str) and charges not in CHARGE_SOURCES:
        raise InputError(f"{where}charges {charges!r} not understood; use one of {', '.join(CHARGE_SOURCES)}, "
                         "numbers, or a map by element or label")
    rules = _check_rules(rules, table, where)
    block = table.block
    if not isinstance(charges, str):
        crystal = _crystal(table, charges, None, source, min_distance, max_atoms)
        _check_averaged(crystal, occupancy)
        return Loaded(crystal, None, block, "given")
    zeros = np.zeros(len(table))
    if charges == "equilibrate":
        if rules:
            raise InputError(f"{where}charge rules (--charge) cannot be combined with charge equilibration")
        base = _crystal(table, zeros, None, source, min_distance, max_atoms)
        _check_averaged(base, occupancy)
        result = equilibrate(base, **charge_options)
        return Loaded(base.with_charges(result.charges), None, block, "equilibrate", result)
    known = _known_states(table, rules, not ignore_file_states, where)
    if charges == "auto":
        base = _crystal(table, zeros, None, source, min_distance, max_atoms)
        _check_averaged(base, occupancy)
        assignment = assign_oxidation_states(base, known_states=known, symmetry_tolerance=symmetry_tolerance,
                                             mixing_denominator=mixing_denominator, **charge_options)
        states = [None] * len(base)
        for group, values in zip(assignment.groups, assignment.best.states):
            for i in group.sites:
                states[i] = values
        return Loaded(base.replace(charges=assignment.charges, species_states=states), assignment, block, "auto")
    site_charges = np.empty(len(table))
    for i, (label, parts, values) in enumerate(zip(table.labels, table.species, known)):
        missing = [el for (el, *_), v in zip(parts, values) if v is None]
        if missing:
            if not any(v is not None for entry in known for v in entry):
                elements = list(dict.fromkeys(el for p in table.species for el, *_ in p))
                raise InputError(f"{where}no charges found in the structure; give them, e.g. "
                                 + " ".join(f"--charge {el}=Q" for el in elements)
                                 + ", or let madelung assign them (--charges-from auto)")
            raise InputError(f"{where}site {label} ({missing[0]}) has no charge in the file or the rules; give it, "
                             f"e.g. --charge {label}=Q, or let madelung assign it (--charges-from auto)")
        site_charges[i] = sum(occ * v for (_, occ, _), v in zip(parts, values))
    crystal = _crystal(table, site_charges, known, source, min_distance, max_atoms)
    _check_averaged(crystal, occupancy)
    if not allow_net_charge and not rules:   # charges the user gave are theirs to answer for (the sum warns)
        _charged_cell(crystal, where)
    return Loaded(crystal, None, block, "file")


def load(source, charges="file", *, rules=None, block=None, format=None, name=None, min_distance=DEFAULT_MIN_DISTANCE,
         occupancy="average", max_atoms=DEFAULT_MAX_ATOMS, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE, mixing_denominator=2,
         ignore_file_states=False, allow_net_charge=False, **charge_options) -> Loaded:
    """Read a structure file (or take an ``ase.Atoms``) and decide its charges.

    Parameters
    ----------
    source : path or ase.Atoms
    charges : "file", "auto", "equilibrate", None (= "file"), a map by element or site label
        (rules; the file fills in the rest), or an array of site charges. See the module docstring.
    rules : mapping, optional
        Charge by element or site label (a label wins); they replace the file's states for the
        species they name and are kept by the assignment.
    block : str or int, optional
        CIF data block (or frame) by name or number counted from 1; needed for files with several.
    format : str, optional
        ASE format name when the file ending does not tell.
    name : str, optional
        How to name the structure in messages (default: the path, or the block-qualified path).
    min_distance : float
        Refuse ions closer than this, Å.
    occupancy : "average" or "error"
        Mixed or partly occupied sites: the occupancy-weighted sum of their rows' charges with a
        warning (the virtual-crystal average), or refuse the structure.
    max_atoms : int or None
        Refuse structures with more sites than this (None: no limit).
    symmetry_tolerance, mixing_denominator, ignore_file_states : for ``charges="auto"``.
    allow_net_charge : bool
        Sum a cell the file leaves charged with a neutralizing background instead of refusing it.
    **charge_options
        Passed on to the assignment or the equilibration.

    Returns
    -------
    Loaded
    """
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        table = read_sites(path, block=block, format=format, max_atoms=max_atoms)
        if name is None:
            name = path if table.block is None or block is None else f"{path}#{table.block}"
    else:
        check_size(len(source), max_atoms, name)
        table = sites_from_atoms(source, name)
    return charge_table(table, charges, rules=rules, source=name, min_distance=min_distance, occupancy=occupancy,
                        max_atoms=max_atoms, symmetry_tolerance=symmetry_tolerance, mixing_denominator=mixing_denominator,
                        ignore_file_states=ignore_file_states, allow_net_charge=allow_net_charge, **charge_options)


def read_crystal(source, charges="file", **options) -> Crystal:
    """The Crystal of :func:`load` (see there for the options)."""
    return load(source, charges, **options).crystal


def read_structure(path, *, block=None, format=None, max_atoms=DEFAULT_MAX_ATOMS, min_distance=DEFAULT_MIN_DISTANCE):
    """The Crystal of a file with every charge zero (geometry, labels, occupancies only)."""
    table = read_sites(path, block=block, format=format, max_atoms=max_atoms)
    return _crystal(table, np.zeros(len(table)), None, os.fspath(path), min_distance, max_atoms)


def _from_file(cls, path, charges=None, **options):
    return read_crystal(path, charges, **options)


def _from_ase(cls, atoms, charges=None, *, source=None, max_atoms=None, labels=None, **options):
    if labels is not None:
        if len(labels) != len(atoms):
            raise InputError(f"{_where(source)}{len(labels)} labels given for {len(atoms)} sites")
        atoms = atoms.copy()
        atoms.arrays["labels"] = np.array([str(x) for x in labels], dtype=object).astype(str)
    return read_crystal(atoms, charges, name=source, max_atoms=max_atoms, **options)


use_loader(_from_file, _from_ase)
