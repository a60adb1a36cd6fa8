"""madelung: crystal electrostatics on the CPU.

Ewald sums, site potentials and Madelung constants of periodic point charges,
converged to an accuracy you state. Point charges are a model: with formal charges the
electrostatic energies overstate what a real, partly covalent solid holds.

The public names below are loaded on first use (PEP 562 module ``__getattr__``), so that
``import madelung`` and a command that stops at an argument error do not pay for NumPy, SciPy,
Numba and ASE; ``from madelung import ewald`` and ``madelung.ewald`` work as usual.
"""

from importlib import import_module

from .errors import InputError, MadelungError, MadelungWarning

__version__ = "0.1.0"

#: Each lazily loaded public name -> the module (relative to this package) that defines it.
_HOMES = {
    "Crystal": "io.read",   # through the loader, which registers Crystal.from_file / from_ase on import
    "load": "io.read", "read_crystal": "io.read", "Loaded": "io.read",
    "ewald": "sums.dispatch",
    "EwaldResult": "sums.direct", "EwaldParameters": "sums.direct",
    "SumPlan": "sums.plan", "plan_for": "sums.plan", "METHODS": "sums.plan",
    "madelung_constants": "analysis.madelung_constants", "MadelungConstants": "analysis.madelung_constants",
    "describe": "analysis.descriptors",
    "potential_at": "analysis.defects", "potential_grid": "analysis.defects",
    "find_interstitials": "analysis.defects", "defect_energy": "analysis.defects",
    "vacancy_ranking": "analysis.defects", "charged_cell_correction": "analysis.defects",
    "correction_series": "analysis.defects",
    "PairPotential": "sums.shortrange", "RepulsionModel": "sums.shortrange", "shortrange": "sums.shortrange",
    "FitTarget": "analysis.fitting", "fit_repulsion": "analysis.fitting",
    "lattice_energy": "analysis.lattice_energy",
    "equation_of_state": "analysis.equation_of_state",
    "born_haber_cycle": "analysis.thermochemistry",
    "RigidIonCalculator": "analysis.calculator", "relax": "analysis.calculator",
    "embedding": "analysis.embedding", "Embedding": "analysis.embedding",
    "rank_orderings": "analysis.orderings", "OrderingRanking": "analysis.orderings",
}

#: Names whose use builds crystals from files or ASE atoms: the loader must be registered first.
_NEED_LOADER = {"RigidIonCalculator", "relax"}

__all__ = ["Crystal", "load", "read_crystal", "Loaded", "ewald", "EwaldResult", "EwaldParameters", "SumPlan",
           "plan_for", "METHODS", "madelung_constants",
           "MadelungConstants", "describe", "InputError", "MadelungError", "MadelungWarning",
           "potential_at", "potential_grid", "find_interstitials", "defect_energy", "vacancy_ranking",
           "charged_cell_correction", "correction_series",
           "PairPotential", "RepulsionModel", "shortrange", "FitTarget", "fit_repulsion", "lattice_energy",
           "equation_of_state", "born_haber_cycle", "RigidIonCalculator", "relax", "embedding", "Embedding",
           "rank_orderings", "OrderingRanking"]


def __getattr__(name):
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    if name in _NEED_LOADER:
        import_module(f"{__name__}.io.read")
    value = getattr(import_module(f"{__name__}.{home}"), name)
    globals()[name] = value   # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
