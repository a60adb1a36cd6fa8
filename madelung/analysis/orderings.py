"""Orderings of disordered sites ranked by electrostatic energy.

A crystal with mixed or partly occupied sites (Mg/Al, Li/vacancy, O/F) stands for many ordered
crystals. In a chosen supercell each disordered sublattice holds a fixed number of each ion (and
vacancies, charge 0); every way of placing them is one ordering. With the periodic Coulomb matrix
``J`` of the disordered sites and the potential ``phi_fixed`` of the other ions on them, one
ordering's electrostatic energy is the quadratic form ``E = E_fixed + q . phi_fixed + q . J q / 2``
and a swap of two ions changes it in O(N) operations; so millions of orderings a second can be
ranked, instead of one Ewald sum each.

Exact enumeration keeps one ordering per symmetry orbit (the lexicographically smallest) and
checks the number found against Burnside's count; when there are too many orderings, simulated
annealing with swap moves searches for the lowest ones (a search, not a proof).

Limits: point charges on the unrelaxed, averaged lattice; the electrostatic ranking is a first
filter for the orderings worth a quantum-mechanical or force-field calculation, not a phase diagram.

References
----------
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the periodic Coulomb matrix).
W. Burnside, Theory of Groups of Finite Order (1897) (orbit counting).
N. Metropolis et al., J. Chem. Phys. 21 (1953) 1087; S. Kirkpatrick et al., Science 220 (1983) 671.
K. Okhotnikov, T. Charpentier and S. Cadars, J. Cheminform. 8 (2016) 17 (ranking site orderings of
disordered crystals by Ewald energy as a first filter; cited from memory).
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from ..structure.crystal import Crystal
from .defects import tile_supercell
from ..errors import InputError
from ..sums.matrix import coulomb_matrix, potentials_for_charge_sets
from ..structure.symmetry import DEFAULT_SYMMETRY_TOLERANCE, crystal_symmetry
from ..units import EV_TO_KJ_PER_MOL
from . import _ordering_kernels as kernels
from .ordering_search import run_enumeration, run_search
from .ordering_symmetry import burnside_count, inverse_permutations, multinomial, site_permutations
from ..defaults import SUM_TOL

#: Enumerate when there are at most this many symmetry-distinct orderings (Burnside's count); else search.
DEFAULT_MAX_DISTINCT = 10**7

#: ... and when distinct orderings x symmetry operations stays below this: every orbit minimum is
#: tested against every operation (about 20 ns each on one core), a few minutes at this limit.
ENUMERATION_WORK_LIMIT = 5 * 10**9

#: Occupancy times sites must be this close to a whole number (CIFs print 1/3 as 0.333).
OCCUPANCY_TOLERANCE = 2e-3

VACANCY = "vacancy"


@dataclass(frozen=True)
class OrderingProblem:
    """Everything the kernels need for one crystal and supercell (built by :func:`ordering_problem`).

    Attributes
    ----------
    supercell : the averaged supercell (:class:`madelung.Crystal`).
    matrix : (3, 3) supercell matrix (rows: supercell vectors in parent vectors); ``supercell_text``
        says it in words, e.g. ``"2x2x1"``.
    sites : (N,) supercell indices of the disordered sites, grouped by sublattice.
    segments : per sublattice, its (lo, hi) range in ``sites``.
    sublattice_names : per sublattice, the parent site label and mixture, e.g. ``"Li1 (Li0.5)"``.
    species : per species code, ``(element, charge)``; ``(VACANCY, 0.0)`` for an empty site.
    counts : per sublattice, the number of sites taken by each species code.
    coulomb : (N, N) Coulomb matrix of the disordered sites, V per e.
    phi_fixed : (N,) potential of the ordered ions on the disordered sites, V.
    energy_fixed : energy of the ordered ions among themselves, eV.
    inverse_ops : (M, N) inverse site permutations of the distinct symmetry operations.
    formula : reduced formula of one formula unit; ``formula_units`` of them per supercell.
    net_charge : charge of the supercell, e (0 unless a background was asked for).
    """

    supercell: Crystal
    matrix: np.ndarray
    supercell_text: str
    sites: np.ndarray
    segments: tuple
    sublattice_names: tuple
    species: tuple
    counts: tuple
    coulomb: np.ndarray = field(repr=False)
    phi_fixed: np.ndarray = field(repr=False)
    energy_fixed: float
    inverse_ops: np.ndarray = field(repr=False)
    formula: str
    formula_units: int
    net_charge: float

    @property
    def charge_of(self) -> np.ndarray:
        return np.array([q for _, q in self.species], dtype=np.float64)

    @property
    def segment_sizes(self) -> tuple:
        return tuple(hi - lo for lo, hi in self.segments)

    @property
    def total_orderings(self) -> int:
        """All orderings, symmetry-equivalent ones counted separately (exact integer)."""
        result = 1
        for count in self.counts:
            result *= multinomial(count)
        return result

    def to_dict(self) -> dict:
        """The set-up in plain numbers (the matrix itself left out): sites, sublattices, species
        (element, charge in e), counts, formula, symmetry operations, net charge (e)."""
        return {"supercell": self.supercell_text, "disordered_sites": len(self.sites),
                "sublattices": [{"name": name, "sites": hi - lo,
                                 "counts": {self.species[c][0]: n for c, n in enumerate(count) if n}}
                                for name, (lo, hi), count in zip(self.sublattice_names, self.segments, self.counts)],
                "species": [{"element": el, "charge_e": q} for el, q in self.species],
                "total_orderings": str(self.total_orderings), "symmetry_operations": len(self.inverse_ops),
                "formula": self.formula, "formula_units": self.formula_units, "net_charge_e": self.net_charge,
                "energy_of_ordered_ions_eV": self.energy_fixed}

    def first_ordering(self) -> np.ndarray:
        """The lexicographically first ordering: each sublattice's codes in ascending order."""
        return np.concatenate([np.repeat(np.arange(len(self.species)), c) for c in self.counts]).astype(np.int64)

    def ordering_at(self, index) -> np.ndarray:
        """The ordering with this position in the lexicographic walk (last sublattice fastest)."""
        index = int(index)
        if not 0 <= index < self.total_orderings:
            raise InputError(f"ordering index {index} outside 0..{self.total_orderings - 1}")
        parts = []
        sizes = [multinomial(c) for c in self.counts]
        for s, count in enumerate(self.counts):
            below = math.prod(sizes[s + 1:])
            parts.append(_unrank(list(count), index // below))
            index %= below
        return np.concatenate(parts).astype(np.int64)

    def energy_of(self, ordering) -> float:
        """Electrostatic energy (eV per supercell) of one ordering (species codes), from the matrix."""
        rows = np.ascontiguousarray(np.atleast_2d(ordering), dtype=np.int64)
        return float(kernels.energies_of(self.coulomb, self.phi_fixed, self.energy_fixed, self.charge_of, rows)[0])

    def crystal_of(self, ordering) -> Crystal:
        """The ordered supercell: every disordered site holds its ion; vacancies are left out."""
        ordering = np.asarray(ordering)
        big = self.supercell
        symbols = list(big.symbols)
        charges = np.array(big.charges, dtype=float)
        keep = np.ones(len(big), dtype=bool)
        for site, code in zip(self.sites, ordering):
            element, charge = self.species[int(code)]
            if element == VACANCY:
                keep[site] = False
            symbols[site], charges[site] = element, charge
        index = np.flatnonzero(keep)
        return Crystal(big.cell, big.positions[index], charges[index], [symbols[i] for i in index],
                       source=big.source, min_distance=big.min_distance, info=big.info)


def _unrank(count, rank):
    """The multiset permutation of codes with multiplicities ``count`` at lexicographic ``rank``."""
    remaining = sum(count)
    total = multinomial(count)
    out = []
    while remaining:
        for code, c in enumerate(count):
            if c == 0:
                continue
            starting = total * c // remaining   # permutations that start with this code
            if rank < starting:
                out.append(code)
                count[code] -= 1
                total = starting
                remaining -= 1
                break
            rank -= starting
    return np.array(out, dtype=np.int64)


# ------------------------------------------------------------------ charges of the ions
def _ion_charges(crystal, given):
    """Per site, the charge (e) of each of its species, from ``given`` (a map by element or label,
    or one tuple per site) or, where not given, from the site's averaged charge."""
    where = f"{crystal.source}: " if crystal.source else ""
    plain = {}
    for i in range(len(crystal)):
        if not crystal.is_averaged(i):
            plain.setdefault(crystal.symbols[i], set()).add(round(float(crystal.charges[i]), 6))
    by_key = dict(given) if isinstance(given, Mapping) else {}
    per_site = None if given is None or isinstance(given, Mapping) else list(given)
    if per_site is not None and len(per_site) != len(crystal):
        raise InputError(f"{where}ion charges given for {len(per_site)} sites, the structure has {len(crystal)}")
    result = []
    for i in range(len(crystal)):
        parts = crystal.species_of(i)
        known = []
        for k, (element, _) in enumerate(parts):
            value = by_key.get(crystal.labels[i] if len(parts) == 1 else None, by_key.get(element))
            if value is None and per_site is not None:
                entry = per_site[i]
                value = entry[k] if entry is not None and k < len(entry) else None
            if value is not None and not np.isfinite(float(value)):
                value = None
            known.append(None if value is None else float(value))
        missing = [k for k, v in enumerate(known) if v is None]
        if len(missing) > 1:   # an element seen elsewhere with one charge only
            for k in list(missing):
                seen = plain.get(parts[k][0], set())
                if len(seen) == 1:
                    known[k] = next(iter(seen))
            missing = [k for k, v in enumerate(known) if v is None]
        if len(missing) == 1:  # the rest of the site's averaged charge
            k = missing[0]
            rest = float(crystal.charges[i]) - sum(occ * v for (_, occ), v in zip(parts, known) if v is not None)
            known[k] = rest / parts[k][1]
        elif missing:
            names = [parts[k][0] for k in missing]
            raise InputError(f"{where}site {crystal.labels[i]} mixes {' and '.join(names)}; give the charge of "
                             f"each ion (ion_charges={{'{names[0]}': Q, ...}}, or --charge {names[0]}=Q on the "
                             "command line)")
        result.append(tuple(known))
    return result


def _smallest_supercells(needed, limit=4):
    """Diagonal supercells with ``needed`` parent cells, most compact first, as text."""
    shapes = sorted({(a, b, needed // (a * b)) for a in range(1, needed + 1) if needed % a == 0
                     for b in range(1, needed // a + 1) if (needed // a) % b == 0},
                    key=lambda s: (max(s) - min(s), [-x for x in s]))
    return ", ".join("x".join(map(str, s)) for s in shapes[:limit])


# ------------------------------------------------------------------ the problem
def ordering_problem(crystal, supercell=1, *, ion_charges=None, background=False, tol=SUM_TOL,
                     symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE) -> OrderingProblem:
    """Set up the orderings of ``crystal``'s mixed and partly occupied sites in a supercell: the
    sublattices and their ion counts, the Coulomb matrix and the symmetry operations.
    Parameters as for :func:`rank_orderings`."""
    if not isinstance(crystal, Crystal):
        raise InputError(f"orderings need a madelung.Crystal, got {type(crystal).__name__}")
    where = f"{crystal.source}: " if crystal.source else ""
    averaged = crystal.averaged_sites
    if not averaged:
        raise InputError(f"{where}no mixed or partly occupied sites: there is nothing to order")
    charges_by_site = _ion_charges(crystal, ion_charges)
    sc = tile_supercell(crystal, supercell)
    big, n_parent, cells = sc.crystal, len(crystal), sc.size

    # sublattices: the averaged sites with the same label, mixture and ion charges
    keys, parent_sublattice = {}, {}
    for i in averaged:
        key = (crystal.labels[i], crystal.species_of(i), charges_by_site[i])
        parent_sublattice[i] = keys.setdefault(key, len(keys))
    names, counts, members, needed, code_of = [], [], [], 1, {}
    for (label, parts, charges), s in keys.items():
        parent_sites = [i for i in averaged if parent_sublattice[i] == s]
        per_cell = len(parent_sites)
        sites = [c * n_parent + i for c in range(cells) for i in parent_sites]
        row = {}
        for (element, occ), q in zip(parts, charges):
            code = code_of.setdefault((element, round(q, 9)), len(code_of))
            row[code] = row.get(code, 0.0) + occ
        if 1.0 - sum(row.values()) > OCCUPANCY_TOLERANCE:
            row[code_of.setdefault((VACANCY, 0.0), len(code_of))] = 1.0 - sum(row.values())
        for occ in row.values():  # cells x per_cell x occ must be whole
            denominator = next(d for d in range(1, 10**4) if abs(occ * d - round(occ * d)) <= OCCUPANCY_TOLERANCE * d)
            step = denominator // math.gcd(denominator, per_cell)
            needed = needed * step // math.gcd(needed, step)
        whole = {code: int(round(occ * len(sites))) for code, occ in row.items()}
        largest = max(whole, key=lambda c: row[c] * len(sites) - whole[c])
        whole[largest] += len(sites) - sum(whole.values())
        names.append(f"{label} ({crystal.species_label(parent_sites[0])})")
        counts.append(whole)
        members.append(sites)
    if cells % needed:
        raise InputError(f"{where}occupancies times sites are not whole numbers in a {sc.describe()} supercell; "
                         f"the number of cells must be a multiple of {needed}, e.g. {_smallest_supercells(needed)}")
    species = [None] * len(code_of)
    for (element, q), code in code_of.items():
        species[code] = (element, float(q))
    n_codes = len(species)
    counts = tuple(tuple(row.get(code, 0) for code in range(n_codes)) for row in counts)
    sites = np.array([s for group in members for s in group], dtype=np.int64)
    bounds = np.cumsum([0] + [len(group) for group in members])
    segments = tuple((int(bounds[k]), int(bounds[k + 1])) for k in range(len(members)))

    fixed = np.ones(len(big), dtype=bool)
    fixed[sites] = False
    fixed_charges = np.where(fixed, big.charges, 0.0)
    net = float(fixed_charges.sum()) + sum(n * species[c][1] for row in counts for c, n in enumerate(row))
    if abs(net) > 1e-6 and not background:
        raise InputError(f"{where}the ordered supercell carries a net charge of {net:+.6g} e with these ion charges; "
                         "give charges that balance, or ask for a uniform neutralizing background")

    coulomb = coulomb_matrix(big.cell, big.positions[sites], tol=tol)
    if np.any(fixed):
        phi = potentials_for_charge_sets(big.cell, big.positions, fixed_charges[None, :], tol=tol)[0]
        energy_fixed, phi_fixed = 0.5 * float(fixed_charges @ phi), phi[sites]
    else:
        energy_fixed, phi_fixed = 0.0, np.zeros(len(sites))

    # symmetry: ordered ions typed by species and charge, disordered sites by sublattice
    types = np.zeros(len(big), dtype=np.int64)
    kinds = {}
    for i in np.flatnonzero(fixed):
        types[i] = kinds.setdefault((big.species_label(i), round(float(big.charges[i]), 6)), len(kinds) + 1)
    for s, group in enumerate(members):
        types[group] = len(kinds) + 1 + s
    perms = site_permutations(big.cell, big.fractional_positions, types, symmetry_tolerance)
    position = np.full(len(big), -1, dtype=np.int64)
    position[sites] = np.arange(len(sites))
    restricted = np.unique(position[perms[:, sites]], axis=0)

    composition = {el: 0 for i in range(n_parent) for el, _ in crystal.species_of(i)}  # order of the file
    for i in np.flatnonzero(fixed):
        composition[big.symbols[i]] = composition.get(big.symbols[i], 0) + 1
    for row in counts:
        for code, n in enumerate(row):
            if species[code][0] != VACANCY and n:
                composition[species[code][0]] = composition.get(species[code][0], 0) + n
    composition = {el: n for el, n in composition.items() if n}
    units = int(np.gcd.reduce(np.array(list(composition.values()), dtype=np.int64)))
    formula = "".join(f"{el}{'' if n // units == 1 else n // units}" for el, n in composition.items())
    for array in (coulomb, phi_fixed, restricted):
        array.setflags(write=False)
    return OrderingProblem(supercell=big, matrix=sc.matrix, supercell_text=sc.describe(), sites=sites,
                           segments=segments,
                           sublattice_names=tuple(names), species=tuple(species), counts=counts,
                           coulomb=np.ascontiguousarray(coulomb), phi_fixed=np.ascontiguousarray(phi_fixed),
                           energy_fixed=energy_fixed, inverse_ops=inverse_permutations(restricted),
                           formula=formula, formula_units=units, net_charge=net)


# ------------------------------------------------------------------ results
@dataclass(frozen=True)
class Ordering:
    """One ordering of the disordered sites.

    Attributes
    ----------
    rank : 1 for the lowest energy found.
    occupation : per disordered site (in :attr:`OrderingRanking.sites` order), the element there or
        ``"vacancy"``.
    energy : electrostatic energy of the ordered supercell, eV (signed Ewald sum).
    energy_per_formula_unit : the same per formula unit, eV.
    energy_above_lowest : per formula unit, above the lowest ordering found, eV.
    degeneracy : number of symmetry-equivalent orderings in the supercell (the orbit size).
    space_group : space group of the ordered supercell, e.g. ``"Fm-3m (225)"``.
    index : position in the lexicographic walk of all orderings (exact enumeration), else None.
    """

    rank: int
    occupation: tuple
    energy: float
    energy_per_formula_unit: float
    energy_above_lowest: float
    degeneracy: int
    space_group: str
    index: int | None
    codes: np.ndarray = field(repr=False, compare=False)

    def to_dict(self) -> dict:
        return {"rank": self.rank, "energy_eV": self.energy, "energy_per_formula_unit_eV": self.energy_per_formula_unit,
                "energy_above_lowest_meV_per_formula_unit": 1000.0 * self.energy_above_lowest,
                "energy_above_lowest_kJ_per_mol": self.energy_above_lowest * EV_TO_KJ_PER_MOL,
                "degeneracy": self.degeneracy, "space_group": self.space_group, "index": self.index,
                "occupation": list(self.occupation)}


@dataclass(frozen=True)
class OrderingRanking:
    """Orderings of a disordered crystal in one supercell, ranked by electrostatic energy.

    Attributes
    ----------
    method : ``"enumeration"`` (every ordering visited: the ranking is exact for the model) or
        ``"search"`` (simulated annealing: the lowest found, not a proof that none is lower).
    orderings : the kept orderings, lowest energy first.
    total_orderings : number of orderings, symmetry-equivalent ones counted separately.
    distinct_orderings : symmetry-distinct orderings by Burnside's lemma.
    enumerated_distinct : orbit minima found by the enumeration (equals the Burnside count when
        the enumeration is complete), or the distinct orderings the search found.
    energies : (K,) energy of every distinct ordering enumerated (or found), eV per supercell, lowest first.
    degeneracies : (K,) their orbit sizes.
    indices : (K,) their positions in the lexicographic walk (enumeration), else None.
    found : (K, N) species codes of the orderings the search found (search), else None.
    formula : formula unit; ``formula_units`` of them in the supercell.
    supercell : the supercell matrix as text, e.g. ``"2x2x1"``.
    sites : number of disordered sites; ``sublattices`` names them with their ion counts.
    symmetry_operations : distinct site permutations of the supercell's symmetry.
    candidates_visited : orderings whose energy was computed (enumeration: the others were skipped,
        whole branches of the walk at a time, as provably not the minimum of their orbit) or swaps
        attempted (search).
    seconds : wall time of the ranking, s.
    net_charge : charge of the supercell, e (non-zero only with a neutralizing background).
    """

    method: str
    orderings: tuple
    total_orderings: int
    distinct_orderings: int
    enumerated_distinct: int
    energies: np.ndarray = field(repr=False)
    degeneracies: np.ndarray = field(repr=False)
    indices: np.ndarray | None = field(repr=False)
    found: np.ndarray | None = field(repr=False)
    formula: str
    formula_units: int
    supercell: str
    sites: int
    sublattices: tuple
    symmetry_operations: int
    candidates_visited: int
    seconds: float
    net_charge: float
    problem: OrderingProblem = field(repr=False, compare=False)

    NOTE = ("Point charges on the unrelaxed, averaged lattice: the electrostatic ranking is a first filter for "
            "orderings worth a quantum-mechanical or force-field calculation, not a phase diagram.")

    def crystal(self, rank=1) -> Crystal:
        """The ordered supercell of the kept ordering with this rank (1 = lowest)."""
        return self.problem.crystal_of(self._ordering(rank).codes)

    def atoms(self, rank=1):
        """The same as an ``ase.Atoms`` (charges as initial charges)."""
        return self.crystal(rank).to_ase()

    def occupation_text(self, row) -> str:
        """One ordering (species codes) as text: the element on each disordered site, ``-`` for a vacancy."""
        return " ".join("-" if self.problem.species[int(c)][0] == VACANCY else self.problem.species[int(c)][0]
                        for c in row)

    def _ordering(self, rank):
        if not 1 <= int(rank) <= len(self.orderings):
            raise InputError(f"rank {rank} outside the {len(self.orderings)} orderings kept")
        return self.orderings[int(rank) - 1]

    def to_dict(self) -> dict:
        return {"method": self.method, "is_exhaustive": self.method == "enumeration",
                "formula": self.formula, "formula_units": self.formula_units, "supercell": self.supercell,
                "disordered_sites": self.sites, "sublattices": list(self.sublattices),
                "total_orderings": str(self.total_orderings) if self.total_orderings > 2**53 else self.total_orderings,
                "distinct_orderings_burnside": str(self.distinct_orderings) if self.distinct_orderings > 2**53
                else self.distinct_orderings,
                "distinct_orderings_found": self.enumerated_distinct, "symmetry_operations": self.symmetry_operations,
                "candidates_visited": self.candidates_visited, "seconds": self.seconds, "net_charge_e": self.net_charge,
                "orderings": [o.to_dict() for o in self.orderings], "note": self.NOTE}


def rank_orderings(crystal, supercell=1, keep=20, *, ion_charges=None, method="auto",
                   max_distinct=DEFAULT_MAX_DISTINCT, restarts=8, sweeps=50, seed=0, workers=1,
                   scheduler=None, background=False, tol=SUM_TOL, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE) -> OrderingRanking:
    """Rank the orderings of a crystal's mixed and partly occupied sites in a supercell by their
    electrostatic energy.

    Parameters
    ----------
    crystal : Crystal
        With mixed or partly occupied sites (``species``); ordered sites keep their charges.
    supercell : int, three repeats (e.g. (2, 2, 1)) or a 3x3 integer matrix (rows: supercell vectors in
        units of the cell's vectors).
    keep : int
        How many of the lowest orderings to return in full.
    ion_charges : mapping or sequence, optional
        Charge (e) of each ion on the disordered sites: a map by element (or by label of a site with
        one species), or per site a tuple with the charge of each of its species. Default: the
        site's averaged charge divided by its occupancy; for a mixed site the other species' charges
        are taken from elsewhere in the crystal where that is unambiguous. Vacancies carry 0.
    method : "auto", "enumeration" or "search"
        "auto" enumerates when there are at most ``max_distinct`` symmetry-distinct orderings and
        their number times the symmetry operations is at most :data:`ENUMERATION_WORK_LIMIT`
        (each orbit minimum is tested against every operation), else searches.
    max_distinct : int
        Largest number of symmetry-distinct orderings (Burnside's count) to enumerate.
    restarts, sweeps, seed : search settings: independent annealing runs, attempted swaps per
        site at each of 40 temperatures, random seed.
    workers : int
        Local worker processes for the enumeration chunks or annealing restarts.
    scheduler : str or dask.distributed.Client, optional
        Run the chunks on a Dask cluster instead.
    background : bool
        Allow a composition with a net charge, summed with a uniform neutralizing background
        (otherwise refused).
    tol : float
        Accuracy of the Coulomb matrix, as for :func:`madelung.ewald`.
    symmetry_tolerance : float
        Symmetry tolerance, Å.

    Returns
    -------
    OrderingRanking

    Notes
    -----
    Point charges on the unrelaxed lattice of the averaged structure: relaxation, covalency and
    short-range repulsion can reorder close orderings. Use the ranking to pick the few orderings
    worth a quantum-mechanical calculation, not as a phase diagram.

    References
    ----------
    P. P. Ewald, Ann. Phys. 369 (1921) 253.
    W. Burnside, Theory of Groups of Finite Order (1897).
    S. Kirkpatrick, C. D. Gelatt and M. P. Vecchi, Science 220 (1983) 671.
    """
    started = time.perf_counter()
    if method not in ("auto", "enumeration", "search"):
        raise InputError(f"method must be auto, enumeration or search, got {method!r}")
    keep = int(keep)
    if keep < 1:
        raise InputError(f"keep must be a positive whole number, got {keep}")
    problem = ordering_problem(crystal, supercell, ion_charges=ion_charges, background=background, tol=tol,
                               symmetry_tolerance=symmetry_tolerance)
    total = problem.total_orderings
    n_ops = len(problem.inverse_ops)
    distinct = burnside_count(np.argsort(problem.inverse_ops, axis=1), problem.segments, problem.counts)
    if method == "auto":
        small = distinct <= int(max_distinct) and distinct * n_ops <= ENUMERATION_WORK_LIMIT
        method = "enumeration" if small and total < 2**62 else "search"
    if method == "enumeration":
        indices, energies, fixed, visited = run_enumeration(problem, workers=workers, scheduler=scheduler)
        order = np.lexsort((indices, energies))
        indices, energies, fixed = indices[order], energies[order], fixed[order]
        rows = [problem.ordering_at(i) for i in indices[:keep]]
    else:
        rows, energies, fixed, visited = run_search(problem, keep=keep, restarts=restarts, sweeps=sweeps, seed=seed,
                                                    workers=workers, scheduler=scheduler)
        indices = None
    degeneracies = n_ops // np.asarray(fixed, dtype=np.int64)
    lowest = float(energies[0]) / problem.formula_units if len(energies) else 0.0
    kept = []
    for r, row in enumerate(rows[:keep]):
        ordered = problem.crystal_of(row)
        info = crystal_symmetry(ordered, symmetry_tolerance=symmetry_tolerance)
        per_unit = float(energies[r]) / problem.formula_units
        kept.append(Ordering(rank=r + 1, occupation=tuple(problem.species[int(c)][0] for c in row),
                             energy=float(energies[r]), energy_per_formula_unit=per_unit,
                             energy_above_lowest=per_unit - lowest, degeneracy=int(degeneracies[r]),
                             space_group=f"{info.symbol} ({info.number})",
                             index=None if indices is None else int(indices[r]), codes=np.asarray(row)))
    sublattices = tuple(f"{name}: {', '.join(f'{n} {problem.species[c][0]}' for c, n in enumerate(count) if n)}"
                        for name, count in zip(problem.sublattice_names, problem.counts))
    return OrderingRanking(method=method, orderings=tuple(kept), total_orderings=total, distinct_orderings=distinct,
                           enumerated_distinct=len(energies), energies=np.asarray(energies),
                           degeneracies=degeneracies, indices=indices,
                           found=None if indices is not None else np.asarray(rows), formula=problem.formula,
                           formula_units=problem.formula_units, supercell=problem.supercell_text,
                           sites=len(problem.sites), sublattices=sublattices, symmetry_operations=n_ops,
                           candidates_visited=int(visited), seconds=time.perf_counter() - started,
                           net_charge=problem.net_charge, problem=problem)

