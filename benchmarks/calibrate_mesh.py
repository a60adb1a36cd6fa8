"""Calibrate the mesh error estimate of madelung.ewald.tuning (MESH_ERROR_MODEL: A_n and s_n).

For the bundled prototypes (as given, as 2x2x2 supercells with random displacements, and both
written in an oblique basis), random neutral triclinic cells and small strongly skewed cells, at
alpha d_min = 2, 3, 4.5, spline orders 4..8 and mesh steps alpha h / pi = 0.06 ... 0.3, the mesh
reciprocal energy and potentials are compared with the direct reciprocal sum at the same
splitting parameter (converged far beyond the mesh). The mesh is laid on the reduced basis, as
the engine does, and the step along lattice vector a is h_a = |a_a| / K_a (the lattice-vector
length: the Miller indices the sum needs grow with it). The larger of the coherent potential
error 1/2 sum|q_i| rms(dphi) and the energy difference, relative to E_scale = sum q^2 / d_min,
is fitted per order by

    measured = 1/2 A_n alpha d_min mean_a (alpha h_a / pi)^s_n

(s_n by least squares in log space); the largest A_n seen is printed, and tuning.py uses twice it
(or more: constants from an earlier, more cautious calibration are kept where they are larger).

    python benchmarks/calibrate_mesh.py      # about 3 minutes on 2 cores
"""

import glob
import math
import sys

import numba
import numpy as np

sys.path.insert(0, ".")
import madelung  # noqa: E402
from madelung.ewald import kernels  # noqa: E402
from madelung.ewald import mesh as mesh_mod  # noqa: E402
from madelung.ewald.plan import reciprocal_vectors  # noqa: E402
from madelung.geometry import reduced_basis, shortest_distance, wrapped_fractional  # noqa: E402
from madelung.units import COULOMB_CONSTANT  # noqa: E402


def exact_reciprocal(cell, frac, charges, alpha):
    volume = abs(np.linalg.det(cell))
    k_cut = 2.0 * alpha * math.sqrt(16.0 * math.log(10.0) + 2.0)
    hkl, kv, hmax = reciprocal_vectors(cell, k_cut)
    k2 = np.einsum("ij,ij->i", kv, kv)
    w = np.ascontiguousarray(2.0 * (4.0 * math.pi / volume) * np.exp(-k2 / (4 * alpha * alpha)) / k2)
    s_re, s_im = kernels.structure_factors(frac, charges, hkl, hmax, numba.get_num_threads())
    phi, _ = kernels.reciprocal_site_terms(frac, charges, hkl, hmax, kv, w, s_re, s_im, False)
    return phi, 0.5 * float(np.dot(w, s_re ** 2 + s_im ** 2))


def random_cell(rng, n):
    cell = np.diag(rng.uniform(4.0, 8.0, 3)) + rng.uniform(-1.5, 1.5, (3, 3)) * (1 - np.eye(3))
    cell *= (n / 0.05 / abs(np.linalg.det(cell))) ** (1.0 / 3.0)  # 0.05 ions per Å^3
    while True:
        pos = rng.uniform(0, 1, (n, 3)) @ cell
        q = rng.choice([-2.0, -1.0, 1.0, 2.0], n)
        q -= q.mean()
        try:
            return madelung.Crystal(cell, pos, q, min_distance=0.8)
        except madelung.InputError:
            continue


def skewed_cell(rng, n):
    """Small, strongly skewed cells: lengths 3-6 Å, angles 65-115 degrees, charges uniform in
    [-2, 2] made neutral, ions at least 1 Å apart (the cells of tests/test_mesh.py)."""
    from ase.geometry import cellpar_to_cell

    while True:
        lengths = rng.uniform(3.0, 6.0, 3)
        cell = cellpar_to_cell(np.concatenate([lengths, rng.uniform(65.0, 115.0, 3)]))
        if abs(np.linalg.det(cell)) < 0.3 * np.prod(lengths):
            continue
        q = rng.uniform(-2.0, 2.0, n)
        q -= q.mean()
        try:
            return madelung.Crystal(cell, rng.random((n, 3)) @ cell, q, min_distance=1.0)
        except madelung.InputError:
            continue


def cases():
    rng = np.random.default_rng(7)
    for path in sorted(glob.glob("structures/*.cif")):
        try:
            c = madelung.Crystal.from_file(path)
        except madelung.InputError:
            continue
        if abs(c.net_charge) > 1e-6:
            continue
        yield path.split("/")[-1], c
        s = c.repeat(2)
        s = s.replace(positions=s.positions + rng.normal(0, 0.08, s.positions.shape))
        yield path.split("/")[-1] + " x2 disp", s
        oblique = np.array([[1, 0, 0], [3, 1, 0], [3, 3, 1]])
        yield path.split("/")[-1] + " oblique", c.replace(cell=oblique @ c.cell)
        yield path.split("/")[-1] + " x2 disp oblique", s.replace(cell=oblique @ s.cell)
    for i in range(6):
        yield f"random {i}", random_cell(rng, int(rng.integers(6, 30)))
    for i in range(10):
        yield f"skewed {i}", skewed_cell(rng, int(rng.integers(4, 12)))


def main():
    k_e = COULOMB_CONSTANT
    rows = {n: [] for n in (4, 5, 6, 7, 8)}
    for name, c in cases():
        cell, _ = reduced_basis(c.cell)
        frac = wrapped_fractional(cell, c.positions)
        q = np.ascontiguousarray(c.charges, dtype=float)
        d_min = shortest_distance(cell, c.positions)
        q2, qa = float(q @ q), float(np.abs(q).sum())
        plane = np.linalg.norm(cell, axis=1)  # lattice-vector lengths
        for a_scale in (2.0, 3.0, 4.5):
            alpha = a_scale / d_min
            phi_ex, e_ex = exact_reciprocal(cell, frac, q, alpha)
            for order in rows:
                for x in (0.06, 0.1, 0.15, 0.22, 0.3):
                    h = x * math.pi / alpha  # alpha h / pi = x
                    shape = tuple(int(math.ceil(d / h)) for d in plane)
                    if min(shape) < 2 * order or max(shape) > 160:  # the tuner's minimum mesh
                        continue
                    e, phi, _, _ = mesh_mod.mesh_reciprocal(cell, frac, q, alpha, shape, order, False, False)
                    coherent = 0.5 * qa * math.sqrt(np.mean((phi - phi_ex) ** 2))
                    actual = abs(e - e_ex)
                    measured = max(coherent, actual) / (q2 / d_min)  # relative to E_scale
                    if measured < 1e-13:  # double-precision noise of the reference
                        continue
                    xs = [alpha * plane[i] / shape[i] / math.pi for i in range(3)]
                    rows[order].append((name, a_scale, xs, measured))
        print(name, {k: len(v) for k, v in rows.items()}, flush=True)
    print("fit of measured = 1/2 A_n alpha d_min mean_a (alpha h_a / pi)^s_n  (relative to E_scale):")
    for order, data in rows.items():
        lx = np.log([np.mean(np.array(xs) ** order) ** (1.0 / order) for _, _, xs, _ in data])
        ly = np.log([m / (0.5 * a) for _, a, _, m in data])
        slope, _ = np.polyfit(lx, ly, 1)
        s = float(slope)
        ratios = [m / (0.5 * a * np.mean(np.array(xs) ** s)) for _, a, xs, m in data]
        worst = int(np.argmax(ratios))
        print(f"  order {order}: s = {s:.3f}, largest A = {max(ratios):.4g} ({data[worst][0]}, alpha d_min "
              f"{data[worst][1]}), median A = {np.median(ratios):.4g}, {len(data)} points")


if __name__ == "__main__":
    main()
