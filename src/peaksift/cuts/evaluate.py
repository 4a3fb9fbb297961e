"""Evaluating parsed nodes on columnar data."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from ..errors import CutError
from .vocabulary import _ARITH_FUNC, _CMP_FUNC, FUNCTIONS, IDENTIFY_FUNCTION, _Node

if TYPE_CHECKING:  # a Cut holds a _Context; importing it at run time would be circular
    from .expression import Cut


# ------------------------------------------------------------------ evaluation
class _Context:
    __slots__ = ("available", "cache", "cut", "get", "identify", "length", "where")

    def __init__(self, cut: Cut, get: Callable[[str], Any], cache: dict[str, np.ndarray],
                 length: int, where: str, available: list[str],
                 identify: Callable[[str], Any] | None = None) -> None:
        self.cut, self.get, self.cache = cut, get, cache
        self.length, self.where, self.available = length, where, available
        self.identify = identify

    def ident(self, node: _Node) -> np.ndarray:
        key = f"{IDENTIFY_FUNCTION}({node[2]})"  # not a valid field name: no clash
        if key in self.cache:
            return self.cache[key]
        if self.identify is None:
            self.cut._fail(node[1], f"{IDENTIFY_FUNCTION}() needs a dE/dx response for "
                           f"{self.where}: configure the [identification] table (or pass "
                           "identification= to peaksift.pair)")
        arr = np.asarray(self.identify(node[2]), dtype=np.float64)
        if arr.shape != (self.length,):
            self.cut._fail(node[1], f"{IDENTIFY_FUNCTION}({node[2]}) gave {arr.shape} values "
                           f"for {self.length} rows")
        self.cache[key] = arr
        return arr

    def name(self, node: _Node) -> np.ndarray:
        n = node[2]
        if n in self.cache:
            return self.cache[n]
        try:
            raw = self.get(n)
        except KeyError:
            self.cut._unknown(node, self.available, self.where)
            raise AssertionError("unreachable") from None  # pragma: no cover
        except CutError:
            raise
        try:
            arr = np.asarray(raw)
        except (ValueError, TypeError):  # an awkward array that is not flat, etc.
            arr = None
        if arr is None or arr.ndim != 1 or arr.dtype.kind not in "biuf":
            self.cut._fail(node[1], f"{n!r} in {self.where} is not a plain number or flag per "
                           "row; cuts can use numeric and true/false fields only")
        if arr.shape[0] != self.length:
            self.cut._fail(node[1], f"{n!r} has {arr.shape[0]} values but {self.where} has "
                           f"{self.length} rows")
        self.cache[n] = arr
        return arr

    def num(self, node: _Node) -> Any:
        v = self.eval(node)
        a = np.asarray(v)
        return a if a.dtype == np.float64 else a.astype(np.float64)

    def cond(self, node: _Node) -> Any:
        v = self.eval(node)
        a = np.asarray(v)
        if a.dtype != np.bool_:
            self.fail_not_bool(node, a)
        return a

    def fail_not_bool(self, node: _Node, arr: np.ndarray) -> None:
        if node[0] == "name":
            self.cut._fail(node[1], f"{node[2]!r} holds numbers ({arr.dtype}), not true/false; "
                           f"compare it, e.g. '{node[2]} > 0'")
        self.cut._fail(node[1], "this part gives numbers, not a true/false condition; "
                       "add a comparison")

    def eval(self, node: _Node) -> Any:
        k = node[0]
        if k == "const":
            return node[2]
        if k == "name":
            return self.name(node)
        if k == "ident":
            return self.ident(node)
        if k == "arith":
            return _ARITH_FUNC[node[2]](self.num(node[3]), self.num(node[4]))
        if k == "neg":
            return np.negative(self.num(node[2]))
        if k == "pos":
            return self.num(node[2])
        if k == "not":
            return np.logical_not(self.cond(node[2]))
        if k in ("and", "or"):
            f = np.logical_and if k == "and" else np.logical_or
            out = self.cond(node[2][0])
            for v in node[2][1:]:
                out = f(out, self.cond(v))
            return out
        if k == "cmp":
            ops, operands = node[2], node[3]
            left = self.eval(operands[0])
            out = None
            for op, right_node in zip(ops, operands[1:]):
                right = self.eval(right_node)
                r = _CMP_FUNC[op](left, right)
                out = r if out is None else np.logical_and(out, r)
                left = right
            return out
        if k == "call":
            func = FUNCTIONS[node[2]][0]
            args = [self.num(a) for a in node[3]]
            if node[2] in ("min", "max"):
                out = args[0]
                for a in args[1:]:
                    out = func(out, a)
                return out
            return func(*args)
        raise AssertionError(f"unknown node {k}")  # pragma: no cover
