"""Which files a source names (paths, globs, directories, lists), and the reader's constants."""

from __future__ import annotations

import glob
import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any, Union

from ..errors import InputError, closest

Source = Union[str, os.PathLike, Sequence[Union[str, os.PathLike]]]  # noqa: UP007

#: Events per chunk when the caller does not say.  The demo search on 500 000-event chunks
#: peaks near 0.4 GiB per process (about half of it the libraries themselves).
DEFAULT_CHUNK_EVENTS = 500_000
_PIECE_EVENTS = 200_000  # read_events' internal piece size (measured: least system time)
_MAX_OPEN_FILES = 64  # data sets with more files reopen each file when its data are read

_POLAR = ("pt", "eta", "phi")
_MASS_NAMES = ("mass", "m")
_CART = ("px", "py", "pz")
_ENERGY_NAMES = ("energy", "e")
_KIN_OUT = ("pt", "eta", "phi", "mass")
# names vector reads as coordinates of a Momentum4D record
_RESERVED = {"x", "y", "z", "t", "rho", "theta", "tau", "px", "py", "pz", "E", "e", "energy",
             "M", "m", "mass", "pt", "eta", "phi"}
_GLOB_CHARS = set("*?[")


# --------------------------------------------------------------------------- files


def list_files(source: Source) -> list[Path]:
    """Resolve ``source`` to a list of Parquet files.

    Parameters
    ----------
    source : str, path or sequence of them
        Each entry is a file, a directory (all ``*.parquet`` files below it, recursively) or a
        glob (``"data/run_*.parquet"``, ``**`` allowed).  Matches of one entry are sorted; the
        entries keep their order; duplicates are removed.

    Raises
    ------
    InputError
        An entry matches nothing, or a directory holds no ``.parquet`` file.
    """
    entries: list[Any]
    if isinstance(source, (str, os.PathLike)):
        entries = [source]
    else:
        entries = list(source)
        if not entries:
            raise InputError("no input given: pass a Parquet file, a directory or a glob")
    out: list[Path] = []
    seen: set[Path] = set()
    for entry in entries:
        text = os.fspath(entry)
        if _GLOB_CHARS & set(text):
            found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
            if not found:
                raise InputError(
                    f"no file matches the glob '{text}' (working directory {os.getcwd()}); "
                    "check the pattern and the path")
        else:
            path = Path(text)
            if path.is_dir():
                found = sorted(p for p in path.rglob("*.parquet") if p.is_file())
                if not found:
                    raise InputError(
                        f"directory '{text}' contains no .parquet file; point to the directory "
                        "that holds the event files or give the files themselves")
            elif path.is_file():
                found = [path]
            else:
                hint = ""
                parent = path.parent if str(path.parent) else Path(".")
                if parent.is_dir():
                    near = closest(path.name, [p.name for p in parent.iterdir()])
                    if near:
                        hint = f" (did you mean '{parent / near}'?)"
                raise InputError(
                    f"no file or directory '{text}'{hint}; check the path "
                    f"(working directory {os.getcwd()})")
        for p in found:
            if p not in seen:
                seen.add(p)
                out.append(p)
    return out
