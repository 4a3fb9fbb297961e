"""Parsing a cut expression against the whitelist into plain-tuple nodes (nothing is executed)."""

from __future__ import annotations

import ast
import warnings
from collections.abc import Callable, Iterable

import numpy as np

from ..energy_loss import HYPOTHESES
from ..errors import CutError, closest
from .vocabulary import (
    _ARITH,
    _CMP,
    _CONSTANTS,
    _MAX_DEPTH,
    _MAX_LENGTH,
    _REFUSED,
    FUNCTIONS,
    IDENTIFY_FUNCTION,
    _cut_error,
    _Node,
)


# --------------------------------------------------------------------- parsing
def _parse(expression: str) -> tuple[str, str, _Node, tuple[str, ...]]:
    if not isinstance(expression, str):
        raise CutError(f"a cut expression must be text, got {type(expression).__name__}")
    if len(expression) > _MAX_LENGTH:
        raise CutError(
            f"cut {expression[:60]!r}... is {len(expression)} characters long; the limit is "
            f"{_MAX_LENGTH}; split the selection or shorten it"
        )
    # Line breaks and tabs become spaces (one character each, so positions are unchanged):
    # a cut written over several lines of a config file is one expression.
    clean = expression.translate({ord(c): " " for c in "\n\r\t\f\v"})
    body = clean.lstrip(" ")
    shift = len(clean) - len(body)
    if not body.strip():
        raise _cut_error(expression, 0, "the expression is empty; write e.g. 'pt > 25'")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tree = ast.parse(body, mode="eval")
    except SyntaxError as exc:
        off = (exc.offset or 1) - 1 if exc.offset else len(body)
        if exc.lineno not in (None, 1):
            off = len(body)
        msg = exc.msg or "invalid syntax"
        if "null bytes" in msg:
            pos = body.find("\x00")
            raise _cut_error(expression, shift + max(pos, 0), "the text contains a NUL byte") from None
        if "Exceeds the limit" in msg:
            msg = "a number has too many digits"
        raise _cut_error(
            expression, shift + off,
            f"not a valid expression ({msg}); write e.g. 'pt > 25 and abs(eta) < 2.4'",
        ) from None
    except (ValueError, MemoryError, RecursionError, OverflowError) as exc:
        raise _cut_error(expression, shift, f"cannot be parsed ({exc})") from None
    line = body
    names: list[str] = []

    def pos(node: ast.AST) -> int:
        # col_offset counts UTF-8 bytes; convert to characters
        b = getattr(node, "col_offset", 0) or 0
        return shift + len(line.encode("utf-8")[:b].decode("utf-8", errors="ignore"))

    def fail(node: ast.AST, what: str) -> None:
        raise _cut_error(expression, pos(node), what)

    def conv(node: ast.AST, depth: int) -> _Node:
        if depth > _MAX_DEPTH:
            fail(node, f"the expression is nested more than {_MAX_DEPTH} levels deep")
        d = depth + 1
        if isinstance(node, ast.Constant):
            v = node.value
            if isinstance(v, bool):
                return ("const", pos(node), np.bool_(v))
            if isinstance(v, (int, float)):
                try:
                    return ("const", pos(node), np.float64(float(v)))
                except OverflowError:
                    fail(node, "the number is too large")
            if isinstance(v, (str, bytes)):
                fail(node, "strings are not allowed; compare numeric fields with numbers")
            if isinstance(v, complex):
                fail(node, "complex numbers are not allowed")
            fail(node, f"the constant {v!r} is not allowed; use numbers, True or False")
        if isinstance(node, ast.Name):
            n = node.id
            if n.startswith("__"):
                fail(node, f"names starting with '__' are not allowed ({n!r})")
            if n in FUNCTIONS:
                fail(node, f"{n!r} is a function; call it, e.g. '{n}(x)'")
            if n in ("None",):
                fail(node, "None is not allowed")
            if n in _CONSTANTS:
                return ("const", pos(node), np.float64(_CONSTANTS[n]))
            if n not in names:
                names.append(n)
            return ("name", pos(node), n)
        if isinstance(node, ast.UnaryOp):
            if isinstance(node.op, ast.Not):
                return ("not", pos(node), _need_bool(conv(node.operand, d), "not"))
            if isinstance(node.op, ast.USub):
                return ("neg", pos(node), conv(node.operand, d))
            if isinstance(node.op, ast.UAdd):
                return ("pos", pos(node), conv(node.operand, d))
            fail(node, "'~' is not allowed; use 'not'")
        if isinstance(node, ast.BinOp):
            op = _ARITH.get(type(node.op))
            left = conv(node.left, d)
            right = conv(node.right, d)
            if op is None:
                sym = {ast.BitAnd: ("&", "and"), ast.BitOr: ("|", "or"), ast.BitXor: ("^", None),
                       ast.Mod: ("%", None), ast.FloorDiv: ("//", None), ast.MatMult: ("@", None),
                       ast.LShift: ("<<", None), ast.RShift: (">>", None)}.get(type(node.op))
                s, alt = sym if sym else ("?", None)
                hint = f"; use '{alt}'" if alt else "; allowed are + - * / **"
                opos = _find_op(line, node, s)
                raise _cut_error(expression, shift + opos if opos is not None else pos(node),
                                 f"the operator '{s}' is not allowed{hint}")
            return ("arith", pos(node), op, left, right)
        if isinstance(node, ast.BoolOp):
            kind = "and" if isinstance(node.op, ast.And) else "or"
            vals = tuple(_need_bool(conv(v, d), kind) for v in node.values)
            return (kind, pos(node), vals)
        if isinstance(node, ast.Compare):
            ops = []
            for o in node.ops:
                s = _CMP.get(type(o))
                if s is None:
                    word = {ast.In: "in", ast.NotIn: "not in", ast.Is: "is",
                            ast.IsNot: "is not"}.get(type(o), "?")
                    fail(node, f"'{word}' comparisons are not allowed; use < <= > >= == !=")
                ops.append(s)
            operands = (conv(node.left, d), *(conv(c, d) for c in node.comparators))
            return ("cmp", pos(node), tuple(ops), operands)
        if isinstance(node, ast.Call):
            if not isinstance(node.func, ast.Name):
                fail(node.func, "only the whitelisted functions may be called, by plain name "
                     f"({', '.join(FUNCTIONS)})")
            fname = node.func.id
            if fname == IDENTIFY_FUNCTION:
                return _identify_node(node, pos, fail)
            if fname not in FUNCTIONS:
                known = (*FUNCTIONS, IDENTIFY_FUNCTION)
                guess = closest(fname, known)
                hint = f"; did you mean {guess!r}?" if guess else ""
                fail(node.func, f"unknown function {fname!r}; allowed: {', '.join(known)}{hint}")
            if node.keywords:
                fail(node.keywords[0].value, f"keyword arguments are not allowed in {fname}()")
            for a in node.args:
                if isinstance(a, ast.Starred):
                    fail(a, "starred arguments are not allowed")
            _, lo, hi = FUNCTIONS[fname]
            if not lo <= len(node.args) <= hi:
                want = str(lo) if lo == hi else f"at least {lo}"
                fail(node.func, f"{fname}() takes {want} argument(s), got {len(node.args)}")
            return ("call", pos(node), fname, tuple(conv(a, d) for a in node.args))
        what = _REFUSED.get(type(node).__name__, f"{type(node).__name__} is not allowed")
        if isinstance(node, (ast.Attribute, ast.Subscript)):
            # point at the '.' or '[' that follows the value
            raw = line.encode("utf-8")
            at = len(raw[: node.value.end_col_offset].decode("utf-8", errors="ignore"))
            mark = "." if isinstance(node, ast.Attribute) else "["
            i = line.find(mark, at)
            raise _cut_error(expression, shift + (i if i >= 0 else at), what)
        fail(node, what)
        raise AssertionError("unreachable")  # pragma: no cover

    try:
        top = conv(tree.body, 0)
    except RecursionError:
        raise _cut_error(expression, shift, "the expression is nested too deeply") from None
    except _BoolNeeded as exc:
        raise _cut_error(
            expression, exc.node[1],
            f"the operand of '{exc.op}' is a number, not a condition; "
            "compare it, e.g. 'pt > 25 and abs(eta) < 2.4'",
        ) from None
    if _static_kind(top) == "num":
        raise _cut_error(
            expression, top[1],
            "the expression gives a number, not a true/false condition; "
            "add a comparison such as 'pt > 25'",
        )
    return expression, clean, top, tuple(names)


def _identify_node(node: ast.Call, pos: Callable[[ast.AST], int],
                   fail: Callable[[ast.AST, str], None]) -> _Node:
    """``dedx_deviation(kaon)`` -> ("ident", position, "kaon"); the argument is a bare word."""
    usage = f"write e.g. '{IDENTIFY_FUNCTION}(kaon)' with one of {', '.join(HYPOTHESES)}"
    if node.keywords or len(node.args) != 1:
        fail(node.func, f"{IDENTIFY_FUNCTION}() takes one mass hypothesis; {usage}")
    arg = node.args[0]
    if not isinstance(arg, ast.Name):
        fail(arg, f"the argument of {IDENTIFY_FUNCTION}() is a hypothesis name; {usage}")
    if arg.id not in HYPOTHESES:
        guess = closest(arg.id, HYPOTHESES)
        hint = f"; did you mean {guess!r}?" if guess else ""
        fail(arg, f"{arg.id!r} is not a known mass hypothesis; use one of "
             f"{', '.join(HYPOTHESES)}{hint}")
    return ("ident", pos(node), arg.id)


def _find_op(line: str, node: ast.BinOp, sym: str) -> int | None:
    """Character index of the operator between the two operands of ``node`` (best effort)."""
    try:
        raw = line.encode("utf-8")
        start = len(raw[: node.left.end_col_offset].decode("utf-8", errors="ignore"))
        stop = len(raw[: node.right.col_offset].decode("utf-8", errors="ignore"))
        i = line.find(sym, start, stop)
        return i if i >= 0 else None
    except (TypeError, AttributeError):  # pragma: no cover - positions missing
        return None


def _static_kind(node: _Node) -> str:
    k = node[0]
    if k in ("cmp", "and", "or", "not"):
        return "bool"
    if k == "const":
        return "bool" if isinstance(node[2], np.bool_) else "num"
    if k in ("arith", "neg", "pos", "call", "ident"):
        return "num"
    return "any"  # a name: known when applied


def _need_bool(node: _Node, op: str) -> _Node:
    if _static_kind(node) == "num":
        raise _BoolNeeded(node, op)
    return node


class _BoolNeeded(Exception):
    def __init__(self, node: _Node, op: str) -> None:
        super().__init__(node, op)
        self.node, self.op = node, op


def _walk(node: _Node) -> Iterable[_Node]:
    yield node
    for part in node[2:]:
        if isinstance(part, tuple):
            if part and isinstance(part[0], str) and len(part) >= 2 and isinstance(part[1], int):
                yield from _walk(part)
            else:
                for p in part:
                    if isinstance(p, tuple):
                        yield from _walk(p)
