"""Plain NumPy/SciPy Ewald sum: the baseline the engine is benchmarked against.

This is what a careful practitioner would write without compiled kernels:
vectorised NumPy, a SciPy k-d tree for the real-space neighbour search, and
chunking so that memory stays bounded.  It imports nothing from ``madelung``.

Conventions (same as tests/reference_mpmath.py): cell rows are lattice vectors
(Å), positions Cartesian (Å), charges in e; energy in eV, site potentials in V
(own charge excluded, ``E = 1/2 sum q_i phi_i``), forces ``F = -dE/dr`` in
eV/Å, stress ``(1/V) dE/d(strain)`` in eV/Å^3 (ASE sign).  A net charge is
compensated by a uniform background.  Point-charge model: formal charges
overstate real ionic energies.

Parameter choice: ``alpha = sqrt(pi) (N / V^2)^(1/6)`` balances the real- and
reciprocal-space work [2]_; with ``p = sqrt(-ln tol)`` the cutoffs are
``r_cut = p / alpha`` and ``k_cut = 2 p alpha``, so both Gaussian tails are
about ``tol``.

References
----------
.. [1] P. P. Ewald, "Die Berechnung optischer und elektrostatischer
   Gitterpotentiale", Ann. Phys. 369 (1921) 253-287.
.. [2] D. Fincham, "Optimisation of the Ewald sum for large systems",
   Mol. Simul. 13 (1994) 1-9 (citation from memory).
"""

import itertools
import time

import numpy as np
import scipy.constants
from scipy.spatial import cKDTree
from scipy.special import erfc

#: Coulomb constant e / (4 pi eps0 * 1 Å) in eV·Å/e² (CODATA via scipy;
#: built here rather than taken from madelung.units so the baseline stays
#: independent of the package it is compared with).
K_E = scipy.constants.elementary_charge / (4 * np.pi * scipy.constants.epsilon_0 * 1e-10)

#: Target number of array elements handled per chunk (pairs or k x atoms).
#: About 3e6 keeps every temporary well below ~2 GB.
_CHUNK_ELEMENTS = 3_000_000


def _is_orthorhombic(cell):
    off = cell - np.diag(np.diag(cell))
    return bool(np.all(np.abs(off) <= 1e-12 * np.abs(cell).max()) and np.all(np.diag(cell) > 0))


def _pairs_periodic_tree(cell, pos, r_cut):
    """Orthorhombic box at least 2 r_cut wide: at most one image per pair.

    Yields chunks ``(i, j, d)`` of unordered pairs (``i < j``, each once)
    with separation ``d = r_i - r_j - n`` (minimum image), ``|d| <= r_cut``.
    """
    n = len(pos)
    box = np.diag(cell).copy()
    wrapped = np.mod(pos, box)
    wrapped[wrapped >= box] = 0.0
    tree = cKDTree(wrapped, boxsize=box)
    chunk = _atoms_per_chunk(n / np.prod(box), r_cut)
    for start in range(0, n, chunk):
        sub = cKDTree(wrapped[start:start + chunk], boxsize=box)
        pairs = sub.sparse_distance_matrix(tree, r_cut, output_type="ndarray")
        i = pairs["i"].astype(np.int64) + start
        j = pairs["j"].astype(np.int64)
        once = j > i  # no self images: the box is wider than 2 r_cut
        i, j = i[once], j[once]
        d = wrapped[i] - wrapped[j]
        d -= box * np.round(d / box)
        yield i, j, d


def _pairs_ghost_images(cell, pos, r_cut):
    """Any cell: explicit image shifts (ghost atoms) searched with a k-d tree.

    Yields chunks ``(i, j, d)`` of unordered pairs (image pairs ``n`` and
    ``-n`` of an atom with itself count as one pair) with
    ``d = r_i - r_j - n``, ``|d| <= r_cut``; the site itself may appear with
    ``d = 0``.
    """
    n = len(pos)
    inv = np.linalg.inv(cell)
    frac = pos @ inv
    frac -= np.floor(frac)
    home = frac @ cell  # wrapped into the cell; the sums are unchanged
    spacing = 1.0 / np.linalg.norm(inv, axis=0)  # lattice-plane spacings
    reach = r_cut / spacing  # cutoff in fractional units along each axis
    # home fractions lie in [0, 1), so |m_a| < 1 + reach_a
    m_max = np.ceil(reach).astype(int)
    shifts = list(itertools.product(*[range(-k, k + 1) for k in m_max]))
    # shifts are symmetric: shift number s and len - 1 - s are m and -m
    centre = len(shifts) // 2
    ghost_pos, ghost_idx, ghost_shift = [], [], []
    for sid, m in enumerate(shifts):
        f = frac + np.array(m, dtype=float)
        # a ghost matters only if it lies within reach of the home cell
        keep = np.all((f > -reach) & (f < 1 + reach), axis=1)
        ghost_pos.append(f[keep] @ cell)
        ghost_idx.append(np.nonzero(keep)[0])
        ghost_shift.append(np.full(np.count_nonzero(keep), sid))
    ghost_pos = np.concatenate(ghost_pos)
    ghost_idx = np.concatenate(ghost_idx)
    ghost_shift = np.concatenate(ghost_shift)
    ghost_tree = cKDTree(ghost_pos)
    chunk = _atoms_per_chunk(n / abs(np.linalg.det(cell)), r_cut)
    for start in range(0, n, chunk):
        sub = cKDTree(home[start:start + chunk])
        pairs = sub.sparse_distance_matrix(ghost_tree, r_cut, output_type="ndarray")
        i = pairs["i"].astype(np.int64) + start
        k = pairs["j"].astype(np.int64)
        j = ghost_idx[k]
        # keep (i, j, n) with j > i, and self images with n on one side
        once = (j > i) | ((j == i) & (ghost_shift[k] > centre))
        i, j, k = i[once], j[once], k[once]
        yield i, j, home[i] - ghost_pos[k]


def _atoms_per_chunk(density, r_cut):
    neighbours = max(1.0, density * 4.0 / 3.0 * np.pi * r_cut**3)
    return max(1, int(_CHUNK_ELEMENTS / neighbours))


def _real_space(pair_chunks, q, alpha, want_forces):
    """Accumulate erfc-screened terms over unordered pairs (i, j, n)."""
    n = len(q)
    phi = np.zeros(n)
    forces = np.zeros((n, 3))
    virial = np.zeros((3, 3))  # dE/d(strain) without k_e
    for i, j, d in pair_chunks:
        dist = np.sqrt(np.einsum("ij,ij->i", d, d))
        nonself = dist > 0.0  # the site itself (i == j, no shift)
        i, j, d, dist = i[nonself], j[nonself], d[nonself], dist[nonself]
        f = erfc(alpha * dist) / dist
        phi += np.bincount(i, q[j] * f, minlength=n) + np.bincount(j, q[i] * f, minlength=n)
        if want_forces:
            # g = -(1/r) d/dr [erfc(alpha r)/r]
            g = (f + 2 * alpha / np.sqrt(np.pi) * np.exp(-((alpha * dist) ** 2))) / dist**2
            w = (q[i] * q[j] * g)[:, None] * d
            for c in range(3):
                forces[:, c] += np.bincount(i, w[:, c], minlength=n) - np.bincount(j, w[:, c], minlength=n)
            virial -= d.T @ w
    return phi, forces, virial


def _half_kspace(cell, k_cut):
    """Reciprocal vectors with 0 < |k| <= k_cut, one of each +-k pair."""
    recip = 2 * np.pi * np.linalg.inv(cell).T
    # k . a_a = 2 pi m_a  =>  |m_a| <= k_cut |a_a| / (2 pi)
    m_max = np.floor(k_cut * np.linalg.norm(cell, axis=1) / (2 * np.pi)).astype(int)
    axes = [np.arange(-k, k + 1) for k in m_max]
    m = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    positive = (m[:, 0] > 0) | ((m[:, 0] == 0) & (m[:, 1] > 0)) | (
        (m[:, 0] == 0) & (m[:, 1] == 0) & (m[:, 2] > 0)
    )
    kvec = m[positive] @ recip
    k2 = np.einsum("ij,ij->i", kvec, kvec)
    inside = k2 <= k_cut**2
    return kvec[inside], k2[inside]


def _reciprocal_space(cell, pos, q, alpha, k_cut, want_forces):
    n = len(q)
    volume = abs(np.linalg.det(cell))
    kvec, k2 = _half_kspace(cell, k_cut)
    # factor 2 for the omitted -k half
    weight = 2 * (2 * np.pi / volume) * np.exp(-k2 / (4 * alpha**2)) / k2
    energy = 0.0
    phi = np.zeros(n)
    forces = np.zeros((n, 3))
    virial = np.zeros((3, 3))
    chunk = max(1, _CHUNK_ELEMENTS // max(n, 1))
    for start in range(0, len(k2), chunk):
        kv = kvec[start:start + chunk]
        w = weight[start:start + chunk]
        phase = kv @ pos.T  # (chunk, n)
        c, s = np.cos(phase), np.sin(phase)
        s_re, s_im = c @ q, s @ q
        s2 = s_re**2 + s_im**2
        energy += w @ s2
        # phi_i = 2 * sum_k w Re(S exp(-i k.r_i)) over the half space
        phi += 2 * ((w * s_re) @ c + (w * s_im) @ s)
        if want_forces:
            # F_i = -dE/dr_i = 2 q_i sum_k w k (S_re sin_i - S_im cos_i)
            amp = (w * s_re)[:, None] * s - (w * s_im)[:, None] * c  # (chunk, n)
            forces += 2 * q[:, None] * (amp.T @ kv)
            kk = w * s2 * 2 * (1 / (4 * alpha**2) + 1 / k2[start:start + chunk])
            virial += (kv * kk[:, None]).T @ kv
    if want_forces:
        virial -= energy * np.eye(3)
    return len(k2), energy, phi, forces, virial


def numpy_ewald(cell, positions, charges, tol=1e-8, forces=True, stress=False, alpha=None):
    """Ewald energy, site potentials and forces with vectorised NumPy.

    Parameters
    ----------
    cell : (3, 3) array_like
        Lattice vectors as rows, Å.
    positions : (N, 3) array_like
        Cartesian positions, Å.
    charges : (N,) array_like
        Charges, e.  A net charge gets a uniform neutralising background.
    tol : float, optional
        Target size of both Gaussian tails; sets ``p = sqrt(-ln tol)``.
    forces : bool, optional
        Also compute forces (eV/Å).
    stress : bool, optional
        Also compute the stress tensor (eV/Å^3, ASE sign).
    alpha : float, optional
        Override the splitting parameter (1/Å); default
        ``sqrt(pi) (N / V^2)^(1/6)``.

    Returns
    -------
    dict
        ``energy`` (eV), ``potentials`` (V, shape (N,)), ``forces``
        (eV/Å, shape (N, 3), or None), ``stress`` (3x3 or None), ``alpha``,
        ``r_cut``, ``k_cut``, ``n_kvectors`` (half space), ``real_path``
        ('periodic-tree' or 'ghost-images'), ``seconds`` (wall time).

    References
    ----------
    .. [1] P. P. Ewald, Ann. Phys. 369 (1921) 253.
    .. [2] D. Fincham, Mol. Simul. 13 (1994) 1.
    """
    t0 = time.perf_counter()
    cell = np.ascontiguousarray(cell, dtype=float).reshape(3, 3)
    pos = np.ascontiguousarray(positions, dtype=float).reshape(-1, 3)
    q = np.ascontiguousarray(charges, dtype=float).ravel()
    n = len(q)
    if n == 0 or len(pos) != n:
        raise ValueError("positions and charges must have the same nonzero length")
    if not 0.0 < tol < 1.0:
        raise ValueError("tol must lie in (0, 1)")
    volume = abs(np.linalg.det(cell))
    if volume <= 0:
        raise ValueError("cell is singular")
    if alpha is None:
        alpha = np.sqrt(np.pi) * (n / volume**2) ** (1.0 / 6.0)
    p = np.sqrt(-np.log(tol))
    r_cut = p / alpha
    k_cut = 2 * p * alpha
    want = forces or stress

    if _is_orthorhombic(cell) and np.all(np.diag(cell) >= 2 * r_cut):
        real_path = "periodic-tree"
        pair_chunks = _pairs_periodic_tree(cell, pos, r_cut)
    else:
        real_path = "ghost-images"
        pair_chunks = _pairs_ghost_images(cell, pos, r_cut)
    phi_r, f_r, vir_r = _real_space(pair_chunks, q, alpha, want)
    e_real = 0.5 * q @ phi_r

    n_k, e_k, phi_k, f_k, vir_k = _reciprocal_space(cell, pos, q, alpha, k_cut, want)

    q_net = q.sum()
    e_self = -alpha / np.sqrt(np.pi) * (q @ q)
    e_bg = -np.pi * q_net**2 / (2 * volume * alpha**2)
    phi = phi_r + phi_k - 2 * alpha / np.sqrt(np.pi) * q - np.pi * q_net / (volume * alpha**2)

    result = {
        "energy": K_E * (e_real + e_k + e_self + e_bg),
        "potentials": K_E * phi,
        "forces": K_E * (f_r + f_k) if forces else None,
        "stress": K_E * (vir_r + vir_k - e_bg * np.eye(3)) / volume if stress else None,
        "alpha": alpha,
        "r_cut": r_cut,
        "k_cut": k_cut,
        "n_kvectors": n_k,
        "real_path": real_path,
    }
    result["seconds"] = time.perf_counter() - t0
    return result


def _self_check():
    """Compare with the mpmath yardstick (tests/reference_mpmath.py)."""
    import os
    import sys

    sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "tests"))
    from reference_mpmath import mp_ewald_energy

    def mp_energy(cell, pos, q, dps=20):
        return float(mp_ewald_energy(cell, pos, q, dps=dps)[0])

    def mp_forces(cell, pos, q, h=1e-5):
        # central differences of the high-precision energy
        out = np.zeros_like(pos)
        for i in range(len(q)):
            for c in range(3):
                plus, minus = pos.copy(), pos.copy()
                plus[i, c] += h
                minus[i, c] -= h
                out[i, c] = -(mp_energy(cell, plus, q) - mp_energy(cell, minus, q)) / (2 * h)
        return out

    def mp_stress(cell, pos, q, h=1e-6):
        volume = abs(np.linalg.det(cell))
        out = np.zeros((3, 3))
        for a in range(3):
            for b in range(a, 3):
                e = []
                for sign in (1, -1):
                    eps = np.zeros((3, 3))
                    eps[a, b] = sign * h
                    deform = (np.eye(3) + eps).T
                    e.append(mp_energy(cell @ deform, pos @ deform, q))
                out[a, b] = out[b, a] = (e[0] - e[1]) / (2 * h) / volume
        return out

    rng = np.random.default_rng(7)
    a = 5.64
    cubic = a * np.eye(3)
    frac = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0],
                     [.5, 0, 0], [0, .5, 0], [0, 0, .5], [.5, .5, .5]])
    rattled = frac @ cubic + rng.normal(scale=0.08, size=(8, 3))
    q_nacl = np.array([1, 1, 1, 1, -1, -1, -1, -1], dtype=float)
    tri_cell = np.array([[4.3, 0.0, 0.0], [1.2, 3.9, 0.0], [-0.8, 1.1, 4.6]])
    tri_pos = rng.random((4, 3)) @ tri_cell
    tri_q = np.array([2.0, -1.0, -1.5, 0.75])  # net charge +0.25

    cases = [
        ("rattled rock salt, 8 ions, cubic cell", cubic, rattled, q_nacl, None),
        ("same, large alpha (periodic k-d tree path)", cubic, rattled, q_nacl, 1.6),
        ("triclinic, 4 ions, net charge +0.25", tri_cell, tri_pos, tri_q, None),
    ]
    derivative_refs = {}
    print("numpy_ewald(tol=1e-8) vs mpmath reference (dps=30 energy/potentials, dps=20 finite differences)")
    for label, cell, pos, q, alpha in cases:
        res = numpy_ewald(cell, pos, q, tol=1e-8, forces=True, stress=True, alpha=alpha)
        e_ref, phi_ref = mp_ewald_energy(cell, pos, q, dps=30)
        e_ref = float(e_ref)
        phi_ref = np.array([float(x) for x in phi_ref])
        print(f"- {label}: path={res['real_path']} alpha={res['alpha']:.4f} "
              f"r_cut={res['r_cut']:.3f} k_cut={res['k_cut']:.3f} n_k={res['n_kvectors']}")
        print(f"    energy      {res['energy']:+.12f} eV  ref {e_ref:+.12f}  "
              f"rel err {abs(res['energy'] - e_ref) / abs(e_ref):.2e}")
        print(f"    potentials  max abs err {np.abs(res['potentials'] - phi_ref).max():.2e} V "
              f"(max |phi| {np.abs(phi_ref).max():.2f} V)")
        if id(pos) not in derivative_refs:
            derivative_refs[id(pos)] = mp_forces(cell, pos, q), mp_stress(cell, pos, q)
        f_ref, s_ref = derivative_refs[id(pos)]
        print(f"    forces      max abs err {np.abs(res['forces'] - f_ref).max():.2e} eV/A "
              f"(max |F| {np.abs(f_ref).max():.3f} eV/A; net force {np.abs(res['forces'].sum(0)).max():.1e})")
        print(f"    stress      max abs err {np.abs(res['stress'] - s_ref).max():.2e} eV/A^3 "
              f"(max |sigma| {np.abs(s_ref).max():.4f} eV/A^3)")

    print("- energy error against tol (rattled rock salt, 8 ions):")
    e_ref = float(mp_ewald_energy(cubic, rattled, q_nacl, dps=30)[0])
    for tol in (1e-4, 1e-6, 1e-8, 1e-10, 1e-12, 1e-14):
        res = numpy_ewald(cubic, rattled, q_nacl, tol=tol, forces=False)
        print(f"    tol {tol:.0e}: rel err {abs(res['energy'] - e_ref) / abs(e_ref):.2e}")


if __name__ == "__main__":
    _self_check()
