"""A parsed, validated cut expression (:class:`Cut`), applied to many chunks."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np

from ..errors import CutError, closest
from .evaluate import _Context
from .parse import _parse, _walk
from .vocabulary import _cut_error, _Node


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
        from .apply import object_mask  # apply.py works on Cut objects: imported at call time

        return object_mask(collection, self, name=name)

    def event_mask(self, events: Any) -> np.ndarray:
        """Boolean numpy mask over events (names: per-event scalars and ``n_<collection>``)."""
        from .apply import event_mask

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
