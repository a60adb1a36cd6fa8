"""An ASE calculator for the rigid-ion model: Ewald Coulomb energy of point charges plus
short-range pair terms, with forces and stress, so ASE's optimisers and cell filters can
relax a structure in it.

The model has fixed point charges and no polarisability; relaxed structures and energies
are model estimates, only as good as the fitted short-range parameters.

References
----------
M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1 (the rigid-ion model);
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the Coulomb sum).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from ase.calculators.calculator import Calculator, all_changes

from ..errors import InputError
from ..structure.crystal import Crystal
from ..sums.dispatch import ewald
from ..sums.shortrange import load_repulsion, shortrange
from ..defaults import SUM_TOL
from ..units import EV_TO_KJ_PER_MOL


class RigidIonCalculator(Calculator):
    """Energy (eV), forces (eV/Å) and stress (eV/Å^3, ASE sign) of the rigid-ion model.

    Parameters
    ----------
    repulsion : RepulsionModel, dict or path of a parameter file
        The short-range pair terms.
    charges : mapping or array, optional
        Ion charges (e) by element, by site label or per atom; default: the atoms' initial charges.
    tol : float, optional
        Relative accuracy of the Ewald sum (default 1e-10).

    Examples
    --------
    >>> atoms.calc = RigidIonCalculator(repulsion="params.json", charges={"Na": 1, "Cl": -1})
    >>> atoms.get_potential_energy()

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1; P. P. Ewald, Ann. Phys. 369 (1921) 253.
    """

    implemented_properties = ["energy", "free_energy", "forces", "stress"]
    default_parameters = {"tol": 1e-10}

    def __init__(self, repulsion, charges=None, tol=SUM_TOL, **kwargs):
        super().__init__(**kwargs)
        self.repulsion = load_repulsion(repulsion)
        self.charges = charges
        self.parameters["tol"] = float(tol)
        self.coulomb_energy = None
        self.short_range_energy = None

    def crystal(self, atoms):
        """The madelung Crystal of ``atoms`` with this calculator's charges."""
        charges = self.charges
        if charges is None:
            charges = atoms.get_initial_charges()
            if not np.any(charges != 0):
                raise InputError("RigidIonCalculator: the atoms carry no initial charges; give charges=")
        labels = [str(x) for x in atoms.arrays["labels"]] if "labels" in atoms.arrays else None
        return Crystal.from_ase(atoms, charges, labels=labels, min_distance=0.0)

    def calculate(self, atoms=None, properties=("energy",), system_changes=all_changes):
        super().calculate(atoms, properties, system_changes)
        crystal = self.crystal(self.atoms)
        # forces and stress cost little beside the energy: always computed, so that ASE's separate
        # requests for energy, forces and stress of one geometry run the sums once
        coulomb = ewald(crystal, tol=self.parameters["tol"], forces=True, stress=True)
        short = shortrange(crystal, self.repulsion, forces=True, stress=True)
        self.coulomb_energy = coulomb.energy
        self.short_range_energy = short.energy
        energy = coulomb.energy + short.energy
        self.results["energy"] = energy
        self.results["free_energy"] = energy
        self.results["forces"] = np.array(coulomb.forces + short.forces)
        s = coulomb.stress + short.stress
        self.results["stress"] = np.array([s[0, 0], s[1, 1], s[2, 2], s[1, 2], s[0, 2], s[0, 1]])


@dataclass(frozen=True)
class Relaxation:
    """Outcome of :func:`relax`.

    Attributes
    ----------
    atoms : the relaxed ``ase.Atoms`` (charges as initial charges).
    initial_energy, final_energy : total model energy per cell, eV.
    initial_volume, final_volume : Å^3.
    steps_taken : optimiser steps taken.  converged : whether ``force_limit`` was reached.
    force_limit : the force criterion, eV/Å (stress scaled to forces by the cell filter).
    cell_relaxed : True when the cell was relaxed too.
    formula_units : Z of the cell.
    """

    atoms: object
    initial_energy: float
    final_energy: float
    initial_volume: float
    final_volume: float
    steps_taken: int
    converged: bool
    force_limit: float
    cell_relaxed: bool
    formula_units: int

    @property
    def energy_gain(self):
        """initial - final energy per cell, eV (positive when relaxation lowered the energy)."""
        return self.initial_energy - self.final_energy

    @property
    def volume_change(self):
        """Relative volume change, (V_final - V_initial) / V_initial."""
        return (self.final_volume - self.initial_volume) / self.initial_volume

    def to_dict(self) -> dict:
        """JSON-ready: convergence, steps, volumes Å^3 and their relative change, energies per cell eV,
        the gain per cell eV and per formula unit kJ/mol, the relaxed cell Å."""
        return {"converged": self.converged, "steps_taken": self.steps_taken, "cell_relaxed": self.cell_relaxed,
                "initial_volume_angstrom3": self.initial_volume, "final_volume_angstrom3": self.final_volume,
                "volume_change": self.volume_change, "initial_energy_eV": self.initial_energy,
                "final_energy_eV": self.final_energy, "energy_gain_eV": self.energy_gain,
                "energy_gain_kJ_per_mol_per_formula_unit": self.energy_gain / self.formula_units * EV_TO_KJ_PER_MOL,
                "cell": np.asarray(self.atoms.cell).tolist()}


def relax(crystal, repulsion, cell=True, force_limit=1e-4, max_steps=500, tol=SUM_TOL, trajectory=None) -> Relaxation:
    """Relax ion positions (and the cell) of a crystal in the rigid-ion model with ASE's BFGS.

    Parameters
    ----------
    crystal : Crystal
    repulsion : RepulsionModel or parameter-file path
    cell : bool
        Also relax the cell (through ``ase.filters.FrechetCellFilter``), default True.
    force_limit : float
        Stop when every force (and scaled stress) component is below this, eV/Å.
    max_steps : int
        Most optimiser steps.
    tol : float
        Relative accuracy of the Ewald sums.
    trajectory : str, optional
        Write ASE's trajectory there.

    Returns
    -------
    Relaxation

    References
    ----------
    C. G. Broyden, IMA J. Appl. Math. 6 (1970) 76; R. Fletcher, Comput. J. 13 (1970) 317
    (the BFGS method, as ASE implements it).
    """
    from ase.filters import FrechetCellFilter
    from ase.optimize import BFGS

    atoms = crystal.to_ase()
    calculator = RigidIonCalculator(repulsion, charges=np.array(crystal.charges), tol=tol)
    atoms.calc = calculator
    initial_energy = atoms.get_potential_energy()
    initial_volume = atoms.get_volume()
    target = FrechetCellFilter(atoms) if cell else atoms
    optimiser = BFGS(target, logfile=None, trajectory=trajectory)
    converged = bool(optimiser.run(fmax=force_limit, steps=max_steps))  # ASE's keyword names
    final_energy = atoms.get_potential_energy()
    relaxed = atoms.copy()
    relaxed.calc = None
    return Relaxation(relaxed, float(initial_energy), float(final_energy), float(initial_volume),
                      float(atoms.get_volume()), int(optimiser.nsteps), converged, float(force_limit), bool(cell),
                      crystal.formula_units)
