"""File writing shared by every layer that writes (no peaksift imports here).

:func:`atomic_write` is the one way peaksift puts a file on disk: through a temporary
file in the same directory, renamed into place, so a failure or an interrupt leaves
either the old file or none, never half a file.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["atomic_write"]


def atomic_write(path: str | os.PathLike[str], data: bytes | str) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same directory and rename.

    A failure (or an interrupt) leaves either the old file or none, never half a file.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    raw = data.encode("utf-8") if isinstance(data, str) else data
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(raw)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
