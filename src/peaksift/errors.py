"""Errors peaksift raises for a user's mistake.

Every failure caused by input, configuration, a cut expression or a fit derives
from :class:`PeaksiftError`.  The message always says *what* was wrong, *where*
(file, column, config key, character position) and *how to fix it*; the command
line prints that one message and exits with status 2.

Use the most specific subclass:

* :class:`InputError`     -- Parquet files, columns, schemas, kinematic fields.
* :class:`ConfigError`    -- the TOML configuration (unknown keys, types, ranges).
* :class:`CutError`       -- a cut expression that cannot be parsed or evaluated.
* :class:`FitError`       -- a fit that cannot be set up (empty window, bad bounds, ...).
* :class:`ExecutionError` -- a worker, engine or file failure during a run.
* :class:`OutputError`    -- the output folder: files peaksift did not write, a read-only
  or full file system, a rename the system refuses.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable

__all__ = [
    "ConfigError",
    "CutError",
    "DataWarning",
    "ExecutionError",
    "FitError",
    "InputError",
    "OutputError",
    "PeaksiftError",
    "closest",
]


class PeaksiftError(Exception):
    """Base class of every user-facing peaksift error."""


class InputError(PeaksiftError):
    """Bad input files or columns."""


class ConfigError(PeaksiftError):
    """Bad configuration: unknown key, wrong type or out-of-range value."""


class CutError(PeaksiftError):
    """A cut expression that is not allowed, cannot be parsed or names an unknown field."""


class FitError(PeaksiftError):
    """A fit that cannot be set up as requested."""


class ExecutionError(PeaksiftError):
    """A failure while running the work (a dead worker, an unreadable file mid-run)."""


class OutputError(PeaksiftError):
    """The output folder cannot take the run's files (see :mod:`peaksift._output`)."""


def closest(word: str, choices: Iterable[str]) -> str | None:
    """Return the closest match of ``word`` among ``choices`` (or None), for 'did you mean'."""
    matches = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1, cutoff=0.5)
    return matches[0] if matches else None


class DataWarning(UserWarning):
    """Input data were repaired (e.g. objects with NaN kinematics dropped); the message counts them."""
