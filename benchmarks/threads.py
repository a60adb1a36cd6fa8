"""One thread against two, with and without a competing process, for each threading set-up.

Every set-up runs in a fresh process (Numba fixes its threading layer, and OpenMP reads its
waiting policy, once per process):

- ``omp spin``, the OpenMP layer (GNU) with ``OMP_WAIT_POLICY=ACTIVE``: idle threads spin;
- ``omp spin 300k``, OpenMP's default: idle threads spin 300,000 rounds, then sleep;
- ``omp spin 10k``, the same with ``GOMP_SPINCOUNT=10000`` (a bounded spin of some microseconds);
- ``omp passive``, ``OMP_WAIT_POLICY=PASSIVE``: idle threads sleep at once;
- ``tbb``, Intel's Threading Building Blocks, when its library can be loaded (work stealing);
- ``workqueue``, Numba's own pool (threads wait on a condition variable; it aborts the process
  when two Python threads launch parallel kernels at once, so it cannot be a library's default);
- ``package default``, whatever ``import madelung`` chooses when the user has set nothing
  (``geometry._choose_threading``).

The competitor is one process spinning on a core for the whole measurement. Wall times, best of
repeats; the machine may have other work running too, which the table cannot see.

    python benchmarks/threads.py [--quick]
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import print_table, verdict  # noqa: E402

SETUPS = {
    "omp spin": {"NUMBA_THREADING_LAYER": "omp", "OMP_WAIT_POLICY": "ACTIVE"},
    "omp spin 300k": {"NUMBA_THREADING_LAYER": "omp"},
    "omp spin 10k": {"NUMBA_THREADING_LAYER": "omp", "GOMP_SPINCOUNT": "10000"},
    "omp passive": {"NUMBA_THREADING_LAYER": "omp", "OMP_WAIT_POLICY": "PASSIVE"},
    "tbb": {"NUMBA_THREADING_LAYER": "tbb"},
    "workqueue": {"NUMBA_THREADING_LAYER": "workqueue"},
    "package default": {},
}

CONTROLLED = ("NUMBA_THREADING_LAYER", "OMP_WAIT_POLICY", "GOMP_SPINCOUNT", "KMP_BLOCKTIME")


def worker(quick):
    """Time the cases on 1 and 2 threads in this process; print one JSON line."""
    import numba

    import madelung
    from common import rattled_rock_salt

    cases = [("8 ions, direct", 1, "direct"), ("512 ions, direct", 4, "direct"),
             ("4096 ions, auto", 8, "auto"), ("4096 ions, direct", 8, "direct")]
    if quick:
        cases = cases[1:3]
    repeat = 5 if quick else 9
    out = {"layer": None, "rows": []}
    for name, repeats, method in cases:
        crystal = rattled_rock_salt(repeats)
        if repeats == 1:
            crystal = madelung.Crystal(crystal.cell, crystal.positions, crystal.charges)
        times = {1: float("inf"), 2: float("inf")}
        for threads in (1, 2):
            numba.set_num_threads(threads)
            madelung.ewald(crystal, tol=1e-8, forces=True, method=method)
        # alternate the two counts so that both see the same spells of load from other work
        for _ in range(repeat):
            for threads in (1, 2):
                numba.set_num_threads(threads)
                started = time.perf_counter()
                madelung.ewald(crystal, tol=1e-8, forces=True, method=method)
                times[threads] = min(times[threads], time.perf_counter() - started)
        out["rows"].append([name, times[1], times[2]])
    out["layer"] = numba.threading_layer()
    print(json.dumps(out))


def run_setup(env_changes, competitor, quick):
    env = {k: v for k, v in os.environ.items() if k not in CONTROLLED}
    env.update(env_changes)
    spinner = None
    if competitor:
        spinner = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        args = [sys.executable, os.path.abspath(__file__), "--worker"] + (["--quick"] if quick else [])
        done = subprocess.run(args, env=env, capture_output=True, text=True)
    finally:
        if spinner is not None:
            spinner.kill()
            spinner.wait()
    if done.returncode != 0:
        return None
    return json.loads(done.stdout.strip().splitlines()[-1])


def main():
    quick = "--quick" in sys.argv
    if "--worker" in sys.argv:
        worker(quick)
        return
    rows = []
    never_slower = {}
    for label, env_changes in SETUPS.items():
        for competitor in (False, True):
            result = run_setup(env_changes, competitor, quick)
            if result is None:
                rows.append([label, "not available", "yes" if competitor else "no", "-", "-", "-", "-"])
                continue
            for name, one, two in result["rows"]:
                rows.append([label, result["layer"], "yes" if competitor else "no", name,
                             f"{one * 1e3:.1f}", f"{two * 1e3:.1f}", f"{two / one:.2f}"])
                never_slower.setdefault(label, True)
                # within 5 % counts as not slower: repeats on a shared machine scatter that much
                never_slower[label] &= two <= 1.05 * one
    print_table(["set-up", "layer", "competitor", "case", "1 thread ms", "2 threads ms", "2/1"], rows,
                title="madelung.ewald, tol 1e-8 with forces: wall time, best of repeats")
    print()
    for label, ok in never_slower.items():
        print(f"  {label}: two threads never slower than one (within 5 %): {verdict(ok)}")


if __name__ == "__main__":
    main()
