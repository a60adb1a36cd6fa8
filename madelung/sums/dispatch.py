"""The one entry point of the Ewald sum: plan once, then run the engine the plan chose."""

from ..structure.crystal import Crystal
from ..errors import InputError
from .direct import run_direct
from .mesh import run_mesh
from .plan import plan_for
from ..defaults import SUM_TOL


def ewald(crystal, tol=SUM_TOL, forces=False, stress=False, alpha=None, method="auto"):
    """Electrostatic energy, site potentials and optionally forces and stress of a crystal.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and charges.
    tol : float, optional
        Wanted error of the energy relative to ``k_e * sum(q_i^2) / d_min``, with d_min the
        shortest interionic distance (default 1e-10).
    forces, stress : bool, optional
        Also compute forces (eV/Å) and the stress tensor (eV/Å^3, ASE sign convention).
    alpha : float, optional
        Fix the Ewald splitting parameter (1/Å); by default it is chosen for the least work.
    method : {"auto", "direct", "mesh"}, optional
        "direct": the Ewald sum over k-vectors (cost about N^1.5); "mesh": smooth particle-mesh
        Ewald (about N log N), checked against an independent direct reciprocal sum (see
        :mod:`madelung.sums.mesh`); "auto" (default): the one predicted to be faster at this
        ``tol``. One sum plan (``result.plan``) decides everything once, in the reduced basis
        of the lattice, so the result does not depend on the basis the cell is written in.
        ``result.params.method`` says which ran and ``result.params.extra["predicted_seconds_by_method"]``
        the predictions (None for an engine not considered).

    Returns
    -------
    EwaldResult
        ``energy`` (eV), ``potentials`` (V), ``forces``, ``stress``, ``params``,
        ``error_estimate`` (eV) and more; see :class:`EwaldResult`.

    Notes
    -----
    ``error_estimate`` includes a rounding floor: double precision resolves the energy only to
    about eps * E_scale * sqrt(terms per ion); a ``tol`` below that is refused with an InputError
    that names the smallest meaningful value.

    A cell with a net charge is summed with a uniform neutralizing background; the result's
    ``background`` flag says so and a :class:`MadelungWarning` is issued.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    A. Kolafa and J. W. Perram, Mol. Simul. 9 (1992) 351.
    U. Essmann et al., J. Chem. Phys. 103 (1995) 8577 (smooth particle-mesh Ewald).
    """
    if not isinstance(crystal, Crystal):
        raise InputError(f"ewald() needs a madelung.Crystal, got {type(crystal).__name__}")
    plan = plan_for(crystal, tol, method=method, alpha=alpha)
    if plan.method == "mesh":
        return run_mesh(crystal, plan, forces=forces, stress=stress)
    return run_direct(crystal, plan, forces=forces, stress=stress)
