"""Which files a source names (paths, globs, directories, lists), and the reader's constants."""

from __future__ import annotations

import glob
import os
import re
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

#: How sibling list columns name a collection's fields by default: the dotted names Arrow's
#: own struct flattening gives (``pyarrow.Table.flatten``: ``muon.pt``, ``muon.eta``, ...).
#: Other layouts are read with ``column_pattern`` (e.g. ``"{collection}_{field}"``).
DEFAULT_COLUMN_PATTERN = "{collection}.{field}"


def column_regex(pattern: str, collection: str | None = None) -> re.Pattern[str]:
    """The regular expression of a column pattern holding ``{collection}`` and ``{field}``
    once each (``collection`` given: only that collection's columns match).

    Raises
    ------
    InputError
        The pattern lacks one of the two placeholders or repeats one.
    """
    if not isinstance(pattern, str) or pattern.count("{collection}") != 1 or \
            pattern.count("{field}") != 1:
        raise InputError(
            f"column_pattern {pattern!r} must hold {{collection}} and {{field}} once each, e.g. "
            f"{DEFAULT_COLUMN_PATTERN!r} (muon.pt) or '{{collection}}_{{field}}' (muon_pt)")
    out = ""
    for part in re.split(r"(\{collection\}|\{field\})", pattern):
        if part == "{collection}":
            out += "(?P<collection>.+)" if collection is None else \
                f"(?P<collection>{re.escape(collection)})"
        elif part == "{field}":
            out += "(?P<field>.+?)" if collection is None else "(?P<field>.+)"
        else:
            out += re.escape(part)
    return re.compile(f"^{out}$")
#: file name endings a directory is searched for
EVENT_SUFFIXES = (".parquet", ".arrow", ".feather", ".ipc")


# --------------------------------------------------------------------------- files


def list_files(source: Source) -> list[Path | str]:
    """Resolve ``source`` to a list of event files (Parquet or Arrow IPC).

    Parameters
    ----------
    source : str, path or sequence of them
        Each entry is a file, a directory (all ``*.parquet``, ``*.arrow``, ``*.feather`` and
        ``*.ipc`` files below it, recursively) or a glob (``"data/run_*.parquet"``, ``**``
        allowed); local, ``file://`` or any fsspec URL (``memory://``, ``s3://``, ...; the
        file system's package must be installed).  Matches of one entry are sorted; the
        entries keep their order; duplicates are removed.  Local files come back as
        :class:`~pathlib.Path`, URLs as text.

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
    out: list[Path | str] = []
    seen: set[Path | str] = set()
    for entry in entries:
        text = os.fspath(entry)
        text = text.removeprefix("file://")
        if "://" in text:
            found = _list_url(text)
        elif _GLOB_CHARS & set(text):
            found = sorted(Path(p) for p in glob.glob(text, recursive=True) if Path(p).is_file())
            if not found:
                raise InputError(
                    f"no file matches the glob '{text}' (working directory {os.getcwd()}); "
                    "check the pattern and the path")
        else:
            path = Path(text)
            if path.is_dir():
                found = sorted(p for p in path.rglob("*") if p.suffix.lower() in
                               EVENT_SUFFIXES and p.is_file())
                if not found:
                    raise InputError(
                        f"directory '{text}' contains no .parquet or .arrow/.feather file; "
                        "point to the directory that holds the event files or give the files "
                        "themselves")
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


def file_sha256(loc: Path | str) -> str:
    """The sha256 of a file's bytes (local path or fsspec URL), read in 1 MiB blocks."""
    import hashlib

    h = hashlib.sha256()
    text = os.fspath(loc)
    if "://" in text and not text.startswith("file://"):
        import fsspec

        opener: Any = fsspec.open(text, "rb")
    else:
        opener = open(text.removeprefix("file://"), "rb")  # noqa: SIM115 - closed below
    with opener as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _list_url(url: str) -> list[Path | str]:
    """Files an fsspec URL names: a file, a directory (searched like a local one) or a glob."""
    try:
        import fsspec

        fs, path = fsspec.core.url_to_fs(url)
    except (ImportError, ValueError) as exc:
        raise InputError(f"cannot open the URL '{url}' ({exc}); install fsspec and the package "
                         "of that file system, or copy the files locally") from None
    try:
        if _GLOB_CHARS & set(path):
            found = [p for p in fs.glob(path) if fs.isfile(p)]
        elif fs.isdir(path):
            found = [p for p in fs.find(path) if p.lower().endswith(EVENT_SUFFIXES)]
            if not found:
                raise InputError(f"directory '{url}' contains no .parquet or .arrow/.feather "
                                 "file; point to the directory that holds the event files")
        elif fs.isfile(path):
            found = [path]
        else:
            found = []
    except OSError as exc:
        raise InputError(f"cannot list '{url}' ({exc}); check the URL and the credentials of "
                         "that file system") from None
    if not found:
        raise InputError(f"no file matches '{url}'; check the URL")
    return [fs.unstrip_protocol(p) for p in sorted(found)]
