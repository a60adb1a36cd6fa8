"""Inputs of a batch: files, folders, globs or an ASE database, turned into a stream of tasks in a fixed order.

Each task has a ``source`` that names it in the table: the path, or ``DATABASE@ID``.
"""

from __future__ import annotations

import glob as globbing
import os
from dataclasses import dataclass

from ..errors import InputError, one_line
from ..io.read import structures_to_read


#: File endings read from a folder.
STRUCTURE_ENDINGS = (".cif", ".mcif", ".vasp", ".poscar", ".xyz", ".extxyz", ".traj", ".json", ".xsf", ".res")


@dataclass(frozen=True)
class Task:
    """One structure to screen: its place in the input order, its name, and where to read it."""

    index: int
    source: str
    path: str
    db_id: int = -1
    block: str | None = None


def _is_glob(text):
    return any(ch in text for ch in "*?[")


def _is_database(path):
    return path.lower().endswith(".db")


def _folder_files(folder):
    found = []
    for root, dirs, files in os.walk(folder):
        dirs.sort()
        for name in sorted(files):
            lower = name.lower()
            if lower.endswith(STRUCTURE_ENDINGS) or lower.startswith(("poscar", "contcar")):
                found.append(os.path.join(root, name))
    return found


def _database_ids(path, select):
    import ase.db

    if not os.path.exists(path):
        raise InputError(f"{path}: no such database")
    try:
        connection = ase.db.connect(path, type="db")
        for row in connection.select(select or None, include_data=False):
            yield int(row.id)
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{path}: cannot select rows {select!r} ({one_line(exc)[:200]})") from None


def iter_tasks(inputs=(), db=None, select=None):
    """The tasks of a job in their fixed order (a generator: nothing is held but the current one).

    Parameters
    ----------
    inputs : sequence of str
        Files, folders (searched recursively for structure files), globs (``**`` allowed) and
        ASE databases (``*.db``). A path that does not exist still makes a task, whose row then
        says so. A file named twice is screened once.
    db : str, optional
        An ASE database (SQLite by default) to take structures from as well.
    select : str, optional
        ASE database selection, e.g. ``"natoms<100"`` (applies to every database input).
    """
    index = 0
    seen = set()
    databases = [db] if db else []
    for item in inputs:
        item = os.fspath(item)
        if _is_database(item) and not _is_glob(item):
            databases.append(item)
            continue
        if _is_glob(item):
            paths = sorted(globbing.glob(item, recursive=True))
            if not paths:
                raise InputError(f"{item}: no file matches")
            paths = [p for p in paths if not os.path.isdir(p)]
        elif os.path.isdir(item):
            paths = _folder_files(item)
            if not paths:
                raise InputError(f"{item}: no structure files in this folder")
        else:
            paths = [item]
        for path in paths:
            path = os.path.normpath(path)
            if path in seen:
                continue
            seen.add(path)
            blocks = structures_to_read(path)
            for block in blocks:   # a file with several data blocks (or frames) gives one task per block
                source = path if len(blocks) == 1 else f"{path}#{block}"
                yield Task(index, source, path, block=None if len(blocks) == 1 else block)
                index += 1
    for database in databases:
        database = os.path.normpath(os.fspath(database))
        for row_id in _database_ids(database, select):
            yield Task(index, f"{database}@{row_id}", database, row_id)
            index += 1


def count_tasks(inputs=(), db=None, select=None) -> int:
    """How many tasks :func:`iter_tasks` yields (a second pass over the inputs, holding nothing)."""
    return sum(1 for _ in iter_tasks(inputs, db, select))
