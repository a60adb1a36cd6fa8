"""Running the ordering kernels: exact enumeration in independent chunks and simulated-annealing
restarts, on this process, a local worker pool or a Dask cluster.

The enumeration walks every ordering in lexicographic order; a chunk is a range of positions in that
walk, started from its first ordering (unranked directly), so chunks need nothing from each other.
Each annealing restart is one task with its own random seed.

Works on an :class:`madelung.analysis.orderings.OrderingProblem`.

References
----------
N. Metropolis et al., J. Chem. Phys. 21 (1953) 1087 (Metropolis acceptance).
S. Kirkpatrick, C. D. Gelatt and M. P. Vecchi, Science 220 (1983) 671 (simulated annealing).
"""

from __future__ import annotations

import math
from concurrent.futures import ProcessPoolExecutor

import numpy as np

from ..errors import InputError
from ..batch.executors import _main_module_hidden
from ..batch.tasks import prepare_process
from . import _ordering_kernels as kernels
from .ordering_symmetry import canonical_form, multinomial

#: Orderings visited per enumeration chunk at most (the chunk's output arrays are this long).
MAX_CHUNK = 1 << 20

_PROBLEM = None  # the problem a pool worker was started with


def _install(problem):
    global _PROBLEM
    prepare_process()
    _PROBLEM = problem


#: Jump past the orderings that share a non-minimal prefix only when at least this many positions follow it.
MIN_SKIP = 6


def walk_arrays(problem):
    """Segment bounds, per-segment code counts, arrangements per segment and the walk positions one
    step of each segment is worth (int64; the walk must have fewer than 2^62 positions)."""
    if problem.total_orderings >= 2**62:
        raise InputError(f"{problem.total_orderings} orderings are too many to enumerate; use the search")
    sizes = [multinomial(c) for c in problem.counts]
    below = [math.prod(sizes[s + 1:]) for s in range(len(sizes))]
    return (np.array([lo for lo, _ in problem.segments] + [problem.segments[-1][1]], dtype=np.int64),
            np.array(problem.counts, dtype=np.int64).reshape(len(sizes), -1), np.array(sizes, dtype=np.int64),
            np.array(below, dtype=np.int64))


def enumerate_range(problem, start, stop):
    """Walk positions ``start`` to ``stop`` (excluded). Returns (positions, energies in eV, stabilizer
    sizes) of the orbit minima among them, and how many orderings had their energy computed (the
    others were skipped as provably not minimal)."""
    starts, counts, sizes, below = walk_arrays(problem)
    x = problem.ordering_at(start)
    has_end = stop < problem.total_orderings
    end = problem.ordering_at(stop) if has_end else x.copy()
    length = max(1, int(stop) - int(start))
    ranks = np.empty(length, dtype=np.int64)
    energies = np.empty(length)
    fixed = np.empty(length, dtype=np.int64)
    found, visited = kernels.enumerate_range(problem.coulomb, problem.phi_fixed, problem.energy_fixed,
                                             problem.charge_of, starts, counts, sizes, below, problem.inverse_ops,
                                             x, end, has_end, MIN_SKIP, ranks, energies, fixed)
    return ranks[:found], energies[:found], fixed[:found], int(visited)


def anneal_restart(problem, seed, temperatures, sweeps, pool_size):
    """One annealing run from a random ordering. Returns (orderings (rows of codes), energies in eV,
    attempted swaps) of the lowest distinct orderings it visited."""
    rng = np.random.default_rng(seed)
    x = problem.first_ordering()
    for lo, hi in problem.segments:
        x[lo:hi] = rng.permutation(x[lo:hi])
    segment_of = np.concatenate([np.full(hi - lo, s) for s, (lo, hi) in enumerate(problem.segments)]).astype(np.int64)
    starts = np.array([lo for lo, _ in problem.segments] + [len(x)], dtype=np.int64)
    pool_x = np.zeros((pool_size, len(x)), dtype=np.int64)
    pool_energy = np.full(pool_size, np.inf)
    _, attempts = kernels.anneal(problem.coulomb, problem.phi_fixed, problem.energy_fixed, problem.charge_of,
                                 segment_of, starts, x, np.ascontiguousarray(temperatures, dtype=np.float64),
                                 int(sweeps), int(seed % (2**31 - 1)), pool_x, pool_energy)
    good = np.isfinite(pool_energy)
    return pool_x[good], pool_energy[good], int(attempts)


def _range_in_worker(start, stop):
    return enumerate_range(_PROBLEM, start, stop)


def _restart_in_worker(seed, temperatures, sweeps, pool_size):
    return anneal_restart(_PROBLEM, seed, temperatures, sweeps, pool_size)


def _run(problem, function, worker_function, tasks, workers, scheduler):
    """Results of ``function(problem, *task)`` for every task, here, on a local pool or on Dask."""
    if scheduler is not None:
        try:
            from dask.distributed import Client
        except ImportError:
            raise InputError("a Dask scheduler needs Dask: pip install 'madelung[dask]'") from None
        client = scheduler if isinstance(scheduler, Client) else Client(scheduler)
        try:
            shared = client.scatter(problem, broadcast=True)
            futures = [client.submit(function, shared, *task, pure=False) for task in tasks]
            return client.gather(futures)
        finally:
            if client is not scheduler:
                client.close()
    workers = int(workers)
    if workers < 1:
        raise InputError(f"workers must be a positive whole number, got {workers}")
    if workers == 1 or len(tasks) == 1:
        return [function(problem, *task) for task in tasks]
    import multiprocessing

    methods = multiprocessing.get_all_start_methods()
    context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
    if context.get_start_method() == "forkserver":
        context.set_forkserver_preload(["madelung.analysis.orderings"])
    with _main_module_hidden(), ProcessPoolExecutor(max_workers=min(workers, len(tasks)), mp_context=context,
                                                    initializer=_install, initargs=(problem,)) as pool:
        futures = [pool.submit(worker_function, *task) for task in tasks]
        return [future.result() for future in futures]


def run_enumeration(problem, workers=1, scheduler=None, chunk=None, first=0, count=None):
    """Every orbit minimum with its position in the walk, energy (eV) and stabilizer size, from position
    ``first`` of the walk for ``count`` positions (default: all); and the number of orderings whose
    energy was computed."""
    end = problem.total_orderings if count is None else min(problem.total_orderings, int(first) + int(count))
    if chunk is None:
        chunk = min(MAX_CHUNK, max(1, math.ceil((end - int(first)) / (4 * max(1, int(workers))))))
    chunk = max(1, min(int(chunk), MAX_CHUNK))
    tasks = [(start, min(start + chunk, end)) for start in range(int(first), end, chunk)]
    parts = _run(problem, enumerate_range, _range_in_worker, tasks, workers, scheduler)
    return (np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts]),
            np.concatenate([p[2] for p in parts]), sum(p[3] for p in parts))


def temperature_schedule(problem, steps=40, seed=0):
    """Falling temperatures (eV) for annealing: from the spread of swap energies in a random ordering
    down to a thousandth of it, geometric."""
    rng = np.random.default_rng(seed)
    x = problem.first_ordering()
    for lo, hi in problem.segments:
        x[lo:hi] = rng.permutation(x[lo:hi])
    q = problem.charge_of[x]
    phi = problem.phi_fixed + problem.coulomb @ q
    deltas = []
    for _ in range(400):
        lo, hi = problem.segments[rng.integers(len(problem.segments))]
        p, r = rng.integers(lo, hi, size=2)
        d = q[r] - q[p]
        if d != 0:
            j = problem.coulomb
            deltas.append(d * (phi[p] - phi[r]) + 0.5 * d * d * (j[p, p] + j[r, r] - 2 * j[p, r]))
    spread = float(np.std(deltas)) if len(deltas) > 1 else 1.0
    spread = spread if spread > 0 else 1.0
    return spread * np.geomspace(1.0, 1e-3, steps)


def run_search(problem, keep=20, restarts=8, sweeps=50, seed=0, workers=1, scheduler=None):
    """Annealing restarts; the lowest distinct (symmetry-inequivalent) orderings found. Each restart
    keeps one ordering per energy level it visits (distinct orderings of exactly equal energy, which
    are rare, may be found as one).

    Returns (orderings as canonical rows of codes, energies in eV, stabilizer sizes, attempted swaps),
    lowest first."""
    if int(restarts) < 1 or int(sweeps) < 1:
        raise InputError(f"restarts and sweeps must be positive, got {restarts} and {sweeps}")
    temperatures = temperature_schedule(problem, seed=seed)
    pool_size = max(2 * int(keep), 8)
    tasks = [(int(seed) * 1000003 + r, temperatures, int(sweeps), pool_size) for r in range(int(restarts))]
    parts = _run(problem, anneal_restart, _restart_in_worker, tasks, workers, scheduler)
    found, attempts = {}, 0
    for rows, energies, tried in parts:
        attempts += tried
        for row, energy in zip(rows, energies):
            form, stabilizer = canonical_form(row, problem.inverse_ops)
            key = form.tobytes()
            if key not in found or energy < found[key][1]:
                found[key] = (form, float(energy), stabilizer)
    ranked = sorted(found.values(), key=lambda item: item[1])
    rows = np.array([r[0] for r in ranked], dtype=np.int64).reshape(len(ranked), -1)
    return rows, np.array([r[1] for r in ranked]), np.array([r[2] for r in ranked], dtype=np.int64), attempts
