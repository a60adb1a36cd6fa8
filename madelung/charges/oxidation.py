"""Oxidation-state assignment: enumerate charge-neutral assignments and rank them.

Every crystallographic orbit (set of symmetry-equivalent sites) gets one state per species,
chosen from the element's common oxidation states (:func:`madelung.elements.common_oxidation_states`).
States the structure file gives are kept. Symmetry-distinct sites of one element may differ
(Fe2+ on one orbit, Fe3+ on another).

Mixed valence on one orbit
--------------------------
An orbit may also carry the average of two adjacent common states of its element in steps of
1/``mixing_denominator`` (default 1/2): half its ions in one state and half in the other, as in
magnetite's octahedral 16d site (Fe2+/Fe3+, average +2.5). Such an average is a mean-field
charge, not an oxidation state; candidates that need it are ranked below equally good integer
candidates, and the report names them as averages. ``mixing_denominator=1`` allows integer
states only.

Ranking (first difference decides)
----------------------------------
1. Electronegativity order: the number of (cation element, anion element) pairs in which the
   negatively charged element is not the more electronegative one (Pauling scale).
2. Electrostatic plausibility: the number of sites whose charge and site potential have the
   same sign (a cation should sit at a negative potential, an anion at a positive one).
3. Bond-valence sums (:mod:`.bond_valence`), when parameters exist for every bond of every
   candidate: the root-mean-square relative misfit between sum and state, compared in bins of
   :data:`BOND_VALENCE_BIN` so that small differences fall through to the next keys.
4. Fewer orbits with a mixed-valence average.
5. Lower electrostatic (Madelung) energy per formula unit, from the Ewald sum.

The energy alone always favours the highest charges; the first keys are what make it usable.
All of this is a model: formal states are bookkeeping of the ionic limit, not measured charges.

References
----------
L. Pauling, J. Am. Chem. Soc. 54 (1932) 3570 (electronegativity).
I. D. Brown and D. Altermatt, Acta Cryst. B41 (1985) 244 (bond valence).
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the lattice sum).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from .. import elements
from ..errors import InputError
from ..symmetry import DEFAULT_SYMPREC, analyse
from . import bond_valence

#: Bins of the bond-valence misfit used for ranking (relative units).
BOND_VALENCE_BIN = 0.05

#: Stop enumerating after this many neutral candidates (the result says it was cut short).
DEFAULT_MAX_CANDIDATES = 400

#: Accuracy of the Ewald sums used for ranking (relative, as in :func:`madelung.ewald`).
RANKING_TOL = 1e-6


@dataclass(frozen=True)
class SiteGroup:
    """One orbit of equivalent sites with the same file-given states.

    Attributes
    ----------
    index : group number.
    sites : member site indices.
    label : site label of the first member.
    species : ``((element, occupancy), ...)`` of the sites.
    wyckoff : Wyckoff letter and multiplicity, e.g. ``"16d"``.
    fixed : per species, the state given by the file or the user, or None.
    """

    index: int
    sites: tuple
    label: str
    species: tuple
    wyckoff: str
    fixed: tuple

    @property
    def species_label(self) -> str:
        if len(self.species) == 1 and self.species[0][1] >= 1 - 1e-6:
            return self.species[0][0]
        return "".join(f"{el}{occ:g}" for el, occ in self.species)


@dataclass(frozen=True)
class Candidate:
    """One charge-neutral assignment and how it scored.

    Attributes
    ----------
    states : per group, the state of each species (floats; averages for mixed valence).
    charges : (N,) site charges, e (occupancy-weighted for mixed or partly occupied sites).
    electronegativity_violations : cation–anion element pairs in the wrong electronegativity order.
    wrong_sign_sites : sites whose charge and potential have the same sign.
    potentials : per group, the site potential, V.
    bond_valence_sums : per group, the bond-valence sum (None where parameters are missing).
    bond_valence_misfit : root-mean-square relative misfit of the sums, or None.
    mixed_groups : groups carrying a mixed-valence average.
    energy_per_formula_unit : electrostatic energy per formula unit, eV (signed).
    """

    states: tuple
    charges: np.ndarray
    electronegativity_violations: int
    wrong_sign_sites: int
    potentials: tuple
    bond_valence_sums: tuple
    bond_valence_misfit: float | None
    mixed_groups: int
    energy_per_formula_unit: float

    def key(self, use_bond_valence):
        bvs = 0
        if use_bond_valence and self.bond_valence_misfit is not None:
            bvs = int(self.bond_valence_misfit / BOND_VALENCE_BIN)
        return (self.electronegativity_violations, self.wrong_sign_sites, bvs, self.mixed_groups,
                round(self.energy_per_formula_unit, 6))


@dataclass(frozen=True)
class OxidationAssignment:
    """Ranked charge-neutral oxidation-state assignments of one structure.

    Attributes
    ----------
    source : file the structure came from (or None).
    groups : the site groups (orbits).
    candidates : all candidates found, best first.
    space_group : space-group symbol and number, e.g. ``"Fd-3m (227)"``.
    used_bond_valence : whether bond-valence sums took part in the ranking.
    truncated : True if the enumeration stopped at ``max_candidates``.
    reason : why the best candidate beat the runner-up, in words.
    formula_units : formula units per cell used for the energies.
    """

    source: str | None
    groups: tuple
    candidates: tuple
    space_group: str
    used_bond_valence: bool
    truncated: bool
    reason: str
    formula_units: int

    @property
    def best(self) -> Candidate:
        return self.candidates[0]

    @property
    def runner_up(self) -> Candidate | None:
        return self.candidates[1] if len(self.candidates) > 1 else None

    @property
    def charges(self) -> np.ndarray:
        return self.best.charges

    def describe(self, candidate=None) -> str:
        """One-line text of an assignment, e.g.
        ``"Fe1 (8a) Fe+3, Fe2 (16d) Fe+2.5 (Fe2+/Fe3+ average), O1 (32e) O-2"``."""
        candidate = candidate or self.best
        parts = []
        for group, states in zip(self.groups, candidate.states):
            text = " ".join(f"{el}{_state_text(q)}{mixed_note(el, q)}" for (el, _), q in zip(group.species, states))
            parts.append(f"{group.label} ({group.wyckoff}) {text}")
        return ", ".join(parts)


def _state_text(q):
    return f"{q:+g}"


def mixed_pair(element, q):
    """The two adjacent common states of ``element`` whose average ``q`` is, or None for a common state."""
    states = sorted(int(s) for s in elements.common_oxidation_states(element))
    if any(abs(q - s) < 1e-9 for s in states):
        return None
    for low, high in zip(states, states[1:]):
        if low < q < high:
            return low, high
    return math.floor(q), math.ceil(q)


def mixed_note(element, q):
    """``" (Fe2+/Fe3+ average)"`` for a mixed-valence average, else ``""``."""
    pair = mixed_pair(element, q)
    if pair is None:
        return ""
    return f" ({element}{_ion(pair[0])}/{element}{_ion(pair[1])} average)"


def _ion(q):
    return f"{abs(q)}{'+' if q > 0 else '-'}"


def _as_fraction(value, limit=1000):
    return Fraction(value).limit_denominator(limit)


def allowed_states(element, mixing_denominator=2, source=None):
    """States an orbit of ``element`` may take: the common oxidation states, plus averages of two
    adjacent states of the same sign in steps of 1/``mixing_denominator``. Fractions, sorted."""
    where = f"{source}: " if source else ""
    try:
        states = elements.common_oxidation_states(element)
    except InputError:
        raise InputError(f"{where}unknown element symbol {element!r}; give its charge with --charge") from None
    states = sorted({int(s) for s in states if int(s) != 0})
    if not states:
        raise InputError(f"{where}element {element} has no common oxidation state in the periodic-table data; "
                         f"give its charge, e.g. --charge {element}=+1")
    values = {Fraction(s) for s in states}
    for a, b in zip(states, states[1:]):
        if a * b <= 0:
            continue
        for d in range(2, int(mixing_denominator) + 1):
            for k in range(1, d):
                values.add(Fraction(a) + Fraction(b - a) * Fraction(k, d))
    return sorted(values)


def site_groups(crystal, known_states=None, symprec=DEFAULT_SYMPREC):
    """Orbits of the crystal, split where the given states differ. Returns (groups, SymmetryInfo)."""
    n = len(crystal)
    known = [None] * n if known_states is None else list(known_states)
    if len(known) != n:
        raise InputError(f"{len(known)} known-state entries for {n} sites")
    keys, types = {}, np.empty(n, dtype=np.int64)
    fixed_per_site = []
    for i in range(n):
        species = crystal.species_of(i)
        entry = known[i]
        if entry is None:
            entry = (None,) * len(species)
        entry = tuple(entry)
        if len(entry) != len(species):
            entry = (None,) * len(species)
        entry = tuple(None if v is None or (isinstance(v, float) and math.isnan(v)) else float(v) for v in entry)
        fixed_per_site.append(entry)
        types[i] = keys.setdefault((crystal.species_label(i), entry), len(keys) + 1)
    info = analyse(crystal.cell, crystal.fractional_positions, types, symprec)
    groups = []
    for orbit in info.orbits:
        first = orbit.sites[0]
        groups.append(SiteGroup(index=len(groups), sites=orbit.sites, label=crystal.labels[first],
                                species=crystal.species_of(first), wyckoff=orbit.wyckoff_label,
                                fixed=fixed_per_site[first]))
    return tuple(groups), info


def _enumerate(options, target, limit):
    """All choices (one option index per group) whose contributions add up to ``target``.

    ``options[g]`` is a list of (contribution Fraction, payload). Uses the sets of sums reachable
    from each group onward to prune. Returns (choices, truncated).
    """
    g_count = len(options)
    reachable = [set() for _ in range(g_count + 1)]
    reachable[g_count] = {Fraction(0)}
    for g in range(g_count - 1, -1, -1):
        reachable[g] = {c + r for c, _ in options[g] for r in reachable[g + 1]}
        if len(reachable[g]) > 200000:
            raise InputError("too many oxidation-state combinations to enumerate; fix some with --charge")
    found = []
    truncated = False

    def walk(g, remaining, picked):
        nonlocal truncated
        if len(found) >= limit:
            truncated = True
            return
        if g == g_count:
            if remaining == 0:
                found.append(tuple(picked))
            return
        for index, (c, _) in enumerate(options[g]):
            if (remaining - c) in reachable[g + 1]:
                picked.append(index)
                walk(g + 1, remaining - c, picked)
                picked.pop()

    if target in reachable[0]:
        walk(0, target, [])
    return found, truncated


def assign_oxidation_states(crystal, *, known_states=None, symprec=DEFAULT_SYMPREC, mixing_denominator=2,
                            max_candidates=DEFAULT_MAX_CANDIDATES, total_charge=0, tol=RANKING_TOL):
    """Charge-neutral oxidation states for every site, ranked; the best first.

    Parameters
    ----------
    crystal : Crystal
        The structure (its charges are ignored).
    known_states : sequence, optional
        Per site, a tuple with the state of each species or None where unknown (as
        :func:`madelung.crystal.file_states` returns); these are kept.
    symprec : float
        Symmetry tolerance for the orbits, Å.
    mixing_denominator : int
        Mixed-valence averages in steps of 1/this (1: integer states only; default 2).
    max_candidates : int
        Stop after this many neutral candidates.
    total_charge : number
        Net charge of the cell the assignment must give (default 0).

    Returns
    -------
    OxidationAssignment

    Raises
    ------
    InputError
        An element has no admissible state, or no neutral assignment exists.

    References
    ----------
    See the module docstring.
    """
    from ..ewald.matrix import potentials_for_charge_sets

    source = crystal.source
    where = f"{source}: " if source else ""
    try:
        mixing_denominator = int(mixing_denominator)
    except (TypeError, ValueError):
        raise InputError(f"mixing denominator must be a whole number, got {mixing_denominator!r}") from None
    if mixing_denominator < 1:
        raise InputError(f"mixing denominator must be at least 1, got {mixing_denominator}")
    groups, info = site_groups(crystal, known_states, symprec)

    options = []
    for group in groups:
        per_species = []
        for (element, occ), fixed in zip(group.species, group.fixed):
            values = [_as_fraction(fixed)] if fixed is not None else allowed_states(element, mixing_denominator, source)
            per_species.append([(v, _as_fraction(occ)) for v in values])
        combos = [((), Fraction(0))]
        for choices in per_species:
            combos = [(states + (v,), total + occ * v) for states, total in combos for v, occ in choices]
        m = len(group.sites)
        options.append([(m * total, states) for states, total in combos])

    found, truncated = _enumerate(options, _as_fraction(total_charge), int(max_candidates))
    if not found:
        listing = "; ".join(f"{el}: {', '.join(_state_text(float(v)) for v in allowed_states(el, 1, source))}"
                            for el in dict.fromkeys(el for g in groups for el, _ in g.species))
        raise InputError(f"{where}no charge-neutral assignment of the common oxidation states exists ({listing}); "
                         "give the charges with --charge, e.g. --charge " + f"{groups[0].species[0][0]}=VALUE")

    # one Ewald sum per group gives the potentials of every candidate (the sum is linear)
    n = len(crystal)
    indicator = np.zeros((len(groups), n))
    for group in groups:
        indicator[group.index, list(group.sites)] = 1.0
    by_group = potentials_for_charge_sets(crystal.cell, crystal.positions, indicator, tol=tol)
    reps = [group.sites[0] for group in groups]
    phi_matrix = by_group[:, reps].T          # phi at rep of g from unit charges on group h
    multiplicity = np.array([len(group.sites) for group in groups], dtype=float)
    z = crystal.formula_units

    # bond-valence neighbours of each representative, once
    element_set = {el for g in groups for el, _ in g.species}
    neighbours = bond_valence.neighbour_lists(crystal, reps, bond_valence.search_radius(element_set))
    group_of_site = np.empty(n, dtype=np.int64)
    for group in groups:
        group_of_site[list(group.sites)] = group.index
    averaged = [crystal.is_averaged(group.sites[0]) for group in groups]

    candidates = []
    for choice in found:
        states = [options[g][k][1] for g, k in enumerate(choice)]
        q_group = np.array([float(sum(_as_fraction(occ) * v for (_, occ), v in zip(group.species, st)))
                            for group, st in zip(groups, states)])
        phi = phi_matrix @ q_group
        energy = 0.5 * float(np.sum(multiplicity * q_group * phi))
        positive, negative = set(), set()
        for group, st in zip(groups, states):
            for (el, _), v in zip(group.species, st):
                (positive if v > 0 else negative).add(el)
        violations = 0
        for p in positive:
            for q in negative:
                chi_p, chi_q = elements.electronegativity(p), elements.electronegativity(q)
                if chi_p is not None and chi_q is not None and chi_q <= chi_p:
                    violations += 1
        wrong = int(sum(len(g.sites) for g, qg, ph in zip(groups, q_group, phi) if qg * ph > 0))
        sums = []
        for g, (partners, distances) in enumerate(neighbours):
            if averaged[g] or any(averaged[group_of_site[j]] for j in partners):
                sums.append(None)
                continue
            el = groups[g].species[0][0]
            partner_groups = group_of_site[partners]
            value = bond_valence.site_sum(el, q_group[g], [groups[h].species[0][0] for h in partner_groups],
                                          q_group[partner_groups], distances)
            sums.append(value)
        covered = [(s, abs(q), m) for s, q, m in zip(sums, q_group, multiplicity) if s is not None and q != 0]
        misfit = None
        if covered:
            misfit = math.sqrt(sum(m * ((s - q) / q) ** 2 for s, q, m in covered) / sum(m for *_, m in covered))
        mixed = sum(1 for group, st in zip(groups, states)
                    if any(mixed_pair(el, float(v)) is not None for (el, _), v in zip(group.species, st)))
        charges = np.empty(n)
        for group, qg in zip(groups, q_group):
            charges[list(group.sites)] = qg
        charges.setflags(write=False)
        candidates.append(Candidate(states=tuple(tuple(float(v) for v in st) for st in states), charges=charges,
                                    electronegativity_violations=violations, wrong_sign_sites=wrong,
                                    potentials=tuple(float(x) for x in phi), bond_valence_sums=tuple(sums),
                                    bond_valence_misfit=misfit, mixed_groups=mixed,
                                    energy_per_formula_unit=energy / z))
    use_bvs = all(all(s is not None for s, g in zip(c.bond_valence_sums, groups) if not averaged[g.index])
                  for c in candidates) and not all(averaged)
    candidates.sort(key=lambda c: c.key(use_bvs))
    reason = _reason(candidates, use_bvs)
    return OxidationAssignment(source=source, groups=groups, candidates=tuple(candidates),
                               space_group=f"{info.symbol} ({info.number})", used_bond_valence=use_bvs,
                               truncated=truncated, reason=reason, formula_units=z)


def _reason(candidates, use_bvs):
    if len(candidates) == 1:
        return "the only charge-neutral assignment of the common oxidation states"
    best, second = candidates[0], candidates[1]
    if best.electronegativity_violations != second.electronegativity_violations:
        return (f"electronegativity order: {best.electronegativity_violations} vs "
                f"{second.electronegativity_violations} cation–anion pairs where the anion is the less "
                "electronegative element")
    if best.wrong_sign_sites != second.wrong_sign_sites:
        return (f"site potentials: {best.wrong_sign_sites} vs {second.wrong_sign_sites} sites whose potential "
                "has the same sign as their charge")
    b, s = best.key(use_bvs), second.key(use_bvs)
    if b[2] != s[2]:
        return (f"bond-valence sums: misfit {best.bond_valence_misfit:.1%} vs {second.bond_valence_misfit:.1%} "
                "(root-mean-square relative deviation from the states)")
    if b[3] != s[3]:
        return "integer states preferred over a mixed-valence average (otherwise equally plausible)"
    if b[4] != s[4]:
        return (f"lower electrostatic energy per formula unit: {best.energy_per_formula_unit:.4f} vs "
                f"{second.energy_per_formula_unit:.4f} eV")
    return "tied with the runner-up on every criterion; the first one found is shown"
