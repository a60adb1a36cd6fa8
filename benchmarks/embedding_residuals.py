"""Residuals of the embedded-cluster fit against cluster and field radius.

For each bundled structure and radius pair: the fitted embedding's misfit to the periodic (Ewald)
potential at the cluster sites and on a check grid the fit never saw, against the baseline of a
bare cut-out of the same ions with the crystal's charges (same run, same points). Prints a table;
the ratio column is bare / fitted at the cluster sites.

Run:  python benchmarks/embedding_residuals.py

References: S. E. Derenzo, M. K. Klintenberg and M. J. Weber, J. Chem. Phys. 112 (2000) 2074;
M. Klintenberg, S. E. Derenzo and M. J. Weber, Comput. Phys. Commun. 131 (2000) 120.
"""

import os
import sys
import warnings

import numpy as np

import madelung

STRUCTURES = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "structures")

CASES = [("rocksalt-NaCl.cif", "Na1"), ("fluorite-CaF2.cif", "Ca1"), ("corundum-Al2O3.cif", "Al1")]
CLUSTER_RADII = (4.0, 6.0)
FIELD_EXTRA = (6.0, 8.0, 10.0, 14.0)


def main(offset="ewald"):
    print(f"offset mode: {offset}; residual = embedded - periodic potential, mV")
    print(f"{'structure':<20} {'R_cl':>5} {'R_fld':>6} {'ions':>5} {'charges':>8} {'fitted':>7} "
          f"{'sites RMS':>10} {'sites max':>10} {'check RMS':>10} {'check max':>10} {'bare RMS':>10} "
          f"{'ratio':>9} {'max dq':>7} {'s':>6}")
    for name, center in CASES:
        crystal = madelung.Crystal.from_file(os.path.join(STRUCTURES, name))
        for rc in CLUSTER_RADII:
            for extra in FIELD_EXTRA:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", madelung.MadelungWarning)
                    r = madelung.embedding(crystal, center, rc, rc + extra, offset=offset)
                change = np.max(np.abs(r.charges - r.formal_charges))
                print(f"{name[:-4]:<20} {rc:5.1f} {rc + extra:6.1f} {len(r.cluster_sites):5d} {len(r.charges):8d} "
                      f"{int(r.fitted.sum()):7d} {r.sites.rms_mV:10.2e} {r.sites.max_mV:10.2e} "
                      f"{r.check.rms_mV:10.2e} {r.check.max_mV:10.2e} {r.bare_sites.rms_mV:10.3g} "
                      f"{r.bare_sites.rms_mV / max(r.sites.rms_mV, 1e-30):9.2e} {change:7.3f} {r.seconds:6.2f}",
                      flush=True)


if __name__ == "__main__":
    main(*sys.argv[1:])
