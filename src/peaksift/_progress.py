"""When to show progress bars (base layer: no peaksift imports).

``progress=None`` everywhere in the API means: show them where someone watches -- a terminal
(stderr is a TTY) or a Jupyter notebook, where ``tqdm.auto`` draws them as widgets.
"""

from __future__ import annotations

import sys

__all__ = ["progress_wanted"]


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
