"""Bounds on the numbers a structure may hold, checked before any work is planned.

The sums are done in double precision. A cell length of 1e30 Å, a charge of 1e308 e, an integer
with hundreds of digits or a header claiming a billion atoms are valid-looking text, but no sum
can be planned or represented for them: they overflow, exhaust memory, or loop for hours. Each
check here refuses such an input with an :class:`~madelung.errors.InputError` that names the
value and the limit, in well under a second.

``precheck_file`` looks at the text of a structure file before a reader expands it (digit runs,
the atom counts that extended-XYZ and POSCAR headers claim); ``check_cell`` and ``check_charges``
bound what a :class:`~madelung.Crystal` is built from, whatever its source.
"""

from __future__ import annotations

import math
import os
import re

import numpy as np

from ..errors import InputError
from .lattice import plane_spacings, reduced_cell

#: Longest lattice vector accepted, Å (a micrometre; real periodic models stay far below).
MAX_CELL_LENGTH = 1.0e4
#: Shortest lattice vector of the reduced cell accepted, Å.
MIN_CELL_LENGTH = 1.0e-2
#: Largest ratio of the longest to the shortest vector of the reduced cell (needle or sheet cells).
MAX_CELL_ASPECT = 1.0e3
#: Largest skew of the basis the neighbour walks use (the Niggli-reduced basis, or the basis given
#: where the reduction fails): the product over the three lattice directions of (plane spacing of
#: the Minkowski-reduced cell / plane spacing of that basis). The periodic images a walk visits grow
#: with it (about 2 s at 1e4, minutes at 1e6).
MAX_BASIS_SKEW = 1.0e4
#: Peak memory of a particle-mesh sum per mesh point, bytes: the charge mesh, its transform and the
#: potential mesh share one half-spectrum array of 8 B per point (sums/mesh.py); measured with the
#: ions' arrays, 8.2 to 8.8 B per point for 10^6 ions on 400^3 and 500^3 meshes
#: (benchmarks/scaling_mesh.py --stages), rounded up.
MESH_BYTES_PER_POINT = 10
#: Largest peak memory a mesh may take, bytes.
MAX_MESH_BYTES = 2.0e9
#: Largest charge magnitude on one site, e.
MAX_CHARGE = 1.0e3
#: Ions may lie this many times the longest lattice vector from the origin, no further (precision
#: of the wrapping into the cell).
MAX_CELLS_AWAY = 1.0e3
#: Integers longer than this many digits are refused (no structure file needs them; 18 digits
#: still fit a 64-bit integer).
MAX_DIGITS = 18
#: Most columns an extended-XYZ ``Properties=`` entry may claim for one property.
MAX_XYZ_COLUMNS = 64
#: Ions nearer than this, Å, are the same point: refused even when the distance check is off.
COINCIDENT_DISTANCE = 1.0e-6
#: Fewest bytes one atom line of an extended-XYZ or POSCAR file can take ("H 0 0 0\n").
MIN_BYTES_PER_ATOM = 6

_LONG_INTEGER = re.compile(rf"(?<![\d.])[-+]?\d{{{MAX_DIGITS + 1},}}(?![\d.])")


def _where(source):
    return f"{source}: " if source else ""


def _kind(path, format):
    format = (format or "").lower()
    name = os.path.basename(path).lower()
    ending = os.path.splitext(name)[1]
    if format in ("vasp", "poscar") or (not format and (ending in (".vasp", ".poscar")
                                                       or name.startswith(("poscar", "contcar")))):
        return "vasp"
    if format in ("xyz", "extxyz") or (not format and ending in (".xyz", ".extxyz")):
        return "xyz"
    if format == "cif" or (not format and ending in (".cif", ".mcif")):
        return "cif"
    return None


def precheck_file(path, format=None, max_atoms=None):
    """Refuse a CIF, POSCAR or extended-XYZ file whose text holds numbers no sum can use.

    Checks integers of more than :data:`MAX_DIGITS` digits, CIF cell lengths above
    :data:`MAX_CELL_LENGTH`, a POSCAR scale factor out of range, and the atom counts the
    extended-XYZ and POSCAR headers claim: each against ``max_atoms`` and against the size of
    the file, before the file is read in full by a reader that trusts them. Other formats pass.
    """
    kind = _kind(os.fspath(path), format)
    if kind is None:
        return
    try:
        with open(path, "r", encoding="utf-8", errors="replace") as handle:
            text = handle.read()
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None
    match = _LONG_INTEGER.search(text)
    if match:
        raise InputError(f"{path}: holds an integer of {len(match.group().lstrip('+-'))} digits, more than the "
                         f"{MAX_DIGITS} any structure needs")
    size = len(text.encode("utf-8", errors="replace"))
    if kind == "xyz":
        _check_xyz_counts(path, text, size, max_atoms)
    elif kind == "vasp":
        _check_poscar(path, text, size, max_atoms)
    else:
        for tag in ("_cell_length_a", "_cell_length_b", "_cell_length_c"):
            found = re.search(rf"^\s*{tag}\s+([-+]?[\d.]+(?:[eE][-+]?\d+)?)", text, flags=re.MULTILINE | re.IGNORECASE)
            if found:
                _check_length(path, tag, found.group(1))


def _check_length(path, what, text):
    try:
        value = float(text)
    except ValueError:
        return
    if math.isfinite(value) and abs(value) > MAX_CELL_LENGTH:
        raise InputError(f"{path}: {what} is {value:g} Å, above the limit of {MAX_CELL_LENGTH:g} Å")


def _check_claim(path, claimed, size, max_atoms, what):
    if max_atoms is not None and claimed > int(max_atoms):
        raise InputError(f"{path}: {what} claims {claimed} atoms, more than the limit of {int(max_atoms)} "
                         "(raise it with --max-atoms / max_atoms= if you mean it)")
    if claimed * MIN_BYTES_PER_ATOM > size:
        raise InputError(f"{path}: {what} claims {claimed} atoms, but the file has only {size} bytes")


def _check_xyz_counts(path, text, size, max_atoms):
    """Walk the frames: each is a count line, a comment line and that many atom lines."""
    lines = text.splitlines()
    i, frame = 0, 0
    while i < len(lines):
        if not lines[i].strip():
            i += 1
            continue
        token = lines[i].split()[0]
        if not token.lstrip("+").isdigit():
            return   # not an XYZ count line: the reader will say what is wrong
        claimed = int(token)
        frame += 1
        _check_claim(path, claimed, size, max_atoms, f"the header of frame {frame}")
        comment = lines[i + 1] if i + 1 < len(lines) else ""
        found = re.search(r"properties=(\S+)", comment, flags=re.IGNORECASE)
        if found:
            fields = found.group(1).strip("'\"").split(":")
            for name, count in zip(fields[0::3], fields[2::3]):
                if count.isdigit() and int(count) > MAX_XYZ_COLUMNS:
                    raise InputError(f"{path}: frame {frame} claims {count} columns for property {name}, more "
                                     f"than the {MAX_XYZ_COLUMNS} allowed")
        if i + 2 + claimed > len(lines):
            raise InputError(f"{path}: frame {frame} claims {claimed} atoms, but only "
                             f"{max(0, len(lines) - i - 2)} lines follow")
        i += 2 + claimed


def _check_poscar(path, text, size, max_atoms):
    lines = text.splitlines()
    if len(lines) < 7:
        return
    scale = lines[1].split()
    for token in scale[:3]:
        try:
            value = float(token)
        except ValueError:
            return
        if not math.isfinite(value) or value == 0:
            raise InputError(f"{path}: the scale factor {token} must be a finite non-zero number")
        if value < 0 and abs(value) > MAX_CELL_LENGTH ** 3:
            raise InputError(f"{path}: the cell volume {-value:g} Å^3 (negative scale factor) is above the limit of "
                             f"{MAX_CELL_LENGTH ** 3:g} Å^3")
        if value > 0 and value > MAX_CELL_LENGTH:
            raise InputError(f"{path}: the scale factor {value:g} is above {MAX_CELL_LENGTH:g}")
    counts_line = lines[5].split()
    if counts_line and not counts_line[0].lstrip("+").isdigit():
        counts_line = lines[6].split()
    counts = []
    for token in counts_line:
        if not token.lstrip("+").isdigit():
            break
        counts.append(int(token))
    if counts:
        _check_claim(path, sum(counts), size, max_atoms, "the POSCAR header")


def check_cell(cell, positions, source=None, min_distance=0.0):
    """Refuse a finite, non-degenerate cell that no sum can be planned for.

    The lattice vectors must not exceed :data:`MAX_CELL_LENGTH`; the Minkowski-reduced cell
    (a change of basis that keeps the crystal) must have its shortest vector above
    :data:`MIN_CELL_LENGTH` and ``min_distance`` (an ion nearer than that to its own image
    overlaps it) and an aspect ratio below :data:`MAX_CELL_ASPECT`; ions may lie at most
    :data:`MAX_CELLS_AWAY` longest lattice vectors from the origin; the basis the neighbour walks
    use may be skewed against the reduced cell by at most :data:`MAX_BASIS_SKEW`. Returns nothing.

    References
    ----------
    H. Minkowski, J. Reine Angew. Math. 129, 220 (1905) -- the reduction (the lengths of the
    Niggli cell of spglib, I. Křivý and B. Gruber, Acta Cryst. A32 (1976) 297, which are those of a
    Minkowski-reduced basis in three dimensions; ``ase.geometry.minkowski_reduce`` where spglib
    cannot reduce the cell).
    """
    where = _where(source)
    lengths = np.linalg.norm(cell, axis=1)
    longest = float(lengths.max())
    if longest > MAX_CELL_LENGTH:
        raise InputError(f"{where}a lattice vector is {longest:.4g} Å long, above the limit of "
                         f"{MAX_CELL_LENGTH:g} Å")
    # the Niggli cell the sums reduce to anyway (kept, so no second reduction): its vector lengths
    # are those of the Minkowski-reduced cell; where spglib cannot reduce, ASE's Minkowski reduction
    facts = reduced_cell(cell)
    if facts.by_spglib:
        reduced, reduced_lengths = facts.cell, facts.lengths
    else:
        from ase.geometry import minkowski_reduce

        try:
            reduced, _ = minkowski_reduce(np.array(cell, dtype=float))
        except Exception:   # the reduction gives up on nearly degenerate cells
            reduced = np.array(cell, dtype=float)
        reduced_lengths = np.linalg.norm(reduced, axis=1)
    shortest = float(reduced_lengths.min())
    if shortest < MIN_CELL_LENGTH:
        raise InputError(f"{where}the shortest lattice vector is {shortest:.3g} Å, below the limit of "
                         f"{MIN_CELL_LENGTH:g} Å")
    if min_distance and shortest < min_distance:
        raise InputError(f"{where}every ion is {shortest:.3f} Å from its own image (the shortest lattice "
                         f"vector), closer than the {min_distance:g} Å allowed")
    aspect = float(reduced_lengths.max()) / shortest
    if aspect > MAX_CELL_ASPECT:
        raise InputError(f"{where}the cell is {aspect:.3g} times longer than wide (reduced lattice vectors "
                         f"{shortest:.4g} to {reduced_lengths.max():.4g} Å), above the limit of {MAX_CELL_ASPECT:g}")
    # the basis the neighbour walks use is the Niggli cell itself, or the input if spglib cannot reduce it
    skew = 1.0 if facts.by_spglib else float(np.prod(plane_spacings(reduced) / facts.spacings))
    if skew > MAX_BASIS_SKEW:
        raise InputError(f"{where}the cell is given in a basis {skew:.3g} times more skewed than its reduced cell "
                         f"(lattice vectors up to {longest:.4g} Å for a reduced cell of {shortest:.4g} to "
                         f"{reduced_lengths.max():.4g} Å), above the limit of {MAX_BASIS_SKEW:g}; write the same "
                         "crystal in a reduced basis (Minkowski or Niggli reduction)")
    if len(positions):
        far = float(np.max(np.linalg.norm(np.asarray(positions, dtype=float), axis=1))) / longest
        if not math.isfinite(far) or far > MAX_CELLS_AWAY:
            raise InputError(f"{where}an ion lies {far:.3g} cell lengths from the origin, above the limit of "
                             f"{MAX_CELLS_AWAY:g}")


def check_mesh(shape):
    """Refuse a particle mesh whose peak memory (:data:`MESH_BYTES_PER_POINT` per point) is above
    :data:`MAX_MESH_BYTES`, before it is allocated (ions nearly on top of each other with the
    distance check off ask for meshes of hundreds of millions of points)."""
    points = float(np.prod([float(k) for k in shape]))
    need = MESH_BYTES_PER_POINT * points
    if need > MAX_MESH_BYTES:
        raise InputError(f"the particle mesh this sum needs ({'x'.join(str(int(k)) for k in shape)} points, about "
                         f"{need / 1e9:.3g} GB) is above the limit of {MAX_MESH_BYTES / 1e9:g} GB; use the direct "
                         "sum (method 'direct' or 'auto') or check for ions nearly on top of each other")


def check_charges(charges, labels=None, source=None):
    """Refuse site charges above :data:`MAX_CHARGE` in magnitude."""
    charges = np.asarray(charges, dtype=float)
    if not charges.size:
        return
    i = int(np.argmax(np.abs(charges)))
    if abs(charges[i]) > MAX_CHARGE:
        name = labels[i] if labels is not None else f"#{i}"
        raise InputError(f"{_where(source)}site {name} has charge {charges[i]:g} e, above the limit of "
                         f"{MAX_CHARGE:g} e in magnitude")
