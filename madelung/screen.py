"""Screening at scale: the descriptors of :mod:`madelung.analysis.descriptors` for thousands of structures.

One call, :func:`screen`, takes files, folders, globs or an ASE database, computes one row per
structure on a pool of worker processes (or on a Dask cluster), and writes a table (Parquet, CSV
or JSON lines, by extension) in chunks that each replace the file atomically, so an interrupted
run leaves a readable table and ``resume=True`` carries on where it stopped.

The parts, from the outside in:

inputs
    :func:`iter_tasks` turns the inputs into a stream of tasks in a fixed order (the inputs in the
    order given; inside a folder or glob, sorted paths; database rows by id). Each task has a
    ``source`` that names it in the table: the path, or ``DATABASE@ID``.
work
    :func:`screen_task` reads one structure, gives it charges, and describes it; every failure
    becomes the row's ``status`` (``"ok"`` or the message) instead of an exception.
execution
    :class:`LocalPool` runs the tasks on worker processes, one task per worker at a time, so a
    worker that crashes or runs past the per-structure timeout is replaced and its structure is
    recorded as failed. :class:`DaskExecutor` does the same through ``dask.distributed``.
    Each worker runs Numba and BLAS on one thread: the parallelism is across structures.
output
    :class:`TableWriter` appends chunks by writing a new file beside the old one and renaming it
    over the old one (atomic on POSIX). Chunks grow with the table (at least a quarter of what is
    written) so the rewriting costs a bounded multiple of the final size.

Row order is the input order, whatever the executor: results are buffered until the rows before
them are in, and no more than a fixed window of tasks is in flight, so memory does not grow with
the number of structures.

Limits: the descriptors are those of a point-charge model (see :mod:`madelung.analysis.descriptors`).
"""

from __future__ import annotations

import glob as globbing
import json
import math
import os
import shutil
import sys
import time
import traceback
import warnings
from collections import deque
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .crystal import check_size
from .io.read import charge_table, read_sites, sites_from_atoms, structures_to_read
from .report.files import atomic_output, check_outputs, remove_stale_temporaries

#: Columns that come before the descriptors, with their types.
ID_COLUMNS = {"index": "int", "source": "str", "db_id": "int", "status": "str", "space_group": "str",
              "space_group_number": "int", "charges_from": "str", "settings": "str"}

#: Columns that come after the descriptors: warnings raised for the structure, and timings (s).
TAIL_COLUMNS = {"notes": "str", "seconds_read": "float", "seconds_charges": "float",
                "seconds_sums": "float", "seconds_total": "float", "seconds_cpu": "float"}

#: Columns that differ between identical runs (timings: wall seconds of each stage, and the CPU
#: seconds of the worker process for the whole structure; wall above CPU means a busy machine).
TIMING_COLUMNS = ("seconds_read", "seconds_charges", "seconds_sums", "seconds_total", "seconds_cpu")

#: File endings read from a folder.
STRUCTURE_ENDINGS = (".cif", ".mcif", ".vasp", ".poscar", ".xyz", ".extxyz", ".traj", ".json", ".xsf", ".res")

FORMATS = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".jsonl": "jsonl", ".ndjson": "jsonl"}


def table_columns(spectrum_length=None) -> dict:
    """Every column of the screening table with its type, in order."""
    from .analysis.descriptors import SPECTRUM_LENGTH, column_types

    length = SPECTRUM_LENGTH if spectrum_length is None else spectrum_length
    return {**ID_COLUMNS, **column_types(length), **TAIL_COLUMNS}


def site_table_columns() -> dict:
    """Columns of the per-site table: the structure's index and source, then the site values."""
    from .analysis.descriptors import SITE_COLUMNS

    return {"index": "int", "source": "str", **SITE_COLUMNS}


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
    symprec : symmetry tolerance, Å, for the space group and ``"auto"`` charges.
    min_distance, max_atoms, occupancy : as for :meth:`madelung.Crystal.from_file`.
    sites : also return the per-site rows.
    """

    charges: str = "file"
    rules: tuple = ()
    tol: float = 1e-8
    spectrum_length: int = 40
    symprec: float = 1e-2
    min_distance: float = 0.5
    max_atoms: int = 20000
    occupancy: str = "average"
    sites: bool = False
    allow_net_charge: bool = False


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
        message = " ".join(str(exc).split()) or type(exc).__name__
        raise InputError(f"{path}: cannot select rows {select!r} ({message[:200]})") from None


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
                        symprec=options.symprec, min_distance=options.min_distance, occupancy=options.occupancy,
                        max_atoms=options.max_atoms, allow_net_charge=options.allow_net_charge).crystal


def _space_group(crystal, symprec):
    from .symmetry import _dataset, site_types

    data = _dataset(np.ascontiguousarray(crystal.cell), np.ascontiguousarray(crystal.fractional_positions),
                    site_types(crystal), symprec)
    if data is None:
        return "", -1
    return str(data.international), int(data.number)


def _one_line(exc):
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def failed_row(task, status, options, seconds=math.nan) -> dict:
    """The row of a structure that could not be screened: identifiers, the message, NaN elsewhere."""
    from .analysis.descriptors import empty_row

    return {"index": task.index, "source": task.source, "db_id": task.db_id, "status": status,
            "space_group": "", "space_group_number": -1, "charges_from": _charges_from(options),
            "settings": settings_text(options), **empty_row(options.spectrum_length), "notes": "",
            "seconds_read": math.nan, "seconds_charges": math.nan, "seconds_sums": math.nan,
            "seconds_total": seconds, "seconds_cpu": math.nan}


def settings_text(options) -> str:
    """The settings that change the numbers of a row, as the ``settings`` column holds them; a
    resumed run refuses a table whose rows were made with other settings."""
    return (f"tol={options.tol!r};charges={_charges_from(options)};symprec={options.symprec!r};"
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
    from .analysis.descriptors import describe

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
            group, number = _space_group(crystal, options.symprec)
            t2 = time.perf_counter()
            charged = t2 - t1
            result = describe(crystal, tol=options.tol, spectrum_length=options.spectrum_length,
                              sites=options.sites)
            descriptors, sites = result if options.sites else (result, [])
            summed = time.perf_counter() - t2
            status = "ok"
        except InputError as exc:
            status = _one_line(exc)
        except MemoryError:
            status = "out of memory"
        except Exception as exc:  # a bug of ours, or a library's: the job goes on, the row says what
            frame = traceback.extract_tb(exc.__traceback__)[-1]
            status = (f"internal error: {type(exc).__name__}: {_one_line(exc)[:200]} "
                      f"({os.path.basename(frame.filename)}:{frame.lineno})")
    notes = "; ".join(dict.fromkeys(_one_line(w.message) for w in caught
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


# ---------------------------------------------------------------- executors
#: Modules the fork server imports once, so that every worker starts with them loaded (running a
#: Numba kernel there is another matter: its OpenMP runtime does not survive a fork).
PRELOAD = ("madelung.screen", "madelung.analysis.descriptors", "madelung.analysis.madelung_constants", "madelung.sums.matrix",
           "madelung.symmetry", "madelung.charges", "ase.io", "ase.io.cif", "ase.db", "spglib", "scipy.special")


def _worker_main(connection, options):
    """Loop of a pool worker: receive a task, send back its result; stop at None or a closed pipe."""
    import signal

    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent decides what an interrupt means
    prepare_process()
    while True:
        try:
            task = connection.recv()
        except (EOFError, OSError):
            return
        if task is None:
            return
        result = screen_task(task, options)
        try:
            connection.send((task.index, result))
        except (BrokenPipeError, OSError):
            return


@contextmanager
def _main_module_hidden():
    """Start workers without re-running the caller's main script in them.

    A fork-server or spawned child normally imports the parent's ``__main__`` first, which runs a
    script without an ``if __name__ == "__main__"`` guard again (and starts workers from the
    workers). Our workers need nothing from it: their code lives in this module.
    """
    main = sys.modules.get("__main__")
    saved = {name: main.__dict__[name] for name in ("__file__", "__spec__") if main is not None
             and name in main.__dict__}
    if main is not None:
        main.__dict__.pop("__file__", None)
        main.__spec__ = None
    try:
        yield
    finally:
        if main is not None:
            main.__dict__.update(saved)


class _Worker:
    def __init__(self, context, options):
        self.connection, child = context.Pipe()
        self.process = context.Process(target=_worker_main, args=(child, options), daemon=True)
        with _main_module_hidden():
            self.process.start()
        child.close()
        self.task = None
        self.started = 0.0

    def stop(self, kill=False):
        try:
            if kill:
                self.process.kill()
            else:
                self.connection.send(None)
        except (BrokenPipeError, OSError):
            pass
        self.process.join(timeout=None if kill else 5)
        if self.process.is_alive():
            self.process.kill()
            self.process.join()
        self.connection.close()


class LocalPool:
    """Worker processes on this machine, one task each at a time.

    A worker is started from a fork server that has imported madelung already (so start-up costs
    little, and the Numba kernels load from their on-disk cache once per worker). A worker that
    dies, or runs one structure longer than ``timeout`` seconds (it is then killed), is replaced;
    its structure gets a failed row.
    """

    def __init__(self, workers, options, timeout=None):
        import multiprocessing

        self.options = options
        self.timeout = timeout
        methods = multiprocessing.get_all_start_methods()
        self.context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
        if self.context.get_start_method() == "forkserver":
            self.context.set_forkserver_preload(list(PRELOAD))
        self.workers = [_Worker(self.context, options) for _ in range(max(1, int(workers)))]
        self.capacity = len(self.workers)

    def idle(self):
        return sum(1 for w in self.workers if w.task is None)

    def busy(self):
        return sum(1 for w in self.workers if w.task is not None)

    def submit(self, task):
        worker = next(w for w in self.workers if w.task is None)
        worker.task, worker.started = task, time.perf_counter()
        worker.connection.send(task)

    def _replace(self, worker, kill):
        position = self.workers.index(worker)
        worker.stop(kill=kill)
        self.workers[position] = _Worker(self.context, self.options)

    def collect(self, wait=0.5):
        """Results that are in: a list of ``(task, (row, sites))``; waits up to ``wait`` s for one."""
        from multiprocessing.connection import wait as wait_for

        busy = [w for w in self.workers if w.task is not None]
        if not busy:
            return []
        now = time.perf_counter()
        if self.timeout:
            wait = max(0.0, min(wait, min(w.started + self.timeout for w in busy) - now))
        ready = set(wait_for([w.connection for w in busy] + [w.process.sentinel for w in busy], timeout=wait))
        done = []
        now = time.perf_counter()
        for worker in busy:
            task = worker.task
            if worker.connection in ready or worker.connection.poll():
                try:
                    _, result = worker.connection.recv()
                except (EOFError, OSError):
                    result = None
                if result is not None:
                    worker.task = None
                    done.append((task, result))
                    continue
            if worker.process.sentinel in ready or not worker.process.is_alive():
                worker.process.join(timeout=1)
                code = worker.process.exitcode
                status = f"worker crashed (exit code {code}) while screening this structure"
                done.append((task, (failed_row(task, status, self.options, now - worker.started), [])))
                self._replace(worker, kill=True)
            elif self.timeout and now - worker.started > self.timeout:
                status = f"timed out after {self.timeout:g} s (worker stopped)"
                done.append((task, (failed_row(task, status, self.options, now - worker.started), [])))
                self._replace(worker, kill=True)
        return done

    def close(self, kill=False):
        for worker in self.workers:
            worker.stop(kill=kill)


class DaskExecutor:
    """The same tasks on a Dask distributed cluster (``pip install madelung[dask]``).

    ``scheduler`` is an address (``tcp://host:8786``) or a ``dask.distributed.Client``. A task
    that has not finished ``timeout`` seconds after it was handed to the cluster is recorded as
    timed out and cancelled (Dask cannot stop a running task: its thread may finish in vain).
    A task whose worker died more often than the cluster allows is recorded as crashed.

    Security: results come back through Dask's serialisation (pickle), so whoever controls the
    scheduler or a worker can run code in this process. Use only a cluster you trust.
    """

    def __init__(self, scheduler, options, timeout=None):
        try:
            from dask.distributed import Client
        except ImportError:
            raise InputError("--scheduler needs Dask: pip install 'madelung[dask]'") from None
        if isinstance(scheduler, Client):
            self.client, self.own_client = scheduler, False
        else:
            try:
                self.client = Client(str(scheduler), timeout=30)
            except Exception as exc:
                raise InputError(f"cannot reach the Dask scheduler at {scheduler} ({_one_line(exc)[:160]})") from None
            self.own_client = True
        self.options = options
        self.timeout = timeout
        threads = sum(self.client.nthreads().values()) or 1
        self.capacity = 2 * threads
        self.futures = {}

    def idle(self):
        return self.capacity - len(self.futures)

    def busy(self):
        return len(self.futures)

    def submit(self, task):
        future = self.client.submit(screen_task, task, self.options, pure=False)
        self.futures[future] = (task, time.perf_counter())

    def collect(self, wait=0.5):
        from dask.distributed import wait as wait_for

        if not self.futures:
            return []
        try:
            wait_for(list(self.futures), timeout=wait, return_when="FIRST_COMPLETED")
        except Exception:  # distributed's TimeoutError: nothing finished yet
            pass
        done = []
        now = time.perf_counter()
        for future, (task, submitted) in list(self.futures.items()):
            if future.done():
                del self.futures[future]
                try:
                    done.append((task, future.result()))
                except Exception as exc:
                    name = type(exc).__name__
                    status = (f"worker crashed while screening this structure ({name})" if name == "KilledWorker"
                              else f"internal error: {name}: {_one_line(exc)[:200]}")
                    done.append((task, (failed_row(task, status, self.options, now - submitted), [])))
            elif self.timeout and now - submitted > self.timeout:
                del self.futures[future]
                future.cancel()
                status = f"timed out after {self.timeout:g} s (task cancelled)"
                done.append((task, (failed_row(task, status, self.options, now - submitted), [])))
        return done

    def close(self, kill=False):
        for future in self.futures:
            future.cancel()
        self.futures.clear()
        if self.own_client:
            self.client.close()


# ---------------------------------------------------------------- output
def output_format(path) -> str:
    ending = os.path.splitext(os.fspath(path))[1].lower()
    if ending not in FORMATS:
        raise InputError(f"{path}: unknown table format {ending or '(no ending)'}; use .parquet, .csv or .jsonl")
    return FORMATS[ending]


def _arrow_schema(columns):
    import pyarrow as pa

    kinds = {"int": pa.int64(), "float": pa.float64(), "str": pa.string()}
    return pa.schema([(name, kinds[kind]) for name, kind in columns.items()])


def _json_value(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _parse_text(value, kind):
    if kind == "str":
        return "" if value is None else str(value)
    if value in (None, ""):
        return -1 if kind == "int" else math.nan
    return int(value) if kind == "int" else float(value)


class TableWriter:
    """A table on disk that grows by whole chunks, each one an atomic replacement of the file.

    Parquet: the old row groups are copied into a new file, the chunk becomes one more row group.
    CSV and JSON lines: the old file is copied and the chunk appended. Then the new file is renamed
    over the old one, so a reader (or a resumed run) always sees a complete table.
    """

    def __init__(self, path, columns):
        self.path = os.fspath(path)
        self.format = output_format(self.path)
        self.columns = dict(columns)
        self.rows_written = 0
        self.fresh = False    # the next append replaces the file instead of extending it
        if self.format == "parquet":
            try:
                import pyarrow  # noqa: F401
            except ImportError:
                raise InputError("writing Parquet needs pyarrow: pip install pyarrow") from None
        folder = os.path.dirname(os.path.abspath(self.path))
        if not os.path.isdir(folder):
            raise InputError(f"{self.path}: folder {folder} does not exist")

    # reading back (for resume)
    def read(self):
        """Every row of the table on disk as dicts (``[]`` if there is no file)."""
        if not os.path.exists(self.path):
            return []
        try:
            if self.format == "parquet":
                import pyarrow.parquet as pq

                return pq.read_table(self.path).to_pylist()
            if self.format == "csv":
                import csv

                with open(self.path, newline="", encoding="utf-8") as handle:
                    return [{k: _parse_text(v, self.columns.get(k, "str")) for k, v in row.items()}
                            for row in csv.DictReader(handle)]
            rows = []
            with open(self.path, encoding="utf-8") as handle:
                for line in handle:
                    if line.strip():
                        rows.append({k: _parse_text(v, self.columns.get(k, "str"))
                                     for k, v in json.loads(line).items()})
            return rows
        except Exception as exc:
            raise InputError(f"{self.path}: cannot read the existing table to resume ({_one_line(exc)[:160]})") \
                from None

    def start(self, rows=()):
        """Begin the table with ``rows`` (an empty table if none), replacing any file there."""
        self._replace(list(rows), keep_old=False)
        self.rows_written = len(rows)

    def append(self, rows):
        if rows or self.fresh:
            self._replace(rows, keep_old=not self.fresh)
            self.fresh = False
            self.rows_written += len(rows)

    def _replace(self, rows, keep_old):
        """Write the new table to a fresh file beside the old one (``atomic_output``: created with an
        unpredictable name, never through a link) and rename it over the old one; a failed write
        (a full disk) leaves the old table as it was and no partial file."""
        old = self.path if keep_old and os.path.exists(self.path) else None
        rows = [{name: row.get(name) for name in self.columns} for row in rows]
        binary = self.format == "parquet"
        with atomic_output(self.path, binary=binary) as (handle, _):
            if binary:
                import pyarrow as pa
                import pyarrow.parquet as pq

                schema = _arrow_schema(self.columns)
                with pq.ParquetWriter(handle, schema) as writer:
                    if old is not None:
                        previous = pq.ParquetFile(old)
                        for group in range(previous.num_row_groups):
                            writer.write_table(previous.read_row_group(group).cast(schema))
                    if rows or old is None:
                        writer.write_table(pa.Table.from_pylist(rows, schema=schema))
                return
            if old is not None:
                with open(old, encoding="utf-8", newline="") as previous:
                    shutil.copyfileobj(previous, handle)
            if self.format == "csv":
                import csv

                writer = csv.writer(handle)
                if old is None:
                    writer.writerow(list(self.columns))
                for row in rows:
                    writer.writerow(["" if isinstance(v, float) and math.isnan(v) else
                                     (repr(v) if isinstance(v, float) else v) for v in row.values()])
            else:
                for row in rows:
                    handle.write(json.dumps({k: _json_value(v) for k, v in row.items()}) + "\n")

    def sort_by_index(self):
        """Rewrite the table in input order (after a resumed run has appended out of order)."""
        rows = self.read()
        rows.sort(key=lambda r: (r.get("index", 0), r.get("site", 0)))
        self._replace(rows, keep_old=False)


def _write_back(database, rows):
    """Store the scalar results of database rows as key-value pairs ``madelung_<column>``."""
    import ase.db

    from .analysis.descriptors import spectrum_columns

    skip = set(spectrum_columns(10000)) | {"index", "source", "db_id", "species_potentials_V", "formula",
                                           "reduced_formula", "notes", "ewald_matrix_note", *TIMING_COLUMNS}
    connection = ase.db.connect(database, type="db")
    with connection:
        for row in rows:
            if row.get("db_id", -1) < 0 or not row["source"].startswith(database + "@"):
                continue
            pairs = {}
            for key, value in row.items():
                if key in skip or value is None or (isinstance(value, float) and not math.isfinite(value)):
                    continue
                pairs[f"madelung_{key}"] = value if not isinstance(value, str) else value[:300]
            connection.update(int(row["db_id"]), **pairs)


class TableLock:
    """A lock file beside the table (``TABLE.lock``) held for the whole run: a second run writing
    the same table is refused instead of interleaving its rows. The lock is an advisory
    ``flock``, so the kernel drops it when a run dies (even by SIGKILL) and a stale lock file
    never blocks a resume."""

    def __init__(self, path):
        import fcntl

        self.path = os.fspath(path) + ".lock"
        try:
            self.descriptor = os.open(self.path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
        except OSError as exc:
            raise InputError(f"{self.path}: cannot create the lock file of the table "
                             f"({exc.strerror or exc})") from None
        try:
            fcntl.flock(self.descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
            same = os.fstat(self.descriptor).st_ino == os.stat(self.path).st_ino
        except OSError:
            same = False
        if not same:
            os.close(self.descriptor)
            self.descriptor = None
            raise InputError(f"{path}: another run is writing this table (lock {self.path}); wait for it to end")

    def release(self):
        if self.descriptor is None:
            return
        try:
            os.unlink(self.path)
        except OSError:
            pass
        os.close(self.descriptor)
        self.descriptor = None


# ---------------------------------------------------------------- progress
class Progress:
    """A bar on a terminal (tqdm), plain periodic lines otherwise (logs, CI)."""

    def __init__(self, total, stream=None, enabled=True, every=10.0):
        self.total = total
        self.stream = stream or sys.stderr
        self.enabled = enabled
        self.every = every
        self.done = self.failed = 0
        self.started = self.last = time.perf_counter()
        self.bar = None
        if enabled and getattr(self.stream, "isatty", lambda: False)():
            try:
                from tqdm import tqdm

                self.bar = tqdm(total=total, file=self.stream, unit="structure", dynamic_ncols=True,
                                desc="screen", smoothing=0.1)
            except ImportError:
                self.bar = None

    def update(self, ok, failed):
        self.done += ok + failed
        self.failed += failed
        if not self.enabled:
            return
        if self.bar is not None:
            self.bar.update(ok + failed)
            self.bar.set_postfix_str(f"failed {self.failed}", refresh=False)
            return
        now = time.perf_counter()
        if now - self.last >= self.every:
            self.last = now
            print(self.line(), file=self.stream, flush=True)

    def line(self):
        elapsed = time.perf_counter() - self.started
        rate = self.done / elapsed if elapsed > 0 else 0.0
        left = (self.total - self.done) / rate if rate > 0 and self.total else math.nan
        share = f" ({100 * self.done / self.total:.0f}%)" if self.total else ""
        eta = f", ETA {left:.0f} s" if math.isfinite(left) else ""
        waiting = "; workers starting (a first run compiles the Numba kernels once)" if self.done == 0 else ""
        return f"screen: {self.done}/{self.total}{share} done, {self.failed} failed, {rate:.1f}/s{eta}{waiting}"

    def close(self):
        if self.bar is not None:
            self.bar.close()


# ---------------------------------------------------------------- the job
@dataclass(frozen=True)
class ScreenSummary:
    """What a job did.

    Attributes
    ----------
    total : structures in the input.
    ok, failed : rows screened in this run with status ok / with an error.
    skipped : structures already ok in the table (``resume``).
    seconds : wall time of the run, s.
    out, sites : the tables written.
    executor : ``"local pool (N workers)"`` or ``"dask (ADDRESS)"``.
    """

    total: int
    ok: int
    failed: int
    skipped: int
    seconds: float
    out: str
    sites: str | None
    executor: str
    failures: tuple = field(default=())

    @property
    def rate(self) -> float:
        """Structures screened per second in this run."""
        return (self.ok + self.failed) / self.seconds if self.seconds > 0 else math.nan

    def line(self) -> str:
        skipped = f", {self.skipped} already done (resume)" if self.skipped else ""
        return (f"screen: {self.total} structures: {self.ok} ok, {self.failed} failed{skipped}; "
                f"{self.seconds:.1f} s ({self.rate:.1f}/s) on {self.executor}; table {self.out}")

    def as_dict(self):
        return {"total": self.total, "ok": self.ok, "failed": self.failed, "skipped": self.skipped,
                "seconds": self.seconds, "structures_per_second": self.rate if math.isfinite(self.rate) else None,
                "out": self.out,
                "sites": self.sites, "executor": self.executor,
                "failures": [{"source": s, "status": m} for s, m in self.failures]}


def screen(inputs=(), out="results.parquet", *, db=None, select=None, charges="file", charge_rules=None,
           tol=1e-8, workers=None, scheduler=None, timeout=None, resume=False, sites=None, write_db=False,
           chunk_size=256, progress=True, spectrum_length=None, symprec=None, min_distance=0.5,
           max_atoms=None, occupancy="average", progress_every=10.0, allow_net_charge=False,
           overwrite=False) -> ScreenSummary:
    """Screen many structures and write one row each (see the module docstring).

    Parameters
    ----------
    inputs : sequence of str
        Files, folders, globs and ASE databases (see :func:`iter_tasks`).
    out : str
        The table: ``.parquet`` (pyarrow), ``.csv`` or ``.jsonl``, columns :func:`table_columns`.
    db, select : str, optional
        An ASE database and a row selection (e.g. ``"natoms<100"``).
    charges : ``"file"``, ``"auto"`` or ``"equilibrate"``
        Where charges come from (``"file"``: CIF oxidation states, ASE initial charges).
    charge_rules : mapping, optional
        Charges by element or site label, e.g. ``{"Na": 1, "Cl": -1}``; they override the file.
    tol : float
        Relative accuracy of every sum (default 1e-8).
    workers : int, optional
        Worker processes of the local pool (default: every core).
    scheduler : str or dask.distributed.Client, optional
        Run on this Dask cluster instead of the local pool.
    timeout : float, optional
        Seconds allowed per structure; a structure over it is recorded as failed.
    resume : bool
        Keep the rows of ``out`` whose status is ok and screen only the rest. The rows must have
        been made with the same settings (tolerance, charges, symmetry tolerance, occupancy).
    overwrite : bool
        Replace an existing ``out`` (and ``sites``) table. Without it, and without ``resume``, an
        existing table is refused. The old table stays whole until the first new chunk replaces it.
    sites : str, optional
        Also write the per-site table here (same formats).
    write_db : bool
        Store the results of database rows back in their database as ``madelung_*`` key-value pairs.
    chunk_size : int
        Smallest number of rows written at once (chunks grow to a quarter of the table).
    progress : bool
        Show progress on stderr (a bar on a terminal, a line every ``progress_every`` s otherwise).
    allow_net_charge : bool
        Sum structures the file leaves charged with a neutralizing background instead of failing them.

    Returns
    -------
    ScreenSummary
    """
    from .crystal import DEFAULT_MAX_ATOMS
    from .analysis.descriptors import SPECTRUM_LENGTH
    from .symmetry import DEFAULT_SYMPREC

    if charges not in ("file", "auto", "equilibrate"):
        raise InputError(f"charges must be 'file', 'auto' or 'equilibrate', got {charges!r}")
    if not (isinstance(tol, (int, float)) and 0 < tol < 1):
        raise InputError(f"tol must lie between 0 and 1, got {tol!r}")
    if timeout is not None and not timeout > 0:
        raise InputError(f"timeout must be a positive number of seconds, got {timeout!r}")
    if write_db and not (db or any(_is_database(os.fspath(i)) for i in inputs)):
        raise InputError("--write-db needs a database input (--db FILE)")
    rules = tuple(sorted((str(k), float(v)) for k, v in (charge_rules or {}).items()))
    options = ScreenOptions(
        charges=charges, rules=rules, tol=float(tol),
        spectrum_length=SPECTRUM_LENGTH if spectrum_length is None else int(spectrum_length),
        symprec=DEFAULT_SYMPREC if symprec is None else float(symprec), min_distance=float(min_distance),
        max_atoms=DEFAULT_MAX_ATOMS if max_atoms is None else int(max_atoms), occupancy=occupancy,
        sites=bool(sites), allow_net_charge=bool(allow_net_charge))
    columns = table_columns(options.spectrum_length)
    table = TableWriter(out, columns)
    site_writer = TableWriter(sites, site_table_columns()) if sites else None
    if site_writer is not None and os.path.abspath(site_writer.path) == os.path.abspath(table.path):
        raise InputError(f"{sites}: the site table must be another file than the results table")
    if workers is not None and (not isinstance(workers, int) or workers < 1):
        raise InputError(f"workers must be at least 1, got {workers!r}")
    outputs = [table.path] + ([site_writer.path] if site_writer is not None else [])
    named = [os.fspath(i) for i in inputs if not _is_glob(os.fspath(i))] + ([os.fspath(db)] if db else [])
    check_outputs(outputs, inputs=named, overwrite=True)
    if not resume and not overwrite:
        for path in outputs:
            if os.path.lexists(path):
                raise InputError(f"{path}: exists; pass --resume to continue it or --overwrite to replace it")

    # every check that can fail comes before the existing table is touched
    total = count_tasks(inputs, db, select)
    lock = TableLock(table.path)
    executor = None
    try:
        for path in outputs:
            remove_stale_temporaries(path)   # left by a run killed mid-write; the lock says none is alive
        if scheduler is not None:
            executor = DaskExecutor(scheduler, options, timeout)
            name = f"dask ({getattr(executor.client, 'scheduler', None) and executor.client.scheduler.address})"
        else:
            count = workers if workers else (os.cpu_count() or 1)
            executor = LocalPool(count, options, timeout)
            name = f"local pool ({executor.capacity} worker{'s' if executor.capacity > 1 else ''})"
        done_sources = set()
        if resume:
            kept = [row for row in table.read() if row.get("status") == "ok"]
            if kept and set(kept[0]) != set(columns):
                raise InputError(f"{table.path}: the table has other columns than this run writes (another spectrum "
                                 "length or madelung version?); resume into a new file instead")
            wanted = settings_text(options)
            other = next((row["settings"] for row in kept if row.get("settings") != wanted), None)
            if other is not None:
                raise InputError(f"{table.path}: rows were made with other settings ({other}) than this run "
                                 f"({wanted}); resume with the same settings or write a new table")
            done_sources = {row["source"] for row in kept}
            if site_writer is not None:
                site_writer.start([r for r in site_writer.read() if r.get("source") in done_sources])
            table.start(kept)
        else:
            # the old table (replaced with --overwrite) stays whole until the first chunk is written
            table.fresh = True
            if site_writer is not None:
                site_writer.fresh = True
    except BaseException:
        if executor is not None:
            executor.close(kill=True)
        lock.release()
        raise

    meter = Progress(total - len(done_sources), enabled=progress, every=progress_every)
    started = time.perf_counter()
    tasks = (t for t in iter_tasks(inputs, db, select) if t.source not in done_sources)
    window = 4 * executor.capacity + 2 * chunk_size   # tasks in flight or waiting for earlier rows
    ready = {}          # index -> (row, sites), waiting for the rows before it
    order = deque()     # indices handed out and not yet written, in input order
    pending_rows, pending_sites = [], []
    ok = failed = 0
    failures = []
    last_flush = time.perf_counter()
    databases = {db} if db else set()
    databases |= {os.path.normpath(os.fspath(i)) for i in inputs if _is_database(os.fspath(i))}

    def flush():
        nonlocal pending_rows, pending_sites, last_flush
        if site_writer is not None:
            site_writer.append(pending_sites)
        table.append(pending_rows)
        if write_db:
            for database in databases:
                _write_back(os.path.normpath(database), pending_rows)
        pending_rows, pending_sites = [], []
        last_flush = time.perf_counter()

    exhausted = False
    try:
        while True:
            while not exhausted and executor.idle() > 0 and len(order) < window:
                task = next(tasks, None)
                if task is None:
                    exhausted = True
                    break
                order.append(task.index)
                executor.submit(task)
            if exhausted and executor.busy() == 0 and not order:
                break
            for task, result in executor.collect():
                ready[task.index] = result
            fresh_ok = fresh_failed = 0
            while order and order[0] in ready:
                row, site_rows = ready.pop(order.popleft())
                pending_rows.append(row)
                pending_sites.extend(site_rows)
                if row["status"] == "ok":
                    fresh_ok += 1
                else:
                    fresh_failed += 1
                    if len(failures) < 1000:
                        failures.append((row["source"], row["status"]))
            ok += fresh_ok
            failed += fresh_failed
            meter.update(fresh_ok, fresh_failed)
            if pending_rows and (len(pending_rows) >= max(chunk_size, table.rows_written // 4)
                                 or time.perf_counter() - last_flush > 60.0):
                flush()
        flush()
    except BaseException:
        try:
            if pending_rows:
                flush()   # keep what is done; the file stays a complete table either way
        finally:
            executor.close(kill=True)
            meter.close()
            lock.release()
        raise
    try:
        executor.close()
        meter.close()
        if resume and done_sources:
            table.sort_by_index()
            if site_writer is not None:
                site_writer.sort_by_index()
    finally:
        lock.release()
    return ScreenSummary(total=total, ok=ok, failed=failed, skipped=len(done_sources),
                         seconds=time.perf_counter() - started, out=table.path,
                         sites=None if site_writer is None else site_writer.path, executor=name,
                         failures=tuple(failures))
