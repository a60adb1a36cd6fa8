"""Reading CIFs: where the time of one small structure goes, with the fast (gemmi) and the general (ASE) tag reader.

Stages of one file, as the batch runner meets them (``madelung.batch.tasks.screen_task``):
check (the bounds pre-check of the text), read+tags (the bytes decoded, then the CIF parser: gemmi
or ASE's), sites (rows, occupancies and oxidation states, symmetry expansion; for the fast reader
this includes turning gemmi's tokens into values, which happens on first use), crystal+charges
(the file's states as site charges and the Crystal built with them), space group (spglib), describe (the sums of ``describe``: Ewald sum,
Madelung constants, Coulomb-matrix spectrum). The first three are the reading (what
``madelung.io.read.read_sites`` does); only read+tags and sites differ between the readers.

Sets: the bundled prototypes (structures/*.cif, written with their full space-group operators,
up to 192 of them), and 1000 small P1 cells as the screening benchmark writes them (strained,
rattled prototypes and small supercells, 2-40 sites), generated into a temporary folder.

Every file is also checked to give the same site table both ways (cell, positions, labels,
species, block, info) -- the benchmark says how many did.

With ``--previous TREE`` (a checkout of madelung, e.g. the main branch before this reader), the
whole ``read_sites`` of each set is also timed with that checkout, each tree in a fresh process.

Timing: the best of ``--repeat`` passes per file, in CPU time of this process (less disturbed than
wall time on a shared machine; the load average is printed). The baseline is the general reader
measured in the same run, file by file beside the fast one.
"""

import argparse
import glob
import json
import os
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import STRUCTURES, print_table  # noqa: E402
from screening import make_cells, write_inputs  # noqa: E402

STAGES = ("check", "read+tags", "sites", "crystal+charges", "space group", "describe")
READING = ("check", "read+tags", "sites")


def stage_times(path, reader, with_sums):
    """Seconds of each stage for one file, and the site table read."""
    from madelung.analysis.descriptors import describe
    from madelung.batch.tasks import _space_group
    from madelung.io import cif
    from madelung.io.read import charge_table
    from madelung.structure.bounds import precheck_file

    times = {}
    clock = time.process_time
    t1 = clock()
    precheck_file(path, "cif", 20000)
    t2 = clock()
    blocks = cif.cif_blocks(path, reader)
    t3 = clock()
    table = cif.block_sites(blocks[0][1], path, max_atoms=20000)
    t4 = clock()
    crystal = charge_table(table, "file", source=path).crystal
    t5 = clock()
    times["check"], times["read+tags"], times["sites"], times["crystal+charges"] = t2 - t1, t3 - t2, t4 - t3, t5 - t4
    if with_sums:
        t6 = clock()
        _space_group(crystal, 1e-2)
        t7 = clock()
        describe(crystal, tol=1e-8)
        times["space group"], times["describe"] = t7 - t6, clock() - t7
    return times, table


def same_table(a, b):
    return (np.array_equal(a.cell, b.cell) and np.array_equal(a.positions, b.positions) and a.labels == b.labels
            and repr(a.species) == repr(b.species) and a.block == b.block and a.info == b.info)


def measure(paths, repeat, with_sums):
    """Per reader: summed best-of-repeat seconds per stage; and how many files gave the same table."""
    totals = {reader: dict.fromkeys(STAGES, 0.0) for reader in ("fast", "general")}
    same = 0
    for path in paths:
        tables = {}
        for reader in ("general", "fast"):
            best = None
            for _ in range(repeat):
                times, tables[reader] = stage_times(path, reader, with_sums and reader == "fast")
                best = times if best is None else {k: min(best[k], times[k]) for k in times}
            for key, value in best.items():
                totals[reader][key] += value
        same += same_table(tables["general"], tables["fast"])
    if with_sums:   # the sums do not depend on the reader
        for key in ("space group", "describe"):
            totals["general"][key] = totals["fast"][key]
    return totals, same


def report(title, paths, totals, same, with_sums):
    n = len(paths)
    fast, general = totals["fast"], totals["general"]
    rows = []
    for stage in STAGES:
        if not with_sums and stage in ("space group", "describe"):
            continue
        ratio = general[stage] / fast[stage] if fast[stage] > 0 else float("nan")
        rows.append([stage, f"{1e3 * fast[stage] / n:.3f}", f"{1e3 * general[stage] / n:.3f}",
                     f"{ratio:.2f}x" if stage in ("read+tags", "sites") else ""])
    read_fast = sum(fast[s] for s in READING)
    read_general = sum(general[s] for s in READING)
    rows.append(["reading (check..sites)", f"{1e3 * read_fast / n:.3f}", f"{1e3 * read_general / n:.3f}",
                 f"{read_general / read_fast:.2f}x"])
    if with_sums:
        all_fast = sum(fast.values())
        all_general = sum(general.values())
        rows.append(["all stages", f"{1e3 * all_fast / n:.3f}", f"{1e3 * all_general / n:.3f}",
                     f"{all_general / all_fast:.2f}x"])
        rows.append(["reading share", f"{100 * read_fast / all_fast:.0f}%", f"{100 * read_general / all_general:.0f}%",
                     ""])
        rows.append(["describe share", f"{100 * fast['describe'] / all_fast:.0f}%",
                     f"{100 * general['describe'] / all_general:.0f}%", ""])
    print_table(["stage", "fast ms/file", "general ms/file", "general/fast"], rows,
                title=f"{title}: {n} files, same site table both ways for {same}/{n} "
                      f"(load average {os.getloadavg()[0]:.1f})")
    print()


def read_sites_time(paths, repeat):
    """Mean best-of-``repeat`` CPU seconds of ``madelung.io.read.read_sites`` per file, in this process."""
    from madelung.io.read import read_sites

    total = 0.0
    for path in paths:
        best = np.inf
        for _ in range(repeat):
            started = time.process_time()
            read_sites(path)
            best = min(best, time.process_time() - started)
        total += best
    return total / len(paths)


def read_sites_time_apart(paths, repeat, tree=None, reader="fast"):
    """:func:`read_sites_time` in a fresh process with the madelung of ``tree`` (a checkout) and a CIF reader."""
    env = dict(os.environ, MADELUNG_CIF_READER=reader)
    if tree is not None:
        env["PYTHONPATH"] = tree
    request = json.dumps({"paths": paths, "repeat": repeat})
    done = subprocess.run([sys.executable, os.path.abspath(__file__), "--one-run", request], env=env,
                          capture_output=True, text=True, check=True)
    return float(done.stdout.strip().splitlines()[-1])


def compare_trees(title, paths, repeat, previous):
    """read_sites per file: this checkout (fast, general) against another checkout, each in a fresh process."""
    cases = [("this checkout, fast reader", None, "fast"), ("this checkout, general reader", None, "general"),
             (f"{previous}", previous, "fast")]
    times = [read_sites_time_apart(paths, repeat, tree, reader) for _, tree, reader in cases]
    rows = [[label, f"{1e3 * t:.3f}", f"{t / times[0]:.2f}x"] for (label, _, _), t in zip(cases, times)]
    print_table(["read_sites of", "ms/file", "vs fast"], rows, title=f"{title}: {len(paths)} files, whole read_sites "
                f"(check..sites), CPU time (load average {os.getloadavg()[0]:.1f})")
    print()


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--count", type=int, default=1000, help="P1 cells to generate (default 1000)")
    parser.add_argument("--repeat", type=int, default=3, help="passes per file, best kept (default 3)")
    parser.add_argument("--previous", metavar="TREE", help="also time read_sites with the madelung of this checkout "
                        "(e.g. the main branch before the fast reader)")
    parser.add_argument("--one-run", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    warnings.simplefilter("ignore")
    if args.one_run:
        request = json.loads(args.one_run)
        print(read_sites_time(request["paths"], request["repeat"]))
        return
    from madelung.batch.tasks import prepare_process

    prepare_process()       # one thread for Numba and BLAS, as in a screening worker

    bundled = sorted(glob.glob(os.path.join(STRUCTURES, "*.cif")))
    bundled = [p for p in bundled if "Fe3O4" not in p]      # its file gives no Fe states (needs "auto")
    for path in bundled[:2]:
        stage_times(path, "fast", True)                     # compile and load the kernels first
    totals, same = measure(bundled, args.repeat, with_sums=True)
    report("Bundled prototypes (with their space-group operators)", bundled, totals, same, True)
    if args.previous:
        compare_trees("Bundled prototypes", bundled, args.repeat, args.previous)

    with tempfile.TemporaryDirectory() as folder:
        cif_folder, _ = write_inputs(make_cells(args.count), folder)
        paths = sorted(glob.glob(os.path.join(cif_folder, "*.cif")))
        for path in paths[:2]:
            stage_times(path, "fast", True)
        totals, same = measure(paths, args.repeat, with_sums=True)
        report(f"{len(paths)} P1 cells as the screening benchmark writes them", paths, totals, same, True)
        if args.previous:
            compare_trees(f"{len(paths)} P1 cells", paths, args.repeat, args.previous)
    print("  the fast reader's value conversion happens on first use, so it is counted under 'sites'; space group and\n"
          "  describe are timed on the fast reader's crystal (best of --repeat) and shown for both: they do not depend\n"
          "  on the reader. CPU time of this one process, Numba and BLAS on one thread.")


if __name__ == "__main__":
    main()
