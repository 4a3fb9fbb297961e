"""What the ``peaksift`` command prints on stderr besides its results: the log lines of
``-v``, other libraries' warnings and logged warnings as one line of ours, and the one line
of a stopped run."""

from __future__ import annotations

import argparse
import sys
from typing import Any


def _setup_logging(args: argparse.Namespace) -> None:
    """``-v``: INFO lines of the ``peaksift`` logger on stderr; ``-vv``: DEBUG; ``-q``:
    warnings only."""
    import logging

    level = (logging.WARNING if getattr(args, "quiet", False) else
             {0: logging.WARNING, 1: logging.INFO}.get(getattr(args, "verbose", 0),
                                                       logging.DEBUG))
    log = logging.getLogger("peaksift")
    log.setLevel(level)
    if not any(getattr(h, "_peaksift_cli", False) for h in log.handlers):
        h = logging.StreamHandler(sys.stderr)
        h.setFormatter(logging.Formatter("peaksift: %(message)s"))
        h._peaksift_cli = True  # type: ignore[attr-defined]
        log.addHandler(h)
        log.propagate = False
    # other libraries' logged warnings (matplotlib's, say) as one line of ours, like their
    # warnings.warn ones, not Python's bare last-resort line
    root = logging.getLogger()
    if not root.handlers:
        other = logging.StreamHandler(sys.stderr)
        other.setLevel(logging.WARNING)
        other.setFormatter(_OneLine())
        root.addHandler(other)


class _OneLine:
    """Formats a log record as ``peaksift: warning: <message> (<logger>)`` on one line."""

    def format(self, record: Any) -> str:
        text = " ".join(record.getMessage().split())
        return f"peaksift: {record.levelname.lower()}: {text} ({record.name})"


def _one_line_warning(message: Any, category: type, *_: Any, **__: Any) -> str:
    """A warning as the command prints it: one line, no source line."""
    text = " ".join(str(message).split())
    name = "" if category.__module__.startswith("peaksift") else f" ({category.__name__})"
    return f"peaksift: warning: {text}{name}\n"



def _stopped(stop: BaseException, what: str, otherwise: str) -> str:
    """The stop's one line; a stop held over the outputs' moves came after them (_output)."""
    where = getattr(stop, "outputs_in", None)
    return f"peaksift: {what}; " + (f"the outputs were all in place in {where} first"
                                    if where else otherwise)
