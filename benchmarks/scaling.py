"""Scaling: energy + potentials + forces of rattled rock-salt supercells against the NumPy baseline.

Cases: cubic NaCl supercells (a = 5.64 Å, charges +-1, Gaussian displacements of 0.05 Å) with
N = 64 ... 32768 ions at tol 1e-8. "ours" is madelung.ewald with method="direct", the Ewald sum
itself (best of 3 after a warm-up call); "auto" is the default method="auto", which takes the
particle-mesh engine for the larger cells;
the baseline is benchmarks/baseline_numpy.py, a vectorised NumPy/SciPy Ewald sum (one call).
The achieved error is |E - E_ref| / (k_e sum q^2 / d_min) with E_ref from the direct engine at tol 1e-13.

Targets on the 2-core reference machine (issue: core engine): N = 4096 under 0.5 s,
N = 32768 under 10 s, fitted exponent at most 1.6, at least 30x faster than the baseline at 4096.

Then the direct and the particle-mesh engines side by side, N = 64 ... 314432 (10^6 with
--largest), at tol 1e-6 and 1e-8: see benchmarks/scaling_mesh.py (--skip-mesh leaves it out).
"""

import argparse
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from baseline_numpy import numpy_ewald  # noqa: E402
from common import RESULTS, best_time, fit_exponent, print_table, rattled_rock_salt, verdict  # noqa: E402

REPEATS = [2, 4, 8, 16]  # 64, 512, 4096, 32768 ions


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--tol", type=float, default=1e-8)
    parser.add_argument("--baseline-max", type=int, default=32768, help="skip the baseline above this N")
    parser.add_argument("--repeats", type=int, nargs="*", default=REPEATS, help="supercell repeats to run")
    parser.add_argument("--skip-mesh", action="store_true", help="leave out the direct/mesh side-by-side table")
    parser.add_argument("--largest", action="store_true", help="side-by-side table: also N = 10^6 (mesh only)")
    parser.add_argument("--no-plot", action="store_true")
    args = parser.parse_args(argv)

    import madelung

    warm = rattled_rock_salt(2)
    madelung.ewald(warm, tol=args.tol, forces=True, method="direct")  # compile or load the kernels first
    rows = []
    sizes, ours_times, speedups, base_times, auto_speedups = [], [], {}, {}, {}
    for reps in args.repeats:
        crystal = rattled_rock_salt(reps)
        n = len(crystal)
        seconds, result = best_time(lambda: madelung.ewald(crystal, tol=args.tol, forces=True, method="direct"),
                                    repeat=3 if n <= 4096 else 1)
        auto_seconds, auto = best_time(lambda: madelung.ewald(crystal, tol=args.tol, forces=True),
                                       repeat=3 if n <= 4096 else 1)
        reference = madelung.ewald(crystal, tol=1e-13, method="direct").energy
        achieved = abs(result.energy - reference) / result.energy_scale
        auto_error = abs(auto.energy - reference) / result.energy_scale
        if n <= args.baseline_max:
            base_seconds, base = best_time(lambda: numpy_ewald(crystal.cell, crystal.positions, crystal.charges,
                                                               tol=args.tol, forces=True), repeat=1)
            base_error = abs(base["energy"] - reference) / result.energy_scale
            ratio = base_seconds / seconds
            speedups[n] = ratio
            auto_speedups[n] = base_seconds / auto_seconds
            base_times[n] = base_seconds
            base_cells = [f"{base_seconds:.3f}", f"{ratio:.1f}x", f"{base_error:.1e}", f"{auto_speedups[n]:.1f}x"]
        else:
            base_cells = ["—", "—", "—", "—"]
        sizes.append(n)
        ours_times.append(seconds)
        p = result.params
        rows.append([n, f"{seconds:.4f}", f"{auto_seconds:.4f} ({auto.params.method})", *base_cells,
                     f"{achieved:.1e}", f"{auto_error:.1e}", f"{p.alpha:.3f}", f"{p.real_cutoff:.1f}", p.k_vectors])
    print_table(["N ions", "direct / s", "auto / s", "NumPy / s", "speed-up", "NumPy error", "auto speed-up",
                 "direct error", "auto error", "alpha / Å^-1", "r_cut / Å", "k-vectors"], rows,
                title=f"Direct Ewald sum against the NumPy baseline: energy + potentials + forces, rattled rock salt, "
                      f"tol {args.tol:g}")
    big = [i for i, n in enumerate(sizes) if n >= 512]
    exponent = fit_exponent([sizes[i] for i in big], [ours_times[i] for i in big])
    print(f"\nfitted exponent (N >= 512): {exponent:.2f}")
    by_n = dict(zip(sizes, ours_times))
    print("\ntargets:")
    if 4096 in by_n:
        print(f"  N = 4096 under 0.5 s: {by_n[4096]:.3f} s — {verdict(by_n[4096] < 0.5)}")
    if 32768 in by_n:
        print(f"  N = 32768 under 10 s: {by_n[32768]:.2f} s — {verdict(by_n[32768] < 10)}")
    print(f"  exponent at most 1.6: {exponent:.2f} — {verdict(exponent <= 1.6)}")
    if 4096 in speedups:
        print(f"  at least 30x the baseline at N = 4096: direct {speedups[4096]:.1f}x — "
              f"{verdict(speedups[4096] >= 30)}; default method='auto' {auto_speedups[4096]:.1f}x — "
              f"{verdict(auto_speedups[4096] >= 30)}")
    if not args.skip_mesh:
        from scaling_mesh import side_by_side

        side_by_side(largest=args.largest)
    if not args.no_plot:
        plot(sizes, ours_times, base_times)
    return 0


def plot(sizes, ours_times, base_times):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    os.makedirs(RESULTS, exist_ok=True)
    fig, ax = plt.subplots(figsize=(6, 4.5))
    ax.loglog(sizes, ours_times, "o-", label="madelung (direct Ewald, Numba)")
    if base_times:
        ax.loglog(sorted(base_times), [base_times[n] for n in sorted(base_times)], "s--", label="NumPy baseline")
    ax.set_xlabel("ions N")
    ax.set_ylabel("energy + potentials + forces / s")
    ax.set_title("Rattled rock salt, tol 1e-8")
    ax.legend()
    fig.tight_layout()
    path = os.path.join(RESULTS, "scaling.png")
    fig.savefig(path, dpi=120)
    print(f"plot: {path}")


if __name__ == "__main__":
    sys.exit(main())
