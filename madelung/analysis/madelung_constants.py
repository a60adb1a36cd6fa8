"""Madelung constants in the conventions practitioners mix up, each named.

With r0 the shortest cation–anion distance and E_fu the electrostatic energy per formula
unit of the reduced composition (k_e the Coulomb constant):

``charges_left_in``
    E_fu = -M k_e / r0. The ion charges stay inside M (fluorite CaF2: 5.0388; corundum with the
    bundled structure: 24.33).
``handbook``
    E_fu = -M z+ z- k_e / r0, with z+ and |z-| the charges of the one cation kind and the one
    anion kind (fluorite: 2.5194, CaO: 1.7476; corundum with the bundled structure: 4.056).
    Undefined when the structure has more than one kind of cation or anion.

Both also come with r0 taken as the **mean first-shell cation–anion distance**
(``r0_mean_first_shell``; the shell is every anion within FIRST_SHELL_FACTOR times each cation's
nearest anion distance). Where the cations' first shells are uneven (rutile, anatase, corundum)
the tabulated handbook values follow this choice: the bundled corundum gives 4.183 with it
(the CRC table lists 4.1719 for its own structure parameters) against 4.056 with the shortest
distance; rutile 2.401 against 2.388 (CRC 2.408, from memory). For rock salt, CsCl, fluorite and
zinc blende the two r0 coincide.
``common_factor``
    E_fu = -M Z^2 k_e / r0, with Z the highest common factor of the ion charges (fluorite:
    5.0388, CaO: 1.7476). Undefined when any charge is not a whole number (averaged sites,
    partial charges) or the charges have no common factor.
``site`` (per site)
    M_i = -phi_i r0 / (k_e q_i): the site potential in units of k_e q_i / r0, positive for an ion
    held by its surroundings. Then E = -(k_e / 2 r0) sum_i q_i^2 M_i.

References
----------
E. Madelung, Phys. Z. 19 (1918) 524; values of the handbook convention are tabulated in the
CRC Handbook of Chemistry and Physics ("Madelung constants").
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from ..charges.polyatomic import centred_crystal, find_polyatomic_ions
from ..errors import InputError
from ..sums.geometry import neighbour_pairs
from ..units import COULOMB_CONSTANT
from ..sums.direct import run_direct
from ..sums.dispatch import ewald
from ..defaults import SUM_TOL
from .conventions import CONVENTION_TEXT

CONVENTIONS = ("charges_left_in", "handbook", "common_factor")

#: Anions within this factor of a cation's nearest anion distance form its first shell (for
#: ``r0_mean_first_shell``); 1.2 separates the first shell of every bundled oxide and halide from
#: the next (corundum 1.86-1.97 Å against 3.2 Å; rutile 1.95-1.98 Å against 3.5 Å).
FIRST_SHELL_FACTOR = 1.2


def mean_first_shell_distance(crystal, to_opposite=None, pairs=None) -> float:
    """Mean cation–anion distance over every cation's first shell of anions, Å (``to_opposite``:
    each ion's nearest distance to an ion of opposite sign, if known; see ``Crystal.nearest_distances``;
    ``pairs``: ``(owner, partner, distance, cutoff)``, every pair within ``cutoff`` of every site
    as :func:`~madelung.sums.geometry.neighbour_pairs` gives them, if at hand)."""
    charges = np.asarray(crystal.charges)
    cations = np.flatnonzero(charges > 0)
    if to_opposite is None:
        _, to_opposite, _ = crystal.nearest_distances()
    reach = FIRST_SHELL_FACTOR * float(np.max(to_opposite[cations])) * (1 + 1e-9)
    if pairs is not None and reach <= pairs[3]:
        owner, partner, distance, _ = pairs
        keep = (charges[owner] > 0) & (charges[partner] < 0)
        owner, distance = owner[keep], distance[keep]
        nearest = to_opposite[owner]
    else:
        owner, partner, distance = neighbour_pairs(crystal.cell, crystal.positions, reach, sites=cations)
        anion = charges[partner] < 0
        owner, distance = owner[anion], distance[anion]
        nearest = to_opposite[cations][owner]
    shell = distance <= FIRST_SHELL_FACTOR * nearest * (1 + 1e-9)
    return float(np.mean(distance[shell]))


@dataclass(frozen=True)
class MadelungConstants:
    """Madelung constants of one crystal.

    Attributes
    ----------
    formula : reduced formula (the formula unit).
    formula_units : formula units in the cell.
    r0 : shortest cation–anion distance, Å.
    energy : electrostatic energy of the cell, eV.
    energy_per_formula_unit : eV.
    charges_left_in : M with E_fu = -M k_e / r0.
    handbook : M with E_fu = -M z+ |z-| k_e / r0, or None (see ``handbook_note``).
    handbook_charges : (z+, |z-|) used, or None.
    common_factor : M with E_fu = -M Z^2 k_e / r0, or None (see ``common_factor_note``).
    common_factor_z : Z used, or None.
    r0_mean_first_shell : mean cation–anion distance over the cations' first shells, Å.
    charges_left_in_mean_first_shell, handbook_mean_first_shell : the same conventions with that r0.
    polyatomic_ions : the polyatomic ions counted as one charge each ("" when none).
    site : (N,) site constants M_i = -phi_i r0 / (k_e q_i) (nan for uncharged sites).
    error_estimate : estimated error of the constants from the sum's truncation error.
    handbook_note, common_factor_note : why a convention is undefined here ("" when defined).
    ewald : the underlying EwaldResult.
    """

    formula: str
    formula_units: int
    r0: float
    energy: float
    energy_per_formula_unit: float
    charges_left_in: float
    handbook: float | None
    handbook_charges: tuple | None
    handbook_note: str
    common_factor: float | None
    common_factor_z: float | None
    common_factor_note: str
    site: np.ndarray
    error_estimate: float
    ewald: object
    r0_mean_first_shell: float = math.nan
    charges_left_in_mean_first_shell: float = math.nan
    handbook_mean_first_shell: float | None = None
    polyatomic_ions: str = ""

    def to_dict(self):
        return {
            "formula": self.formula, "formula_units": self.formula_units, "r0_angstrom": self.r0,
            "r0_mean_first_shell_angstrom": self.r0_mean_first_shell,
            "polyatomic_ions": self.polyatomic_ions,
            "charges_left_in_mean_first_shell": self.charges_left_in_mean_first_shell,
            "handbook_mean_first_shell": self.handbook_mean_first_shell,
            "energy_eV": self.energy, "energy_per_formula_unit_eV": self.energy_per_formula_unit,
            "charges_left_in": self.charges_left_in,
            "handbook": self.handbook, "handbook_charges": self.handbook_charges,
            "handbook_note": self.handbook_note,
            "common_factor": self.common_factor, "common_factor_z": self.common_factor_z,
            "common_factor_note": self.common_factor_note,
            "error_estimate": self.error_estimate,
            "conventions": CONVENTION_TEXT,
        }


def _common_factor(charges):
    """Highest common factor Z of the charges (a rational value), or None if there is none."""
    magnitudes = sorted({abs(q) for q in np.asarray(charges, dtype=float).tolist()} - {0.0})
    if magnitudes and all(q.is_integer() for q in magnitudes):   # whole charges: their greatest common divisor
        return float(math.gcd(*(int(q) for q in magnitudes)))
    values = [Fraction(q).limit_denominator(1000) for q in magnitudes]   # each distinct charge once
    if not values or any(abs(float(v) - q) > 1e-9 for v, q in zip(values, magnitudes)):
        return None
    numerator = 0
    denominator = 1
    for v in values:
        denominator = denominator * v.denominator // math.gcd(denominator, v.denominator)
    for v in values:
        numerator = math.gcd(numerator, int(v * denominator))
    return numerator / denominator


def madelung_constants(crystal, tol=SUM_TOL, method="auto", ewald_result=None,
                       polyatomic_ions="centre", plan=None, nearest=None, pairs=None) -> MadelungConstants:
    """Madelung constants of a crystal in every named convention (see the module docstring).

    Parameters
    ----------
    crystal : Crystal
        A neutral crystal with at least one cation and one anion.
    tol : float
        Relative accuracy of the underlying Ewald sum.
    method : {"auto", "direct", "mesh"}
        Engine of the underlying sum (see :func:`madelung.ewald`).
    ewald_result : EwaldResult, optional
        The sum of this very crystal if it has been done already (it is not done again; the
        crystal is then taken as given, without looking for polyatomic ions).
    plan : SumPlan, optional
        A direct-sum plan of these very sites made already (e.g. for the Coulomb matrix,
        :func:`madelung.sums.matrix.site_plan`): the sum reuses its layout when that meets ``tol``
        for these charges (:meth:`~madelung.sums.plan.SumPlan.with_charges`), else plans anew.
        The crystal is then taken as given, as with ``ewald_result``.
    nearest : tuple, optional
        ``crystal.nearest_distances()`` of this very crystal, if found already.
    pairs : tuple, optional
        ``(owner, partner, distance, cutoff)``: every pair of this very crystal within ``cutoff``
        of every site (:func:`~madelung.sums.geometry.neighbour_pairs`), if found already; the
        first shells are taken from them when they reach far enough.
    polyatomic_ions : {"centre", "atoms"}
        "centre" (default, as the command line): covalently bonded polyatomic ions (carbonate,
        sulfate, hydroxide, ammonium, ...; :mod:`madelung.charges.polyatomic`) count as one charge
        at their centre, so r0 is the shortest cation–anion-centre distance and the constants
        describe the salt of those ions; ``polyatomic_ions`` of the result names them and ``site``
        then has one entry per ion. "atoms": every atom is a point charge.

    Returns
    -------
    MadelungConstants

    References
    ----------
    E. Madelung, Phys. Z. 19 (1918) 524; P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """
    if polyatomic_ions not in ("centre", "atoms"):
        raise InputError(f"polyatomic_ions must be 'centre' or 'atoms', got {polyatomic_ions!r}")
    ions = ""
    if polyatomic_ions == "centre" and ewald_result is None and plan is None:
        found = find_polyatomic_ions(crystal)
        if found.found:
            crystal, ions = centred_crystal(crystal, found), found.summary()
    charges = np.asarray(crystal.charges)
    where = f"{crystal.source}: " if crystal.source else ""
    if not (charges.max() > 0 > charges.min()):
        raise InputError(f"{where}a Madelung constant needs both cations and anions")
    result = ewald_result
    if result is None and plan is not None:
        charged = plan.with_charges(charges)
        if charged.tol <= tol and charged.error_estimate <= charged.target:
            result = run_direct(crystal, charged)
    if result is None:
        result = ewald(crystal, tol=tol, method=method)
    if result.background:
        raise InputError(f"{where}the cell carries a net charge of {result.net_charge:+.6g} e; "
                         "Madelung constants are defined for neutral crystals")
    _, to_opposite, _ = crystal.nearest_distances() if nearest is None else nearest
    r0 = float(np.min(to_opposite))
    k_e = COULOMB_CONSTANT
    z = crystal.formula_units
    e_fu = result.energy / z
    m_in = -e_fu * r0 / k_e

    kinds_pos = sorted({(s, float(q)) for s, q in zip(crystal.symbols, charges) if q > 0})
    kinds_neg = sorted({(s, float(q)) for s, q in zip(crystal.symbols, charges) if q < 0})
    handbook = handbook_charges = None
    handbook_note = ""
    if len({q for _, q in kinds_pos}) != 1 or len({q for _, q in kinds_neg}) != 1 or \
            len({s for s, _ in kinds_pos}) != 1 or len({s for s, _ in kinds_neg}) != 1:
        handbook_note = ("undefined: needs exactly one kind of cation and one kind of anion; this structure has "
                         f"cations {', '.join(f'{s}{q:+g}' for s, q in kinds_pos)} and anions "
                         f"{', '.join(f'{s}{q:+g}' for s, q in kinds_neg)}")
    else:
        zp, zm = kinds_pos[0][1], -kinds_neg[0][1]
        handbook = m_in / (zp * zm)
        handbook_charges = (zp, zm)

    common = _common_factor(charges)
    common_value = None
    common_note = ""
    fractional = [q for q in charges.tolist() if abs(q - round(q)) > 1e-9]
    if fractional:
        # a common factor of fractional charges (Z = 0.5, 0.1) gives constants of no meaning (117.5, 3137)
        common = None
        common_note = (f"undefined: the charges are not whole numbers (e.g. {fractional[0]:+g} e, from mixed or "
                       "partly occupied sites or partial charges)")
    elif common is None:
        common_note = "undefined: the charges are not whole multiples of one common value"
    else:
        common_value = m_in / common ** 2

    with np.errstate(divide="ignore", invalid="ignore"):
        site = np.where(charges != 0, -result.potentials * r0 / (k_e * charges), np.nan)
    error = result.error_estimate / z * r0 / k_e
    r0_mean = mean_first_shell_distance(crystal, to_opposite, pairs)
    return MadelungConstants(
        polyatomic_ions=ions, r0_mean_first_shell=r0_mean, charges_left_in_mean_first_shell=m_in * r0_mean / r0,
        handbook_mean_first_shell=None if handbook is None else handbook * r0_mean / r0,
        formula=crystal.reduced_formula, formula_units=z, r0=r0, energy=result.energy,
        energy_per_formula_unit=e_fu, charges_left_in=m_in, handbook=handbook,
        handbook_charges=handbook_charges, handbook_note=handbook_note, common_factor=common_value,
        common_factor_z=common, common_factor_note=common_note, site=site, error_estimate=error,
        ewald=result)
