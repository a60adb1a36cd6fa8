"""Start-up of the command line: cold (empty Numba cache) and warm runs, imports, argument errors.

Every case runs in a fresh process. Wall time is the best of ``--repeat`` runs (one run for cold
cases: each gets a new empty ``NUMBA_CACHE_DIR``); CPU time (user + system of the child) is shown
beside it because on a shared machine the wall clock also counts the time other work held the
cores. Baselines measured in the same run: a bare ``python -c pass`` and ``import numpy, scipy``.
The cold cases run with stderr on a pseudo-terminal, as a user sees them, to show whether the
"compiling..." notice appeared (it is printed only when the cache lacks a kernel, only to a terminal).

``--before DIR`` runs the same cases on another checkout of the package (say an export of an
earlier commit: ``git archive main | tar -x -C DIR``) and adds its times as columns.

``--detail`` adds the CPU cost of compiling each heavy kernel with its own parallel options
against its one-thread twin (``madelung.sums._kernels.variants``), compiled in-process from scratch.

    python benchmarks/startup.py [--repeat 3] [--no-cold] [--detail] [--before DIR]
"""

from __future__ import annotations

import argparse
import os
import pty
import resource
import shutil
import subprocess
import sys
import tempfile
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import STRUCTURES, print_table, verdict  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NACL = os.path.join(STRUCTURES, "rocksalt-NaCl.cif")
SPINEL = os.path.join(STRUCTURES, "spinel-MgAl2O4.cif")
CLI = [sys.executable, "-m", "madelung.cli"]
NOTICE = "compiling the numerical kernels"
HEAVY_KERNELS = ("kernels.real_space_terms", "kernels.structure_factors", "kernels.reciprocal_site_terms",
                 "geometry_kernels.closest_distance", "geometry_kernels.nearest_neighbours")


def _environment(cache_dir=None, root=ROOT):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([root, os.environ.get("PYTHONPATH", "")]))
    if cache_dir is not None:
        env["NUMBA_CACHE_DIR"] = cache_dir
    return env


def run_once(command, env, terminal=False, cwd=ROOT):
    """(wall s, CPU s of the child, exit code, stderr text) of one run of ``command`` in ``cwd``
    (``python -m`` and ``-c`` put the working folder first on the path: it must be the checkout timed)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    started = time.perf_counter()
    if terminal:
        master, slave = pty.openpty()
        process = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL, stderr=slave, cwd=cwd)
        os.close(slave)
        chunks = []
        while True:
            try:
                chunk = os.read(master, 4096)
            except OSError:
                break
            if not chunk:
                break
            chunks.append(chunk)
        os.close(master)
        code, err = process.wait(), b"".join(chunks).decode(errors="replace")
    else:
        done = subprocess.run(command, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=cwd)
        code, err = done.returncode, done.stderr.decode(errors="replace")
    wall = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, code, err


def best_of(command, repeat, env, cwd=ROOT):
    """Best wall and best CPU time of ``repeat`` runs, and the last exit code and stderr."""
    runs = [run_once(command, env, cwd=cwd) for _ in range(repeat)]
    return min(r[0] for r in runs), min(r[1] for r in runs), runs[-1][2], runs[-1][3]


def cold(command, root=ROOT):
    """One run with a new, empty Numba cache, stderr on a terminal."""
    folder = tempfile.mkdtemp(prefix="madelung-cold-cache-")
    try:
        return run_once(command, _environment(folder, root), terminal=True, cwd=root)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def compile_detail():
    """CPU seconds to compile each heavy kernel from scratch: parallel options against the twin."""
    code = r"""
import sys, time, io, contextlib
from numba import njit
from madelung.cli import main
from madelung.sums._kernels import kernels, geometry_kernels
with contextlib.redirect_stdout(io.StringIO()):
    main(["constant", sys.argv[1]])            # warm cache: gives each kernel's signature
modules = {"kernels": kernels, "geometry_kernels": geometry_kernels}
for which in sys.argv[2:]:
    module, name = which.split(".")
    twin = getattr(modules[module], name)
    signature = (twin.signatures or twin.serial.signatures)[0]
    for label, dispatcher in (("parallel", twin.parallel), ("one thread", twin.serial)):
        options = {k: v for k, v in dispatcher.targetoptions.items() if k not in ("cache", "nopython")}
        fresh = njit(**options)(dispatcher.py_func)   # same body and options, nothing cached
        started = time.process_time()
        fresh.compile(signature)
        print(which, label, time.process_time() - started, sep="\t", flush=True)
"""
    done = subprocess.run([sys.executable, "-c", code, NACL, *HEAVY_KERNELS], env=_environment(),
                          capture_output=True, text=True, cwd=ROOT)
    if done.returncode != 0:
        print(done.stderr[-2000:])
        return
    seconds = {}
    for line in done.stdout.splitlines():
        which, label, value = line.split("\t")
        seconds[which, label] = float(value)
    rows = []
    for which in HEAVY_KERNELS:
        p, s = seconds.get((which, "parallel")), seconds.get((which, "one thread"))
        if p is not None and s is not None:
            rows.append([which, f"{p:.2f}", f"{s:.2f}", f"{p / s:.1f}"])
    total_p = sum(seconds.get((w, "parallel"), 0.0) for w in HEAVY_KERNELS)
    total_s = sum(seconds.get((w, "one thread"), 0.0) for w in HEAVY_KERNELS)
    rows.append(["all five", f"{total_p:.2f}", f"{total_s:.2f}", f"{total_p / max(total_s, 1e-9):.1f}"])
    print_table(["kernel", "parallel CPU s", "one-thread twin CPU s", "ratio"], rows,
                title="\nCompiling from scratch, CPU seconds (the twin is what a small first command compiles)")


def measure(root, repeat, with_cold):
    """{case: (wall s, CPU s, note)} for the package at ``root``."""
    env = _environment(root=root)
    # warm the cache once for the warm cases (a no-op when it is warm already)
    run_once(CLI + ["constant", NACL], env, cwd=root)
    run_once(CLI + ["energy", SPINEL], env, cwd=root)
    cases = [
        ("python -c pass (baseline)", [sys.executable, "-c", "pass"], 0),
        ("import numpy, scipy (baseline)", [sys.executable, "-c", "import numpy, scipy"], 0),
        ("import madelung", [sys.executable, "-c", "import madelung"], 0),
        ("madelung --help", CLI + ["--help"], 0),
        ("argument error: constant missing.cif", CLI + ["constant", "missing.cif"], 2),
        ("argument error: constant --tol abc", CLI + ["constant", NACL, "--tol", "abc"], 2),
        ("warm: constant rocksalt-NaCl.cif", CLI + ["constant", NACL], 0),
        ("warm: energy spinel-MgAl2O4.cif", CLI + ["energy", SPINEL], 0),
    ]
    measured = {}
    for name, command, expected in cases:
        wall, cpu, code, err = best_of(command, repeat, env, cwd=root)
        if code != expected:
            print(f"  {name}: exit code {code}, expected {expected}: {err.strip()[-300:]}")
        measured[name] = (wall, cpu, "")
    if with_cold:
        for name, command in (("cold: constant rocksalt-NaCl.cif", CLI + ["constant", NACL]),
                              ("cold: energy spinel-MgAl2O4.cif", CLI + ["energy", SPINEL])):
            wall, cpu, code, err = cold(command, root)
            measured[name] = (wall, cpu, "notice shown" if NOTICE in err else "no notice")
            if code != 0:
                print(f"  {name}: exit code {code}: {err.strip()[-300:]}")
    return measured


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--no-cold", action="store_true", help="skip the cold (empty cache) runs")
    parser.add_argument("--detail", action="store_true", help="also compile the heavy kernels both ways")
    parser.add_argument("--before", metavar="DIR", help="another checkout to time the same way, for comparison")
    args = parser.parse_args()
    print(f"load average at start {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    measured = measure(ROOT, args.repeat, not args.no_cold)
    before = measure(os.path.abspath(args.before), args.repeat, not args.no_cold) if args.before else None

    bare_wall = measured["python -c pass (baseline)"][0]
    libs_wall = measured["import numpy, scipy (baseline)"][0]
    headers = ["case", "wall s", "CPU s", "/ python pass", "/ numpy+scipy", "note"]
    if before:
        headers += ["before wall s", "before CPU s", "CPU before/now"]
    rows = []
    for name, (wall, cpu, note) in measured.items():
        row = [name, f"{wall:.3f}", f"{cpu:.3f}", f"{wall / bare_wall:.1f}", f"{wall / libs_wall:.1f}", note]
        if before:
            b_wall, b_cpu, _ = before[name]
            row += [f"{b_wall:.3f}", f"{b_cpu:.3f}", f"{b_cpu / max(cpu, 1e-9):.1f}"]
        rows.append(row)
    print_table(headers, rows, title=f"\nStart-up times, best of {args.repeat} (cold: one run, fresh NUMBA_CACHE_DIR)")
    print(f"load average at end {os.getloadavg()[0]:.2f}")

    targets = [("warm constant under 1 s wall", measured["warm: constant rocksalt-NaCl.cif"][0] < 1.0),
               ("warm energy under 1 s wall", measured["warm: energy spinel-MgAl2O4.cif"][0] < 1.0),
               ("argument errors under 0.3 s wall",
                max(measured[n][0] for n in measured if n.startswith("argument error")) < 0.3)]
    if not args.no_cold:
        targets.append(("cold constant under 15 s wall", measured["cold: constant rocksalt-NaCl.cif"][0] < 15.0))
    for text, ok in targets:
        print(f"  {text}: {verdict(ok)}")
    if args.detail:
        compile_detail()

if __name__ == "__main__":
    main()
