"""Arbitrary-precision Ewald sum: the independent yardstick for the test suite.

This module is deliberately separate from the ``madelung`` package (it imports
nothing from it) so that the engine can be checked against a second,
straightforward implementation evaluated with mpmath at high precision.

Model and conventions
---------------------
Point charges ``q_i`` (elementary charges) at Cartesian positions ``r_i`` (Å)
in a periodic cell whose *rows* are the lattice vectors (Å).  The energy is

    E = k_e * 1/2 sum_i sum_j sum_n' q_i q_j / |r_i - r_j + n|      (eV)

(the prime drops i == j at n == 0), evaluated by Ewald's splitting with
parameter ``alpha`` (1/Å)::

    E_real  = k_e/2 sum_{i,j,n}' q_i q_j erfc(alpha r) / r
    E_recip = k_e (2 pi / V) sum_{k != 0} exp(-k^2 / (4 alpha^2)) / k^2 |S(k)|^2
    E_self  = -k_e alpha / sqrt(pi) sum_i q_i^2
    E_bg    = -k_e pi Q^2 / (2 V alpha^2)     (uniform neutralising background
                                               for a net charge Q)

with ``S(k) = sum_j q_j exp(i k.r_j)``.  Site potentials ``phi_i`` (V) exclude
the site's own charge and satisfy ``E = 1/2 sum_i q_i phi_i``.  The Coulomb
constant ``k_e = e / (4 pi epsilon_0 * 1 Å)`` in eV·Å/e² is built from
scipy.constants (CODATA values) directly, not through madelung.units, so that
the yardstick shares nothing with the engine.  The conditionally convergent direct sum is
given the usual "tin-foil" meaning (no surface dipole term).  This is a
point-charge model: formal charges overstate real ionic energies.

Truncation
----------
Both tails are Gaussian-like.  With the bound erfc(x) <= exp(-x^2) (x >= 0)
and continuum estimates of the number of lattice / reciprocal-lattice vectors
beyond a cutoff, the dropped real-space part is about
``sum|q|^2 pi erfc(alpha r_c) / (alpha^2 V)`` and the dropped reciprocal part
about ``sum|q|^2 alpha erfc(k_c / (2 alpha)) / sqrt(pi)``.  Cutoffs are chosen
so that both, multiplied by a safety margin of 1e3, stay below ``10**-dps``
times the self-energy scale ``alpha/sqrt(pi) sum q_i^2`` (which is of the order
of the lattice energy for ionic crystals).  Image vectors are enumerated over
integer ranges bounded by the lattice-plane spacings, so no vector inside a
cutoff is missed for any triclinic cell.

References
----------
.. [1] P. P. Ewald, "Die Berechnung optischer und elektrostatischer
   Gitterpotentiale", Ann. Phys. 369 (1921) 253-287.
"""

import itertools

import mpmath
import numpy as np
import scipy.constants

#: Safety factor applied to the continuum tail estimates (covers lattice
#: discreteness near the cutoff sphere).
_TAIL_MARGIN = 1e3


def _coulomb_constant():
    """k_e = e / (4 pi eps0 * 1e-10 m) in eV·Å/e², at the current mp precision.

    The CODATA numbers are taken from scipy.constants through their decimal
    representation so that the decimal values themselves are used.
    """
    e = mpmath.mpf(repr(scipy.constants.elementary_charge))
    eps0 = mpmath.mpf(repr(scipy.constants.epsilon_0))
    return e / (4 * mpmath.pi * eps0 * mpmath.mpf("1e-10"))


def _integer_range(center, half_width):
    """Integers m with |center + m| <= half_width, padded by one on each side."""
    lo = int(np.floor(-center - half_width)) - 1
    hi = int(np.ceil(-center + half_width)) + 1
    return range(lo, hi + 1)


def mp_ewald_energy(cell, positions, charges, dps=30, alpha=None):
    """Ewald energy and site potentials in arbitrary precision.

    Parameters
    ----------
    cell : (3, 3) array_like
        Lattice vectors as rows, Å.  Entries may be floats, strings or mpf.
    positions : (N, 3) array_like
        Cartesian positions, Å (any values accepted by ``mpmath.mpf``).
    charges : (N,) array_like
        Charges in elementary charges.  A net charge is compensated by a
        uniform background.
    dps : int, optional
        Decimal digits of working precision; truncation is aimed at
        ``10**-dps`` relative to the self-energy scale.
    alpha : number, optional
        Ewald splitting parameter in 1/Å.  Default
        ``sqrt(pi) * (N / V**2)**(1/6)``.

    Returns
    -------
    energy : mpmath.mpf
        Total electrostatic energy, eV.
    potentials : list of mpmath.mpf
        Site potentials phi_i, V, with ``energy == 1/2 sum q_i phi_i``.

    References
    ----------
    .. [1] P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    with mpmath.workdps(dps):
        mpf = mpmath.mpf
        A = mpmath.matrix([[mpf(x) for x in row] for row in cell])
        if A.rows != 3 or A.cols != 3:
            raise ValueError("cell must be 3x3")
        pos = [[mpf(x) for x in p] for p in positions]
        q = [mpf(x) for x in charges]
        n_atoms = len(q)
        if n_atoms == 0 or len(pos) != n_atoms:
            raise ValueError("positions and charges must have the same nonzero length")

        volume = abs(mpmath.det(A))
        if volume == 0:
            raise ValueError("cell is singular")
        # Reciprocal vectors as rows: b_a . a_b = 2 pi delta_ab.
        B = 2 * mpmath.pi * (A ** -1).T
        k_e = _coulomb_constant()
        sqrt_pi = mpmath.sqrt(mpmath.pi)
        if alpha is None:
            alpha = sqrt_pi * (mpf(n_atoms) / volume ** 2) ** (mpf(1) / 6)
        alpha = mpf(alpha)

        # --- cutoffs from the Gaussian tails (erfc(x) <= exp(-x^2)) -------
        eps = mpf(10) ** (-dps)
        sum_q2 = sum(x * x for x in q)
        sum_abs_q = sum(abs(x) for x in q)
        if sum_q2 == 0:
            return mpf(0), [mpf(0)] * n_atoms
        ratio = sum_abs_q ** 2 / sum_q2  # <= N
        # real tail / self scale  ~ ratio * pi^1.5 / (alpha^3 V) * erfc(alpha r_c)
        real_pref = ratio * mpmath.pi ** 1.5 / (alpha ** 3 * volume)
        p_real = mpmath.sqrt(mpmath.log(_TAIL_MARGIN * max(real_pref, 1) / eps))
        # recip tail / self scale ~ ratio * erfc(k_c / (2 alpha))
        p_recip = mpmath.sqrt(mpmath.log(_TAIL_MARGIN * max(ratio, 1) / eps))
        r_cut = p_real / alpha
        k_cut = 2 * p_recip * alpha

        # Float copies used only to enumerate candidate vectors.
        A_f = np.array(A.tolist(), dtype=float)
        B_f = np.array(B.tolist(), dtype=float)
        pos_f = np.array([[float(x) for x in p] for p in pos])
        rc_f = float(r_cut)
        kc_f = float(k_cut)
        # Plane spacings d_a = 2 pi / |b_a|; |m_a + f_a| <= r / d_a for any
        # vector of length r with fractional coordinates m + f.
        spacing = 2 * np.pi / np.linalg.norm(B_f, axis=1)

        # --- real space: t_ij = sum_n' erfc(alpha |d + n|) / |d + n| --------
        def real_pair_sum(i, j):
            d_f = pos_f[i] - pos_f[j]
            frac = B_f @ d_f / (2 * np.pi)
            ranges = [_integer_range(frac[a], rc_f / spacing[a]) for a in range(3)]
            m = np.array(list(itertools.product(*ranges)), dtype=float)
            vec = d_f + m @ A_f
            keep = np.einsum("ij,ij->i", vec, vec) <= (rc_f * (1 + 1e-8)) ** 2
            total = mpf(0)
            d = [pos[i][c] - pos[j][c] for c in range(3)]
            for m1, m2, m3 in m[keep].astype(int):
                if i == j and m1 == 0 and m2 == 0 and m3 == 0:
                    continue
                v = [d[c] + m1 * A[0, c] + m2 * A[1, c] + m3 * A[2, c] for c in range(3)]
                r = mpmath.sqrt(v[0] ** 2 + v[1] ** 2 + v[2] ** 2)
                total += mpmath.erfc(alpha * r) / r
            return total

        t = [[None] * n_atoms for _ in range(n_atoms)]
        for i in range(n_atoms):
            for j in range(i, n_atoms):
                # sum over n of f(r_i - r_j + n) equals that of f(r_j - r_i + n)
                t[i][j] = t[j][i] = real_pair_sum(i, j)
        e_real = mpf(0)
        for i in range(n_atoms):
            e_real += q[i] * q[i] * t[i][i] / 2
            for j in range(i + 1, n_atoms):
                e_real += q[i] * q[j] * t[i][j]
        phi_real = [sum(q[j] * t[i][j] for j in range(n_atoms)) for i in range(n_atoms)]

        # --- reciprocal space: all k != 0 with |k| <= k_cut ----------------
        # k . a_a = 2 pi m_a, so |m_a| <= k_cut |a_a| / (2 pi).
        m_max = [int(np.floor(kc_f * np.linalg.norm(A_f[a]) / (2 * np.pi))) + 1 for a in range(3)]
        m = np.array(list(itertools.product(*[range(-mm, mm + 1) for mm in m_max])), dtype=float)
        kvec_f = m @ B_f
        keep = np.einsum("ij,ij->i", kvec_f, kvec_f) <= (kc_f * (1 + 1e-8)) ** 2
        keep &= np.any(m != 0, axis=1)
        e_recip = mpf(0)
        phi_recip = [mpf(0)] * n_atoms
        four_alpha2 = 4 * alpha ** 2
        for m1, m2, m3 in m[keep].astype(int):
            k = [m1 * B[0, c] + m2 * B[1, c] + m3 * B[2, c] for c in range(3)]
            k2 = k[0] ** 2 + k[1] ** 2 + k[2] ** 2
            g = mpmath.exp(-k2 / four_alpha2) / k2
            phases = [k[0] * p[0] + k[1] * p[1] + k[2] * p[2] for p in pos]
            cos_k = [mpmath.cos(x) for x in phases]
            sin_k = [mpmath.sin(x) for x in phases]
            s_re = sum(qj * c for qj, c in zip(q, cos_k))
            s_im = sum(qj * s for qj, s in zip(q, sin_k))
            e_recip += g * (s_re ** 2 + s_im ** 2)
            for i in range(n_atoms):
                # Re(S(k) exp(-i k.r_i))
                phi_recip[i] += g * (s_re * cos_k[i] + s_im * sin_k[i])
        e_recip *= 2 * mpmath.pi / volume
        phi_recip = [4 * mpmath.pi / volume * x for x in phi_recip]

        # --- self and neutralising background -----------------------------
        q_net = sum(q)
        e_self = -alpha / sqrt_pi * sum_q2
        e_bg = -mpmath.pi * q_net ** 2 / (2 * volume * alpha ** 2)
        phi_bg = -mpmath.pi * q_net / (volume * alpha ** 2)

        energy = k_e * (e_real + e_recip + e_self + e_bg)
        potentials = [
            k_e * (phi_real[i] + phi_recip[i] - 2 * alpha * q[i] / sqrt_pi + phi_bg)
            for i in range(n_atoms)
        ]
        return +energy, [+x for x in potentials]
