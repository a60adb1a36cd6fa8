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


def parse_supercell(text):
    """``"3x3x3"``, ``"3"`` or ``"2x2x1"`` into a diagonal repeat matrix; nine integers (the rows) into
    a matrix. The library checks the matrix (:func:`madelung.structure.supercells.supercell_matrix`)."""
    parts = [p for p in re.split(r"[x×,;\s]+", str(text).strip().lower()) if p]
    try:
        values = [int(p) for p in parts]
    except ValueError:
        raise InputError(f"supercell {text!r} must look like 3x3x3 (or nine integers, rows of the matrix)") from None
    if len(values) == 1:
        values = values * 3
    if len(values) == 3:
        return np.diag(values).astype(np.int64)
    if len(values) == 9:
        return np.array(values, dtype=np.int64).reshape(3, 3)
    raise InputError(f"supercell {text!r} must have 3 repeats (3x3x3) or 9 integers")


def parse_miller(text):
    """``"001"``, ``"1-10"`` or ``"1,1,0"`` into three integers (a lattice plane)."""
    text = str(text).strip()
    if "," in text or " " in text:
        parts = [p for p in re.split(r"[,\s]+", text) if p]
    else:
        parts = re.findall(r"-?\d", text)
        if "".join(parts) != text:
            parts = []
    try:
        miller = tuple(int(p) for p in parts)
    except ValueError:
        miller = ()
    if len(miller) != 3 or miller == (0, 0, 0):
        raise InputError(f"plane {text!r} must be three Miller indices such as 001, 110 or 1,-1,0")
    return miller


def parse_vector(text, what):
    """``"x,y,z"`` (commas or spaces) into three finite numbers."""
    try:
        values = [float(x) for x in re.split(r"[,\s]+", str(text).strip()) if x]
    except ValueError:
        raise InputError(f"{what} {text!r} must be three numbers, e.g. 0.5,0.5,0.5") from None
    if len(values) != 3 or not all(math.isfinite(v) for v in values):
        raise InputError(f"{what} {text!r} must be three numbers, e.g. 0.5,0.5,0.5")
    return np.array(values)


_SITE_AT = re.compile(r"^(?P<label>[^@]+?)(?:@(?P<at>[^@]+))?$")


def parse_site(text, what="site"):
    """A site of a (super)cell: ``#INDEX`` -> the index; ``LABEL@x,y,z`` -> ``(LABEL, fractional
    point)`` (the copy of LABEL nearest that point); ``LABEL`` -> the label (or element)."""
    text = str(text).strip()
    if text.startswith("#"):
        try:
            return int(text[1:])
        except ValueError:
            raise InputError(f"{what} {text!r}: #INDEX needs an integer") from None
    match = _SITE_AT.match(text)
    if not match or not match.group("label").strip():
        raise InputError(f"{what} {text!r} not understood; give a site label such as O1, O1@0.5,0.5,0.5 or #INDEX")
    label = match.group("label").strip()
    if match.group("at") is None:
        return label
    return label, parse_vector(match.group("at"), f"{what} {text!r}: position")


_SPECIES = re.compile(r"^([A-Z][a-z]?)\s*(?::\s*([+-]?\d+(?:\.\d+)?)|([+-]\d+(?:\.\d+)?))?$")


def parse_species(text, what):
    """``Al``, ``Al:+3`` or ``Al+3`` into ``(element, charge or None)``."""
    text = str(text).strip()
    match = _SPECIES.match(text)
    if not match:
        raise InputError(f"{what} {text!r} must be an element with an optional charge, e.g. Al:+3")
    value = match.group(2) or match.group(3)
    return match.group(1), (None if value is None else float(value))


def parse_substitutions(specs):
    """``--substitute SITE=EL[:Q]`` options into ``{site: (element, charge or None)}`` (sites as
    :func:`parse_site` gives them)."""
    result = {}
    for spec in specs or []:
        site, sep, species = str(spec).partition("=")
        if not sep:
            raise InputError(f"substitution {spec!r} must look like SITE=ELEMENT, e.g. Mg1=Al:+3")
        key = parse_site(site, f"substitution {spec!r}: site")
        key = (key[0], tuple(float(x) for x in key[1])) if isinstance(key, tuple) else key
        if key in result:
            raise InputError(f"substitution {spec!r}: site {site.strip()} is substituted twice")
        result[key] = parse_species(species, f"substitution {spec!r}")
    return result


def parse_interstitials(specs):
    """``--interstitial x,y,z=EL[:Q]`` options into ``[(fractional point, element, charge or None)]``."""
    result = []
    for spec in specs or []:
        where, sep, species = str(spec).partition("=")
        if not sep:
            raise InputError(f"interstitial {spec!r} must look like x,y,z=ELEMENT, e.g. 0.5,0.5,0.5=Li")
        result.append((parse_vector(where, f"interstitial {spec!r}: position"),
                       *parse_species(species, f"interstitial {spec!r}")))
    return result


def parse_center(text):
    """``--center``: ``#INDEX`` -> the index, ``x,y,z`` -> fractional coordinates, else a site label."""
    text = str(text).strip()
    if re.fullmatch(r"[^,\s]+(\s*[,\s]\s*[^,\s]+){2}", text) and re.match(r"^[-+.\d]", text):
        return parse_vector(text, "centre")
    if text.startswith("#"):
        return parse_site(text, "centre")
    return text
