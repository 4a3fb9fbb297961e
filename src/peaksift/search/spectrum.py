"""Only the selected spectrum: :func:`run_spectrum`."""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..config import Config, load_config
from .common import _blinded_copy, _blinding, _collect, _fill, _save_spectrum
from .result import SpectrumResult
from .staging import _apply_overrides, _check_inputs, _staged, _target


def run_spectrum(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    *,
    out: str | os.PathLike[str] | bool | None = None,
    engine: str | None = None,
    progress: bool | None = None,
    share_folder: bool = False,
) -> SpectrumResult:
    """Only the selected spectrum: ``spectrum.json`` (MassHistogram format) and its figure.

    With ``blinding.enabled`` the bins overlapping ``blinding.window`` are emptied in the
    histogram returned and saved (marked in the file's ``blinded`` entry) and hidden in the
    figure, and the candidates' pT/rapidity figure is not written (it includes them).
    ``share_folder`` as for :func:`~peaksift.search.run_search`.
    """
    from .._progress import progress_wanted

    progress = progress_wanted(progress)  # None: a terminal or a notebook
    cfg = _apply_overrides(load_config(config), toys=None, seed=None, engine=engine)
    _check_inputs(cfg)
    target = _target(cfg, out)
    with _staged(target, "spectrum", share_folder) as stage:
        col, _, _ = _collect(cfg, progress=progress)
        lo, hi = cfg.spectrum.window
        hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
        blinding = _blinding(cfg, unblind=False)
        blind = cfg.blinding.window if blinding["active"] else None
        if blind is not None:  # `peaksift spectrum` has no --unblind: always hidden
            hist = _blinded_copy(hist, blind)
        files: dict[str, Path] = {}
        if stage is not None:
            from .. import plotting

            labels = plotting.figure_labels(cfg)
            _save_spectrum(hist, stage.path / "spectrum.json", blinding)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                figs = plotting.spectrum_only(hist, stage.path / "figures",
                                              formats=cfg.output.formats,
                                              log_scale=cfg.output.log_scale, blind=blind,
                                              title=_short_title(cfg), labels=labels) \
                    if cfg.output.draws("spectrum") else {}
                # pT/rapidity include the blinded window: withheld while blinded
                if blind is None and cfg.output.draws("candidates"):
                    figs.update(plotting.candidates(col, stage.path / "figures",
                                                    formats=cfg.output.formats,
                                                    labels=labels))
            files = {"spectrum.json": target / "spectrum.json",
                     **{k: target / "figures" / Path(v).name for k, v in figs.items()}}
    return SpectrumResult(config=cfg, histogram=hist, collected=col, outdir=target, files=files)


def _short_title(cfg: Config) -> str:
    a, b = cfg.objects.collection, cfg.objects.second_collection
    ch = {"opposite": "opposite-charge ", "same": "same-charge "}.get(cfg.pairing.charge, "")
    return f"{ch}{a}-{b} pairs" if b and b != a else f"{ch}{a} pairs"


# --------------------------------------------------------------------------------- fit
#: what ``run_fit(..., out=DIR)`` writes into DIR (and the only names it will replace there)
