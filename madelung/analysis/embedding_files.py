"""Files of an embedding: the cluster (XYZ and CIF), the point charges ("x y z q") and a report.

Every file puts the embedding's centre at the origin (Å); charges in e.
"""

from __future__ import annotations

import os
import tempfile

import numpy as np

from ..errors import InputError
from ..report.files import atomic_output, cif_text, make_folder, write_text
from ..report.serialize import json_text

#: The files written into the output folder, by role.
FILES = {"cluster_xyz": "cluster.xyz", "cluster_cif": "cluster.cif", "point_charges": "point_charges.txt",
         "report": "report.txt", "json": "embedding.json"}

#: Empty space around the cluster in the CIF's box, Å.
CIF_VACUUM = 10.0

LIMITS = ("A point-charge field: it reproduces the electrostatic potential of rigid point ions with the "
          "crystal's charges. Polarisation of the surroundings and the treatment of the cluster boundary "
          "(pseudopotentials on the nearest cations, for instance) are the user's modelling choices.")


def check_output_folder(folder, overwrite=False):
    """Refuse before any work when the folder cannot be written or already holds our files (the
    folder is created if missing; its parent must exist)."""
    folder = os.fspath(folder)
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise InputError(f"output folder {folder} is a file, not a folder")
    existing = [name for name in FILES.values() if os.path.exists(os.path.join(folder, name))]
    if existing and not overwrite:
        raise InputError(f"output folder {folder} already holds {', '.join(existing)}; "
                         "choose another folder or pass --overwrite")
    make_folder(folder)
    try:  # try it for real: permission bits say little to root or on network file systems
        with tempfile.NamedTemporaryFile(dir=folder, prefix=".madelung-write-test-"):
            pass
    except OSError as exc:
        raise InputError(f"output folder {folder} cannot be written: {exc.strerror or exc}") from None


def _cif_text(result):
    """The cluster in a cubic box with its charges as oxidation states (one CIF writer for the package)."""
    positions = result.cluster_positions - result.center
    side = 2.0 * (float(np.max(np.abs(positions))) if len(positions) else 0.0) + 2.0 * CIF_VACUUM
    labels = [f"{label}_{k + 1}" for k, label in enumerate(result.cluster_labels)]
    return cif_text(side * np.eye(3), positions + 0.5 * side, result.cluster_symbols, result.cluster_charges,
                    labels=labels, title="embedded_cluster",
                    comment="cluster cut from the crystal for an embedded-cluster calculation: one cubic box of "
                            f"{side:.3f} Å with the centre in the middle; not a periodic crystal")


def embedding_report(result) -> str:
    """A readable report of an embedding: geometry, charges, residuals, boundary cations, limits."""
    r = result
    fitted = np.asarray(r.fitted)
    change = np.asarray(r.charges) - np.asarray(r.formal_charges)
    lines = [f"madelung embed  {r.source or ''}".rstrip(),
             f"  centre            {r.center_text} at {np.round(r.center, 6).tolist()} Å (crystal frame; files put "
             "it at the origin)",
             f"  cluster           {len(r.cluster_sites)} ions within {r.cluster_radius:g} Å, charge "
             f"{r.cluster_charge:+.6g} e",
             f"  point charges     {len(r.charges)} out to {r.field_radius:g} Å; {int(fitted.sum())} fitted in the "
             f"outer {r.fitted_thickness:g} Å (largest change {np.max(np.abs(change)) if len(change) else 0:.4f} e)",
             f"  whole array       net charge {r.net_charge:.2e} e, dipole {np.linalg.norm(r.dipole):.2e} e·Å",
             "  potential zero    " + ("Ewald convention (cell average of the periodic potential is zero)"
                                       if r.offset_mode == "ewald" else
                                       f"fitted constant: embedded = periodic + {r.offset:+.6f} V"),
             "  residual, embedded minus periodic potential (mV):",
             "                        RMS         max   points",
             f"    cluster sites  {r.sites.rms_mV:10.4g}  {r.sites.max_mV:10.4g}   {r.sites.points}",
             f"    fitting grid   {r.grid.rms_mV:10.4g}  {r.grid.max_mV:10.4g}   {r.grid.points}  (step "
             f"{r.grid_spacing:.3f} Å)",
             f"    check grid     {r.check.rms_mV:10.4g}  {r.check.max_mV:10.4g}   {r.check.points}  (shifted half "
             "a step; not fitted)",
             f"    bare cut-out   {r.bare_sites.rms_mV:10.4g}  {r.bare_sites.max_mV:10.4g}   {r.bare_sites.points}  "
             "(cluster sites, same ions, crystal charges, no fit)",
             f"  periodic target   Ewald sum, estimated error {r.periodic_error_estimate:.1e} V"]
    if r.boundary_cations:
        names = ", ".join(f"{c.label} #{c.charge_index} ({c.distance:.2f} Å)" for c in r.boundary_cations)
        lines.append(f"  boundary cations  {len(r.boundary_cations)} point-charge cations next to cluster anions "
                     f"(index in {FILES['point_charges']}, 0-based): {names}")
    lines.append(f"  limits            {LIMITS}")
    return "\n".join(lines)


def write_embedding(result, folder, overwrite=False) -> dict:
    """Write the embedding's files into ``folder`` (created if needed), each atomically; return {role: path}.

    Files (centre at the origin, Å, e): cluster.xyz, cluster.cif, point_charges.txt (one
    "x y z q" line per point charge, cluster ions not included), report.txt and embedding.json.
    """
    check_output_folder(folder, overwrite)
    folder = os.fspath(folder)
    paths = {role: os.path.join(folder, name) for role, name in FILES.items()}
    positions = result.cluster_positions - result.center
    with atomic_output(paths["cluster_xyz"]) as (handle, _):
        handle.write(f"{len(positions)}\n")
        handle.write(f"cluster of {len(positions)} ions around {result.center_text}, charge "
                     f"{result.cluster_charge:+.6g} e; Å, centre at the origin\n")
        for symbol, p in zip(result.cluster_symbols, positions):
            handle.write(f"{symbol:<3s} {p[0]:15.8f} {p[1]:15.8f} {p[2]:15.8f}\n")
    write_text(paths["cluster_cif"], _cif_text(result))
    charges = result.charge_positions - result.center
    with atomic_output(paths["point_charges"]) as (handle, _):
        for p, q in zip(charges, result.charges):
            handle.write(f"{p[0]:17.10f} {p[1]:17.10f} {p[2]:17.10f} {q:20.14f}\n")
    write_text(paths["report"], embedding_report(result) + "\n")
    write_text(paths["json"], json_text(result, indent=1) + "\n")
    return paths
