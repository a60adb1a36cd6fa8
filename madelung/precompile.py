"""Compile the Numba kernels ahead of use, into Numba's on-disk cache.

The first sum on a new machine compiles every kernel it touches (about a minute in all); later
runs load them from the cache in ``__pycache__`` beside the modules (or ``NUMBA_CACHE_DIR``).
:func:`compile_kernels` runs each engine once on a two-ion rock-salt cell so that the cache is
filled before the first real job: for cluster images, containers and CI. A two-ion cell runs on
one thread, which compiles the one-thread twin of each parallel kernel
(:mod:`madelung.sums._kernels.variants`); a last step compiles the parallel kernels themselves for
the same argument types, for large jobs.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from .structure.crystal import Crystal
from .analysis.defects import potential_at
from .sums.direct import ewald_direct
from .sums.geometry import build_bins, thread_budget
from .sums.matrix import coulomb_matrix
from .sums.mesh import ewald_mesh
from .sums.shortrange import PairPotential, RepulsionModel, shortrange
from .sums._kernels import geometry_kernels, kernels
from .sums._kernels.variants import SerialOnOneThread


@dataclass(frozen=True)
class CompileResult:
    """What was compiled.

    Attributes
    ----------
    steps : names of the engines run, in order.
    seconds : wall time of each step, s (compiling, or loading from the cache when warm).
    total_seconds : wall time of all steps, s.
    """

    steps: tuple
    seconds: tuple
    total_seconds: float

    def to_dict(self) -> dict:
        return {"steps": list(self.steps), "seconds": list(self.seconds), "total_seconds": self.total_seconds}


def _rock_salt():
    """Two-ion rock salt (a = 5.64 Å, Na+ and Cl-), a fact of the trade used only to drive the kernels."""
    a = 5.64
    cell = 0.5 * a * np.array([[0.0, 1.0, 1.0], [1.0, 0.0, 1.0], [1.0, 1.0, 0.0]])
    return Crystal(cell, np.array([[0.0, 0.0, 0.0], [0.5 * a, 0.0, 0.0]]), np.array([1.0, -1.0]),
                   symbols=["Na", "Cl"])


def _steps():
    crystal = _rock_salt()
    model = RepulsionModel(pairs=(PairPotential(("Cl", "Na"), "born-mayer", {"A": 1000.0, "rho": 0.3}),
                                  PairPotential(("Cl", "Cl"), "none", {}), PairPotential(("Na", "Na"), "none", {})),
                           cutoff=8.0, switch_width=1.0)
    points = np.array([[1.0, 1.0, 1.0]])
    return [
        ("direct Ewald sum (potentials, forces, stress)",
         lambda: ewald_direct(crystal, tol=1e-8, forces=True, stress=True)),
        ("particle-mesh Ewald sum (potentials, forces, stress)",
         lambda: ewald_mesh(crystal, tol=1e-6, forces=True, stress=True, check=False)),
        ("Coulomb matrix", lambda: coulomb_matrix(crystal.cell, crystal.positions, tol=1e-8)),
        ("potential and field at points", lambda: potential_at(crystal, points, tol=1e-8, field=True)),
        ("smeared ions at points", lambda: potential_at(crystal, points, tol=1e-8, smearing=0.3)),
        ("short-range pair terms", lambda: shortrange(crystal, model, forces=True, stress=True)),
        ("neighbour searches of large cells", lambda: _large_cell_searches(crystal)),
        ("parallel variants of the kernels above, for large jobs", _parallel_variants),
    ]


def _large_cell_searches(crystal):
    """The nearest-neighbour and closest-pair kernels, which only cells beyond
    ``geometry.PAIR_LIST_MAX_ATOMS`` use (smaller ones reduce the pair list), called as
    :mod:`madelung.sums.geometry` calls them, on one thread (their one-thread twins)."""
    bins = build_bins(crystal.cell, crystal.positions, 4.0)
    with thread_budget(0.0):
        geometry_kernels.nearest_neighbours(bins.positions, bins.sorted_values(crystal.charges), bins.cell,
                                            bins.counts, bins.offsets, bins.bin_of, bins.bin_start, 4.0)
        geometry_kernels.closest_distance(bins.positions, bins.cell, bins.counts, bins.offsets, bins.bin_of,
                                          bins.bin_start)


def _parallel_variants():
    """Compile each parallel kernel for every argument type its one-thread twin was compiled for."""
    for module in (kernels, geometry_kernels):
        for twin in vars(module).values():
            if isinstance(twin, SerialOnOneThread):
                for signature in twin.serial.signatures:
                    twin.parallel.compile(signature)


def compile_kernels(progress=None) -> CompileResult:
    """Run every engine once on a two-ion cell so that all kernels are compiled and cached.

    ``progress``, if given, is called with ``(index, count, name)`` before each step.
    """
    names, seconds = [], []
    started = time.perf_counter()
    steps = _steps()
    for index, (name, run) in enumerate(steps):
        if progress is not None:
            progress(index, len(steps), name)
        step_started = time.perf_counter()
        run()
        names.append(name)
        seconds.append(time.perf_counter() - step_started)
    return CompileResult(tuple(names), tuple(seconds), time.perf_counter() - started)
