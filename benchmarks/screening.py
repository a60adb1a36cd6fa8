"""Screening throughput: structures per second for 1000 small cells, from CIF files and from an ASE database.

Cases: 1000 cells of up to 40 sites made from the bundled prototypes (rock salt, caesium chloride,
fluorite, rutile, zinc blende, wurtzite, perovskite, layered rock salt, corundum, ilmenite), each
strained by up to +-4 % per axis and rattled by 0.03 Å (seeded), some as 2x1x1, 2x2x1 or 2x2x2
supercells. They are written once as P1 CIFs with oxidation numbers, and once into an ASE
database (SQLite) with the charges as initial charges. Each input is screened end to end
(``madelung.batch.screen``: reading, charges, space group, Ewald sum, Madelung constants,
Coulomb matrix and its spectrum, writing the Parquet table) at tol 1e-8 with 1 and with 2
workers; the workers are started inside the timed run.

The shares come from the per-row timings: reading (parsing the file or fetching the row),
charges and space group, and the sums (Ewald sum, constants, Coulomb-matrix spectrum); the rest
of the wall time is start-up, hand-over between processes and writing.

Targets on the 2-core reference machine (issue 6): at least 100 structures per second end to end
with 2 workers, and at least 1.7x from 1 to 2 workers. The machine is shared: other jobs running
at the same time lower both figures; the load average is printed with the table.
"""

import argparse
import os
import runpy
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
    from madelung.batch import TableWriter, screen, table_columns

    started = time.perf_counter()
    summary = screen(inputs, out, db=db, workers=workers, tol=tol, progress=False, chunk_size=500)
    wall = time.perf_counter() - started
    rows = TableWriter(out, table_columns()).read()
    parts = {name: sum(r[f"seconds_{name}"] for r in rows) for name in ("read", "charges", "sums", "total", "cpu")}
    return summary, wall, parts


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--count", type=int, default=1000)
    parser.add_argument("--tol", type=float, default=1e-8)
    parser.add_argument("--workers", type=int, nargs="*", default=[1, 2])
    args = parser.parse_args(argv)

    cells = make_cells(args.count)
    sizes = [len(c) for c in cells]
    rows = []
    figures = {}
    with tempfile.TemporaryDirectory() as folder:
        cif_folder, db_path = write_inputs(cells, folder)
        for label, inputs, db in (("CIF files", [cif_folder], None), ("ASE database", [], db_path)):
            for workers in args.workers:
                out = os.path.join(folder, f"out-{label[:3]}-{workers}.parquet")
                load = os.getloadavg()[0]
                summary, wall, parts = run(inputs, db, workers, out, args.tol)
                rate = summary.total / wall
                figures[(label, workers)] = rate
                busy = parts["total"]
                rows.append([label, workers, summary.total, summary.failed, f"{wall:.2f}", f"{rate:.1f}",
                             f"{(figures[(label, workers)] / figures.get((label, 1), rate)):.2f}x",
                             f"{100 * parts['read'] / busy:.0f}%", f"{100 * parts['charges'] / busy:.0f}%",
                             f"{100 * parts['sums'] / busy:.0f}%", f"{1000 * busy / summary.total:.1f}",
                             f"{1000 * parts['cpu'] / summary.total:.1f}",
                             f"{workers * summary.total / parts['cpu']:.0f}", f"{load:.1f}"])
    print_table(["input", "workers", "structures", "failed", "wall s", "structures/s", "speed-up", "reading",
                 "charges+sg", "sums", "wall ms/str", "cpu ms/str", "cpu-bound /s", "load avg"], rows,
                title=f"Screening {args.count} cells of {min(sizes)}-{max(sizes)} sites (mean {np.mean(sizes):.1f}) "
                      f"at tol {args.tol:g}, end to end")
    print("  shares: of the summed per-structure wall time inside the workers; wall and cpu ms/str: per structure "
          "in one worker;\n  cpu-bound /s = workers / cpu s per structure, the rate if every worker had a core to "
          "itself (an estimate, not a measurement; wall ms above cpu ms means other jobs took the cores)")
    for label in ("CIF files", "ASE database"):
        if (label, 2) in figures and (label, 1) in figures:
            rate, ratio = figures[(label, 2)], figures[(label, 2)] / figures[(label, 1)]
            print(f"  {label}: {rate:.1f} structures/s with 2 workers (target >= 100: {verdict(rate >= 100)}); "
                  f"1 -> 2 workers {ratio:.2f}x (target >= 1.7: {verdict(ratio >= 1.7)})")


if __name__ == "__main__":
    main()
