"""Oxidation-state assignment: enumerate charge-neutral assignments and rank them.

Every crystallographic orbit (set of symmetry-equivalent sites) gets one state per species.
States the structure file gives are kept. Symmetry-distinct sites of one element may differ
(Fe2+ on one orbit, Fe3+ on another).

Candidate states and their prior
--------------------------------
The candidates come from every state known for the element (:mod:`.common_states`), with a
two-level prior on how often states occur: the common states (Greenwood & Earnshaw) are
searched first; the rare ones are searched as well only when no charge-neutral assignment of
common states exists or the best one misfits its bond-valence sums by more than
:data:`WIDEN_MISFIT`. A rare-state candidate is kept only when its bond-valence sums can be
computed (an unverifiable exotic state is not offered), and it ranks below a common-state one
unless the bond valences favour it.

Mixed valence on one orbit
--------------------------
An orbit may also carry the average of two adjacent integer states of its element in steps of
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
4. Fewer sites in rarely seen states (the prior).
5. Fewer orbits with a mixed-valence average.
6. Lower electrostatic (Madelung) energy per formula unit, from the Ewald sum.

The energy alone always favours the highest charges; the first keys are what make it usable.
All of this is a model: formal states are bookkeeping of the ionic limit, not measured charges.

References
----------
L. Pauling, J. Am. Chem. Soc. 54 (1932) 3570 (electronegativity).
I. D. Brown and D. Altermatt, Acta Cryst. B41 (1985) 244 (bond valence).
P. P. Ewald, Ann. Phys. 369 (1921) 253 (the lattice sum).
N. N. Greenwood and A. Earnshaw, Chemistry of the Elements, 2nd ed. (1997) (common states).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from ..structure import elements
from ..structure.crystal import ion_text
from ..errors import InputError
from ..sums.matrix import potentials_for_charge_sets
from ..units import EV_TO_KJ_PER_MOL
from ..structure.symmetry import DEFAULT_SYMMETRY_TOLERANCE, analyse
from . import bond_valence
from .common_states import adjacent_pair, common_states, is_common
from .common_states import known_states as all_known_states

#: Bins of the bond-valence misfit used for ranking (relative units).
BOND_VALENCE_BIN = 0.05

#: Stop enumerating after this many neutral candidates (the result says it was cut short).
DEFAULT_MAX_CANDIDATES = 400

#: Accuracy of the Ewald sums used for ranking (relative, as in :func:`madelung.ewald`).
RANKING_TOL = 1e-6

#: When the best assignment of common states misfits its bond-valence sums by more than this
#: (root-mean-square relative deviation), rarely seen states are searched too; and a chosen
#: assignment above it is reported as doubtful. Agreement within 10-15 % is usual for ionic
#: solids (see :mod:`.bond_valence`); 25 % is well outside it.
WIDEN_MISFIT = 0.25


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
        """As :meth:`madelung.Crystal.species_label`: ``Fe0.5Ti0.5``, ``Mn3+0.7Mn4+0.3`` (states shown
        where one element comes in several)."""
        if len(self.species) == 1 and self.species[0][1] >= 1 - 1e-6:
            return self.species[0][0]
        if len({el for el, _ in self.species}) < len(self.species):
            return "".join(f"{ion_text(el, st)}{occ:g}" for (el, occ), st in zip(self.species, self.fixed))
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
    rare_sites : sites holding a state outside the element's common ones (the prior's penalty).
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
    rare_sites: int = 0

    def key(self, use_bond_valence):
        bvs = 0
        if use_bond_valence and self.bond_valence_misfit is not None:
            bvs = int(self.bond_valence_misfit / BOND_VALENCE_BIN)
        return (self.electronegativity_violations, self.wrong_sign_sites, bvs, self.rare_sites, self.mixed_groups,
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
    reason : why the best candidate beat the runner-up, in words (with the bond-valence misfits).
    formula_units : formula units per cell used for the energies.
    searched_rare_states : True if rarely seen states were searched too (see the module docstring).
    """

    source: str | None
    groups: tuple
    candidates: tuple
    space_group: str
    used_bond_valence: bool
    truncated: bool
    reason: str
    formula_units: int
    searched_rare_states: bool = False

    @property
    def doubtful(self) -> bool:
        """True when the chosen assignment misfits its bond-valence sums by more than WIDEN_MISFIT."""
        misfit = self.best.bond_valence_misfit
        return misfit is not None and misfit > WIDEN_MISFIT

    @property
    def best(self) -> Candidate:
        return self.candidates[0]

    @property
    def runner_up(self) -> Candidate | None:
        return self.candidates[1] if len(self.candidates) > 1 else None

    @property
    def charges(self) -> np.ndarray:
        return self.best.charges

    def candidate_dict(self, candidate, rank) -> dict:
        """One candidate, JSON-ready: per orbit its species' states, site potential V and bond-valence
        sum; the ranking's scores; the energy per formula unit (eV and kJ/mol, signed)."""
        return {"rank": rank, "assignment": self.describe(candidate),
                "states": [{"label": g.label, "wyckoff": g.wyckoff, "sites_in_cell": len(g.sites),
                            "species": [{"element": el, "occupancy": occ, "state": q}
                                        for (el, occ), q in zip(g.species, states)],
                            "potential_V": phi, "bond_valence_sum": bvs}
                           for g, states, phi, bvs in zip(self.groups, candidate.states, candidate.potentials,
                                                          candidate.bond_valence_sums)],
                "electronegativity_violations": candidate.electronegativity_violations,
                "wrong_sign_sites": candidate.wrong_sign_sites,
                "bond_valence_misfit": candidate.bond_valence_misfit,
                "mixed_valence_orbits": candidate.mixed_groups,
                "sites_in_rarely_seen_states": candidate.rare_sites,
                "energy_per_formula_unit_eV": candidate.energy_per_formula_unit,
                "energy_per_formula_unit_kJ_per_mol": candidate.energy_per_formula_unit * EV_TO_KJ_PER_MOL}

    def to_dict(self) -> dict:
        """JSON-ready: the space group, why the best candidate won, how the search went, and every
        candidate ranked (:meth:`candidate_dict`)."""
        return {"space_group": self.space_group, "method": "oxidation-state assignment", "reason": self.reason,
                "bond_valence_used_in_ranking": self.used_bond_valence, "truncated": self.truncated,
                "searched_rarely_seen_states": self.searched_rare_states,
                "candidates": [self.candidate_dict(c, k + 1) for k, c in enumerate(self.candidates)],
                "note": "formal oxidation states: bookkeeping of the ionic limit, not measured charges"}

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
    """The two adjacent integer states whose average ``q`` is (Mn 3.5 -> (3, 4)), or None for an integer."""
    if abs(q - round(q)) < 1e-9:
        return None
    return adjacent_pair(element, q)


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


def allowed_states(element, mixing_denominator=2, source=None, rare=False):
    """States an orbit of ``element`` may take: its common oxidation states (or, with ``rare``, every
    known state), plus averages of two adjacent positive integer states, both allowed, in steps of
    1/``mixing_denominator``. Fractions, sorted."""
    where = f"{source}: " if source else ""
    try:
        states = all_known_states(element) if rare else common_states(element)
    except InputError:
        raise InputError(f"{where}unknown element symbol {element!r}; give its charge with --charge") from None
    if not states:
        raise InputError(f"{where}element {element} has no known oxidation state in the periodic-table data; "
                         f"give its charge, e.g. --charge {element}=+1")
    values = {Fraction(s) for s in states}
    for a in states:
        b = a + 1
        if b not in states or a <= 0:      # averages of cation states only (mixed-valence metals)
            continue
        for d in range(2, int(mixing_denominator) + 1):
            for k in range(1, d):
                values.add(Fraction(a) + Fraction(k, d))
    return sorted(values)


def site_groups(crystal, known_states=None, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE):
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
    info = analyse(crystal.cell, crystal.fractional_positions, types, symmetry_tolerance)
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


def assign_oxidation_states(crystal, *, known_states=None, symmetry_tolerance=DEFAULT_SYMMETRY_TOLERANCE, mixing_denominator=2,
                            max_candidates=DEFAULT_MAX_CANDIDATES, total_charge=0, tol=RANKING_TOL):
    """Charge-neutral oxidation states for every site, ranked; the best first.

    Parameters
    ----------
    crystal : Crystal
        The structure (its charges are ignored).
    known_states : sequence, optional
        Per site, a tuple with the state of each species or None where unknown (the loader,
        :mod:`madelung.io.read`, passes the file's states and the charge rules); these are kept.
    symmetry_tolerance : float
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
    source = crystal.source
    where = f"{source}: " if source else ""
    try:
        mixing_denominator = int(mixing_denominator)
    except (TypeError, ValueError):
        raise InputError(f"mixing denominator must be a whole number, got {mixing_denominator!r}") from None
    if mixing_denominator < 1:
        raise InputError(f"mixing denominator must be at least 1, got {mixing_denominator}")
    groups, info = site_groups(crystal, known_states, symmetry_tolerance)
    target = _as_fraction(total_charge)
    scorer = _Scorer(crystal, groups, tol)

    options = _options(groups, mixing_denominator, source, False)
    found, truncated = _enumerate(options, target, int(max_candidates))
    candidates = [scorer.score(_states(options, choice)) for choice in found]
    use_bvs = _bond_valence_usable(candidates, scorer)
    candidates.sort(key=lambda c: c.key(use_bvs))
    widened = not candidates or (candidates[0].bond_valence_misfit or 0) > WIDEN_MISFIT
    if widened:
        options = _options(groups, mixing_denominator, source, True)
        try:
            rare, cut = _enumerate(options, target, int(max_candidates))
        except InputError:
            if not candidates:
                raise
            rare, cut = [], True          # too many rare combinations: keep the common-state candidates
        seen = {c.states for c in candidates}
        extra = [scorer.score(_states(options, choice)) for choice in rare]
        extra = [c for c in extra if c.states not in seen]
        # a rarely seen state is offered only where its bond valences can be checked, unless nothing else is left
        checked = [c for c in extra if c.rare_sites == 0 or c.bond_valence_misfit is not None]
        extra = checked if (checked or candidates) else extra
        candidates += extra
        truncated = truncated or cut
        use_bvs = _bond_valence_usable(candidates, scorer)
        candidates.sort(key=lambda c: c.key(use_bvs))
    if not candidates:
        listing = "; ".join(f"{el}: {', '.join(_state_text(float(v)) for v in allowed_states(el, 1, source, True))}"
                            for el in dict.fromkeys(el for g in groups for el, _ in g.species))
        raise InputError(f"{where}no charge-neutral assignment of the known oxidation states exists ({listing}); "
                         "give the charges with --charge, e.g. --charge " + f"{groups[0].species[0][0]}=VALUE")
    reason = _reason(candidates, use_bvs)
    return OxidationAssignment(source=source, groups=groups, candidates=tuple(candidates),
                               space_group=f"{info.symbol} ({info.number})", used_bond_valence=use_bvs,
                               truncated=truncated, reason=reason, formula_units=crystal.formula_units,
                               searched_rare_states=widened)


def _states(options, choice):
    return [options[g][k][1] for g, k in enumerate(choice)]


def _options(groups, mixing_denominator, source, rare):
    """Per group, the (total charge of the group, states) choices."""
    options = []
    for group in groups:
        per_species = []
        for (element, occ), fixed in zip(group.species, group.fixed):
            values = [_as_fraction(fixed)] if fixed is not None else allowed_states(element, mixing_denominator,
                                                                                   source, rare)
            per_species.append([(v, _as_fraction(occ)) for v in values])
        combos = [((), Fraction(0))]
        for choices in per_species:
            combos = [(states + (v,), total + occ * v) for states, total in combos for v, occ in choices]
        m = len(group.sites)
        options.append([(m * total, states) for states, total in combos])
    return options


def _bond_valence_usable(candidates, scorer):
    """Bond valences rank only when every candidate has a sum for every non-averaged group."""
    averaged = scorer.averaged
    return bool(candidates) and not all(averaged) and all(
        all(s is not None for s, a in zip(c.bond_valence_sums, averaged) if not a) for c in candidates)


class _Scorer:
    """Scores candidates of one crystal: one Ewald sum per group serves them all (the sum is linear)."""

    def __init__(self, crystal, groups, tol):
        n = len(crystal)
        self.groups = groups
        indicator = np.zeros((len(groups), n))
        for group in groups:
            indicator[group.index, list(group.sites)] = 1.0
        by_group = potentials_for_charge_sets(crystal.cell, crystal.positions, indicator, tol=tol)
        reps = [group.sites[0] for group in groups]
        self.phi_matrix = by_group[:, reps].T          # phi at rep of g from unit charges on group h
        self.multiplicity = np.array([len(group.sites) for group in groups], dtype=float)
        self.z = crystal.formula_units
        element_set = {el for g in groups for el, _ in g.species}
        self.neighbours = bond_valence.neighbour_lists(crystal, reps, bond_valence.search_radius(element_set))
        self.group_of_site = np.empty(n, dtype=np.int64)
        for group in groups:
            self.group_of_site[list(group.sites)] = group.index
        self.averaged = [crystal.is_averaged(group.sites[0]) for group in groups]
        self.n = n

    def score(self, states) -> "Candidate":
        groups, averaged = self.groups, self.averaged
        q_group = np.array([float(sum(_as_fraction(occ) * v for (_, occ), v in zip(group.species, st)))
                            for group, st in zip(groups, states)])
        phi = self.phi_matrix @ q_group
        energy = 0.5 * float(np.sum(self.multiplicity * q_group * phi))
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
        for g, (partners, distances) in enumerate(self.neighbours):
            if averaged[g] or any(averaged[self.group_of_site[j]] for j in partners):
                sums.append(None)
                continue
            el = groups[g].species[0][0]
            partner_groups = self.group_of_site[partners]
            sums.append(bond_valence.site_sum(el, q_group[g], [groups[h].species[0][0] for h in partner_groups],
                                              q_group[partner_groups], distances))
        covered = [(s, abs(q), m) for s, q, m in zip(sums, q_group, self.multiplicity) if s is not None and q != 0]
        misfit = None
        if covered:
            misfit = math.sqrt(sum(m * ((s - q) / q) ** 2 for s, q, m in covered) / sum(m for *_, m in covered))
        mixed = sum(1 for group, st in zip(groups, states)
                    if any(mixed_pair(el, float(v)) is not None for (el, _), v in zip(group.species, st)))
        rare = sum(len(group.sites) for group, st in zip(groups, states)
                   if any(fixed is None and not is_common(el, v)
                          for (el, _), v, fixed in zip(group.species, st, group.fixed)))
        charges = np.empty(self.n)
        for group, qg in zip(groups, q_group):
            charges[list(group.sites)] = qg
        charges.setflags(write=False)
        return Candidate(states=tuple(tuple(float(v) for v in st) for st in states), charges=charges,
                         electronegativity_violations=violations, wrong_sign_sites=wrong,
                         potentials=tuple(float(x) for x in phi), bond_valence_sums=tuple(sums),
                         bond_valence_misfit=misfit, mixed_groups=mixed, energy_per_formula_unit=energy / self.z,
                         rare_sites=rare)


def _misfit_text(candidate):
    m = candidate.bond_valence_misfit
    rare = f"; {candidate.rare_sites} sites in rarely seen states" if candidate.rare_sites else ""
    if m is None:
        return "bond valence not checked" + rare
    return f"bond-valence misfit {m:.1%}" + (" — doubtful" if m > WIDEN_MISFIT else "") + rare


def _reason(candidates, use_bvs):
    if len(candidates) == 1:
        return f"the only charge-neutral assignment found ({_misfit_text(candidates[0])})"
    best, second = candidates[0], candidates[1]
    versus = f" [{_misfit_text(best)}; runner-up {_misfit_text(second)}]"
    if best.electronegativity_violations != second.electronegativity_violations:
        return (f"electronegativity order: {best.electronegativity_violations} vs "
                f"{second.electronegativity_violations} cation–anion pairs where the anion is the less "
                "electronegative element" + versus)
    if best.wrong_sign_sites != second.wrong_sign_sites:
        return (f"site potentials: {best.wrong_sign_sites} vs {second.wrong_sign_sites} sites whose potential "
                "has the same sign as their charge" + versus)
    b, s = best.key(use_bvs), second.key(use_bvs)
    if b[2] != s[2]:
        return (f"bond-valence sums: misfit {best.bond_valence_misfit:.1%} vs {second.bond_valence_misfit:.1%} "
                "(root-mean-square relative deviation from the states)")
    if b[3] != s[3]:
        return (f"common oxidation states preferred over rarely seen ones ({best.rare_sites} vs {second.rare_sites} "
                "sites in rare states)" + versus)
    if b[4] != s[4]:
        return "integer states preferred over a mixed-valence average (otherwise equally plausible)" + versus
    if b[5] != s[5]:
        return (f"lower electrostatic energy per formula unit: {best.energy_per_formula_unit:.4f} vs "
                f"{second.energy_per_formula_unit:.4f} eV" + versus)
    return "tied with the runner-up on every criterion; the first one found is shown" + versus
