"""File writing shared by every layer that writes (no peaksift imports here).

:func:`atomic_write` is the one way peaksift puts a file on disk: through a temporary
file in the same directory, renamed into place, so a failure or an interrupt leaves
either the old file or none, never half a file.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

__all__ = ["atomic_write", "file_mode"]


def _umask() -> int:
    """The process's umask, read without changing it where the system says it
    (``/proc/self/status`` on Linux); elsewhere set and restored at once."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def file_mode() -> int:
    """The mode a plain ``open(path, "w")`` would give a new file: 0o666 less the umask.
    Temporary files start as 0o600, which colleagues sharing the folder cannot read."""
    return 0o666 & ~_umask()


def atomic_write(path: str | os.PathLike[str], data: bytes | str) -> Path:
    """Write ``data`` to ``path`` through a temporary file in the same directory and rename.

    A failure (or an interrupt) leaves either the old file or none, never half a file.
    The file gets the user's umask (:func:`file_mode`), as any file a program creates.  A
    system error carries ``path`` as its file name, so callers can say where it happened.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    raw = data.encode("utf-8") if isinstance(data, str) else data
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(raw)
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    except OSError as exc:
        if os.path.exists(tmp):
            os.unlink(tmp)
        if exc.filename is None:  # a full disk at write() names no file
            raise OSError(exc.errno, exc.strerror, str(path)) from exc
        raise
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
