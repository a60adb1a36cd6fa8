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
    :class:`LocalPool` runs the tasks on worker processes, at most two handed to a worker at a
    time, so a worker that crashes or runs past the per-structure timeout is replaced and its structure is
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

import os
import signal
import threading
import time
from collections import deque
from contextlib import contextmanager

from ..errors import InputError
from ..report.files import check_outputs, remove_stale_temporaries
from .executors import DaskExecutor, LocalPool
from .inputs import _is_database, _is_glob, count_tasks, iter_tasks
from .progress import Progress, ScreenSummary
from .tables import TableLock, TableWriter, _write_back, site_table_columns, table_columns
from .tasks import ScreenOptions, settings_text
from ..defaults import SCREENING_TOL


@contextmanager
def _interrupts_deferred():
    """Hold SIGINT (Ctrl-C) until the block is done, where the platform and thread allow it."""
    mask = getattr(signal, "pthread_sigmask", None)
    if mask is None or threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = mask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        yield
    finally:
        mask(signal.SIG_SETMASK, previous)


def screen(inputs=(), out="results.parquet", *, db=None, select=None, charges="file", charge_rules=None,
           tol=SCREENING_TOL, workers=None, scheduler=None, timeout=None, resume=False, sites=None, write_db=False,
           chunk_size=256, progress=True, spectrum_length=None, symmetry_tolerance=None, min_distance=0.5,
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
    from ..structure.crystal import DEFAULT_MAX_ATOMS
    from ..analysis.descriptors import SPECTRUM_LENGTH
    from ..structure.symmetry import DEFAULT_SYMMETRY_TOLERANCE

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
        symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE if symmetry_tolerance is None else float(symmetry_tolerance), min_distance=float(min_distance),
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
    # the workers start before the lock is taken: a forked worker would otherwise hold the lock
    # file open, and keep a resumed run out after this one was killed
    if scheduler is not None:
        executor = DaskExecutor(scheduler, options, timeout)
        name = f"dask ({getattr(executor.client, 'scheduler', None) and executor.client.scheduler.address})"
    else:
        count = workers if workers else (os.cpu_count() or 1)
        executor = LocalPool(count, options, timeout)
        name = f"local pool ({len(executor.workers)} worker{'s' if len(executor.workers) > 1 else ''})"
    lock = None
    try:
        lock = TableLock(table.path)
        for path in outputs:
            remove_stale_temporaries(path)   # left by a run killed mid-write; the lock says none is alive
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
        executor.close(kill=True)
        if lock is not None:
            lock.release()
        raise

    # while the workers load their kernels, this process loads its table writers
    for writer in (table, site_writer):
        if writer is not None:
            writer.load()
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
        # Ctrl-C is held back while a chunk is written: arriving between the table's rename and
        # the clearing of the pending rows it would write them a second time on the way out
        nonlocal pending_rows, pending_sites, last_flush
        with _interrupts_deferred():
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
