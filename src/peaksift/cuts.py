"""Safe selection cuts: text expressions, Python callables and boolean masks.

Analysts write cuts as short text in configuration files (``"pt > 25 and abs(eta) < 2.4"``)
or as Python in scripts.  This module turns either into a boolean mask.

Which piece to use
------------------
* :func:`compile_cut` -- parse a text expression once into a :class:`Cut`; apply it to many
  chunks.  A :class:`Cut` pickles as its text, so it travels to worker processes.
* :meth:`Cut.object_mask` / :func:`object_mask` -- per-object mask over one collection
  (the names are that collection's fields: ``pt``, ``eta``, ``isolation``, ...).
* :meth:`Cut.event_mask` / :func:`event_mask` -- per-event mask (the names are per-event
  scalars such as ``weight``, object counts ``n_<collection>``, and ``<record>_<field>`` for
  a per-event record such as ``met_pt``).
* :meth:`Cut.evaluate` -- the same on a plain mapping of names to flat numpy arrays.

Anything a user may pass as a cut -- text, a :class:`Cut`, a callable returning a mask, or
a boolean (awkward or numpy) mask -- is accepted by :func:`object_mask` and
:func:`event_mask` (and so by :func:`peaksift.pair`).

The expression language
-----------------------
The text is parsed with Python's own parser (:mod:`ast`) and the syntax tree is checked
against a whitelist; it is never compiled to code, evaluated or executed.  Allowed:

* numbers (``25``, ``2.4``, ``1e-3``), ``True`` and ``False``, the constant ``pi``;
* field names (letters, digits, underscores; not starting with ``__``);
* arithmetic ``+ - * / **`` and unary ``-``/``+``, parentheses;
* comparisons ``< <= > >= == !=``, chained as in ``20 < pt < 60``;
* ``and``, ``or``, ``not`` (operands must be conditions, not numbers);
* the functions listed in :data:`FUNCTIONS` (``abs``, ``sqrt``, ``exp``, ``log``,
  ``min``, ``max``, ...), called with positional arguments;
* in object cuts, ``dedx_deviation(<hypothesis>)``: the track's standardised deviation
  (measured - expected) / sigma of its dE/dx from the Bethe expectation for a mass hypothesis
  (``electron``, ``pion``, ``kaon``, ``proton``, ``deuteron``; see
  :mod:`peaksift.energy_loss`), e.g. ``abs(dedx_deviation(kaon)) < 3 and pt > 0.2``.  It
  needs a dE/dx response (:class:`peaksift.energy_loss.DedxResponse`, the ``[identification]``
  config table); the hypothesis is a bare word, never a field.

Everything else -- attribute access, subscripts, unknown functions, keyword arguments,
lambdas, comprehensions, strings, ``if``/``else`` expressions, bitwise ``& | ~`` -- is
refused with a :class:`~peaksift.errors.CutError` that quotes the expression and names the
offending character ("at character 12").  Arithmetic is done in float64; a division by zero
or a logarithm of a negative number gives inf/NaN, and any comparison with NaN is false.
"""

from __future__ import annotations

import ast
import math
import warnings
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np

from .energy_loss import HYPOTHESES
from .errors import CutError, closest

__all__ = [
    "FUNCTIONS",
    "IDENTIFY_FUNCTION",
    "Cut",
    "CutLike",
    "compile_cut",
    "event_mask",
    "event_names",
    "flat_object_mask",
    "object_mask",
]

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


class Cut:
    """A parsed, validated cut expression; apply it to many chunks.

    Create with :func:`compile_cut`.  Field names are resolved when the cut is applied, so
    the same :class:`Cut` serves any collection that has the fields it uses.

    Attributes
    ----------
    expression : str
        The text as written.
    names : tuple of str
        Field (or event-variable) names the expression uses, in order of first appearance;
        a reader can load only these columns.
    hypotheses : tuple of str
        Mass hypotheses of ``dedx_deviation(...)`` calls, in order of first appearance
        (empty when the cut needs no dE/dx identification).
    """

    __slots__ = ("_clean", "_tree", "expression", "hypotheses", "names")

    def __init__(self, expression: str) -> None:  # use compile_cut
        self.expression, self._clean, self._tree, self.names = _parse(expression)
        hyp: list[str] = []
        for node in _walk(self._tree):
            if node[0] == "ident" and node[2] not in hyp:
                hyp.append(node[2])
        self.hypotheses = tuple(hyp)

    def __reduce__(self) -> tuple[Any, tuple[str]]:
        return (compile_cut, (self.expression,))

    def __repr__(self) -> str:
        return f"Cut({self.expression!r})"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Cut) and other.expression == self.expression

    def __hash__(self) -> int:
        return hash(("Cut", self.expression))

    # ------------------------------------------------------------------ checks
    def check(self, available: Iterable[str], *, where: str = "the data") -> None:
        """Raise :class:`CutError` if a name the expression uses is not in ``available``."""
        avail = list(available)
        for node in _walk(self._tree):
            if node[0] == "name" and node[2] not in avail:
                self._unknown(node, avail, where)

    def _unknown(self, node: _Node, avail: list[str], where: str) -> None:
        name = node[2]
        guess = closest(name, avail)
        hint = f"; did you mean {guess!r}?" if guess else ""
        listed = ", ".join(sorted(avail)) if avail else "(none)"
        self._fail(node[1], f"unknown name {name!r}; {where} has: {listed}{hint}")

    def _fail(self, pos: int, what: str) -> None:
        raise _cut_error(self.expression, pos, what)

    # -------------------------------------------------------------- evaluation
    def evaluate(
        self,
        columns: Mapping[str, Any] | Callable[[str], Any],
        length: int,
        *,
        where: str = "the data",
        available: Iterable[str] | None = None,
        identify: Callable[[str], Any] | None = None,
    ) -> np.ndarray:
        """Evaluate on flat columns and return a boolean numpy array of ``length``.

        Parameters
        ----------
        columns : mapping or callable
            Name -> 1-d array of ``length`` values (or a function of the name returning it;
            it should raise ``KeyError`` for unknown names).
        length : int
            Number of rows (objects or events).
        where : str
            What the names belong to, for messages (e.g. ``"collection 'muon'"``).
        available : iterable of str, optional
            Names present, listed in the message for an unknown name.  Default: the keys of
            ``columns`` when it is a mapping.
        identify : callable, optional
            ``identify(hypothesis)`` gives the rows' standardised dE/dx deviations for
            ``dedx_deviation(hypothesis)`` (e.g. from
            :meth:`peaksift.energy_loss.DedxResponse.deviation_of`).
        """
        if available is None:
            available = list(columns) if isinstance(columns, Mapping) else []
        get = columns.__getitem__ if isinstance(columns, Mapping) else columns
        cache: dict[str, np.ndarray] = {}
        ctx = _Context(self, get, cache, int(length), where, list(available), identify)
        try:
            with np.errstate(all="ignore"):
                out = ctx.eval(self._tree)
        except CutError:
            raise
        except RecursionError:
            raise _cut_error(self.expression, 0, "the expression is nested too deeply") from None
        except (TypeError, ValueError, ArithmeticError, MemoryError) as exc:
            raise _cut_error(self.expression, 0, f"cannot be evaluated ({exc})") from None
        arr = np.asarray(out)
        if arr.dtype != np.bool_:
            ctx.fail_not_bool(self._tree, arr)
        if arr.ndim == 0:
            return np.full(int(length), bool(arr))
        return arr

    def object_mask(self, collection: Any, *, name: str = "objects") -> Any:
        """Jagged boolean mask over the objects of an awkward collection."""
        return object_mask(collection, self, name=name)

    def event_mask(self, events: Any) -> np.ndarray:
        """Boolean numpy mask over events (names: per-event scalars and ``n_<collection>``)."""
        return event_mask(events, self)


CutLike = str | Cut | Callable[[Any], Any] | Any


def compile_cut(expression: str | Cut) -> Cut:
    """Parse and validate a cut expression; see the module guide for the syntax.

    Raises
    ------
    CutError
        For anything outside the whitelist, quoting the expression and the character.
    """
    if isinstance(expression, Cut):
        return expression
    if not isinstance(expression, str):
        raise CutError(
            f"a cut expression must be text, got {type(expression).__name__}; "
            "pass a string such as 'pt > 25', a callable or a boolean mask"
        )
    return Cut(expression)


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


# ----------------------------------------------------------- applying to data
def _is_text(cut: Any) -> bool:
    return isinstance(cut, (str, Cut))


def _collection_counts_and_getter(collection: Any, name: str) -> tuple[np.ndarray, Callable, list]:
    import awkward as ak

    if not isinstance(collection, ak.Array) or collection.ndim != 2 or not collection.fields:
        raise CutError(
            f"{name}: an object cut needs a jagged collection of records (one list of objects "
            "per event)"
        )
    counts = np.asarray(ak.num(collection, axis=1))
    fields = list(collection.fields)

    def get(n: str) -> Any:
        if n not in fields:
            raise KeyError(n)
        return ak.to_numpy(ak.flatten(collection[n], axis=1))

    return counts, get, fields


def _flat_from_mask(mask: Any, counts: np.ndarray, name: str) -> np.ndarray:
    """Validate a user mask (jagged awkward or flat numpy) against ``counts``; return flat bool."""
    import awkward as ak

    if isinstance(mask, ak.Array):
        if mask.ndim != 2:
            raise CutError(f"{name}: an object mask must be jagged (one list per event), "
                           f"got {mask.ndim} dimension(s)")
        if len(mask) != counts.size or not np.array_equal(np.asarray(ak.num(mask, axis=1)), counts):
            raise CutError(f"{name}: the object mask's shape does not match the collection "
                           "(different events or object counts); build it from the same array")
        flat = ak.flatten(ak.fill_none(mask, False), axis=1)
        arr = ak.to_numpy(flat)
    else:
        arr = np.asarray(mask)
        if arr.ndim != 1 or arr.size != int(counts.sum()):
            raise CutError(f"{name}: an object mask must be a jagged awkward array, or a flat "
                           f"array with one entry per object ({int(counts.sum())}), got shape "
                           f"{arr.shape}")
    if arr.dtype != np.bool_:
        raise CutError(f"{name}: the object mask holds {arr.dtype} values, not true/false")
    return arr


def flat_object_mask(
    cut: CutLike, collection: Any, counts: np.ndarray, get: Callable[[str], Any],
    fields: list[str], name: str, identification: Any = None,
) -> np.ndarray:
    """Flat boolean mask over all objects of ``collection``, one entry per object.

    The flat form of :func:`object_mask` for callers that already hold the collection's
    flat columns (the pairing works on them and never builds the jagged mask).

    Parameters
    ----------
    cut : str, Cut, callable or mask
        As for :func:`object_mask`.
    collection : awkward.Array
        The jagged collection (passed to a callable cut).
    counts : numpy.ndarray
        Objects per event.
    get : callable
        ``get(field)`` returns the flat column of ``field``; raises ``KeyError`` for others.
    fields : list of str
        The fields a text cut may use.
    name : str
        The collection's name, for messages.
    identification : peaksift.energy_loss.DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in a text cut.

    Returns
    -------
    numpy.ndarray of bool, length ``counts.sum()``.
    """
    if _is_text(cut):
        c = compile_cut(cut)
        where = f"collection {name!r}"
        identify = None
        if identification is not None and c.hypotheses:
            def identify(h: str) -> Any:
                return identification.deviation_of(h, get, where)
        return c.evaluate(get, int(counts.sum()), where=where, available=fields,
                          identify=identify)
    if callable(cut):
        out = cut(collection)
        return _flat_from_mask(out, counts, f"cut on {name!r} (from {_callable_name(cut)})")
    return _flat_from_mask(cut, counts, f"cut on {name!r}")


def _callable_name(f: Any) -> str:
    return getattr(f, "__qualname__", None) or type(f).__name__


def object_mask(collection: Any, cut: CutLike, *, name: str = "objects",
                identification: Any = None) -> Any:
    """Jagged boolean mask over the objects of ``collection`` for any kind of cut.

    Parameters
    ----------
    collection : awkward.Array
        A jagged array of records (e.g. ``events.muon``).
    cut : str, Cut, callable or mask
        Text or :class:`Cut` (names are the collection's fields), a callable taking the
        collection and returning a jagged boolean mask, or such a mask.
    name : str
        The collection's name, for messages.
    identification : peaksift.energy_loss.DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in a text cut.
    """
    import awkward as ak

    counts, get, fields = _collection_counts_and_getter(collection, name)
    flat = flat_object_mask(cut, collection, counts, get, fields, name, identification)
    return ak.unflatten(flat, counts)


def event_names(events: Any) -> dict[str, Callable[[], Any]]:
    """The names an event-level cut may use, each with a function giving its flat column.

    Per-event scalar fields keep their name (``weight``); every collection ``c`` gives
    ``n_c`` (its number of objects per event, before any object cut); a per-event record
    ``r`` with scalar fields ``f`` gives ``r_f`` (e.g. ``met_pt``).  A real field wins over
    a derived name.
    """
    import awkward as ak

    out: dict[str, Callable[[], Any]] = {}
    derived: dict[str, Callable[[], Any]] = {}
    for f in events.fields:
        arr = events[f]
        if arr.ndim == 1 and not arr.fields:
            out[f] = (lambda a=arr: a)
        elif arr.ndim == 2:
            derived[f"n_{f}"] = (lambda a=arr: ak.num(a, axis=1))
        elif arr.ndim == 1 and arr.fields:
            for sub in arr.fields:
                if arr[sub].ndim == 1 and not arr[sub].fields:
                    derived[f"{f}_{sub}"] = (lambda a=arr, s=sub: a[s])
    for k, v in derived.items():
        out.setdefault(k, v)
    return out


def event_mask(events: Any, cut: CutLike) -> np.ndarray:
    """Boolean numpy mask over events for any kind of cut.

    Parameters
    ----------
    events : awkward.Array
        The events (one record per event).
    cut : str, Cut, callable or mask
        Text or :class:`Cut` over the names of :func:`event_names`, a callable taking the
        events and returning one boolean per event, or such a mask.
    """
    import awkward as ak

    n = len(events)
    if _is_text(cut):
        c = compile_cut(cut)
        names = event_names(events)

        def get(name: str) -> Any:
            if name not in names:
                raise KeyError(name)
            return ak.to_numpy(names[name]())

        return c.evaluate(get, n, where="each event", available=list(names))
    label = "event cut"
    if callable(cut):
        label = f"event cut (from {_callable_name(cut)})"
        cut = cut(events)
    if isinstance(cut, ak.Array):
        if cut.ndim != 1:
            raise CutError(f"{label}: must give one true/false value per event, got a "
                           f"{cut.ndim}-dimensional array; reduce it, e.g. with ak.any(..., axis=1)")
        cut = ak.to_numpy(ak.fill_none(cut, False))
    arr = np.asarray(cut)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise CutError(f"{label}: must give one true/false value per event ({n}), got shape "
                       f"{arr.shape}")
    if arr.dtype != np.bool_:
        raise CutError(f"{label}: holds {arr.dtype} values, not true/false")
    return arr
