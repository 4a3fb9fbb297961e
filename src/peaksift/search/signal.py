"""The signal model of a search from ``[signal_model]``: samples through the search's own
selection, or a model saved in a previous results.json.

Each sample file is read, selected and paired by :func:`peaksift.execution.collect` with the
search's own ``[objects]``, ``[pairing]`` and ``[execution]`` (the same code path and engine
as the data); its candidates inside ``spectrum.window`` are the selected events (the
efficiency x acceptance is therefore for the search window).  The model itself is
:func:`peaksift.stats.signal_model.signal_model`.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path
from typing import Any

import numpy as np

from ..config import Config
from ..errors import ConfigError, FitError
from .common import _collect

__all__ = ["search_signal_model"]


def search_signal_model(cfg: Config, *, progress: bool = False) -> Any:
    """The :class:`~peaksift.stats.signal_model.SignalModel` of ``cfg`` (None when
    ``[signal_model]`` is not configured)."""
    from ..histogram import in_range
    from ..stats.signal_model import SignalModel, SignalSample, signal_model

    sm = cfg.signal_model
    if not sm.enabled:
        return None
    where = f"config {cfg.source}" if cfg.source != "<dict>" else "config"
    if sm.saved:
        path = Path(sm.saved)
        try:
            d = json.loads(path.read_text())
        except (OSError, ValueError) as exc:
            raise ConfigError(f"{where}: signal_model.saved: cannot read {str(path)!r} "
                              f"({exc}); give a peaksift results.json") from None
        if not isinstance(d, dict) or not isinstance(d.get("signal_model"), dict):
            raise ConfigError(f"{where}: signal_model.saved: {str(path)!r} holds no "
                              "'signal_model'; give the results.json of a search that built one")
        return SignalModel.from_dict(d["signal_model"])
    lo, hi = cfg.spectrum.window
    # the samples are read without the calibration window: only the search window matters
    sample_cfg = dataclasses.replace(cfg, calibration=dataclasses.replace(
        cfg.calibration, particle=""))
    samples = []
    for f, m, g in zip(sm.files, sm.masses, sm.generated):
        one = dataclasses.replace(sample_cfg, input=dataclasses.replace(cfg.input, files=(f,)))
        col, _, _ = _collect(one, progress=progress)
        x = np.asarray(col.window_mass, float)
        keep = in_range(x, lo, hi)
        w = np.asarray(col.window_weight, float)[keep]
        if not (cfg.input.weights and np.any(w != 1.0)):
            w = None
        samples.append(SignalSample(float(m), x[keep], float(g), weights=w))
    try:
        return signal_model(samples, sm.shape, order=sm.order,
                            efficiency_order=sm.efficiency_order, fixed=dict(sm.fix))
    except FitError as exc:
        raise FitError(f"{where}: [signal_model]: {exc}") from None
