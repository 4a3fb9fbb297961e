"""Values for JSON: the one conversion every ``to_dict`` and results.json writer uses.

Base layer (no peaksift imports).  JSON has no NaN or infinity and no numpy types:
:func:`plain` turns numpy scalars and arrays into Python numbers and lists, non-finite floats
into ``None``, tuples and sets into lists, paths into strings, mappings into dicts, all the
way down; :func:`finite` does the same for one number.  :func:`dumps` writes such a value
as indented JSON with each list of plain values on one line (a scan's masses, a histogram's
counts: one line each, not one line a number).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["dumps", "finite", "plain"]


def finite(x: Any) -> float | None:
    """``x`` as a finite float, or None."""
    try:
        v = float(x)
    except (TypeError, ValueError, OverflowError):
        return None
    return v if math.isfinite(v) else None


def plain(o: Any) -> Any:
    """``o`` made of dicts, lists, str, int, finite float, bool and None only."""
    if o is None or isinstance(o, (str, bool)):
        return o
    if isinstance(o, np.bool_):
        return bool(o)
    if isinstance(o, (int, np.integer)):
        return int(o)
    if isinstance(o, (float, np.floating)):
        return finite(o)
    if isinstance(o, np.ndarray):
        return [plain(v) for v in o.tolist()]
    if isinstance(o, Mapping):
        return {str(k) if not isinstance(k, str) else k: plain(v) for k, v in o.items()}
    if isinstance(o, (list, tuple, set, frozenset)):
        return [plain(v) for v in o]
    if isinstance(o, os.PathLike):
        return os.fspath(o)
    if hasattr(o, "to_dict"):
        return plain(o.to_dict())
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def dumps(o: Any, indent: int = 2, _level: int = 0) -> str:
    """``json.dumps(o, indent=indent)`` (``o`` already :func:`plain`), except that a list
    holding no dict or list is written on one line; NaN and infinity are refused."""
    if isinstance(o, dict) and o:
        pad = " " * (indent * (_level + 1))
        items = (f"{pad}{json.dumps(k)}: {dumps(v, indent, _level + 1)}" for k, v in o.items())
        return "{\n" + ",\n".join(items) + "\n" + " " * (indent * _level) + "}"
    if isinstance(o, list) and any(isinstance(v, (dict, list)) for v in o):
        pad = " " * (indent * (_level + 1))
        items = (pad + dumps(v, indent, _level + 1) for v in o)
        return "[\n" + ",\n".join(items) + "\n" + " " * (indent * _level) + "]"
    return json.dumps(o, allow_nan=False)

