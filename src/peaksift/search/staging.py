"""Where a run writes (the output-folder contract of :mod:`peaksift._output`), the target,
input checks."""

from __future__ import annotations

import contextlib
import os
from pathlib import Path
from typing import Any

from .._output import OutputFolder, staged_output
from ..config import Config
from ..errors import PeaksiftError

#: the command's own staging folder (see :mod:`peaksift._output` for the contract)
_Staging = OutputFolder

#: files each command writes, known before the run (a clash with a file peaksift did not
#: write is refused before any work); a name ending in "/" is a folder of ours
OUTPUT_NAMES = {
    "search": ("results.json", "report.md", "report.html", "spectrum.json", "figures/"),
    "spectrum": ("spectrum.json", "figures/"),
    "fit": ("fit.json", "fit.png"),
}


def _staged(target: Path | None, command: str = "search", share: bool = False
            ) -> contextlib.AbstractContextManager[OutputFolder | None]:
    """The output folder of one command's run: staged, committed at the end, discarded on
    any failure or interrupt; ``share`` allows files peaksift did not write beside ours."""
    return staged_output(target, command, share=share, names=OUTPUT_NAMES.get(command, ()))


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
