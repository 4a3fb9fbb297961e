"""The search configuration: a TOML file validated up front into frozen dataclasses.

Use :func:`load_config` on a TOML file (or a plain dict with the same layout) and hand the
returned :class:`Config` to :func:`peaksift.run_search`.  Every key, its type, default and
allowed range lives in one schema table in this module (``SCHEMA``); the reference page
``docs/config.md`` is generated from it by :func:`reference_markdown`, so the two never drift.

Sections (all optional except ``input`` and ``spectrum``)::

    [input]         files to read (paths and globs relative to the config file)
    [objects]       which collection(s) to pair, and cut expressions on them
    [pairing]       charge requirement, which pair(s) each event contributes, mass
                    hypotheses per leg
    [identification]  dE/dx particle identification (Bethe curve, resolution, calibration)
    [spectrum]      the fit window and its binning
    [model]         signal and background shapes, binned or unbinned fit, parameters of
                    the free fit fixed, constrained or bounded, intervals
    [model.resolution]  the detector mass resolution used by the scan
    [scan]          the grid of mass hypotheses
    [significance]  global significance method (upcrossings or toys), toys, seed
    [blinding]      a mass window hidden until the run is unblinded
    [limits]        confidence level, luminosity, efficiency and their uncertainties
    [systematics]   signal nuisances (mass scale, resolution), background families, the
                    order test, the envelope, the spurious-signal template
    [calibration]   optional fit of a known standard-candle peak in its own window
    [execution]     serial / processes / dask, workers, scheduler address, chunk size
    [output]        output directory, which figures, formats, log-scale spectrum, title

Validation is strict: an unknown key, a wrong type or an out-of-range value raises
:class:`~peaksift.errors.ConfigError` naming the key path (``model.background``), the file, and
the closest valid key or value.
"""

from __future__ import annotations

from .build import load_config, output_figures, section_values
from .reference import reference_markdown
from .schema import SCHEMA
from .sections import (
    BlindingConfig,
    CalibrationConfig,
    Config,
    ExecutionConfig,
    IdentificationConfig,
    InputConfig,
    LimitsConfig,
    ModelConfig,
    ObjectsConfig,
    OutputConfig,
    PairingConfig,
    ResolutionConfig,
    RunConfig,
    ScanConfig,
    SignificanceConfig,
    SpectrumConfig,
    SystematicsConfig,
)

__all__ = [
    "SCHEMA",
    "BlindingConfig",
    "CalibrationConfig",
    "Config",
    "ExecutionConfig",
    "IdentificationConfig",
    "InputConfig",
    "LimitsConfig",
    "ModelConfig",
    "ObjectsConfig",
    "OutputConfig",
    "PairingConfig",
    "ResolutionConfig",
    "RunConfig",
    "ScanConfig",
    "SignificanceConfig",
    "SpectrumConfig",
    "SystematicsConfig",
    "load_config",
    "output_figures",
    "reference_markdown",
    "section_values",
]
