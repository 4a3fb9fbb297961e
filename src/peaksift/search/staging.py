"""Where a run writes: the staging folder renamed into place at the end, the target, input checks."""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..config import Config
from ..errors import ConfigError, PeaksiftError


class _Staging:
    """A temporary directory next to ``target``, renamed into place by :meth:`commit`."""

    def __init__(self, target: Path) -> None:
        self.target = target
        if target.exists() and not target.is_dir():
            raise ConfigError(f"output path {str(target)!r} exists and is not a directory; "
                              "choose another --out")
        if target.is_dir() and any(target.iterdir()) and not (target / "results.json").exists() \
                and not (target / "spectrum.json").exists():
            raise ConfigError(
                f"output directory {str(target)!r} exists and does not hold a previous peaksift "
                "result; choose an empty or new directory with --out (nothing was overwritten)"
            )
        self.created: list[Path] = []
        p = target.parent
        while not p.exists():
            self.created.append(p)
            p = p.parent
        target.parent.mkdir(parents=True, exist_ok=True)
        self.path = target.parent / f".{target.name}.partial-{uuid.uuid4().hex[:8]}"
        self.path.mkdir()

    def commit(self) -> Path:
        old = None
        if self.target.exists():
            old = self.target.parent / f".{self.target.name}.old-{uuid.uuid4().hex[:8]}"
            os.replace(self.target, old)
        os.replace(self.path, self.target)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return self.target

    def discard(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)
        for p in self.created:  # parents this run made, innermost first
            with contextlib.suppress(OSError):
                p.rmdir()


@contextlib.contextmanager
def _staged(target: Path | None) -> Iterator[_Staging | None]:
    if target is None:
        yield None
        return
    st = _Staging(target)
    try:
        yield st
    except BaseException:
        st.discard()
        raise
    st.commit()


def _target(cfg: Config, out: str | os.PathLike[str] | bool | None) -> Path | None:
    if out is False:
        return None
    if out is None or out is True:
        p = Path(cfg.output.dir).expanduser()
        return (p if p.is_absolute() else cfg.base_dir / p).resolve()
    return Path(out).expanduser().resolve()


def _check_inputs(cfg: Config) -> None:
    """Resolve the input files before anything is written (a missing file stops the run)."""
    from ..events import list_files

    try:
        list_files(list(cfg.input.files))
    except PeaksiftError as exc:
        raise type(exc)(f"config {cfg.source}: input.files: {' '.join(str(exc).split())}") from None


def _apply_overrides(cfg: Config, *, toys: int | None, seed: int | None,
                     engine: str | None) -> Config:
    ov: dict[str, Any] = {}
    if toys is not None:
        ov["significance__toys"] = int(toys)
    if seed is not None:
        ov["significance__seed"] = int(seed)
    if engine is not None:
        ov["execution__engine"] = engine
    return cfg.with_overrides(**ov) if ov else cfg


# ------------------------------------------------------------------------------ search
