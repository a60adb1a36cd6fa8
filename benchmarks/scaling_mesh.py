"""Direct Ewald and smooth particle-mesh Ewald side by side, N = 10^3 ... 10^6 ions.

Cases: rattled rock-salt supercells (benchmarks/common.py: a = 5.64 Å, charges +-1, Gaussian
displacements of 0.05 Å) at tol 1e-6 and 1e-8, energy + potentials + forces. Every case runs in
a fresh subprocess (one warm-up call on a small cell first, so JIT loading is not timed) that
reports the wall time of madelung.ewald(..., method=...) (best of 3 calls up to N = 32768, of 2
up to 10^5, else one) and the process's peak
resident memory (VmHWM, whole process: interpreter, crystal and sum).

Achieved error: |E - E_ref| / (k_e sum q^2 / d_min) and the largest force difference, with
E_ref from the direct engine at tol / 100, for N up to --reference-max. The crossover is the N
where the fitted times of the two engines cross (log-log interpolation between measured sizes).

Targets (issue: large cells): mesh exponent at most 1.15 between 10^4 and 10^6; N = 10^5 under
5 s at tol 1e-6 with forces; achieved error within tol wherever the direct check runs; peak
memory of N = 10^6 within 4 GB.

    python benchmarks/scaling_mesh.py            # up to N = 314432
    python benchmarks/scaling_mesh.py --largest  # also N = 10^6 (a few minutes more)
    python benchmarks/scaling_mesh.py --stages   # N = 10^6: CPU s by stage, peak memory, 1 and 2 threads
    python benchmarks/scaling_mesh.py --calibrate  # seconds per unit of work for madelung/sums/mesh.py
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, HERE)
from common import fit_exponent, print_table, verdict  # noqa: E402

#: Supercell repeats: 8 r^3 ions (64 ... 10^6).
REPEATS = [2, 3, 4, 5, 7, 11, 16, 23, 34]
LARGEST = 50


def _peak_resident_mb(resource):
    """Peak resident memory of this process, MB: VmHWM (reset by exec, unlike ru_maxrss, which
    keeps the parent's peak across fork + exec), else ru_maxrss."""
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _run_case(method, reps, tol, forces_path):
    """Inside the subprocess: time one call, report JSON on stdout."""
    import resource

    from common import rattled_rock_salt

    import madelung

    madelung.ewald(rattled_rock_salt(2), tol=tol, forces=True, method=method)  # load the kernels
    crystal = rattled_rock_salt(reps)
    seconds = math.inf
    for _ in range(3 if len(crystal) <= 32768 else 2 if len(crystal) <= 100_000 else 1):  # best of, for noise
        started = time.perf_counter()
        result = madelung.ewald(crystal, tol=tol, forces=True, method=method)
        seconds = min(seconds, time.perf_counter() - started)
    peak = _peak_resident_mb(resource)
    if forces_path:
        np.save(forces_path, result.forces)
    p = result.params
    print(json.dumps({"n": len(crystal), "seconds": seconds, "peak_mb": peak, "energy": result.energy,
                      "scale": result.energy_scale, "method": p.method, "alpha": p.alpha,
                      "r_cut": p.real_cutoff, "mesh": p.extra.get("mesh"), "order": p.extra.get("order"),
                      "k_vectors": p.k_vectors, "estimate": result.error_estimate}))


def run_case(method, reps, tol, keep_forces=True, timeout=3600):
    """Run one case in a fresh process; returns its report (dict) and forces (or None)."""
    path = None
    if keep_forces:
        handle, path = tempfile.mkstemp(suffix=".npy")
        os.close(handle)
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    out = subprocess.run([sys.executable, os.path.abspath(__file__), "--case", method, str(reps), repr(tol),
                          path or ""], capture_output=True, text=True, env=env, timeout=timeout)
    if out.returncode != 0:
        raise RuntimeError(f"case {method} {reps} {tol} failed:\n{out.stderr[-2000:]}")
    report = json.loads(out.stdout.strip().splitlines()[-1])
    forces = None
    if path:
        forces = np.load(path)
        os.unlink(path)
    return report, forces


def crossover(sizes, direct, mesh):
    """N where mesh time first drops below direct time (log-log interpolation), or None."""
    pairs = [(n, d, m) for n, d, m in zip(sizes, direct, mesh) if d is not None and m is not None]
    for (n0, d0, m0), (n1, d1, m1) in zip(pairs, pairs[1:]):
        r0, r1 = math.log(m0 / d0), math.log(m1 / d1)
        if r0 >= 0 > r1:
            t = r0 / (r0 - r1)
            return math.exp(math.log(n0) + t * (math.log(n1) - math.log(n0)))
    if pairs and pairs[0][2] < pairs[0][1]:
        return f"below {pairs[0][0]}"
    return None


def side_by_side(tols=(1e-6, 1e-8), repeats=REPEATS, largest=False, direct_max=100_000, reference_max=100_000):
    """Print the direct/mesh table per tol with exponents, crossover and the targets."""
    repeats = list(repeats) + ([LARGEST] if largest else [])
    summary = {}
    for tol in tols:
        rows = []
        sizes, t_direct, t_mesh, errors_ok, peaks = [], [], [], [], {}
        for reps in repeats:
            n = 8 * reps ** 3
            mesh, f_mesh = run_case("mesh", reps, tol)
            direct = f_direct = None
            if n <= direct_max:
                direct, f_direct = run_case("direct", reps, tol)
            err_mesh = err_direct = df_mesh = None
            if n <= reference_max:
                ref, f_ref = run_case("direct", reps, tol / 100.0)
                err_mesh = abs(mesh["energy"] - ref["energy"]) / mesh["scale"]
                df_mesh = float(np.max(np.abs(f_mesh - f_ref)))
                errors_ok.append(err_mesh <= tol)
                if direct:
                    err_direct = abs(direct["energy"] - ref["energy"]) / direct["scale"]
            sizes.append(n)
            t_mesh.append(mesh["seconds"])
            t_direct.append(direct["seconds"] if direct else None)
            peaks[n] = mesh["peak_mb"]
            fmt = lambda x, f: "—" if x is None else format(x, f)  # noqa: E731
            rows.append([n, fmt(direct and direct["seconds"], ".3f"), fmt(direct and direct["peak_mb"], ".0f"),
                         fmt(err_direct, ".1e"), f"{mesh['seconds']:.3f}", f"{mesh['peak_mb']:.0f}",
                         fmt(err_mesh, ".1e"), fmt(df_mesh, ".1e"),
                         fmt(direct and direct["seconds"] / mesh["seconds"], ".1f"),
                         "x".join(str(k) for k in mesh["mesh"]), mesh["order"], f"{mesh['alpha']:.3f}",
                         f"{mesh['r_cut']:.1f}"])
        print_table(["N ions", "direct / s", "MB", "direct err", "mesh / s", "MB", "mesh err", "mesh |dF|",
                     "direct/mesh", "mesh", "order", "alpha", "r_cut"], rows,
                    title=f"\nEnergy + potentials + forces, rattled rock salt, tol {tol:g} "
                          f"(errors relative to k_e sum q^2 / d_min; |dF| in eV/Å; MB = process peak)")
        big = [i for i, n in enumerate(sizes) if n >= 10_000]
        e_mesh = fit_exponent([sizes[i] for i in big], [t_mesh[i] for i in big])
        d_idx = [i for i, n in enumerate(sizes) if n >= 1000 and t_direct[i] is not None]
        e_direct = fit_exponent([sizes[i] for i in d_idx], [t_direct[i] for i in d_idx])
        cross = crossover(sizes, t_direct, t_mesh)
        cross_text = cross if isinstance(cross, str) or cross is None else f"{cross:.0f}"
        print(f"fitted exponent: mesh (N >= 10^4) {e_mesh:.2f}, direct (N >= 10^3) {e_direct:.2f}; "
              f"crossover N: {cross_text}")
        summary[tol] = dict(sizes=sizes, mesh=t_mesh, direct=t_direct, exponent=e_mesh, errors_ok=errors_ok,
                            peaks=peaks)
    plot(summary)
    print("\ntargets:")
    for tol, s in summary.items():
        print(f"  tol {tol:g}: mesh exponent at most 1.15 (10^4 .. {max(s['sizes']):.0e}): {s['exponent']:.2f} — "
              f"{verdict(s['exponent'] <= 1.15)}")
        print(f"  tol {tol:g}: achieved error within tol in all {len(s['errors_ok'])} checked cases — "
              f"{verdict(all(s['errors_ok']))}")
    s = summary.get(1e-6)
    if s:
        by_n = dict(zip(s["sizes"], s["mesh"]))
        near = min(by_n, key=lambda n: abs(math.log(n / 1e5)))
        print(f"  N = {near} (~10^5) under 5 s at tol 1e-6 with forces: {by_n[near]:.2f} s — {verdict(by_n[near] < 5)}")
    for tol, s in summary.items():
        if 8 * LARGEST ** 3 in s["peaks"]:
            peak = s["peaks"][8 * LARGEST ** 3]
            print(f"  tol {tol:g}: N = 10^6 within 4 GB: {peak:.0f} MB — {verdict(peak < 4096)}")
    return summary


def plot(summary):
    """Time against N for both engines and tols, log-log, into benchmarks/results/scaling_mesh.png."""
    try:
        from matplotlib.figure import Figure
    except ImportError:
        return
    from common import RESULTS

    figure = Figure(figsize=(6.4, 4.4))
    axes = figure.subplots()
    for (tol, s), colour in zip(summary.items(), ("tab:blue", "tab:red")):
        axes.loglog(s["sizes"], s["mesh"], "o-", color=colour, label=f"mesh, tol {tol:g}")
        direct = [(n, t) for n, t in zip(s["sizes"], s["direct"]) if t is not None]
        axes.loglog(*zip(*direct), "s--", color=colour, alpha=0.6, label=f"direct, tol {tol:g}")
    axes.set_xlabel("ions N")
    axes.set_ylabel("wall time, s (energy + forces, 2 cores)")
    axes.set_title("Rattled rock salt: direct Ewald and particle mesh")
    axes.legend()
    axes.grid(True, which="both", alpha=0.3)
    os.makedirs(RESULTS, exist_ok=True)
    path = os.path.join(RESULTS, "scaling_mesh.png")
    figure.tight_layout()
    figure.savefig(path, dpi=120)
    print(f"wrote {path}")


def calibrate():
    """Nanoseconds of one thread per unit of work of the mesh part (constants in madelung/sums/tuning.py)."""
    import numba

    from calibrate_cost import cpu_time as cpu
    from common import rattled_rock_salt

    from madelung.sums import mesh as mesh_module
    from madelung.sums import tuning
    from madelung.sums._kernels import mesh_kernels
    from madelung.sums.geometry import wrapped_fractional

    numba.set_num_threads(1)
    rows = []
    for reps in (8, 16):
        crystal = rattled_rock_salt(reps)
        cell = np.ascontiguousarray(crystal.cell)
        q = np.ascontiguousarray(crystal.charges, dtype=float)
        n = len(q)
        alpha, order, k = 0.45, 8, 8 * reps
        shape = np.array([k, k, k], np.int64)
        points = float(k ** 3)
        frac = wrapped_fractional(cell, crystal.positions)
        atoms, start, slabs = mesh_module._slabs(frac[:, 0], k, order, 1)
        spectrum, real = mesh_module.mesh_buffer(shape)

        def spread():
            real[...] = 0.0
            mesh_kernels.spread_into(real, frac, q, atoms, start, slabs, shape, order)

        spread_s, _ = cpu(spread)
        fft, _ = cpu(lambda: (mesh_module.forward_transform(spectrum, real, shape, 1),
                              mesh_module.inverse_transform(spectrum, real, shape, 1)))
        recip = np.ascontiguousarray(np.linalg.inv(cell).T)
        moduli = [np.ascontiguousarray(mesh_module.bspline_moduli(k, order))] * 3
        influence, _ = cpu(lambda: mesh_kernels.apply_influence(spectrum, recip, shape, *moduli, alpha,
                                                                crystal.volume, False))
        interpolate, _ = cpu(lambda: mesh_kernels.interpolate(frac, q, real, shape, order, recip, True, atoms))
        spline_ns = 1e9 * (spread_s + interpolate) / (2 * n * order ** 3)
        fft_ns = 1e9 * fft / (2 * points * math.log2(points))
        point_ns = 1e9 * influence / points
        rows.append([n, f"{k}^3", f"{spline_ns:.2f}", f"{fft_ns:.2f}", f"{point_ns:.2f}"])
    print_table(["N", "mesh", "ns / spline point", "ns / FFT point log2", "ns / mesh point"], rows,
                title="One-thread process time per unit of work (order 8, forces on)")
    print(f"\ntuning.py uses: {tuning.SPLINE_POINT_NS:.2f}, {tuning.FFT_POINT_LOG_NS:.2f}, {tuning.MESH_POINT_NS:.2f}")

#: Stages of one mesh sum and the functions whose CPU time counts to each. Time inside a nested
#: stage counts to the innermost one only; "check" keeps everything it calls (its own small mesh
#: sum and direct reciprocal sum). Attributes missing from a version of the code are skipped.
STAGE_FUNCTIONS = [
    ("madelung.sums.dispatch", "plan_for", "plan"),
    ("madelung.sums.plan", "shortest_distance", "shortest distance"),
    ("madelung.sums.plan", "build_bins", "bins"),
    ("madelung.sums.mesh", "real_space_part", "real space"),
    ("madelung.sums.mesh", "_slabs", "spreading"),
    ("madelung.sums.mesh", "mesh_buffer", "spreading"),
    ("madelung.sums._kernels.mesh_kernels", "spread_charges", "spreading"),
    ("madelung.sums._kernels.mesh_kernels", "spread_into", "spreading"),
    ("scipy.fft", "rfftn", "FFT"),
    ("scipy.fft", "irfftn", "FFT"),
    ("madelung.sums.mesh", "forward_transform", "FFT"),
    ("madelung.sums.mesh", "inverse_transform", "FFT"),
    ("madelung.sums.mesh", "bspline_moduli", "influence"),
    ("madelung.sums._kernels.mesh_kernels", "apply_influence", "influence"),
    ("madelung.sums._kernels.mesh_kernels", "mesh_site_terms", "interpolation"),
    ("madelung.sums._kernels.mesh_kernels", "interpolate", "interpolation"),
    ("madelung.sums.mesh", "proxy_check", "check"),
    ("madelung.sums.mesh", "subsample_check", "check"),
]
STAGES = ["plan", "shortest distance", "bins", "real space", "spreading", "FFT", "influence", "interpolation",
          "check", "other"]


class StageClock:
    """CPU and wall time per stage (exclusive of nested stages) and the peak resident memory
    reached during each (VmHWM read and reset at every stage boundary, Linux)."""

    def __init__(self):
        self.cpu = dict.fromkeys(STAGES, 0.0)
        self.wall = dict.fromkeys(STAGES, 0.0)
        self.peak_mb = dict.fromkeys(STAGES, 0.0)
        self.stack = []

    @staticmethod
    def _status(key):
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith(key):
                    return int(line.split()[1]) / 1024.0
        return 0.0

    def boundary(self):
        """Attribute the peak since the last boundary to the running stage, then reset it."""
        name = self.stack[-1][0] if self.stack else "other"
        self.peak_mb[name] = max(self.peak_mb[name], self._status("VmHWM:"))
        try:
            with open("/proc/self/clear_refs", "w") as refs:
                refs.write("5")
        except OSError:
            pass

    def wrap(self, function, name):
        def timed(*args, **kwargs):
            if any(frame[0] == "check" for frame in self.stack):
                return function(*args, **kwargs)
            self.boundary()
            self.stack.append([name, time.process_time(), time.perf_counter(), 0.0, 0.0])
            try:
                return function(*args, **kwargs)
            finally:
                self.boundary()
                _, cpu0, wall0, child_cpu, child_wall = self.stack.pop()
                cpu, wall = time.process_time() - cpu0, time.perf_counter() - wall0
                self.cpu[name] += cpu - child_cpu
                self.wall[name] += wall - child_wall
                if self.stack:
                    self.stack[-1][3] += cpu
                    self.stack[-1][4] += wall
        return timed

    def install(self):
        import importlib

        for module_name, attribute, stage in STAGE_FUNCTIONS:
            module = importlib.import_module(module_name)
            if hasattr(module, attribute):
                setattr(module, attribute, self.wrap(getattr(module, attribute), stage))


def _run_stages(reps, tol, threads, lift_limit=False):
    """Inside the subprocess: one mesh sum with forces, timed by stage; JSON on stdout.
    ``lift_limit``: let the plan take a mesh above the memory bound (to measure what it costs)."""
    import numba

    from common import rattled_rock_salt

    import madelung

    from madelung.sums import mesh as mesh_module

    if lift_limit:
        from madelung.sums import plan as plan_module

        plan_module.check_mesh = lambda shape: None
    numba.set_num_threads(threads)
    warm = madelung.ewald(rattled_rock_salt(3), tol=tol, forces=True, method="mesh")  # load the kernels
    mesh_module.proxy_check(warm.plan, warm.plan.mesh, warm.plan.order, rattled_rock_salt(3).charges)
    crystal = rattled_rock_salt(reps)
    clock = StageClock()
    clock.install()
    base_mb = clock._status("VmRSS:")
    clock.boundary()
    cpu0, wall0 = time.process_time(), time.perf_counter()
    result = madelung.ewald(crystal, tol=tol, forces=True, method="mesh")
    cpu, wall = time.process_time() - cpu0, time.perf_counter() - wall0
    clock.boundary()
    clock.cpu["other"] = cpu - sum(v for k, v in clock.cpu.items() if k != "other")
    clock.wall["other"] = wall - sum(v for k, v in clock.wall.items() if k != "other")
    p = result.params
    print(json.dumps({"n": len(crystal), "tol": tol, "threads": threads, "cpu": clock.cpu, "wall": clock.wall,
                      "cpu_total": cpu, "wall_total": wall, "peak_mb": clock.peak_mb, "base_mb": base_mb,
                      "mesh": p.extra.get("mesh"), "order": p.extra.get("order"), "alpha": p.alpha,
                      "r_cut": p.real_cutoff, "pairs": p.real_space_pairs,
                      "check": (p.extra.get("check") or {}).get("kind"), "energy": result.energy,
                      "scale": result.energy_scale}))


def stage_table(reps=LARGEST, tols=(1e-6, 1e-8), thread_counts=(1, 2), cpu_target=8.0, memory_target_mb=2048.0,
                lift_limit=False):
    """CPU seconds by stage and peak memory of one large mesh sum per tol and thread count."""
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    reports = []
    for tol in tols:
        for threads in thread_counts:
            out = subprocess.run([sys.executable, os.path.abspath(__file__), "--stage-case", str(reps), repr(tol),
                                  str(threads), "lift" if lift_limit else "keep"], capture_output=True, text=True, env=env, timeout=3600)
            if out.returncode != 0:
                raise RuntimeError(f"stage case {reps} {tol} {threads} failed:\n{out.stderr[-2000:]}")
            reports.append(json.loads(out.stdout.strip().splitlines()[-1]))
    headers = ["stage"] + [f"{r['tol']:g}/{r['threads']}t" for r in reports]
    rows = [[stage] + [f"{r['cpu'][stage]:.2f}" for r in reports] for stage in STAGES]
    rows.append(["CPU total / s"] + [f"{r['cpu_total']:.2f}" for r in reports])
    rows.append(["wall total / s"] + [f"{r['wall_total']:.2f}" for r in reports])
    rows.append(["peak RSS / MB"] + [f"{max(r['peak_mb'].values()):.0f}" for r in reports])
    rows.append(["  before sum / MB"] + [f"{r['base_mb']:.0f}" for r in reports])
    rows.append(["  stage at peak"] + [max(r["peak_mb"], key=r["peak_mb"].get) for r in reports])
    rows.append(["mesh, order"] + ["x".join(map(str, r["mesh"])) + f", {r['order']}" for r in reports])
    rows.append(["alpha, r_cut"] + [f"{r['alpha']:.3f}, {r['r_cut']:.2f}" for r in reports])
    rows.append(["check"] + [str(r["check"]) for r in reports] )
    print_table(headers, rows, title=f"\nN = {reports[0]['n']} rattled rock salt, mesh engine with forces: "
                                     "CPU s by stage (tol/threads; CPU of all threads)")
    peaks = [[stage] + [f"{r['peak_mb'][stage]:.0f}" for r in reports] for stage in STAGES]
    print_table(headers, peaks, title="\nPeak resident memory reached during each stage, MB (whole process)")
    print("\ntargets:")
    for r in reports:
        peak = max(r["peak_mb"].values())
        print(f"  tol {r['tol']:g}, {r['threads']} thread(s): CPU {r['cpu_total']:.2f} s under {cpu_target:g} s — "
              f"{verdict(r['cpu_total'] < cpu_target)}; peak {peak:.0f} MB under {memory_target_mb:.0f} MB — "
              f"{verdict(peak < memory_target_mb)}")
    return reports


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--case", nargs=4, metavar=("METHOD", "REPEATS", "TOL", "FORCES_NPY"), help=argparse.SUPPRESS)
    parser.add_argument("--largest", action="store_true", help="also run N = 10^6 (mesh only)")
    parser.add_argument("--stage-case", nargs=4, metavar=("REPEATS", "TOL", "THREADS", "LIMIT"), help=argparse.SUPPRESS)
    parser.add_argument("--lift-mesh-limit", action="store_true",
                        help="with --stages: let the plan take a mesh above the memory bound")
    parser.add_argument("--stages", action="store_true",
                        help="CPU time by stage and peak memory of N = 8 x 50^3 = 10^6 (1 and 2 threads)")
    parser.add_argument("--calibrate", action="store_true", help="print seconds per unit of work")
    parser.add_argument("--stage-repeats", type=int, default=LARGEST, help="repeats of the --stages case")
    parser.add_argument("--tols", type=float, nargs="*", default=[1e-6, 1e-8])
    parser.add_argument("--repeats", type=int, nargs="*", default=REPEATS)
    parser.add_argument("--direct-max", type=int, default=100_000, help="largest N for the direct engine")
    parser.add_argument("--reference-max", type=int, default=100_000, help="largest N for the error check")
    args = parser.parse_args(argv)
    if args.case:
        method, reps, tol, path = args.case
        _run_case(method, int(reps), float(tol), path)
        return 0
    if args.stage_case:
        reps, tol, threads, limit = args.stage_case
        _run_stages(int(reps), float(tol), int(threads), limit == "lift")
        return 0
    if args.stages:
        stage_table(args.stage_repeats, args.tols, lift_limit=args.lift_mesh_limit)
        return 0
    if args.calibrate:
        calibrate()
        return 0
    side_by_side(args.tols, args.repeats, args.largest, args.direct_max, args.reference_max)
    return 0


if __name__ == "__main__":
    sys.exit(main())
