"""Convergence: computed Madelung constants of the prototypes against published values for
tol = 1e-4 ... 1e-12, and a PNG of the achieved error against tol.

Published values (handbook convention E_fu = -M z+ |z-| k_e / r0):
  rock salt 1.747564594633182 (OEIS A085469); caesium chloride 1.76267477307099 (OEIS A181152);
  zinc blende 1.63806, ideal wurtzite 1.64132 and fluorite 2.51939 (CRC Handbook of Chemistry
  and Physics, "Madelung constants").
The error column is |M - published| relative to the energy scale: |dM| * E_fu-scale / E_scale,
i.e. the achieved error in the units tol is stated in; it is limited by the published digits for
the handbook values.
"""

import argparse
import os
import sys

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from common import RESULTS, STRUCTURES, print_table  # noqa: E402

PUBLISHED = [
    ("rocksalt-NaCl", 1.747564594633182, "OEIS A085469"),
    ("caesium-chloride-CsCl", 1.76267477307099, "OEIS A181152"),
    ("zincblende-ZnS", 1.63806, "CRC Handbook"),
    ("wurtzite-ZnO-ideal", 1.64132, "CRC Handbook"),
    ("fluorite-CaF2", 2.51939, "CRC Handbook"),
]
TOLERANCES = [1e-4, 1e-6, 1e-8, 1e-10, 1e-12]


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--method", default=None, help="Ewald method to use, if the engine offers several")
    parser.add_argument("--no-plot", action="store_true")
    args = parser.parse_args(argv)

    import madelung
    from madelung.units import COULOMB_CONSTANT

    rows = []
    curves = {}
    all_ok = True
    for name, published, source in PUBLISHED:
        crystal = madelung.Crystal.from_file(os.path.join(STRUCTURES, f"{name}.cif"))
        zp_zm = None
        for tol in TOLERANCES:
            kwargs = {"method": args.method} if args.method else {}
            constants = madelung.madelung_constants(crystal, tol=tol, **kwargs)
            zp_zm = constants.handbook_charges[0] * constants.handbook_charges[1]
            scale = constants.ewald.energy_scale / crystal.formula_units  # per formula unit
            # energy error per formula unit = dM z+ z- k_e / r0, relative to the per-fu scale
            achieved = abs(constants.handbook - published) * zp_zm * COULOMB_CONSTANT / constants.r0 / scale
            digits = len(f"{published}".split(".")[1])
            floor = 0.5 * 10.0 ** -digits * zp_zm * COULOMB_CONSTANT / constants.r0 / scale
            ok = achieved <= max(tol, floor)
            all_ok &= ok
            status = "yes" if achieved <= tol else ("to the published digits" if ok else "NO")
            curves.setdefault(name, []).append(achieved)
            rows.append([name, f"{tol:.0e}", f"{constants.handbook:.12f}", f"{published}", f"{achieved:.2e}",
                         f"{constants.ewald.error_estimate / constants.ewald.energy_scale:.1e}",
                         status,
                         source])
    print_table(["prototype", "tol", "computed M (handbook)", "published", "achieved error", "estimate", "<= tol",
                 "source"], rows, title="Madelung constants against published values (error relative to "
                                        "k_e sum q^2 / d_min)")
    print(f"\nall within tol (or the published precision): {'yes' if all_ok else 'NO'}")
    if not args.no_plot:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        os.makedirs(RESULTS, exist_ok=True)
        fig, ax = plt.subplots(figsize=(6, 4.5))
        for name, errors in curves.items():
            ax.loglog(TOLERANCES, np.maximum(errors, 1e-17), "o-", label=name)
        ax.loglog(TOLERANCES, TOLERANCES, "k--", label="error = tol")
        ax.set_xlabel("requested tol")
        ax.set_ylabel("achieved error / (k_e Σq² / d_min)")
        ax.set_title("Ewald convergence on the prototypes")
        ax.legend(fontsize=7)
        fig.tight_layout()
        path = os.path.join(RESULTS, "convergence.png")
        fig.savefig(path, dpi=120)
        print(f"plot: {path}")
    return 0 if all_ok else 1


if __name__ == "__main__":
    sys.exit(main())
