"""peaksift: invariant-mass resonance searches from columnar events to a meeting report.

Where to start
--------------
* ``read_events`` / ``iter_events`` / ``describe``  -- read Parquet events (awkward + vector).
* ``pair``                                          -- build di-object candidates under cuts
                                                       (mass hypotheses per leg, dE/dx
                                                       identification: ``energy_loss``).
* ``MassHistogram``                                 -- weighted mass spectrum.
* ``fit``                                           -- extended signal-plus-background fit.
* ``Resolution``                                    -- detector mass resolution sigma(m).
* ``scan``                                          -- local significance vs mass hypothesis.
* ``signal_model``                                  -- shape and efficiency from simulated samples.
* ``combine`` / ``combined_limits``                 -- several channels, one sigma x B.
* ``run_search``                                    -- the whole search from a TOML config.

Public names are imported lazily so ``import peaksift`` and the command line stay quick.
"""

from __future__ import annotations

import importlib
from typing import Any

from .errors import (
    ConfigError,
    CutError,
    ExecutionError,
    FitError,
    InputError,
    OutputError,
    PeaksiftError,
)

__version__ = "0.1.0"

# public name -> module that defines it
_EXPORTS: dict[str, str] = {
    "read_events": "peaksift.events.read",
    "iter_events": "peaksift.events.read",
    "describe": "peaksift.events.describe",
    "pair": "peaksift.pairing.build",
    "Candidates": "peaksift.pairing.candidates",
    "compile_cut": "peaksift.cuts.expression",
    "MassHistogram": "peaksift.histogram",
    "fit": "peaksift.fitting.core",
    "FitResult": "peaksift.fitting.result",
    "Resolution": "peaksift.resolution",
    "RunLabel": "peaksift._annotations",
    "scan": "peaksift.stats.scan",
    "ScanResult": "peaksift.stats.scan_result",
    "LimitResult": "peaksift.stats.limit_result",
    "upper_limits": "peaksift.stats.limits",
    "signal_model": "peaksift.stats.signal_model",
    "SignalModel": "peaksift.stats.signal_model_result",
    "SignalSample": "peaksift.stats.signal_model",
    "Channel": "peaksift.stats.channels",
    "Combination": "peaksift.stats.channels",
    "CombinedLimits": "peaksift.stats.channel_limits",
    "combine": "peaksift.stats.channels",
    "combined_limits": "peaksift.stats.channel_limits",
    "run_search": "peaksift.search.run",
    "SearchResult": "peaksift.search.result",
    "load_config": "peaksift.config.build",
}

_SUBMODULES = {
    "kinematics", "cuts", "shapes", "stats", "simulate", "events", "pairing", "blinding",
    "histogram", "fitting", "config", "execution", "search", "plotting", "report",
    "resonances", "errors", "resolution", "energy_loss", "simulate_tracks",
}

__all__ = [
    "Candidates",
    "Channel",
    "Combination",
    "CombinedLimits",
    "ConfigError",
    "CutError",
    "ExecutionError",
    "FitError",
    "FitResult",
    "InputError",
    "LimitResult",
    "MassHistogram",
    "OutputError",
    "PeaksiftError",
    "Resolution",
    "RunLabel",
    "ScanResult",
    "SearchResult",
    "SignalModel",
    "SignalSample",
    "__version__",
    "combine",
    "combined_limits",
    "compile_cut",
    "cuts",
    "describe",
    "fit",
    "iter_events",
    "kinematics",
    "load_config",
    "pair",
    "read_events",
    "run_search",
    "scan",
    "shapes",
    "signal_model",
    "stats",
    "upper_limits",
]


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    if name in _SUBMODULES:
        return importlib.import_module(f"peaksift.{name}")
    raise AttributeError(f"module 'peaksift' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(__all__) | _SUBMODULES)
