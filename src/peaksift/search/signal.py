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
    masses = (tuple(sample_mass(f, sm.mass_column, where) for f in sm.files)
              if sm.mass_column else sm.masses)
    for f, m, g in zip(sm.files, masses, sm.generated):
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
                            efficiency_order=sm.efficiency_order, fixed=dict(sm.fix),
                            raise_order=sm.raise_order)
    except FitError as exc:
        raise FitError(f"{where}: [signal_model]: {exc}") from None


def sample_mass(files: str, column: str, where: str = "config") -> float:
    """The generated mass of a signal sample: the median of the per-event ``column`` over
    every event of ``files`` (a file or glob, Parquet or Arrow IPC; ``signal_model.mass_column``).
    The median, not the mean: a resonance's natural width gives its true masses long
    Breit-Wigner tails, whose mean is unstable."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ..events import list_files
    from ..events.formats import open_source

    values = []
    for loc in list_files(files):
        handle = open_source(loc)
        names = handle.schema_arrow.names
        if column not in names:
            raise ConfigError(f"{where}: signal_model.mass_column {column!r} is not a column of "
                              f"{loc} (columns: {', '.join(names)}); name the per-event "
                              "generated-mass column or give signal_model.masses")
        if isinstance(handle, pq.ParquetFile):
            col = handle.read(columns=[column]).column(column)
        else:
            col = pa.Table.from_batches(handle.batches, handle.schema_arrow).column(column)
        try:
            values.append(np.asarray(col.to_numpy(zero_copy_only=False), float))
        except (TypeError, ValueError, pa.ArrowException):
            raise ConfigError(f"{where}: signal_model.mass_column {column!r} of {loc} is not a "
                              "number per event") from None
    x = np.concatenate(values) if values else np.empty(0)
    x = x[np.isfinite(x)]
    if x.size == 0:
        raise ConfigError(f"{where}: signal_model.mass_column {column!r} holds no finite value "
                          f"in {files}; give signal_model.masses instead")
    return float(np.median(x))
