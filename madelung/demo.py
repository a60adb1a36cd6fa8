"""The main-job demo: screen the invented coating candidates of ``structures/demo/`` and plot them.

:func:`run_demo` makes the candidate files if they are missing (``structures/demo/make_demo.py``),
screens them with :func:`madelung.batch.screen` on the local pool, writes the table and the
per-site table, ranks the candidates by electrostatic energy per atom (most strongly bound
first) and saves a scatter plot of that energy against the mean potential at the anion sites.

The ranking is a point-charge model estimate with formal charges: it orders candidates by how
strongly their ions bind electrostatically, which overstates real, partly covalent bonding, and
it says nothing about whether a compound can be made.
"""

from __future__ import annotations

import os
import runpy
from dataclasses import dataclass

from .errors import InputError
from .report.plots import save_candidate_plot
from .report.files import check_outputs, make_folder, write_with

#: Where the demo candidates live in a checkout of the project.
DEMO_FOLDER = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "structures", "demo")

PROTOTYPES = ("perovskite", "spinel", "layered-rocksalt")


def prototype_of(source):
    """The prototype a demo file is named for (``perovskite-SrTiO3.cif`` -> ``perovskite``)."""
    name = os.path.basename(source)
    return next((p for p in PROTOTYPES if name.startswith(p + "-")), "other")


def demo_structures(folder=DEMO_FOLDER):
    """The demo candidate files, made by the folder's ``make_demo.py`` if they are not there yet."""
    script = os.path.join(folder, "make_demo.py")
    present = sorted(f for f in os.listdir(folder) if f.endswith(".cif")) if os.path.isdir(folder) else []
    if not present:
        if not os.path.exists(script):
            raise InputError(f"{folder}: no demo structures and no make_demo.py; run the demo from a checkout "
                             "of the project (pip install -e .)")
        runpy.run_path(script)["make"](folder)
    return folder


@dataclass(frozen=True)
class DemoResult:
    """What the demo produced: the summary, the ranked rows and the files written."""

    summary: object
    ranked: list
    table: str
    sites: str
    plot: str

    def to_dict(self):
        """JSON-ready: the run's summary, the ranked rows (descriptor columns, units in their names)
        and the paths of the table, the site table and the plot."""
        return {"summary": self.summary.to_dict(), "ranked": self.ranked, "table": self.table, "sites": self.sites,
                "plot": self.plot}

    def report(self):
        lines = ["madelung demo  hypothetical coating candidates (ternary oxides and halides; idealized cells, "
                 "formal charges)",
                 f"  {'rank':>4}  {'candidate':<22} {'prototype':<17} {'space group':<11} {'E/atom eV':>10} "
                 f"{'E/f.u. kJ/mol':>14} {'M (charges in)':>15} {'anion phi V':>12}"]
        for row in self.ranked:
            lines.append(f"  {row['rank']:>4}  {row['reduced_formula']:<22} {row['prototype']:<17} {row['space_group']:<11} "
                         f"{row['energy_per_atom_eV']:>10.4f} {row['energy_per_formula_unit_kJ_mol']:>14.1f} "
                         f"{row['madelung_charges_left_in']:>15.4f} {row['anion_potential_mean_V']:>12.4f}")
        for source, status in self.summary.failures:
            lines.append(f"  failed  {os.path.basename(source)}: {status.replace(source + ': ', '')}")
        lines += [self.summary.line(),
                  f"  table {self.table}, sites {self.sites}, plot {self.plot}",
                  "  E: signed electrostatic energy of the point charges (more negative = more strongly bound); "
                  "M in the charges-left-in convention, E_fu = -M k_e / r0; anion phi: mean site potential at the "
                  "anions.",
                  "  note  Point-charge model with formal charges: it overstates real, partly covalent bonding. "
                  "A ranking of model estimates, not of measured stabilities."]
        return "\n".join(lines)


def run_demo(out_dir="madelung-demo", workers=None, top=10, progress=True, folder=DEMO_FOLDER, parents=False,
             overwrite=False) -> DemoResult:
    """Screen the demo candidates, rank them and plot them (see the module docstring).

    Creates ``out_dir`` (and its missing parents only with ``parents=True``); refuses files of an
    earlier run in it unless ``overwrite``.
    """
    from .batch import TableWriter, screen, table_columns

    folder = demo_structures(folder)
    out_dir = os.fspath(out_dir)
    table = os.path.join(out_dir, "candidates.parquet")
    sites = os.path.join(out_dir, "candidate_sites.parquet")
    plot = os.path.join(out_dir, "candidates.png")
    if not os.path.isdir(out_dir) and not os.path.lexists(out_dir) and not parents and \
            not os.path.isdir(os.path.dirname(os.path.abspath(out_dir))):
        raise InputError(f"{out_dir}: its parent folder does not exist (create it, or pass --parents)")
    make_folder(out_dir, parents=parents)
    check_outputs([table, sites, plot], overwrite=overwrite)
    summary = screen([folder], table, sites=sites, workers=workers, progress=progress, overwrite=overwrite)
    rows = [r for r in TableWriter(table, table_columns()).read() if r["status"] == "ok"]
    for row in rows:
        row["prototype"] = prototype_of(row["source"])
    rows.sort(key=lambda r: r["energy_per_atom_eV"])
    keep = ("reduced_formula", "prototype", "space_group", "energy_per_atom_eV", "energy_per_formula_unit_kJ_mol",
            "madelung_charges_left_in", "anion_potential_mean_V", "source")
    ranked = [{"rank": k + 1, **{name: row[name] for name in keep}} for k, row in enumerate(rows[:max(0, top)])]
    write_with(plot, lambda temporary: save_candidate_plot(rows, temporary, PROTOTYPES, _elements), binary=True)
    return DemoResult(summary=summary, ranked=ranked, table=table, sites=sites, plot=plot)


def _elements(formula):
    import re

    return set(re.findall(r"[A-Z][a-z]?", formula))
