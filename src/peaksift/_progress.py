"""When to show progress bars, and the bars (base layer: no peaksift imports).

``progress=None`` everywhere in the API means: show them where someone watches -- a terminal
(stderr is a TTY) or a Jupyter notebook, where ``tqdm.auto`` draws them as widgets.
:func:`bar` is a ``tqdm.auto`` bar when one is shown and a no-op otherwise: ``tqdm.auto``
costs ~40-70 ms of CPU to import (it looks for notebook widgets), which a quiet run (``-q``,
a pipe, a test) need not pay on its critical path.
"""

from __future__ import annotations

import sys
from typing import Any

__all__ = ["bar", "progress_wanted"]


def _in_notebook() -> bool:
    shell = sys.modules.get("IPython")
    if shell is None:
        return False
    try:
        ip = shell.get_ipython()  # type: ignore[attr-defined]
    except AttributeError:
        return False
    return ip is not None and type(ip).__name__ == "ZMQInteractiveShell"


def progress_wanted(progress: bool | None) -> bool:
    """``progress`` as given, or (None) whether a terminal or a notebook is watching."""
    if progress is not None:
        return bool(progress)
    return bool(getattr(sys.stderr, "isatty", lambda: False)()) or _in_notebook()


class _NoBar:
    """What a hidden bar is asked: nothing shown, nothing imported."""

    def update(self, n: float = 1) -> None:
        pass

    def close(self) -> None:
        pass


def bar(total: float | None = None, *, shown: bool, **options: Any) -> Any:
    """A ``tqdm.auto`` progress bar of ``total`` (``options``: its keywords) when ``shown``,
    else an object with the same ``update``/``close`` that draws nothing."""
    if not shown:
        return _NoBar()
    from tqdm.auto import tqdm

    return tqdm(total=total, **options)
