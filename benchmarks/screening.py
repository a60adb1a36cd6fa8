"""Screening throughput: structures per second for 1000 small cells, from CIF files and from an ASE database.

Cases: 1000 cells of up to 40 sites made from the bundled prototypes (rock salt, caesium chloride,
fluorite, rutile, zinc blende, wurtzite, perovskite, layered rock salt, corundum, ilmenite), each
strained by up to +-4 % per axis and rattled by 0.03 Å (seeded), some as 2x1x1, 2x2x1 or 2x2x2
supercells. They are written once as P1 CIFs with oxidation numbers, and once into an ASE
database (SQLite) with the charges as initial charges. Each input is screened end to end
(``madelung.batch.screen``: reading, charges, space group, Ewald sum, Madelung constants,
Coulomb matrix and its spectrum, writing the Parquet table) at tol 1e-8 with 1 and with 2
workers; the workers are started inside the timed run. Each run is a fresh Python process.

The CIF files are screened with the fast CIF reader (gemmi where it reads a file as ASE's parser
would, the default) and, as the baseline, with the general reader (ASE's parser only,
``MADELUNG_CIF_READER=general``); with ``--previous TREE`` also with another checkout of madelung
(e.g. the main branch before this work). The rows of each run are compared with the general
reader's: they must be identical but for the timing columns.

The shares come from the per-row timings: reading (parsing the file or fetching the row),
charges and space group, and the sums (Ewald sum, constants, Coulomb-matrix spectrum); the rest
of the wall time is start-up, hand-over between processes and writing.

Targets on the 2-core reference machine: at least 500 structures per second from CIF files with
2 workers, and at least 1.7x from 1 to 2 workers. The machine is shared: other jobs running
at the same time lower both figures; the load average is printed with the table.
"""

import argparse
import json
import math
import os
import runpy
import subprocess
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import STRUCTURES, print_table, verdict  # noqa: E402

PROTOTYPES = ["rocksalt-NaCl", "rocksalt-MgO", "caesium-chloride-CsCl", "fluorite-CaF2", "rutile-TiO2",
              "zincblende-ZnS", "wurtzite-ZnO-ideal", "perovskite-SrTiO3", "layered-rocksalt-LiCoO2",
              "corundum-Al2O3", "ilmenite-FeTiO3", "rocksalt-KBr"]


def make_cells(count, seed=0, max_sites=40):
    """``count`` strained, rattled copies of the prototypes (and small supercells), at most ``max_sites``."""
    import madelung

    rng = np.random.default_rng(seed)
    bases = [madelung.Crystal.from_file(os.path.join(STRUCTURES, f"{n}.cif")) for n in PROTOTYPES]
    cells = []
    while len(cells) < count:
        base = bases[len(cells) % len(bases)]
        repeat = [(1, 1, 1), (2, 1, 1), (2, 2, 1), (2, 2, 2)][int(rng.integers(4))]
        crystal = base.repeat(repeat) if len(base) * np.prod(repeat) <= max_sites else base
        strain = np.diag(1 + rng.uniform(-0.04, 0.04, size=3))
        cell = crystal.cell @ strain
        frac = crystal.fractional_positions + rng.normal(scale=0.03, size=crystal.positions.shape) @ \
            np.linalg.inv(cell)
        cells.append(crystal.replace(cell=cell, positions=frac @ cell))
    return cells


def write_inputs(cells, folder):
    """The cells as P1 CIFs (the demo's writer) and as an ASE database; returns (cif folder, db path)."""
    import ase.db

    writer = runpy.run_path(os.path.join(STRUCTURES, "demo", "make_demo.py"))["cif_text"]
    cif_folder = os.path.join(folder, "cif")
    os.makedirs(cif_folder)
    for k, crystal in enumerate(cells):
        states = {}
        for symbol, q in zip(crystal.symbols, crystal.charges):
            states[symbol] = int(round(q))
        sites = list(zip(crystal.symbols, map(tuple, crystal.fractional_positions % 1.0)))
        with open(os.path.join(cif_folder, f"cell-{k:04d}.cif"), "w") as handle:
            handle.write(writer(f"cell_{k:04d}", crystal.cell, sites, states, "benchmark cell"))
    path = os.path.join(folder, "cells.db")
    with ase.db.connect(path) as db:
        for crystal in cells:
            db.write(crystal.to_ase())
    return cif_folder, path


def run(inputs, db, workers, out, tol):
    """One screening run in this process: (summary, wall s around ``screen``, summed per-row seconds)."""
    from madelung.batch import TableWriter, screen, table_columns

    started = time.perf_counter()
    summary = screen(inputs, out, db=db, workers=workers, tol=tol, progress=False, chunk_size=500)
    wall = time.perf_counter() - started
    rows = TableWriter(out, table_columns()).read()
    parts = {name: sum(r[f"seconds_{name}"] for r in rows) for name in ("read", "charges", "sums", "total", "cpu")}
    return summary, wall, parts


def run_apart(inputs, db, workers, out, tol, reader="fast", tree=None):
    """One screening run in a fresh Python process, as a user's ``madelung screen`` would start: the CIF
    reader is chosen by ``MADELUNG_CIF_READER`` (which the workers inherit) and ``tree`` (a checkout of
    madelung, e.g. the main branch) by ``PYTHONPATH``. Returns (total, failed, wall around ``screen``,
    wall of the whole process, summed per-row seconds)."""
    env = dict(os.environ, MADELUNG_CIF_READER=reader)
    if tree is not None:
        env["PYTHONPATH"] = tree
    request = json.dumps({"inputs": inputs, "db": db, "workers": workers, "out": out, "tol": tol})
    started = time.perf_counter()
    done = subprocess.run([sys.executable, os.path.abspath(__file__), "--one-run", request], env=env,
                          capture_output=True, text=True, check=True)
    whole = time.perf_counter() - started
    answer = json.loads(done.stdout.strip().splitlines()[-1])
    print(f"  ({reader} reader, madelung from {answer['package']}: {answer['total']} structures in {answer['wall']:.2f} s)",
          file=sys.stderr)
    return answer["total"], answer["failed"], answer["wall"], whole, answer["parts"]


def _one_run(request):
    request = json.loads(request)
    import madelung

    summary, wall, parts = run(request["inputs"], request["db"], request["workers"], request["out"], request["tol"])
    print(json.dumps({"total": summary.total, "failed": summary.failed, "wall": wall, "parts": parts,
                      "package": os.path.dirname(madelung.__file__)}))


def table_rows(out):
    """The rows of a table without their timing columns (which differ from run to run)."""
    from madelung.batch import TableWriter, table_columns

    return [{k: v for k, v in row.items() if not k.startswith("seconds_")}
            for row in TableWriter(out, table_columns()).read()]


def same_rows(a, b):
    """Whether two tables hold the same rows (NaN equal to NaN, every other value exactly equal)."""
    def same(x, y):
        return x == y or (isinstance(x, float) and isinstance(y, float) and math.isnan(x) and math.isnan(y))

    return len(a) == len(b) and all(r.keys() == q.keys() and all(same(r[k], q[k]) for k in r) for r, q in zip(a, b))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--count", type=int, default=1000)
    parser.add_argument("--tol", type=float, default=1e-8)
    parser.add_argument("--workers", type=int, nargs="*", default=[1, 2])
    parser.add_argument("--previous", metavar="TREE",
                        help="also screen the CIF files with the madelung of this checkout (e.g. the main branch) "
                             "and compare its rows")
    parser.add_argument("--no-database", action="store_true", help="leave out the ASE-database input")
    parser.add_argument("--one-run", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.one_run:
        return _one_run(args.one_run)

    cells = make_cells(args.count)
    sizes = [len(c) for c in cells]
    rows = []
    figures = {}
    cases = [("CIF files", "fast", None), ("CIF files", "general", None)]
    if args.previous:
        cases.append(("CIF files", "previous", args.previous))
    if not args.no_database:
        cases.append(("ASE database", "-", None))
    tables = {}
    with tempfile.TemporaryDirectory() as folder:
        cif_folder, db_path = write_inputs(cells, folder)
        run_apart([cif_folder], None, 1, os.path.join(folder, "warm.parquet"), args.tol)   # Numba's cache, once
        for workers in args.workers:
            for label, reader, tree in cases:
                inputs, db = ([cif_folder], None) if label == "CIF files" else ([], db_path)
                out = os.path.join(folder, f"out-{label[:3]}-{reader}-{workers}.parquet")
                load = os.getloadavg()[0]
                total, failed, wall, whole, parts = run_apart(inputs, db, workers, out, args.tol,
                                                              "fast" if reader != "general" else "general", tree)
                tables[(label, reader, workers)] = table_rows(out)
                rate = total / wall
                figures[(label, reader, workers)] = rate
                busy = parts["total"]
                baseline = figures.get(("CIF files", "general", workers)) if label == "CIF files" else None
                rows.append([label, reader, workers, total, failed, f"{wall:.2f}", f"{rate:.1f}",
                             f"{total / whole:.1f}",
                             f"{rate / baseline:.2f}x" if baseline and reader != "general" else "",
                             f"{(rate / figures.get((label, reader, 1), rate)):.2f}x",
                             f"{100 * parts['read'] / busy:.0f}%", f"{100 * parts['charges'] / busy:.0f}%",
                             f"{100 * parts['sums'] / busy:.0f}%", f"{1000 * parts['read'] / total:.2f}",
                             f"{1000 * busy / total:.1f}", f"{1000 * parts['cpu'] / total:.1f}",
                             f"{workers * total / parts['cpu']:.0f}", f"{load:.1f}"])
    print_table(["input", "reader", "workers", "structures", "failed", "wall s", "structures/s", "incl. start /s",
                 "vs general", "speed-up", "reading", "charges+sg", "sums", "read ms/str", "wall ms/str",
                 "cpu ms/str", "cpu-bound /s", "load avg"], rows,
                title=f"Screening {args.count} cells of {min(sizes)}-{max(sizes)} sites (mean {np.mean(sizes):.1f}) "
                      f"at tol {args.tol:g}, end to end")
    print("  reader: fast = gemmi where it reads the file as ASE's parser would (the default), general = ASE's parser "
          "only,\n  previous = the checkout given with --previous (fast reader if it has one); each run in a fresh "
          "process.\n  structures/s: over the wall time of screen() (workers started inside); incl. start /s: over "
          "the whole process,\n  Python start and imports included. Shares: of the summed per-structure wall time "
          "inside the workers;\n  read ms/str, wall and cpu ms/str: per structure in one worker; cpu-bound /s = "
          "workers / cpu s per structure, the rate\n  if every worker had a core to itself (an estimate, not a "
          "measurement; wall ms above cpu ms means other jobs took the cores)")
    for workers in args.workers:
        reference = tables.get(("CIF files", "general", workers))
        for (label, reader, count), table in tables.items():
            if count == workers and label == "CIF files" and reader != "general":
                print(f"  rows of the {reader} run with {workers} worker(s) identical to the general reader's "
                      f"(timings aside): {same_rows(table, reference)}")
    for label, reader in (("CIF files", "fast"), ("ASE database", "-")):
        if (label, reader, 2) in figures and (label, reader, 1) in figures:
            rate, ratio = figures[(label, reader, 2)], figures[(label, reader, 2)] / figures[(label, reader, 1)]
            print(f"  {label}: {rate:.1f} structures/s with 2 workers (target >= 500: {verdict(rate >= 500)}); "
                  f"1 -> 2 workers {ratio:.2f}x (target >= 1.7: {verdict(ratio >= 1.7)})")


if __name__ == "__main__":
    main()
