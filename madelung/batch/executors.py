"""Executors of a batch: :class:`LocalPool` runs tasks on worker processes, at most two handed to each
worker at a time (the one it runs and the next), so a worker that crashes or runs past the
per-structure timeout is replaced and its structure is recorded as failed; :class:`DaskExecutor` does the same through ``dask.distributed``. Each worker runs
Numba and BLAS on one thread: the parallelism is across structures.
"""

from __future__ import annotations

import sys
import time
from collections import deque
from contextlib import contextmanager

from ..errors import InputError, one_line
from .tasks import failed_row, prepare_process, screen_task


# ---------------------------------------------------------------- executors
#: Modules the fork server imports once, so that every worker starts with them loaded (running a
#: Numba kernel there is another matter: its OpenMP runtime does not survive a fork).
PRELOAD = ("madelung.batch", "madelung.analysis.descriptors", "madelung.analysis.madelung_constants",
           "madelung.sums.matrix", "madelung.structure.symmetry", "madelung.charges", "ase.io", "ase.io.cif", "ase.db", "spglib",
           "scipy.special", "scipy.spatial", "gemmi")   # scipy.spatial: the k-d tree of CIF site grouping

#: Of those, what every structure needs whatever its input (imported once before forking
#: workers); the ASE readers, the database and the k-d tree of CIF site grouping load in a worker
#: when its input needs them (see :func:`madelung.io.cif.use_tree_when_faster`).
FORK_PRELOAD = ("madelung.batch", "madelung.analysis.descriptors", "madelung.analysis.madelung_constants",
                "madelung.sums.matrix", "madelung.structure.symmetry", "madelung.charges", "spglib", "scipy.special",
                "gemmi")



#: This process's ends of the pipes to its workers. A forked worker closes its copies first thing:
#: holding the other end of its own pipe, it would never see the pipe close when the parent dies,
#: and would wait for a task for ever.
_PARENT_ENDS = []


def _worker_main(connection, options):
    """Loop of a pool worker: receive a task, send back its result; stop at None or a closed pipe."""
    import signal

    for end in _PARENT_ENDS:     # empty in a worker from the fork server
        end.close()
    _PARENT_ENDS.clear()
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


def _start_context(fork=True):
    """How a worker process is started: by fork where that is safe, else from the fork server.

    A fork copies this process as it is: the modules imported here come for free, so a worker
    starts in milliseconds instead of waiting for a fresh interpreter to import numpy, scipy, ASE
    and madelung (0.7 s on the 2-core reference machine, before the first row). It is safe when
    this process runs no other thread (a lock held by another thread would stay locked in the
    copy) and Numba has not started its thread pool here (the OpenMP runtime does not survive a
    fork); then, on Linux, fork is used unless ``fork`` is False. Otherwise the fork server (or
    spawn where there is none): a fresh interpreter that inherits no open file of this process.
    """
    import multiprocessing
    import threading

    methods = multiprocessing.get_all_start_methods()
    if fork and sys.platform.startswith("linux") and "fork" in methods and threading.active_count() == 1 \
            and not _numba_threads_started():
        return multiprocessing.get_context("fork")
    context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
    if context.get_start_method() == "forkserver":
        context.set_forkserver_preload(list(PRELOAD))
    return context


def _numba_threads_started():
    """Whether Numba's thread pool runs in this process (True when that cannot be told)."""
    parallel = sys.modules.get("numba.np.ufunc.parallel")
    return parallel is not None and bool(getattr(parallel, "_is_initialized", True))


def _import_all(names):
    import importlib

    for name in names:
        try:
            importlib.import_module(name)
        except ImportError:   # an optional reader (gemmi): the worker does without it as well
            pass


def _load_before_fork():
    """Import what every worker needs, once, in this process before it forks them.

    Also Numba's typing and target registries (about 0.15 s of CPU in each worker's first row
    otherwise): they are filled without compiling or running a kernel, so no thread starts. The
    kernels themselves load from Numba's on-disk cache in each worker (running one here would
    start Numba's thread pool and rule out the fork).
    """
    _import_all(FORK_PRELOAD)
    try:
        from numba.core.registry import cpu_target

        cpu_target.typing_context.refresh()
        cpu_target.target_context.refresh()
    except Exception:  # pragma: no cover - a warm-up only; the worker fills them on first use
        pass


#: Tasks handed to one worker at a time: the one it runs and the next, waiting in its pipe, so it
#: goes on at once while this process is busy (writing a chunk of the table, or descheduled on a
#: machine with as many workers as cores) instead of waiting for it.
TASKS_PER_WORKER = 2


class _Worker:
    def __init__(self, options, fork=True):
        context = _start_context(fork)
        self.connection, child = context.Pipe()
        _PARENT_ENDS.append(self.connection)
        self.process = context.Process(target=_worker_main, args=(child, options), daemon=True)
        with _main_module_hidden():
            self.process.start()
        child.close()
        self.tasks = deque()   # handed over, in order; the first is running
        self.started = 0.0     # when the first one started (when the result before it came in)

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
        if self.connection in _PARENT_ENDS:
            _PARENT_ENDS.remove(self.connection)


class LocalPool:
    """Worker processes on this machine, each with :data:`TASKS_PER_WORKER` tasks at most.

    Workers are forked from this process where that is safe (see :func:`_start_context`), after it
    has imported what they need, else started from a fork server that has; the Numba kernels load
    from their on-disk cache once per worker. A worker that dies, or runs one structure longer than
    ``timeout`` seconds (it is then killed), is replaced, from the fork server: a replacement
    starts while this process may hold open files (the table's lock) that a forked copy would keep
    open. The structure it was running gets a failed row; the task waiting behind it goes to the
    replacement.
    """

    def __init__(self, workers, options, timeout=None):
        self.options = options
        self.timeout = timeout
        count = max(1, int(workers))
        if _start_context().get_start_method() == "fork":
            _load_before_fork()
        self.workers = [_Worker(options) for _ in range(count)]
        self.capacity = TASKS_PER_WORKER * count

    def idle(self):
        return self.capacity - self.busy()

    def busy(self):
        return sum(len(w.tasks) for w in self.workers)

    def submit(self, task):
        worker = min(self.workers, key=lambda w: len(w.tasks))
        if not worker.tasks:
            worker.started = time.perf_counter()
        worker.tasks.append(task)
        worker.connection.send(task)

    def _replace(self, worker, kill):
        """A new worker in the place of ``worker``, with the tasks that waited behind its first."""
        position = self.workers.index(worker)
        worker.stop(kill=kill)
        self.workers[position] = _Worker(self.options, fork=False)
        for task in list(worker.tasks)[1:]:
            self.submit(task)

    def collect(self, wait=0.5):
        """Results that are in: a list of ``(task, (row, sites))``; waits up to ``wait`` s for one."""
        from multiprocessing.connection import wait as wait_for

        busy = [w for w in self.workers if w.tasks]
        if not busy:
            return []
        now = time.perf_counter()
        if self.timeout:
            wait = max(0.0, min(wait, min(w.started + self.timeout for w in busy) - now))
        ready = set(wait_for([w.connection for w in busy] + [w.process.sentinel for w in busy], timeout=wait))
        done = []
        for worker in busy:
            # one result per call from a pipe found ready (a second one is found by the next call
            # at once; each poll() of a pipe costs as much as the wait above)
            if worker.connection in ready:
                self._receive(worker, done)
            if not worker.tasks:
                continue
            dead = worker.process.sentinel in ready or not worker.process.is_alive()
            while dead and worker.tasks and worker.connection.poll():   # results sent before it died
                if not self._receive(worker, done):
                    break
            if not worker.tasks:
                continue
            now = time.perf_counter()
            task = worker.tasks[0]
            if dead:
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

    @staticmethod
    def _receive(worker, done):
        """Take one result from ``worker`` into ``done``; False if the pipe is closed."""
        try:
            _, result = worker.connection.recv()
        except (EOFError, OSError):
            return False
        done.append((worker.tasks.popleft(), result))
        worker.started = time.perf_counter()
        return True

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
                raise InputError(f"cannot reach the Dask scheduler at {scheduler} ({one_line(exc)[:160]})") from None
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
                              else f"internal error: {name}: {one_line(exc)[:200]}")
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
