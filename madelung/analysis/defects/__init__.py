"""Defect electrostatics of point-charge crystals (re-exports; one job per module).

* :mod:`.points` — :func:`potential_at`, the Ewald potential (and field) at any Cartesian points;
* :mod:`.grids` — :func:`potential_grid` on a regular grid over the cell, :func:`plane_section` on a
  lattice plane, and the cube writer (the PNG of a plane is drawn in :mod:`madelung.report.plots`);
* :mod:`.interstitials` — :func:`find_interstitials`, candidate positions for a probe charge;
* :mod:`.supercells` — :func:`tile_supercell` and the near-cubic repeat matrix;
* :mod:`.energies` — :func:`defect_energy` for vacancies, substitutions and interstitials, and
  :func:`defect_series` over growing supercells (the derivation is in that module's docstring);
* :mod:`.ranking` — :func:`vacancy_ranking` of the inequivalent sites of a species;
* :mod:`.corrections` — :func:`charged_cell_correction` with a scalar or tensor dielectric constant
  and :func:`correction_series`, its 1/L check.

The model is rigid point ions with fixed (usually formal) charges: no relaxation, no
polarisation, no electronic structure. Energies are model estimates; with formal charges they
overstate what a real, partly covalent solid costs or gains.
"""

from .corrections import (ChargedCellCorrection, CorrectionSeries, charged_cell_correction, correction_series,
                          dielectric_tensor, read_dielectric_tensor)
from .energies import (DefectResult, DefectSeries, DefectSite, NeighbourChange, defect_energy, defect_series,
                       interstitial_energy, substitution_energy, vacancy_energy)
from .grids import (PlaneSection, PotentialGrid, gaussian_charge_density, grid_fractional, grid_shape,
                    plane_section, potential_grid, write_gaussian_cube)
from .interstitials import (DEFAULT_PROBE_RADIUS, InterstitialSearch, InterstitialSite, equivalent_sites,
                            find_interstitials, ion_radii)
from .points import ON_ION_DISTANCE, PointPotentials, potential_at
from .ranking import VacancyRanking, VacancyRow, vacancy_ranking
from ...structure.supercells import Supercell, near_cubic_matrix, supercell_cell, supercell_matrix, tile_supercell

__all__ = ["ChargedCellCorrection", "CorrectionSeries", "charged_cell_correction", "correction_series",
           "dielectric_tensor", "read_dielectric_tensor", "DefectResult", "DefectSeries", "DefectSite",
           "NeighbourChange", "defect_energy", "defect_series", "interstitial_energy", "substitution_energy",
           "vacancy_energy", "PlaneSection", "PotentialGrid", "gaussian_charge_density", "grid_fractional",
           "grid_shape", "plane_section", "potential_grid", "write_gaussian_cube",
           "DEFAULT_PROBE_RADIUS", "InterstitialSearch", "InterstitialSite", "equivalent_sites",
           "find_interstitials", "ion_radii", "ON_ION_DISTANCE", "PointPotentials", "potential_at",
           "VacancyRanking", "VacancyRow", "vacancy_ranking", "Supercell", "tile_supercell", "near_cubic_matrix",
           "supercell_cell", "supercell_matrix"]
