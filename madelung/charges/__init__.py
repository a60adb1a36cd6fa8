"""Charges for the point-charge model: oxidation-state assignment, charge equilibration and the
handling of mixed or partly occupied sites.

``charges_for(crystal, "auto" | "equilibrate")`` is what :meth:`madelung.Crystal.from_ase` calls
for ``charges="auto"`` and ``charges="equilibrate"``.
"""

from .bond_valence import bond_valence_sums
from .equilibrate import EquilibrationResult, equilibrate
from .oxidation import Candidate, OxidationAssignment, SiteGroup, assign_oxidation_states


def charges_for(crystal, method, known_states=None, **options):
    """Site charges (e) of ``crystal`` by ``method``: ``"auto"`` (best oxidation-state assignment;
    ``known_states`` are kept) or ``"equilibrate"`` (charge equilibration)."""
    if method == "auto":
        return assign_oxidation_states(crystal, known_states=known_states, **options).charges
    if method == "equilibrate":
        return equilibrate(crystal, **options).charges
    from ..errors import InputError

    raise InputError(f"unknown charge method {method!r}; use 'auto' or 'equilibrate'")


def charged_crystal(atoms, method="file", rules=None, *, symprec=0.01, mixing_denominator=2,
                    ignore_file_states=False, **crystal_options):
    """The :class:`~madelung.Crystal` of an ``ase.Atoms`` with its charges decided, as the command
    line and the screening runner both need it.

    Parameters
    ----------
    atoms : ase.Atoms, as read by :func:`madelung.crystal.read_structure`.
    method : "file", "auto" or "equilibrate"
        Charges the file carries (CIF oxidation states, else ASE initial charges), assigned
        oxidation states, or charge equilibration.
    rules : mapping, optional
        Charge by element or site label (a label wins); they replace the file's states for the
        species they name, and are kept fixed by the assignment. Not allowed with "equilibrate".
    ignore_file_states : bool
        With "auto", assign every site afresh instead of keeping the file's states.
    **crystal_options
        ``source``, ``min_distance``, ``occupancy``, ``max_atoms`` for the crystal.

    Returns
    -------
    (Crystal, OxidationAssignment or None)
        The assignment (ranked candidates) when ``method`` is "auto", else None.
    """
    import numpy as np

    from ..crystal import Crystal, file_states
    from ..errors import InputError

    rules = dict(rules or {})
    where = f"{crystal_options['source']}: " if crystal_options.get("source") else ""
    if method == "equilibrate":
        if rules:
            raise InputError(f"{where}charge rules (--charge) cannot be combined with charge equilibration")
        return Crystal.from_ase(atoms, "equilibrate", **crystal_options), None
    if method not in ("file", "auto"):
        raise InputError(f"{where}unknown charge method {method!r}; use file, auto or equilibrate")
    if method == "file" and not rules:
        return Crystal.from_ase(atoms, None, **crystal_options), None

    base = Crystal.from_ase(atoms, np.zeros(len(atoms)), **crystal_options)
    if ignore_file_states:
        states = [(None,) * len(base.species_of(i)) for i in range(len(base))]
    else:
        states = file_states(atoms)
        if all(s == (None,) for s in states) and np.any(atoms.get_initial_charges() != 0):
            states = [(float(q),) for q in atoms.get_initial_charges()]
    named = set(base.symbols) | set(base.labels) | {el for i in range(len(base)) for el, _ in base.species_of(i)}
    unknown = sorted(set(rules) - named)
    if unknown:
        raise InputError(f"{where}charge given for {unknown[0]}, which is neither an element nor a site label "
                         "of this structure")
    known = []
    for i in range(len(base)):
        parts = base.species_of(i)
        given = states[i] if len(states[i]) == len(parts) else (None,) * len(parts)
        known.append(tuple(rules.get(base.labels[i], rules.get(el, None if s is None or not np.isfinite(s) else s))
                           for (el, _), s in zip(parts, given)))
    if method == "auto":
        assignment = assign_oxidation_states(base, known_states=known, symprec=symprec,
                                             mixing_denominator=mixing_denominator)
        return base.with_charges(assignment.charges), assignment
    charges = np.empty(len(base))
    for i, values in enumerate(known):
        missing = [el for (el, _), v in zip(base.species_of(i), values) if v is None]
        if missing:
            raise InputError(f"{where}site {base.labels[i]} ({missing[0]}) has no charge in the file or the rules; "
                             f"add --charge {base.labels[i]}=Q")
        # a mixed or partly occupied site carries the occupancy-weighted sum of its species' charges
        charges[i] = sum(occ * v for (_, occ), v in zip(base.species_of(i), values))
    return base.with_charges(charges), None


__all__ = ["charged_crystal", "assign_oxidation_states", "OxidationAssignment", "Candidate", "SiteGroup", "equilibrate",
           "EquilibrationResult", "bond_valence_sums", "charges_for"]
