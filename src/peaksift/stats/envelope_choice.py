"""The envelope's discrete choice of background function as results.json writes it, one
layout for a single search's envelope (:class:`~peaksift.stats.envelope.EnvelopeResult`)
and for each channel of a combination (``Combination.envelope``, ``CombinedLimits.envelope``).

* :func:`choice_entry` -- the entry: the candidate ``labels``, their free-parameter counts
  ``n_parameters``, the ``penalty`` per parameter, ``null_choice`` (index into ``labels`` of
  the function at mu = 0) and, for a scan, ``chosen`` (the index at each mass; None where a
  combination's mass is blinded).
* :func:`read_choice_entry` -- an entry back, also in the layout of earlier files
  (``functions``; the functions at mu = 0 and at each mass by label).
* :func:`read_channel_entries` -- a combination's per-channel entries back (old files also
  listed the channels without candidates, with no functions: they are left out).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["choice_entry", "read_channel_entries", "read_choice_entry"]


def choice_entry(labels: Sequence[str], n_parameters: Sequence[float], penalty: float,
                 null_choice: int, chosen: Sequence[Any] | None = None) -> dict[str, Any]:
    """The choice's JSON entry (module guide)."""
    out: dict[str, Any] = {"labels": [str(lab) for lab in labels],
                           "n_parameters": [int(n) for n in n_parameters],
                           "penalty": float(penalty), "null_choice": int(null_choice)}
    if chosen is not None:
        out["chosen"] = [None if c is None else int(c) for c in chosen]
    return out


def read_choice_entry(d: Mapping[str, Any]) -> dict[str, Any]:
    """The entry :func:`choice_entry` wrote, or one in the earlier layout, as
    :func:`choice_entry` writes it."""
    labels = list(d["labels"] if "labels" in d else d["functions"])

    def index(c: Any) -> int | None:
        return None if c is None else labels.index(c) if isinstance(c, str) else int(c)

    chosen = d.get("chosen")
    return choice_entry(labels, d["n_parameters"], d["penalty"], index(d["null_choice"]),
                        None if chosen is None else [index(c) for c in chosen])


def read_channel_entries(d: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """A combination's ``envelope`` (channel name -> entry) back; None when no channel
    has candidates."""
    out = {name: read_choice_entry(e) for name, e in (d or {}).items()
           if e.get("labels") or e.get("functions")}
    return out or None
