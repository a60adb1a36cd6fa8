"""The crystal a command works on, from its options: file, charges, cell, polyatomic ions."""

from __future__ import annotations

import argparse

from ..errors import InputError
from .options import _crystal_options, _structure_defaults
from .text import parse_charge_rules


def load_crystal(args):
    """The crystal named on the command line, with its charges, in the cell asked for."""
    from ..structure.symmetry import standard_cell

    _structure_defaults(args)
    return standard_cell(_load_charged(args), args.cell, symmetry_tolerance=args.symmetry_tolerance)


def _load_charged(args):
    return _charged(args)[0]


def _charged(args, ignore_file_states=False):
    """The crystal of the file on the command line and, for --charges-from auto, its assignment."""
    from ..io.read import load

    _structure_defaults(args)
    loaded = load(args.file, getattr(args, "charges_from", "file"), rules=parse_charge_rules(args.charge),
                  ignore_file_states=ignore_file_states, **_crystal_options(args))
    return loaded.crystal, loaded.assignment


def _dielectric_from(args):
    from ..analysis.defects import dielectric_tensor, read_dielectric_tensor

    if getattr(args, "dielectric_tensor", None):
        if args.dielectric is not None:
            raise InputError("give either --dielectric or --dielectric-tensor, not both")
        return read_dielectric_tensor(args.dielectric_tensor)
    if args.dielectric is not None:
        return dielectric_tensor(args.dielectric)
    return None


def _crystal_from(path, args):
    return load_crystal(argparse.Namespace(file=path, charge=args.charge, min_distance=args.min_distance))


def _polyatomic_ions(args, crystal):
    """The polyatomic ions of the crystal, or None when there are none or the user asked for atoms."""
    from ..charges.polyatomic import find_polyatomic_ions

    if getattr(args, "polyatomic_ions", "atoms") == "atoms":
        return None
    found = find_polyatomic_ions(crystal)
    return found if found.found else None


def _ions_as_units(args, crystal):
    """(crystal with one charge per polyatomic ion, ions found) or (crystal, None) without ions."""
    from ..charges.polyatomic import centred_crystal

    found = _polyatomic_ions(args, crystal)
    return (crystal, None) if found is None else (centred_crystal(crystal, found), found)


def _ion_charges_of(args, crystal):
    """Per site, the charge of each of its species, as the loader decided them (the file's states and
    the rules, or the assignment); None after charge equilibration (partial charges: each ion's charge
    only where a site holds one species)."""
    if args.charges_from == "equilibrate":
        return None
    return [crystal.states_of(i) for i in range(len(crystal))]
