"""What a cut expression may contain: the whitelisted functions, constants and operators, and the error with its position."""

from __future__ import annotations

import ast
import math
from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import CutError

#: Whitelisted functions: name -> (numpy implementation, minimum and maximum argument count).
FUNCTIONS: dict[str, tuple[Callable[..., Any], int, int]] = {
    "abs": (np.abs, 1, 1),
    "sqrt": (np.sqrt, 1, 1),
    "exp": (np.exp, 1, 1),
    "log": (np.log, 1, 1),
    "log10": (np.log10, 1, 1),
    "log2": (np.log2, 1, 1),
    "cos": (np.cos, 1, 1),
    "sin": (np.sin, 1, 1),
    "tan": (np.tan, 1, 1),
    "acos": (np.arccos, 1, 1),
    "asin": (np.arcsin, 1, 1),
    "atan": (np.arctan, 1, 1),
    "cosh": (np.cosh, 1, 1),
    "sinh": (np.sinh, 1, 1),
    "tanh": (np.tanh, 1, 1),
    "atan2": (np.arctan2, 2, 2),
    "hypot": (np.hypot, 2, 2),
    "min": (np.minimum, 2, 64),
    "max": (np.maximum, 2, 64),
}

#: the identification function: dedx_deviation(<hypothesis>) (see the module guide)
IDENTIFY_FUNCTION = "dedx_deviation"

_CONSTANTS = {"pi": math.pi}
_MAX_LENGTH = 5000
_MAX_DEPTH = 100

_ARITH = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**"}
_CMP = {ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==", ast.NotEq: "!="}
_CMP_FUNC = {
    "<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal,
    "==": np.equal, "!=": np.not_equal,
}
_ARITH_FUNC = {
    "+": np.add, "-": np.subtract, "*": np.multiply, "/": np.true_divide, "**": np.power,
}

# Friendly explanations for refused syntax, keyed by ast node class name.
_REFUSED = {
    "Attribute": "attribute access ('.') is not allowed; name the field directly, e.g. 'pt'",
    "Subscript": "subscripts ('[...]') are not allowed; name the field directly",
    "Lambda": "lambda functions are not allowed; pass a Python callable instead of text",
    "IfExp": "'if ... else' expressions are not allowed; combine conditions with and/or",
    "ListComp": "comprehensions are not allowed",
    "SetComp": "comprehensions are not allowed",
    "DictComp": "comprehensions are not allowed",
    "GeneratorExp": "comprehensions are not allowed",
    "List": "lists are not allowed",
    "Tuple": "tuples are not allowed (is there a stray comma?)",
    "Set": "sets are not allowed",
    "Dict": "dictionaries are not allowed",
    "JoinedStr": "strings are not allowed; compare numeric fields with numbers",
    "FormattedValue": "strings are not allowed",
    "NamedExpr": "assignments (':=') are not allowed",
    "Await": "'await' is not allowed",
    "Yield": "'yield' is not allowed",
    "YieldFrom": "'yield' is not allowed",
    "Starred": "starred arguments are not allowed",
    "Slice": "slices are not allowed",
}

# A parsed node is a plain tuple: (kind, position, ...); position is a 0-based character index.
_Node = tuple
# ---------------------------------------------------------------------- errors
def _cut_error(expression: str, pos: int, what: str) -> CutError:
    pos = max(0, min(int(pos), len(expression)))
    shown = expression if len(expression) <= 200 else expression[:200] + "..."
    ch = expression[pos] if pos < len(expression) else ""
    at = f"at character {pos + 1} ({ch!r})" if ch else f"at character {pos + 1} (the end)"
    exc = CutError(f"cut {shown!r}: {at}: {what}")
    exc.expression = expression  # type: ignore[attr-defined]
    exc.position = pos  # type: ignore[attr-defined]
    if len(expression) <= 200 and hasattr(exc, "add_note"):  # Python >= 3.11
        flat = expression.translate({ord(c): " " for c in "\n\r\t\f\v"})
        exc.add_note(f"    {flat}\n    {' ' * pos}^")
    return exc
