"""One task of a batch: read one structure, give it charges, describe it; every failure becomes the row's
``status`` (``"ok"`` or the message) instead of an exception.
"""

from __future__ import annotations

import math
import os
import time
import traceback
import warnings
from dataclasses import dataclass

import numpy as np

from ..structure.crystal import check_size
from ..errors import InputError, one_line
from ..io.cif import use_tree_when_faster
from ..io.read import charge_table
from ..io.read import read_sites
from ..io.read import sites_from_atoms


# ---------------------------------------------------------------- options and tasks
@dataclass(frozen=True)
class ScreenOptions:
    """How each structure is treated (the same for every structure of a job).

    Attributes
    ----------
    charges : ``"file"`` (default), ``"auto"`` or ``"equilibrate"``: where charges come from.
    rules : ``((key, charge), ...)`` by element or site label; they override the file, and with
        ``"auto"`` they are kept as known oxidation states.
    tol : relative accuracy of the sums (default 1e-8).
    spectrum_length : length of the padded Ewald-sum-matrix spectrum.
    symmetry_tolerance : symmetry tolerance, Å, for the space group and ``"auto"`` charges.
    min_distance, max_atoms, occupancy : as for :meth:`madelung.Crystal.from_file`.
    sites : also return the per-site rows.
    """

    charges: str = "file"
    rules: tuple = ()
    tol: float = 1e-8
    spectrum_length: int = 40
    symmetry_tolerance: float = 1e-2
    min_distance: float = 0.5
    max_atoms: int = 20000
    occupancy: str = "average"
    sites: bool = False
    allow_net_charge: bool = False


# ---------------------------------------------------------------- the work of one structure
_PROCESS_READY = False


_DATABASES = {}


def prepare_process():
    """Make this process a screening worker: Numba and BLAS on one thread, no SIGINT handling.

    The job runs many small sums side by side, one per core; thread teams inside each would only
    fight over the same cores (and oversubscribed OpenBLAS is far slower than one thread).
    """
    global _PROCESS_READY
    import numba

    numba.set_num_threads(1)  # per thread: cheap, so every call sets it
    if _PROCESS_READY:
        return
    _PROCESS_READY = True
    use_tree_when_faster()    # many files: the k-d tree of site grouping pays where orbits are large
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[name] = "1"
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except ImportError:  # pragma: no cover - threadpoolctl is a dependency
        pass


def _read_atoms(task, options):
    """The sites of a task, read by the loader (a file, or an ``ase.Atoms`` of a database row)."""
    if task.db_id < 0:
        return read_sites(task.path, block=task.block, max_atoms=options.max_atoms)
    import ase.db

    connection = _DATABASES.get(task.path)
    if connection is None:
        connection = _DATABASES[task.path] = ase.db.connect(task.path, type="db")
    try:
        atoms = connection.get_atoms(id=task.db_id)
    except KeyError:
        raise InputError(f"{task.source}: no such row") from None
    if len(atoms) == 0:
        raise InputError(f"{task.source}: contains no atoms")
    check_size(len(atoms), options.max_atoms, task.source)
    return sites_from_atoms(atoms, task.source)


def _charged_crystal(table, task, options):
    """The crystal of a task with charges as the options say, by the loader's own charge step."""
    return charge_table(table, options.charges, rules=dict(options.rules), source=task.source,
                        symmetry_tolerance=options.symmetry_tolerance, min_distance=options.min_distance, occupancy=options.occupancy,
                        max_atoms=options.max_atoms, allow_net_charge=options.allow_net_charge).crystal


def _space_group(crystal, symmetry_tolerance):
    from ..structure.symmetry import _dataset, site_types

    data = _dataset(np.ascontiguousarray(crystal.cell), np.ascontiguousarray(crystal.fractional_positions),
                    site_types(crystal), symmetry_tolerance)
    if data is None:
        return "", -1
    return str(data.international), int(data.number)


def failed_row(task, status, options, seconds=math.nan) -> dict:
    """The row of a structure that could not be screened: identifiers, the message, NaN elsewhere."""
    from ..analysis.descriptors import empty_row

    return {"index": task.index, "source": task.source, "db_id": task.db_id, "status": status,
            "space_group": "", "space_group_number": -1, "charges_from": _charges_from(options),
            "settings": settings_text(options), **empty_row(options.spectrum_length), "notes": "",
            "seconds_read": math.nan, "seconds_charges": math.nan, "seconds_sums": math.nan,
            "seconds_total": seconds, "seconds_cpu": math.nan}


def settings_text(options) -> str:
    """The settings that change the numbers of a row, as the ``settings`` column holds them; a
    resumed run refuses a table whose rows were made with other settings."""
    return (f"tol={options.tol!r};charges={_charges_from(options)};symmetry_tolerance={options.symmetry_tolerance!r};"
            f"occupancy={options.occupancy};spectrum={options.spectrum_length}")


def _charges_from(options):
    rules = ",".join(f"{k}={v:+g}" for k, v in options.rules)
    return options.charges + (f"+rules({rules})" if rules else "")


def screen_task(task, options):
    """Screen one structure: ``(row, site_rows)``; failures go into ``row["status"]``, never raised.

    Parameters
    ----------
    task : Task
    options : ScreenOptions

    Returns
    -------
    (dict, list of dict)
        The row with :func:`table_columns` keys, and the per-site rows (empty unless
        ``options.sites`` and the structure was screened).
    """
    from ..analysis.descriptors import describe

    prepare_process()
    started = time.perf_counter()
    cpu_started = time.process_time()
    read = charged = summed = math.nan
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            atoms = _read_atoms(task, options)
            t1 = time.perf_counter()
            read = t1 - started
            crystal = _charged_crystal(atoms, task, options)
            group, number = _space_group(crystal, options.symmetry_tolerance)
            t2 = time.perf_counter()
            charged = t2 - t1
            description = describe(crystal, tol=options.tol, spectrum_length=options.spectrum_length,
                                   sites=options.sites)
            descriptors, sites = description.to_dict(), [dict(site) for site in description.sites or ()]
            summed = time.perf_counter() - t2
            status = "ok"
        except InputError as exc:
            status = one_line(exc)
        except MemoryError:
            status = "out of memory"
        except Exception as exc:  # a bug of ours, or a library's: the job goes on, the row says what
            frame = traceback.extract_tb(exc.__traceback__)[-1]
            status = (f"internal error: {type(exc).__name__}: {one_line(exc)[:200]} "
                      f"({os.path.basename(frame.filename)}:{frame.lineno})")
    notes = "; ".join(dict.fromkeys(one_line(w.message) for w in caught
                                    if not issubclass(w.category, (DeprecationWarning, ResourceWarning))))
    total = time.perf_counter() - started
    cpu = time.process_time() - cpu_started
    if status != "ok":
        row = failed_row(task, status, options, total)
        row.update(seconds_read=read, seconds_charges=charged, notes=notes[:500], seconds_cpu=cpu)
        return row, []
    row = {"index": task.index, "source": task.source, "db_id": task.db_id, "status": "ok", "space_group": group,
           "space_group_number": number, "charges_from": _charges_from(options),
           "settings": settings_text(options), **descriptors,
           "notes": notes[:500], "seconds_read": read, "seconds_charges": charged, "seconds_sums": summed,
           "seconds_total": total, "seconds_cpu": cpu}
    for site in sites:
        site["index"], site["source"] = task.index, task.source
    return row, sites
