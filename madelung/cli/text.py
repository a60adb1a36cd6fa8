"""The command line's text grammars (cells, series, KEY=VALUE lists), parsed here only.

Every ``KEY=VALUE`` option of every command goes through :func:`parse_key_values`.
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..errors import InputError


def _series(text):
    try:
        return [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--series {text!r} must be integers such as 1,2,3") from None


def parse_cell(text):
    """A cell from a command-line spec (see ``madelung correction --help``)."""
    from ase.geometry import cellpar_to_cell

    text = str(text).strip().lower()
    kind = None
    if ":" in text:
        kind, _, text = text.partition(":")
    try:
        values = [float(x) for x in re.split(r"[,\s]+", text) if x]
    except ValueError:
        raise InputError(f"cell {text!r} must be numbers (Å, degrees)") from None
    if not values or not all(math.isfinite(v) for v in values):
        raise InputError(f"cell {text!r} must be finite numbers")
    if kind is not None:
        if kind not in ("sc", "bcc", "fcc") or len(values) != 1:
            raise InputError(f"cell {kind}:{text} must be sc:L, bcc:L or fcc:L")
        length = values[0]
        shape = {"sc": np.eye(3), "bcc": 0.5 * (np.ones((3, 3)) - 2 * np.eye(3)),
                 "fcc": 0.5 * (np.ones((3, 3)) - np.eye(3))}[kind]
        return length * shape
    if len(values) == 1:
        return values[0] * np.eye(3)
    if len(values) == 3:
        return np.diag(values)
    if len(values) == 6:
        return np.array(cellpar_to_cell(values))
    if len(values) == 9:
        return np.array(values).reshape(3, 3)
    raise InputError(f"cell spec has {len(values)} numbers; give 1, 3, 6 or 9")


def parse_key_values(rules, what="option", shape="KEY=VALUE", number=True) -> dict:
    """Parse command-line ``KEY=VALUE`` options into a map (values as floats unless ``number`` is
    False); a malformed one is an InputError naming it and the ``shape`` wanted."""
    result = {}
    for rule in rules or []:
        key, sep, value = str(rule).partition("=")
        key = key.strip()
        if not sep or not key:
            raise InputError(f"{what} {rule!r} must look like {shape}")
        if not number:
            result[key] = value.strip()
            continue
        try:
            result[key] = float(value)
        except ValueError:
            raise InputError(f"{what} {rule!r}: {value!r} is not a number") from None
    return result


def parse_charge_rules(rules) -> dict:
    """Parse command-line rules such as ``Na=+1`` or ``O1=-2`` into a map."""
    return parse_key_values(rules, "charge rule", "ELEMENT=CHARGE or LABEL=CHARGE, e.g. Na=+1")


def _parse_pairs(rules, what, number=True):
    """``KEY=VALUE`` options into a dict (values as floats unless ``number`` is False)."""
    return parse_key_values(rules, what, number=number)


def _list_values(rules, what):
    result = {}
    for key, text in _parse_pairs(rules, what, number=False).items():
        try:
            result[key] = [float(v) for v in text.split(",")]
        except ValueError:
            raise InputError(f"{what} {key}={text}: values must be numbers separated by commas") from None
    return result
