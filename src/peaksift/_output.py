"""The output-folder contract: peaksift writes only files it names (base layer).

Every command that writes (``search``, ``spectrum``, ``fit``, ``demo``) goes through
:func:`staged_output`:

* The files of a run are written into a staging folder *inside* the output folder
  (``.peaksift-staging-<pid>-<id>``: same file system, so the final moves are renames), and
  moved into place file by file at the very end.  A failed or interrupted run removes the
  staging folder and leaves the output folder as it was.
* ``peaksift-manifest.json`` inside the output folder lists every file peaksift wrote there,
  and which command wrote it.  A rerun replaces exactly the files it writes; files the same
  command wrote before and does not write again (a figure format dropped from the config) are
  removed; nothing else is ever deleted or renamed.
* An output folder that holds files peaksift did not write is refused before the run, with
  one line naming a few of them, unless the caller shares the folder (``share=True``, the
  command line's ``--share-folder``).  Even then a file peaksift did not write is never
  replaced: a name clash is refused too.
* The manifest records each file's size and sha256 as peaksift wrote it.  A file the run
  would replace or remove that no longer matches (the user edited it: annotated a report,
  tuned the demo's ``search.toml``) is refused, before the run and again just before the
  moves, with one line naming it; nothing is written.  A manifest from an older peaksift
  (no ``sha256`` for a file) is read as before: such a file is replaced without that check.
* Staging folders left by a killed run (their process is gone) are removed by the next run
  into the same folder; one whose process still lives is reported and the run refused.
* File-system failures on the output side (read-only, full disk, a rename the system will
  not do) become :class:`~peaksift.errors.OutputError` naming the path and the system's
  reason; the writability of the folder is checked before any work.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import hashlib
import itertools
import json
import os
import shutil
import socket
import uuid
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

from ._files import atomic_write
from ._processes import signals_held
from .errors import OutputError

__all__ = ["MANIFEST_NAME", "STAGING_PREFIX", "OutputFolder", "check_unchanged", "os_reason",
           "staged_output"]

#: the file in every output folder that lists what peaksift wrote there
MANIFEST_NAME = "peaksift-manifest.json"
#: name prefix of the staging folders (inside the output folder)
STAGING_PREFIX = ".peaksift-staging-"
#: system errors that only writing gives
_WRITE_ERRNOS = {errno.ENOSPC, errno.EROFS, errno.EFBIG, getattr(errno, "EDQUOT", errno.ENOSPC)}
#: the marker inside a staging folder: its owner's host and process id
_MARK = ".owner.json"


def os_reason(exc: OSError) -> str:
    """The system's reason for ``exc`` in words (``No space left on device``)."""
    return exc.strerror or str(exc) or type(exc).__name__


def _fail(path: Path | str, exc: OSError, doing: str) -> OutputError:
    where = exc.filename if exc.filename else path
    return OutputError(f"cannot {doing} {str(where)!r}: {os_reason(exc)}; choose a writable "
                       "output folder with enough free space, nothing was replaced")


def _read_manifest(folder: Path) -> dict[str, dict[str, Any]] | None:
    """The manifest's file table, or None when there is none or it cannot be read."""
    path = folder / MANIFEST_NAME
    try:
        d = json.loads(path.read_text(encoding="utf-8"))
        files = d.get("files") if isinstance(d, dict) else None
        if d.get("written_by") != "peaksift" or not isinstance(files, dict):
            return None
        return {str(k): v if isinstance(v, dict) else {} for k, v in files.items()}
    except (OSError, ValueError, AttributeError):
        return None


def _fingerprint(path: Path) -> dict[str, int | str]:
    """Size and sha256 of a file as written (what a later run compares it with)."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return {"size": path.stat().st_size, "sha256": h.hexdigest()}


def _changed(folder: Path, manifest: dict[str, dict[str, Any]], names: Iterable[str]
             ) -> list[str]:
    """Those of ``names`` whose file differs from the size and sha256 the manifest recorded
    (a file without a recorded sha256, an older manifest's, or a missing one: not changed)."""
    out = []
    for n in sorted(set(names)):
        rec = manifest.get(n) or {}
        p = folder / n
        if "sha256" not in rec or not p.is_file() or p.is_symlink():
            continue
        try:
            if p.stat().st_size != rec.get("size") or _fingerprint(p)["sha256"] != rec["sha256"]:
                out.append(n)
        except OSError:
            out.append(n)  # unreadable now: not what peaksift wrote, as far as it can tell
    return out


def _refuse_changed(folder: Path, changed: list[str]) -> None:
    if changed:
        it = "it" if len(changed) == 1 else "them"
        raise OutputError(
            f"output folder {str(folder)!r}: {_short(changed)} changed since peaksift wrote "
            f"{it} (size or sha256 differs from peaksift-manifest.json) and would be replaced; "
            f"move {it} away to keep the edits, or choose another output folder (--out); "
            "nothing was written")


def check_unchanged(target: str | os.PathLike[str], commands: Iterable[str]) -> None:
    """Refuse (:class:`~peaksift.errors.OutputError`) when a file the ``commands`` wrote in
    ``target`` was changed since: for a command made of several writing steps (``peaksift
    demo`` writes its events, then its config), checked before the first one."""
    t = Path(target)
    manifest = _read_manifest(t) if t.is_dir() else None
    if manifest:
        cmds = set(commands)
        _refuse_changed(t, _changed(t, manifest, [n for n, v in manifest.items()
                                                   if v.get("command") in cmds]))


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # someone else's process: alive
        return True
    return True


def _entries(folder: Path) -> Iterator[str]:
    """Relative names of the files (and links, and other non-folders) under ``folder``,
    staging folders and the manifest left out; a folder counts only through its contents."""
    for root, dirs, files in os.walk(folder):
        rel_root = Path(root).relative_to(folder)
        dirs[:] = [d for d in dirs if not (rel_root == Path(".") and d.startswith(STAGING_PREFIX))
                   and not os.path.islink(os.path.join(root, d))]
        links = [d for d in os.listdir(root) if os.path.islink(os.path.join(root, d))
                 and os.path.isdir(os.path.join(root, d))]
        for name in (*files, *links):
            rel = (rel_root / name).as_posix()
            if rel != MANIFEST_NAME:
                yield rel


#: foreign names a refusal quotes
_NAMED = 3


def _short(names: list[str]) -> str:
    return ", ".join(names[:_NAMED]) + (" and more" if len(names) > _NAMED else "")


class OutputFolder:
    """One run's output folder: checks before the run, a staging folder, the final moves.

    Parameters
    ----------
    target : path
        The output folder (created when missing; removed again if the run fails and it
        was created for it).
    command : str
        Who writes (``"search"``, ``"fit"``, ...): the manifest records it per file, and a
        rerun of the same command removes its own files it no longer writes.
    share : bool
        Allow other files in the folder (they are never touched).
    names : iterable of str
        Files (relative names) this run will write, known before the run: a clash with a
        file peaksift did not write is refused before any work.
    """

    def __init__(self, target: str | os.PathLike[str], command: str, *, share: bool = False,
                 names: Iterable[str] = ()) -> None:
        self.target = Path(target)
        self.command = command
        t = self.target
        if t.exists() and not t.is_dir():
            raise OutputError(f"output path {str(t)!r} exists and is not a folder; choose "
                              "another output folder")
        self.created: list[Path] = []
        self.old: dict[str, dict[str, Any]] = {}
        if t.is_dir():
            self._check_existing(share, list(names))
        else:
            p = t
            while not p.exists():
                self.created.append(p)
                p = p.parent
            try:
                t.mkdir(parents=True)
            except OSError as exc:
                self.created.clear()
                raise _fail(t, exc, "create the output folder") from None
        if not os.access(t, os.W_OK | os.X_OK):
            self._remove_created()
            raise OutputError(f"output folder {str(t)!r} is not writable (permission denied); "
                              "choose a writable folder")
        self.path = t / f"{STAGING_PREFIX}{os.getpid()}-{uuid.uuid4().hex[:8]}"
        try:
            self.path.mkdir()
            atomic_write(self.path / _MARK, json.dumps(
                {"host": socket.gethostname(), "pid": os.getpid(), "command": command}))
        except OSError as exc:
            self.discard()
            raise _fail(t, exc, "write into the output folder") from None

    # ------------------------------------------------------------------ before the run
    def _check_existing(self, share: bool, names: list[str]) -> None:
        t = self.target
        self._clear_stale_staging()
        for n in names:  # a folder (or link) where one of our files goes cannot be replaced
            p = t / n.rstrip("/")
            if p.is_symlink() or (p.exists() and p.is_dir() != n.endswith("/")):
                kind = "link" if p.is_symlink() else "folder" if p.is_dir() else "file"
                raise OutputError(f"cannot write {str(p)!r}: a {kind} of that name is in the "
                                  "way; move it away or choose another output folder; nothing "
                                  "was written")
        manifest = _read_manifest(t)
        self.old = manifest or {}
        # the files this run replaces or removes (its own command's, and any listed under
        # the names it writes) must be as peaksift left them
        _refuse_changed(t, _changed(t, self.old, (
            n for n, v in self.old.items() if v.get("command") == self.command or n in names
            or any(d.endswith("/") and n.startswith(d) for d in names))))

        def foreign(entries: Iterable[str]) -> list[str]:
            # lazily, and at most a few: an --out at a large tree must not be walked whole
            found = (n for n in entries if n not in self.old and not _own_temporary(n, self.old))
            return sorted(itertools.islice(found, _NAMED + 1))

        if not share:
            others = foreign(_entries(t))
            if not others:
                return
            why = ("; its peaksift-manifest.json cannot be read, so every file counts as not "
                   "peaksift's" if (t / MANIFEST_NAME).exists() and manifest is None else "")
            raise OutputError(
                f"output folder {str(t)!r} holds files peaksift did not write ({_short(others)})"
                f"{why}; choose a new or empty output folder, or pass --share-folder to write "
                "beside them (they are never touched); nothing was written")
        # shared: only the places this run writes to are looked at
        mine = [n for n in names
                if not n.endswith("/") and ((t / n).exists() or (t / n).is_symlink())]
        for d in (n for n in names if n.endswith("/")):
            if (t / d).is_dir():
                mine += [f"{d}{e}" for e in _entries(t / d)]
        clash = foreign(mine)
        if clash:
            raise OutputError(
                f"output folder {str(t)!r}: {_short(clash)} would be replaced but peaksift did "
                "not write it (not in peaksift-manifest.json); move it away or choose another "
                "output folder; nothing was written")

    def _clear_stale_staging(self) -> None:
        host = socket.gethostname()
        for p in sorted(self.target.glob(STAGING_PREFIX + "*")):
            if not p.is_dir() or p.is_symlink():
                continue
            try:
                owner = json.loads((p / _MARK).read_text(encoding="utf-8"))
                pid = int(owner["pid"])
                same_host = owner.get("host") == host
            except (OSError, ValueError, KeyError, TypeError):
                owner, pid, same_host = None, -1, False
            if owner is not None and same_host and not _alive(pid):
                shutil.rmtree(p, ignore_errors=True)  # a killed run's files: ours, stale
                continue
            what = (f"process {pid} on this machine still runs" if owner and same_host
                    else f"written on host {owner.get('host')!r}" if owner
                    else "its owner cannot be read")
            raise OutputError(
                f"output folder {str(self.target)!r} holds {p.name} from another peaksift run "
                f"({what}); wait for that run, or delete {p.name} if no run writes there")

    # ------------------------------------------------------------------- after the run
    def commit(self) -> dict[str, Path]:
        """Move the staged files into the output folder; returns relative name -> path.

        The manifest is written first with the old and new names (so an interrupt in the
        middle leaves every file peaksift placed listed), then each file is renamed into
        place (atomic per file), then this command's files that were not rewritten are
        removed and the manifest gets its final content.
        """
        t = self.target
        staged = sorted(n for n in _entries(self.path) if n != _MARK)
        now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        new = {n: {"command": self.command, "written": now} for n in staged}
        current = _read_manifest(t) or {}
        for n in staged:
            dest = t / n
            if (dest.exists() or dest.is_symlink()) and n not in current:
                raise OutputError(f"output folder {str(t)!r}: {n} appeared during the run and "
                                  "peaksift did not write it; move it away and rerun")
            if dest.is_dir() and not dest.is_symlink():
                raise OutputError(f"cannot replace {str(dest)!r}: it is a folder; move it away "
                                  "and rerun")
        stale = [n for n, v in current.items() if v.get("command") == self.command
                 and n not in new]
        # edited during the run? (the check before the run saw them unchanged)
        _refuse_changed(t, _changed(t, current, [*staged, *stale]))
        try:
            prints = {n: _fingerprint(self.path / n) for n in staged}
            # the first manifest lists the new files without a fingerprint: a run killed
            # in the middle of the moves leaves files the next run replaces unchecked,
            # never a listed fingerprint of a file not yet moved in
            self._write_manifest({**current, **new})
            out = {}
            for n in staged:
                dest = t / n
                self._mkdirs(dest.parent)
                os.replace(self.path / n, dest)
                out[n] = dest
            for n in stale:
                p = t / n
                if p.is_file() and not p.is_symlink():
                    p.unlink()
            final = {k: v for k, v in {**current, **{n: {**new[n], **prints[n]}
                                                       for n in staged}}.items()
                     if k not in stale and (t / k).exists()}
            self._write_manifest(final)
        except OSError as exc:
            raise _fail(t, exc, "move the outputs into") from None
        finally:
            shutil.rmtree(self.path, ignore_errors=True)
        return out

    def _mkdirs(self, d: Path) -> None:
        if d.is_dir():
            return
        self._mkdirs(d.parent)
        d.mkdir()

    def _write_manifest(self, files: dict[str, dict[str, Any]]) -> None:
        atomic_write(self.target / MANIFEST_NAME, json.dumps(
            {"written_by": "peaksift",
             "about": "files peaksift wrote in this folder (size and sha256 as written); a "
                      "rerun replaces exactly these, refuses one changed since, and touches "
                      "nothing else",
             "files": dict(sorted(files.items()))}, indent=1) + "\n")

    def discard(self) -> None:
        """Remove the staging folder, and the output folder if this run created it and it
        is empty again."""
        shutil.rmtree(getattr(self, "path", self.target / "-"), ignore_errors=True)
        self._remove_created()

    def _remove_created(self) -> None:
        for p in self.created:  # innermost first
            with contextlib.suppress(OSError):
                p.rmdir()


def _own_temporary(name: str, manifest: dict[str, dict[str, Any]]) -> bool:
    """An atomic write's temporary file (``.results.json.x8f2k``) of a listed file."""
    head, _, base = name.rpartition("/")
    return any(base.startswith(f".{Path(n).name}.") and n.rpartition("/")[0] == head
               for n in manifest)


@contextlib.contextmanager
def staged_output(target: str | os.PathLike[str] | None, command: str, *, share: bool = False,
                  names: Iterable[str] = ()) -> Iterator[OutputFolder | None]:
    """Run the body with an :class:`OutputFolder` (None when ``target`` is None), commit on
    success, discard on any exception (Ctrl-C and SIGTERM included).  A system error about a
    file in the staging folder becomes an :class:`~peaksift.errors.OutputError`."""
    if target is None:
        yield None
        return
    folder = OutputFolder(target, command, share=share, names=names)
    try:
        yield folder
    except OSError as exc:
        folder.discard()
        fn = str(exc.filename or "")
        # a full or read-only file system while writing often names no file (a close, a
        # flush); reading the input never gives these
        if (fn and fn.startswith(str(folder.path))) or exc.errno in _WRITE_ERRNOS:
            raise _fail(folder.target, exc, "write into the output folder") from None
        raise
    except BaseException:
        folder.discard()
        raise
    # the moves into place are not cut short: a Ctrl-C or SIGTERM in the middle would leave
    # some files of this run beside the previous run's (a mix neither run wrote); it is
    # raised once they are all in place (a few renames), saying so to whoever reports it
    try:
        with signals_held():
            try:
                folder.commit()
            except BaseException:
                folder.discard()
                raise
    except KeyboardInterrupt as stop:
        stop.outputs_in = str(folder.target)  # type: ignore[attr-defined]
        raise
