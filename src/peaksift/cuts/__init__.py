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
* :func:`clauses` -- the requirements of a text cut joined by a top-level ``and``, each as
  its own :class:`Cut`; :func:`requirement_counts` counts the objects (or events) passing
  them one after the other, for a per-requirement cut flow.

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

from .apply import (
    clauses,
    event_mask,
    event_names,
    flat_object_mask,
    object_mask,
    requirement_counts,
)
from .expression import Cut, CutLike, compile_cut
from .vocabulary import FUNCTIONS, IDENTIFY_FUNCTION

__all__ = [
    "FUNCTIONS",
    "IDENTIFY_FUNCTION",
    "Cut",
    "CutLike",
    "clauses",
    "compile_cut",
    "event_mask",
    "event_names",
    "flat_object_mask",
    "object_mask",
    "requirement_counts",
]
