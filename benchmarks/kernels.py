"""Kernel speed against plain reference loops carried here: ns per real-space pair, per atom and
k-vector, per ion and mesh step, per short-range pair, per (point, ion) term, on one thread.

Each reference is the obvious compiled loop for the same sum (library erfc, exp, cos and sin, no
tricks); its results are checked against ours to 1e-13 relative before anything is timed.
Times are process time of one thread, the best of several repeats (less disturbed than wall time
by other work on the machine).

    python benchmarks/kernels.py [--quick]
    python benchmarks/kernels.py --compile    first calls in a fresh process, empty and filled cache

Targets (issue "Speed near the machine's limit"): real space and reciprocal space each within
2x of the reference loop (ratio ours / reference <= 2).
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
import tempfile
import time

import numba
import numpy as np
from numba import njit

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import print_table, rattled_rock_salt, verdict  # noqa: E402

from madelung.sums._kernels import kernels, mesh_kernels, point_kernels  # noqa: E402
from madelung.sums.plan import reciprocal_vectors  # noqa: E402
from madelung.sums.geometry import build_bins, nearest_neighbour_distances, wrapped_fractional  # noqa: E402
from madelung.sums.shortrange import shortrange  # noqa: E402
from madelung.analysis.defects.points import _point_bins  # noqa: E402

import madelung  # noqa: E402


@njit(cache=True, inline="always")
def _stencil_bin(bin_of, i, offsets, o, counts):
    """Flat bin and lattice shift reached from row ``i`` of ``bin_of`` by stencil offset o."""
    c0 = bin_of[i, 0] + offsets[o, 0]
    c1 = bin_of[i, 1] + offsets[o, 1]
    c2 = bin_of[i, 2] + offsets[o, 2]
    s0 = c0 // counts[0]
    s1 = c1 // counts[1]
    s2 = c2 // counts[2]
    b = ((c0 - s0 * counts[0]) * counts[1] + c1 - s1 * counts[1]) * counts[2] + c2 - s2 * counts[2]
    return b, s0, s1, s2


@njit(cache=True, inline="always")
def _separation(origin, p, positions, j, cell, s0, s1, s2):
    """origin[p] - positions[j] - (s0 a + s1 b + s2 c)."""
    return (origin[p, 0] - positions[j, 0] - (s0 * cell[0, 0] + s1 * cell[1, 0] + s2 * cell[2, 0]),
            origin[p, 1] - positions[j, 1] - (s0 * cell[0, 1] + s1 * cell[1, 1] + s2 * cell[2, 1]),
            origin[p, 2] - positions[j, 2] - (s0 * cell[0, 2] + s1 * cell[1, 2] + s2 * cell[2, 2]))


@njit(cache=True)
def reference_real_space(positions, charges, cell, counts, offsets, bin_of, bin_start, alpha, r_cut):
    """Plain real-space loop: every atom walks the whole stencil, takes each pair once (lower
    index, or the positive image of itself), library erfc and exp, forces on both atoms."""
    n = positions.shape[0]
    phi = np.zeros(n)
    force = np.zeros((n, 3))
    cut2 = r_cut * r_cut
    pairs = 0
    for i in range(n):
        for o in range(offsets.shape[0]):
            b, s0, s1, s2 = _stencil_bin(bin_of, i, offsets, o, counts)
            for j in range(bin_start[b], bin_start[b + 1]):
                if j < i or (j == i and (s0, s1, s2) <= (0, 0, 0)):
                    continue
                dx, dy, dz = _separation(positions, i, positions, j, cell, s0, s1, s2)
                r2 = dx * dx + dy * dy + dz * dz
                if r2 >= cut2:
                    continue
                r = math.sqrt(r2)
                screened = math.erfc(alpha * r) / r
                g = (screened + 2.0 / math.sqrt(math.pi) * alpha * math.exp(-alpha * alpha * r2)) / r2
                phi[i] += charges[j] * screened
                phi[j] += charges[i] * screened
                qq = charges[i] * charges[j] * g
                force[i, 0] += qq * dx
                force[i, 1] += qq * dy
                force[i, 2] += qq * dz
                force[j, 0] -= qq * dx
                force[j, 1] -= qq * dy
                force[j, 2] -= qq * dz
                pairs += 1
    return phi, force, pairs


@njit(cache=True)
def reference_reciprocal(frac, charges, hkl, weights, kvectors):
    """Plain reciprocal loop: structure factor of each k-vector with cos and sin of every atom's
    phase, then each atom's potential and force from them."""
    n = frac.shape[0]
    m_count = hkl.shape[0]
    s_re = np.zeros(m_count)
    s_im = np.zeros(m_count)
    for m in range(m_count):
        for j in range(n):
            angle = 2.0 * math.pi * (hkl[m, 0] * frac[j, 0] + hkl[m, 1] * frac[j, 1] + hkl[m, 2] * frac[j, 2])
            s_re[m] += charges[j] * math.cos(angle)
            s_im[m] += charges[j] * math.sin(angle)
    phi = np.zeros(n)
    force = np.zeros((n, 3))
    for j in range(n):
        for m in range(m_count):
            angle = 2.0 * math.pi * (hkl[m, 0] * frac[j, 0] + hkl[m, 1] * frac[j, 1] + hkl[m, 2] * frac[j, 2])
            c = math.cos(angle)
            s = math.sin(angle)
            phi[j] += weights[m] * (s_re[m] * c + s_im[m] * s)
            im = weights[m] * (s_re[m] * s - s_im[m] * c)
            force[j, 0] += charges[j] * im * kvectors[m, 0]
            force[j, 1] += charges[j] * im * kvectors[m, 1]
            force[j, 2] += charges[j] * im * kvectors[m, 2]
    return phi, force


@njit(cache=True)
def _cardinal_bspline(order, x):
    """M_n(x) from the explicit sum of truncated powers (Schoenberg 1973)."""
    total = 0.0
    binomial = 1.0
    for k in range(order + 1):
        if x - k > 0.0:
            total += (-1.0) ** k * binomial * (x - k) ** (order - 1)
        binomial = binomial * (order - k) / (k + 1)
    return total / math.gamma(order)


@njit(cache=True)
def reference_spread(frac, charges, shape, order):
    """Plain B-spline spreading: each ion's weights M_n(w + j) from the explicit formula."""
    mesh = np.zeros((shape[0], shape[1], shape[2]))
    weights = np.empty((3, order))
    base = np.empty(3, dtype=np.int64)
    for i in range(frac.shape[0]):
        for a in range(3):
            u = frac[i, a] * shape[a]
            base[a] = int(math.floor(u))
            for j in range(order):
                weights[a, j] = _cardinal_bspline(order, u - base[a] + j)
        for j0 in range(order):
            for j1 in range(order):
                for j2 in range(order):
                    g0 = (base[0] - j0) % shape[0]
                    g1 = (base[1] - j1) % shape[1]
                    g2 = (base[2] - j2) % shape[2]
                    mesh[g0, g1, g2] += charges[i] * weights[0, j0] * weights[1, j1] * weights[2, j2]
    return mesh


@njit(cache=True)
def reference_born_mayer(positions, cell, counts, offsets, bin_of, bin_start, big_a, rho, r_cut):
    """Plain Born–Mayer sum A exp(-r/rho): every atom walks the whole stencil and takes every
    partner within the cutoff (each pair seen from both ends, energy halved), force on itself."""
    n = positions.shape[0]
    energy = 0.0
    force = np.zeros((n, 3))
    cut2 = r_cut * r_cut
    pairs = 0
    for i in range(n):
        for o in range(offsets.shape[0]):
            b, s0, s1, s2 = _stencil_bin(bin_of, i, offsets, o, counts)
            for j in range(bin_start[b], bin_start[b + 1]):
                if i == j and s0 == 0 and s1 == 0 and s2 == 0:
                    continue
                dx, dy, dz = _separation(positions, i, positions, j, cell, s0, s1, s2)
                r2 = dx * dx + dy * dy + dz * dz
                if r2 >= cut2:
                    continue
                r = math.sqrt(r2)
                term = big_a * math.exp(-r / rho)
                energy += 0.5 * term
                force[i, 0] += term / (rho * r) * dx
                force[i, 1] += term / (rho * r) * dy
                force[i, 2] += term / (rho * r) * dz
                pairs += 1
    return energy, force, pairs


@njit(cache=True)
def reference_points(points, point_bin, positions, charges, cell, counts, offsets, bin_start, alpha, r_cut):
    """Plain real-space potential at points: each point walks the whole stencil, library erfc."""
    phi = np.zeros(points.shape[0])
    cut2 = r_cut * r_cut
    for p in range(points.shape[0]):
        for o in range(offsets.shape[0]):
            b, s0, s1, s2 = _stencil_bin(point_bin, p, offsets, o, counts)
            for j in range(bin_start[b], bin_start[b + 1]):
                dx, dy, dz = _separation(points, p, positions, j, cell, s0, s1, s2)
                r2 = dx * dx + dy * dy + dz * dz
                if r2 < cut2:
                    r = math.sqrt(r2)
                    phi[p] += charges[j] * math.erfc(alpha * r) / r
    return phi


def cpu_best(function, repeat):
    best = math.inf
    for _ in range(repeat):
        started = time.process_time()
        function()
        best = min(best, time.process_time() - started)
    return best


def relative_difference(a, b):
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))) / max(np.max(np.abs(np.asarray(b))), 1e-300))


def real_space_row(crystal, alpha, r_cut, repeat):
    charges = np.ascontiguousarray(crystal.charges, dtype=float)
    bins = build_bins(crystal.cell, crystal.positions, r_cut)
    q = bins.sorted_values(charges)
    args = (bins.positions, q, bins.cell, bins.counts, bins.offsets, bins.bin_of, bins.bin_start, alpha, r_cut)
    ours = kernels.real_space_terms(*args, True, False)
    reference = reference_real_space(*args)
    agree = max(relative_difference(ours[0], reference[0]), relative_difference(ours[1], reference[1]))
    pairs = reference[2]
    t_ours = cpu_best(lambda: kernels.real_space_terms(*args, True, False), repeat)
    t_reference = cpu_best(lambda: reference_real_space(*args), repeat)
    return pairs, t_ours / pairs * 1e9, t_reference / pairs * 1e9, agree


def reciprocal_row(crystal, alpha, k_cut, repeat):
    charges = np.ascontiguousarray(crystal.charges, dtype=float)
    cell = np.ascontiguousarray(crystal.cell, dtype=float)
    hkl, kvectors, hmax = reciprocal_vectors(cell, k_cut)
    frac = wrapped_fractional(cell, crystal.positions)
    volume = abs(np.linalg.det(cell))
    k2 = np.einsum("ij,ij->i", kvectors, kvectors)
    weights = np.ascontiguousarray(2.0 * (4.0 * math.pi / volume) * np.exp(-k2 / (4 * alpha * alpha)) / k2)

    def ours():
        s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, kernels.CHUNKS)
        return kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kvectors, weights, s_re, s_im, True)

    mine = ours()
    reference = reference_reciprocal(frac, charges, hkl, weights, kvectors)
    agree = max(relative_difference(mine[0], reference[0]), relative_difference(mine[1], reference[1]))
    terms = len(charges) * len(hkl)
    t_ours = cpu_best(ours, repeat)
    t_reference = cpu_best(lambda: reference_reciprocal(frac, charges, hkl, weights, kvectors), max(1, repeat // 2))
    return terms, t_ours / terms * 1e9, t_reference / terms * 1e9, agree


def shortrange_row(crystal, repeat):
    """The short-range sum (Born–Mayer between every pair of ions, cut at 8 Å with a negligible
    switching width) through the public function against the plain loop."""
    model = {"madelung_repulsion": 1, "cutoff": 8.0, "switch_width": 1e-9,
             "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": 1500.0, "rho": 0.32},
                       {"ions": ["Na", "Na"], "form": "born-mayer", "A": 1500.0, "rho": 0.32},
                       {"ions": ["Cl", "Cl"], "form": "born-mayer", "A": 1500.0, "rho": 0.32}]}
    bins = build_bins(crystal.cell, crystal.positions, 8.0)
    args = (bins.positions, bins.cell, bins.counts, bins.offsets, bins.bin_of, bins.bin_start, 1500.0, 0.32, 8.0)
    mine = shortrange(crystal, model, forces=True)
    energy, force, pairs = reference_born_mayer(*args)
    agree = max(abs(mine.energy - energy) / abs(energy), relative_difference(mine.forces, bins.unsorted(force)))
    pairs //= 2
    t_ours = cpu_best(lambda: shortrange(crystal, model, forces=True), repeat)
    t_reference = cpu_best(lambda: reference_born_mayer(*args), repeat)
    return pairs, t_ours / pairs * 1e9, t_reference / pairs * 1e9, agree


def points_row(crystal, alpha, r_cut, repeat, n_points=2000):
    """The real-space potential at random points (kernel call) against the plain loop."""
    charges = np.ascontiguousarray(crystal.charges, dtype=float)
    bins = build_bins(crystal.cell, crystal.positions, r_cut)
    q = bins.sorted_values(charges)
    points = np.random.default_rng(1).random((n_points, 3)) @ bins.cell
    _, wrapped, point_bin = _point_bins(bins, points)
    exclude = np.full(n_points, -1, dtype=np.int64)
    args = (wrapped, point_bin, exclude, bins.positions, q, bins.cell, bins.counts, bins.offsets, bins.bin_start,
            alpha, 0.0, r_cut, 1e-4, True)
    mine = point_kernels.real_space_at_points(*args)
    reference_args = (wrapped, point_bin, bins.positions, q, bins.cell, bins.counts, bins.offsets, bins.bin_start,
                      alpha, r_cut)
    reference = reference_points(*reference_args)
    agree = relative_difference(mine[0], reference)
    terms = mine[4]
    t_ours = cpu_best(lambda: point_kernels.real_space_at_points(*args), repeat)
    t_reference = cpu_best(lambda: reference_points(*reference_args), repeat)
    return terms, t_ours / terms * 1e9, t_reference / terms * 1e9, agree


def neighbour_row(crystal, repeat):
    """Nearest-neighbour distances of every ion (public function), ns per ion; no reference loop."""
    n = len(crystal)
    t = cpu_best(lambda: nearest_neighbour_distances(crystal.cell, crystal.positions, crystal.charges), repeat)
    return t / n * 1e9


def mesh_rows(crystal, order, spacing, repeat):
    charges = np.ascontiguousarray(crystal.charges, dtype=float)
    cell = np.ascontiguousarray(crystal.cell, dtype=float)
    frac = wrapped_fractional(cell, crystal.positions)
    shape = np.array([max(2 * order, int(round(np.linalg.norm(c) / spacing))) for c in cell], dtype=np.int64)
    atom_order, slab_start, n_slabs = np.arange(len(charges)), np.array([0, len(charges)]), 1
    spread = mesh_kernels.spread_charges(frac, charges, atom_order, slab_start, n_slabs, shape, order)
    reference = reference_spread(frac, charges, shape, order)
    agree = relative_difference(spread, reference)
    n = len(charges)
    t_spread = cpu_best(lambda: mesh_kernels.spread_charges(frac, charges, atom_order, slab_start, n_slabs, shape,
                                                            order), repeat)
    t_reference = cpu_best(lambda: reference_spread(frac, charges, shape, order), repeat)
    recip = np.ascontiguousarray(np.linalg.inv(cell).T)
    psi = np.ascontiguousarray(np.random.default_rng(0).normal(size=tuple(shape)))
    t_interp = cpu_best(lambda: mesh_kernels.mesh_site_terms(frac, charges, psi, shape, order, recip, True), repeat)
    moduli = [np.ones(int(k)) for k in shape]
    import scipy.fft

    spectrum = scipy.fft.rfftn(spread)
    t_influence = cpu_best(lambda: mesh_kernels.apply_influence(spectrum.copy(), recip, shape, *moduli, 0.3,
                                                                abs(np.linalg.det(cell)), True), repeat)
    points = int(np.prod(shape))
    return [("spread charges", "ns/ion", t_spread / n * 1e9, t_reference / n * 1e9, agree),
            ("interpolate potential+force", "ns/ion", t_interp / n * 1e9, None, None),
            ("influence function+virial", "ns/mesh point", t_influence / points * 1e9, None, None)]


def first_calls():
    """In this process: the first call of each neighbour-walking kernel on a small crystal, process
    seconds (compiling is one thread; less disturbed than wall time on a shared machine), and whether its dispatcher compiled or loaded from the on-disk cache. Prints JSON."""
    from madelung.sums._kernels import geometry_kernels, shortrange_kernels
    from madelung.sums.geometry import neighbour_pairs, shortest_distance

    crystal = rattled_rock_salt(2)
    charges = np.ascontiguousarray(crystal.charges, dtype=float)
    timings = {}

    def timed(name, function):
        started = time.process_time()
        function()
        timings[name] = time.process_time() - started

    timed("build bins", lambda: build_bins(crystal.cell, crystal.positions, 6.0))
    bins = build_bins(crystal.cell, crystal.positions, 6.0)
    q = bins.sorted_values(charges)
    args = (bins.positions, q, bins.cell, bins.counts, bins.offsets, bins.bin_of, bins.bin_start, 0.5, 6.0)
    timed("real space terms", lambda: kernels.real_space_terms(*args, True, True))
    points = np.random.default_rng(1).random((10, 3)) @ bins.cell
    _, wrapped, point_bin = _point_bins(bins, points)
    timed("real space at points", lambda: point_kernels.real_space_at_points(
        wrapped, point_bin, np.full(10, -1, dtype=np.int64), bins.positions, q, bins.cell, bins.counts, bins.offsets,
        bins.bin_start, 0.5, 0.0, 6.0, 1e-4, True))
    timed("contact repulsion at points", lambda: point_kernels.contact_repulsion_at_points(
        wrapped, point_bin, bins.positions, np.ones(len(q)), bins.cell, bins.counts, bins.offsets, bins.bin_start,
        1.0, 1.0, 0.3, 6.0, True))
    model = {"madelung_repulsion": 1, "cutoff": 6.0, "switch_width": 1.0,
             "pairs": [{"ions": ["Na", "Cl"], "form": "buckingham", "A": 1500.0, "rho": 0.32, "C": 10.0},
                       {"ions": ["Na", "Na"], "form": "born-lande", "B": 100.0, "n": 9},
                       {"ions": ["Cl", "Cl"], "form": "none"}]}
    timed("short range", lambda: shortrange(crystal, model, forces=True, stress=True))
    timed("nearest neighbours", lambda: nearest_neighbour_distances(crystal.cell, crystal.positions, charges))
    timed("neighbour pairs", lambda: neighbour_pairs(crystal.cell, crystal.positions, 4.0))
    timed("shortest distance", lambda: shortest_distance(crystal.cell, crystal.positions))
    dispatchers = [kernels.real_space_terms, point_kernels.real_space_at_points,
                   point_kernels.contact_repulsion_at_points, shortrange_kernels.pair_terms,
                   geometry_kernels.nearest_neighbours, geometry_kernels.pairs_from, geometry_kernels.closest_distance,
                   geometry_kernels.sort_into_bins]
    hits = sum(sum(d.stats.cache_hits.values()) for d in dispatchers)
    misses = sum(sum(d.stats.cache_misses.values()) for d in dispatchers)
    print(json.dumps({"timings": timings, "cache_hits": hits, "cache_misses": misses}))


def compile_table():
    """Cold compile (empty cache directory) and warm load (a second process on the same cache)."""
    script = os.path.abspath(__file__)
    import resource

    runs = []
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache)
        for _ in range(2):
            before = resource.getrusage(resource.RUSAGE_CHILDREN)
            out = subprocess.run([sys.executable, script, "--first-calls"], env=env, capture_output=True, text=True,
                                 check=True)
            after = resource.getrusage(resource.RUSAGE_CHILDREN)
            total = after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime
            runs.append((json.loads(out.stdout.strip().splitlines()[-1]), total))
    (cold, cold_total), (warm, warm_total) = runs
    rows = [[name, f"{cold['timings'][name]:.2f}", f"{warm['timings'][name]:.3f}"] for name in cold["timings"]]
    rows.append(["whole process (import, test crystal)", f"{cold_total:.2f}", f"{warm_total:.2f}"])
    print_table(["first call", "empty cache, s", "second process, s"], rows,
                title="First calls of the neighbour-walking kernels, process (CPU) time")
    print(f"  cache: first process {cold['cache_hits']} hits / {cold['cache_misses']} misses, "
          f"second process {warm['cache_hits']} hits / {warm['cache_misses']} misses")


def main():
    if "--first-calls" in sys.argv:
        first_calls()
        return
    if "--compile" in sys.argv:
        compile_table()
        return
    quick = "--quick" in sys.argv
    repeat = 3 if quick else 5
    numba.set_num_threads(1)
    rows = []
    real_ok = True
    recip_ok = True
    for reps, tol in ((4, 1e-8), (8, 1e-8)):
        crystal = rattled_rock_salt(reps)
        params = madelung.ewald(crystal, tol=tol, method="direct").params
        pairs, ours, ref, agree = real_space_row(crystal, params.alpha, params.real_cutoff, repeat)
        real_ok &= ours <= 2 * ref
        rows.append([f"real space, {len(crystal)} ions, r_cut {params.real_cutoff:.2f} Å", "ns/pair",
                     f"{ours:.2f}", f"{ref:.2f}", f"{ours / ref:.2f}", f"{agree:.1e}", f"{pairs}"])
        terms, ours, ref, agree = reciprocal_row(crystal, params.alpha, params.reciprocal_cutoff, repeat)
        recip_ok &= ours <= 2 * ref
        rows.append([f"reciprocal, {len(crystal)} ions, {params.k_vectors} k", "ns/(atom k)",
                     f"{ours:.2f}", f"{ref:.2f}", f"{ours / ref:.2f}", f"{agree:.1e}", f"{terms}"])
        pairs, ours, ref, agree = points_row(crystal, params.alpha, params.real_cutoff, repeat)
        rows.append([f"points, real space, {len(crystal)} ions, 2000 points", "ns/term",
                     f"{ours:.2f}", f"{ref:.2f}", f"{ours / ref:.2f}", f"{agree:.1e}", f"{pairs}"])
        pairs, ours, ref, agree = shortrange_row(crystal, repeat)
        rows.append([f"short range (public call), {len(crystal)} ions, 8 Å", "ns/pair",
                     f"{ours:.2f}", f"{ref:.2f}", f"{ours / ref:.2f}", f"{agree:.1e}", f"{pairs}"])
        ours = neighbour_row(crystal, repeat)
        rows.append([f"nearest neighbours (public call), {len(crystal)} ions", "ns/ion",
                     f"{ours:.0f}", "-", "-", "-", "-"])
    crystal = rattled_rock_salt(8)
    for name, unit, ours, ref, agree in mesh_rows(crystal, 6, 0.8, repeat):
        rows.append([f"mesh {name}, {len(crystal)} ions, order 6", unit, f"{ours:.2f}",
                     "-" if ref is None else f"{ref:.2f}", "-" if ref is None else f"{ours / ref:.2f}",
                     "-" if agree is None else f"{agree:.1e}", "-"])
    print_table(["case", "unit", "ours", "reference loop", "ratio", "max rel. diff", "terms"], rows,
                title="Kernels on one thread (process time, best of repeats); pairs counted once")
    print()
    print(f"  real space within 2x of the reference loop: {verdict(real_ok)}")
    print(f"  reciprocal space within 2x of the reference loop: {verdict(recip_ok)}")


if __name__ == "__main__":
    main()
