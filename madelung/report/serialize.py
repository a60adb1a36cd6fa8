"""The one JSON serializer: every ``--json`` of every command, and any result a Python user wants as JSON.

:func:`to_jsonable` turns a result into plain JSON values:

* an object with a ``to_dict()`` method (every result type of the package) becomes that dict, converted in turn;
* another dataclass becomes a dict of its fields;
* mappings become dicts with string keys; lists, tuples and sets become lists;
* numpy arrays become (nested) lists, numpy scalars Python numbers, paths strings;
* a float that is NaN or infinite follows the ``non_finite`` policy: ``"error"`` (default) raises
  :class:`NonFiniteResult`, a result of ours that is not a number is a bug, never printed as a number;
  ``"null"`` writes ``null`` (for tables, where NaN means "not defined for this structure").

:func:`write_json` writes the converted value to a stream (standard output by default) with a
newline; characters beyond ASCII (Å, –) are escaped, so any terminal or pipe takes the text.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import sys
from collections.abc import Mapping

import numpy as np

from ..errors import MadelungError

#: What :func:`to_jsonable` may do with NaN and infinities.
NON_FINITE_POLICIES = ("error", "null")


class NonFiniteResult(MadelungError):
    """A result came out NaN or infinite: our fault, reported as an internal error, never printed."""


def to_jsonable(obj, non_finite="error"):
    """``obj`` as plain JSON values (dict, list, str, int, float, bool, None); see the module docstring.

    Raises
    ------
    NonFiniteResult
        With ``non_finite="error"``, for a NaN or an infinity anywhere in ``obj``.
    TypeError
        For an object with no JSON form (a bug of the caller: results have ``to_dict``).
    """
    if non_finite not in NON_FINITE_POLICIES:
        raise ValueError(f"non_finite must be one of {NON_FINITE_POLICIES}, got {non_finite!r}")
    return _convert(obj, non_finite, "")


def _convert(obj, policy, where):
    if obj is None or isinstance(obj, (str, bool)):
        return obj
    if isinstance(obj, (int, np.integer)) and not isinstance(obj, np.bool_):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        if math.isfinite(value):
            return value
        if policy == "null":
            return None
        raise NonFiniteResult(f"a result{where and ' (' + where.lstrip('.') + ')'} is not a finite number "
                              "(NaN or infinity); nothing printed")
    if isinstance(obj, np.ndarray):
        return [_convert(x, policy, where) for x in obj.tolist()] if obj.ndim else _convert(obj.item(), policy, where)
    if hasattr(obj, "to_dict") and callable(obj.to_dict) and not isinstance(obj, type):
        return _convert(obj.to_dict(), policy, where)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _convert(getattr(obj, f.name), policy, f"{where}.{f.name}")
                for f in dataclasses.fields(obj)}
    if isinstance(obj, Mapping):
        return {str(k): _convert(v, policy, f"{where}.{k}") for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [_convert(x, policy, where) for x in obj]
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    raise TypeError(f"cannot write {type(obj).__name__} as JSON{where and ' (' + where.lstrip('.') + ')'}")


def json_text(obj, non_finite="error", indent=2) -> str:
    """``obj`` converted by :func:`to_jsonable` as JSON text (no trailing newline)."""
    return json.dumps(to_jsonable(obj, non_finite), indent=indent, allow_nan=False)


def write_json(obj, stream=None, non_finite="error", indent=2):
    """Write ``obj`` (converted by :func:`to_jsonable`) as JSON and a newline to ``stream`` (default
    standard output). Nothing is written when the conversion fails."""
    text = json_text(obj, non_finite, indent)
    (sys.stdout if stream is None else stream).write(text + "\n")
