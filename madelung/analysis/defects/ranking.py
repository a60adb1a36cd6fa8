"""The inequivalent sites of a species ranked by the electrostatics of a vacancy there."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ...errors import InputError, MadelungWarning
from ...sums.dispatch import ewald
from .energies import defect_energy
from .interstitials import equivalent_sites
from .points import _where
from ...structure.supercells import tile_supercell, Supercell
from ...defaults import SUM_TOL, SYMMETRY_TOLERANCE

@dataclass(frozen=True)
class VacancyRow:
    """One inequivalent site in a vacancy ranking.

    ``potential`` is the site potential (V) of the perfect crystal; ``madelung_estimate`` = -q phi (eV),
    the dilute-limit electrostatic cost of removing the ion to infinity; ``supercell_energy`` the
    direct supercell energy change (eV, neutralizing background) when a supercell was asked for.
    """

    label: str
    element: str
    charge: float
    index: int
    multiplicity: int
    potential: float
    madelung_estimate: float
    supercell_energy: float | None
    image_term: float | None

    def to_dict(self) -> dict:
        """JSON-ready; charge e, potential V, energies eV (None without a supercell)."""
        return {"label": self.label, "element": self.element, "charge_e": self.charge, "index": self.index,
                "multiplicity": self.multiplicity, "potential_V": self.potential,
                "madelung_estimate_eV": self.madelung_estimate, "supercell_energy_change_eV": self.supercell_energy,
                "image_term_eV": self.image_term}


@dataclass(frozen=True)
class VacancyRanking:
    """Inequivalent sites ranked by the Madelung-site-potential estimate of their vacancy (cheapest first)."""

    rows: tuple
    species: str
    supercell: Supercell | None
    error_estimate: float

    def to_dict(self) -> dict:
        """JSON-ready: the species, the supercell's repeats in words (None without one), the ranked
        sites and the order's rule."""
        return {"species": self.species, "supercell": None if self.supercell is None else self.supercell.describe(),
                "sites": [row.to_dict() for row in self.rows],
                "ranking": "lowest Madelung-site-potential estimate -q*phi first"}


def vacancy_ranking(crystal, species="anions", *, supercell=None, smallest_plane_spacing=None, tol=SUM_TOL, symmetry_tolerance=SYMMETRY_TOLERANCE):
    """Rank the symmetry-inequivalent sites of a species by vacancy electrostatics.

    Parameters
    ----------
    crystal : Crystal
    species : str
        ``"anions"``, ``"cations"``, an element symbol or a site label.
    supercell, smallest_plane_spacing : optional
        Also compute each vacancy directly in this supercell (neutralizing background).
    tol, symmetry_tolerance : accuracy of the sums; spglib tolerance for equivalent sites.

    Returns
    -------
    VacancyRanking

    References
    ----------
    E. Madelung, Phys. Z. 19 (1918) 524 (site potentials); G. Makov and M. C. Payne,
    Phys. Rev. B 51 (1995) 4014 (the image term of the supercell values).
    """
    charges = np.asarray(crystal.charges)
    if species == "anions":
        chosen = charges < 0
    elif species == "cations":
        chosen = charges > 0
    else:
        chosen = np.array([lab == species or sym == species for lab, sym in zip(crystal.labels, crystal.symbols)])
    if not chosen.any():
        raise InputError(f"{_where(crystal)}no site matches {species!r} (labels: "
                         f"{', '.join(dict.fromkeys(crystal.labels))})")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MadelungWarning)
        bulk = ewald(crystal, tol=tol)
    equivalent = equivalent_sites(crystal, symmetry_tolerance)
    rows = []
    sc = tile_supercell(crystal, supercell, smallest_plane_spacing) if (supercell is not None or smallest_plane_spacing is not None) else None
    for rep in dict.fromkeys(int(equivalent[i]) for i in np.flatnonzero(chosen)):
        q = float(charges[rep])
        phi = float(bulk.potentials[rep])
        energy = image = None
        if sc is not None:
            result = defect_energy(crystal, vacancy=[int(rep)], supercell=sc.matrix, tol=tol, neighbour_radius=0)
            energy = result.energy_change
            image = result.defect_array_energy
        rows.append(VacancyRow(label=crystal.labels[rep], element=crystal.symbols[rep], charge=q, index=rep,
                               multiplicity=int(np.sum(equivalent == rep)), potential=phi,
                               madelung_estimate=-q * phi, supercell_energy=energy, image_term=image))
    rows.sort(key=lambda r: r.madelung_estimate)
    return VacancyRanking(rows=tuple(rows), species=str(species), supercell=sc, error_estimate=bulk.error_estimate)
