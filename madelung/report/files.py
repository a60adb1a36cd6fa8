"""Writing files safely: nothing overwritten unasked, nothing half-written, no input replaced.

Every command that writes goes through this module:

* :func:`check_outputs` runs *before* the computation: the folder exists and is writable, the
  path is not a folder, it is not one of the command's inputs, and an existing file is only
  replaced when the user asked for it (``--overwrite``).
* :func:`atomic_output` writes to a temporary file created with an unpredictable name in the
  target folder (``tempfile.mkstemp``: created exclusively, never through a link) and renames it
  over the target only when the writing succeeded, so an interrupted or failed write (a full
  disk) leaves the old file or none, and never a partial one.
* :func:`cif_text` writes a structure as a P1 CIF that carries every site's charge, so a file
  the tool writes reads back with the same numbers.
"""

from __future__ import annotations

import errno
import os
import tempfile
from contextlib import contextmanager

from ..errors import InputError


def _same_file(a, b):
    try:
        return os.path.samefile(a, b)
    except OSError:
        return os.path.realpath(a) == os.path.realpath(b)


def check_outputs(paths, *, inputs=(), overwrite=False):
    """Refuse, before any work, outputs that cannot or must not be written.

    Parameters
    ----------
    paths : iterable of str
        The files the command will write (``None`` entries are skipped).
    inputs : iterable of str
        The files the command reads; an output is never one of them, whatever ``overwrite`` says.
    overwrite : bool
        Replace existing files (the ``--overwrite`` option).

    Raises
    ------
    InputError
        One line naming the path and the reason.
    """
    seen = {}
    inputs = [os.fspath(p) for p in inputs if p is not None]
    for path in paths:
        if path is None:
            continue
        path = os.fspath(path)
        if not os.path.basename(path):
            raise InputError(f"{path}: names a folder; give a file name")
        folder = os.path.dirname(os.path.abspath(path))
        if not os.path.isdir(folder):
            raise InputError(f"{path}: folder {folder} does not exist")
        if not os.access(folder, os.W_OK | os.X_OK):
            raise InputError(f"{path}: folder {folder} is not writable")
        key = os.path.realpath(path)
        if key in seen:
            raise InputError(f"{path}: written twice by this command (also as {seen[key]})")
        seen[key] = path
        if os.path.isdir(path):
            raise InputError(f"{path}: is a folder, not a file")
        for source in inputs:
            if os.path.exists(source) and os.path.exists(path) and _same_file(source, path) or \
                    os.path.realpath(source) == key:
                raise InputError(f"{path}: is an input of this command; write the output to another file")
        if os.path.lexists(path) and not overwrite:
            raise InputError(f"{path}: exists; pass --overwrite to replace it")


def make_folder(folder, parents=False):
    """Create the output folder ``folder`` if it is missing: that folder only, and its missing
    parents only with ``parents`` (a mistyped path must not grow a tree of folders)."""
    folder = os.fspath(folder)
    if os.path.isdir(folder):
        return
    if os.path.lexists(folder):
        raise InputError(f"{folder}: exists and is not a folder")
    parent = os.path.dirname(os.path.abspath(folder))
    if os.path.lexists(parent) and not os.path.isdir(parent):
        raise InputError(f"{folder}: cannot be written ({parent} is a file, not a folder)")
    if not os.path.isdir(parent) and not parents:
        raise InputError(f"{folder}: its parent folder {parent} does not exist (create it first)")
    try:
        os.makedirs(folder) if parents else os.mkdir(folder)
    except OSError as exc:
        raise InputError(f"{folder}: cannot create the folder ({exc.strerror or exc})") from None


def _default_mode():
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


@contextmanager
def atomic_output(path, binary=False):
    """Write ``path`` all at once: yields ``(handle, temporary_path)`` of a fresh file beside it.

    Write through the open ``handle``, or (for writers that only take a path) to
    ``temporary_path``, which keeps the target's ending so format detection still works. When
    the block ends without an exception the file is flushed to disk and renamed over ``path``;
    otherwise it is removed and the old ``path`` is untouched. An ``OSError`` (full disk,
    permission) becomes an :class:`InputError` naming ``path``.
    """
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    prefix, suffix = _temporary_pattern(path)
    try:
        descriptor, temporary = tempfile.mkstemp(prefix=prefix, suffix=suffix, dir=folder)
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({exc.strerror or exc})") from None
    handle = os.fdopen(descriptor, "wb" if binary else "w", **({} if binary else {"encoding": "utf-8",
                                                                                   "newline": ""}))
    try:
        try:
            yield handle, temporary
            handle.flush()
            os.fsync(handle.fileno())
        finally:
            handle.close()
        if os.path.isdir(path):
            raise InputError(f"{path}: is a folder, not a file")
        os.chmod(temporary, _default_mode())
        os.replace(temporary, path)
    except BaseException as exc:
        try:
            os.unlink(temporary)
        except OSError:
            pass
        if isinstance(exc, OSError):
            reason = "no space left on the device" if exc.errno == errno.ENOSPC else (exc.strerror or str(exc))
            kept = "the old file is kept" if os.path.exists(path) else "nothing written"
            raise InputError(f"{path}: cannot write ({reason}); {kept}") from None
        if isinstance(exc, InputError) and temporary in str(exc):   # a writer named the file it was given
            raise InputError(str(exc).replace(temporary, path)) from None
        raise


def _temporary_pattern(path):
    name = os.path.basename(os.fspath(path))
    return f".{name}.", f".part{os.path.splitext(name)[1]}"


def remove_stale_temporaries(path):
    """Remove temporary files :func:`atomic_output` left beside ``path`` when a run writing it was
    killed mid-write. Call it only while holding the lock on ``path`` (no other writer is alive).
    Links and folders are never touched."""
    folder = os.path.dirname(os.path.abspath(path))
    prefix, suffix = _temporary_pattern(path)
    with os.scandir(folder) as entries:
        for entry in entries:
            if entry.name.startswith(prefix) and entry.name.endswith(suffix) and \
                    entry.is_file(follow_symlinks=False):
                try:
                    os.unlink(entry.path)
                except OSError:
                    pass


def write_text(path, text):
    """Write ``text`` to ``path`` atomically (see :func:`atomic_output`)."""
    with atomic_output(path) as (handle, _):
        handle.write(text)


def write_with(path, writer, binary=False):
    """Let ``writer(temporary_path)`` write the file, then move it into place atomically."""
    with atomic_output(path, binary=binary) as (_, temporary):
        writer(temporary)


def cif_text(cell, positions, symbols, charges, labels=None, title="madelung", comment=None):
    """A P1 CIF of the sites with their charges as oxidation states.

    Each kind of ion gets a typed symbol (``Na1+``, ``O2-``, ``Co3.5+``) listed in ``_atom_type``
    with its ``_atom_type_oxidation_number`` written exactly (``repr``), so non-integer charges
    (equilibrated, averaged) read back with the same numbers. ``comment`` lines go after the
    data block name.

    References
    ----------
    S. R. Hall, F. H. Allen and I. D. Brown, Acta Cryst. A47 (1991) 655 (the CIF format).
    """
    import numpy as np
    from ase.geometry import cell_to_cellpar

    cell = np.asarray(cell, dtype=float)
    a, b, c, alpha, beta, gamma = cell_to_cellpar(cell)
    fractional = np.linalg.solve(cell.T, np.asarray(positions, dtype=float).T).T
    fractional -= np.floor(fractional + 1e-12)
    labels = list(labels) if labels is not None else [f"{s}{i + 1}" for i, s in enumerate(symbols)]
    types = {}
    for symbol, q in zip(symbols, charges):
        key = (str(symbol), float(q))
        if key not in types:
            name = f"{symbol}{abs(key[1]):.6g}{'-' if key[1] < 0 else '+'}"
            while name in types.values():   # two charges that print alike: still two kinds
                name += "x"
            types[key] = name
    out = [f"data_{''.join(ch if ch.isalnum() else '_' for ch in title) or 'madelung'}"]
    out += [f"# {line}" for line in str(comment or "").splitlines()]
    out += ["_symmetry_space_group_name_H-M 'P 1'", "_symmetry_Int_Tables_number 1",
            "loop_", "_symmetry_equiv_pos_as_xyz", "'x, y, z'",
            f"_cell_length_a {a:.10f}", f"_cell_length_b {b:.10f}", f"_cell_length_c {c:.10f}",
            f"_cell_angle_alpha {alpha:.10f}", f"_cell_angle_beta {beta:.10f}", f"_cell_angle_gamma {gamma:.10f}",
            "", "loop_", "_atom_type_symbol", "_atom_type_oxidation_number"]
    out += [f"{name} {q!r}" for (_, q), name in types.items()]
    out += ["", "loop_", "_atom_site_label", "_atom_site_type_symbol", "_atom_site_fract_x", "_atom_site_fract_y",
            "_atom_site_fract_z", "_atom_site_occupancy"]
    for label, symbol, q, f in zip(labels, symbols, charges, fractional):
        safe = "".join(ch for ch in str(label) if not ch.isspace()) or "X"
        out.append(f"{safe} {types[(str(symbol), float(q))]} {f[0]:.12f} {f[1]:.12f} {f[2]:.12f} 1.0")
    return "\n".join(out) + "\n"
