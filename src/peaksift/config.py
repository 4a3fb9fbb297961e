"""The search configuration: a TOML file validated up front into frozen dataclasses.

Use :func:`load_config` on a TOML file (or a plain dict with the same layout) and hand the
returned :class:`Config` to :func:`peaksift.run_search`.  Every key, its type, default and
allowed range lives in one schema table in this module (``SCHEMA``); the reference page
``docs/config.md`` is generated from it by :func:`reference_markdown`, so the two never drift.

Sections (all optional except ``input`` and ``spectrum``)::

    [input]         files to read (paths and globs relative to the config file)
    [objects]       which collection(s) to pair, and cut expressions on them
    [pairing]       charge requirement, which pair(s) each event contributes
    [spectrum]      the fit window and its binning
    [model]         signal and background shapes, binned or unbinned fit, parameters of
                    the free fit fixed, constrained or bounded, intervals
    [model.resolution]  the detector mass resolution used by the scan
    [scan]          the grid of mass hypotheses
    [significance]  global significance method (upcrossings or toys), toys, seed
    [blinding]      a mass window hidden until the run is unblinded
    [limits]        confidence level, luminosity, efficiency and their uncertainties
    [calibration]   optional fit of a known standard-candle peak in its own window
    [execution]     serial / processes / dask, workers, scheduler address, chunk size
    [output]        output directory, figure formats, log-scale spectrum, report title

Validation is strict: an unknown key, a wrong type or an out-of-range value raises
:class:`~peaksift.errors.ConfigError` naming the key path (``model.background``), the file, and
the closest valid key or value.
"""

from __future__ import annotations

import functools
import hashlib
import itertools
import math
import sys
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from ._vocabulary import LIMIT_METHODS
from .errors import ConfigError, FitError, closest
from .resolution import RELATIVE_MAX, Resolution, check_resolved, relative_problem

if sys.version_info >= (3, 11):  # pragma: no cover - version switch
    import tomllib as _toml
else:  # pragma: no cover
    import tomli as _toml

__all__ = [
    "SCHEMA",
    "BlindingConfig",
    "CalibrationConfig",
    "Config",
    "ExecutionConfig",
    "InputConfig",
    "LimitsConfig",
    "ModelConfig",
    "ObjectsConfig",
    "OutputConfig",
    "PairingConfig",
    "ResolutionConfig",
    "ScanConfig",
    "SignificanceConfig",
    "SpectrumConfig",
    "load_config",
    "reference_markdown",
]

_REQUIRED = object()


@dataclass(frozen=True)
class _Key:
    """One configuration key: its kind, default, constraints and documentation."""

    name: str
    kind: str  # str, int, float, bool, choice, window, strings, paths, floats, table, pairs
    default: Any
    doc: str
    choices: tuple[str, ...] = ()
    lo: float | None = None
    hi: float | None = None
    lo_open: bool = False
    hi_open: bool = False
    nullable: bool = False
    # a number's own check (what is wrong, or None) used instead of lo/hi, which then only
    # document the range: for a rule that another layer owns and applies too
    check: Callable[[Any], str | None] | None = None


# ------------------------------------------------------------------------------- schema
SCHEMA: dict[str, tuple[_Key, ...]] = {
    "input": (
        _Key("files", "paths", _REQUIRED,
             "Parquet files, directories or globs; a string or a list. Relative paths are "
             "taken from the directory of the config file."),
        _Key("weights", "bool", True,
             "Use the per-event `weight` column when the files have one."),
        _Key("strict", "bool", False,
             "Stop on NaN/infinite or negative kinematics instead of dropping those objects "
             "with a warning."),
    ),
    "objects": (
        _Key("collection", "str", "muon", "Collection whose objects are paired."),
        _Key("cut", "str", "", "Cut expression on the objects, e.g. "
             "`pt > 25 and abs(eta) < 2.4 and isolation < 0.15`; empty for none."),
        _Key("second_collection", "str", "",
             "Pair `collection` with this other collection (e.g. `electron`); empty pairs "
             "objects of `collection` among themselves."),
        _Key("second_cut", "str", "", "Cut expression on the second collection's objects."),
        _Key("event_cut", "str", "",
             "Event-level cut expression (per-event scalars and object counts)."),
    ),
    "pairing": (
        _Key("charge", "choice", "opposite",
             "Charge requirement on the pair.", choices=("opposite", "same", "any")),
        _Key("choose", "choice", "all",
             "What each event contributes: every pair, the leading pair, the pair with the "
             "largest scalar pT sum, or the pair closest to `target_mass`.",
             choices=("all", "leading", "max_sum_pt", "closest")),
        _Key("target_mass", "float", None, "Mass in GeV for `choose = \"closest\"`.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("min_delta_r", "float", 0.0,
             "Minimum Delta R between the two objects (0 for no requirement).", lo=0.0),
    ),
    "spectrum": (
        _Key("window", "window", _REQUIRED,
             "Fit window `[low, high]` in GeV; the spectrum, fits and scan live here."),
        _Key("bins", "int", 100, "Number of equal bins on the window.", lo=1, hi=100000),
        _Key("bin_width", "float", None,
             "Bin width in GeV; overrides `bins` (the window must hold a whole number).",
             lo=0.0, lo_open=True, nullable=True),
    ),
    "model": (
        _Key("signal", "str", "gaussian",
             "Signal shape of the free fit at the best mass (`peaksift.shapes.available()`)."),
        _Key("background", "str", "exponential", "Background shape name."),
        _Key("signal_options", "table", {}, "Options passed to the signal shape."),
        _Key("background_options", "table", {},
             "Options passed to the background shape, e.g. `{ degree = 3 }`."),
        _Key("fit", "choice", "auto",
             "Binned or unbinned likelihood; `auto` lets the fitter choose.",
             choices=("auto", "binned", "unbinned")),
        _Key("fix", "values", {},
             "Parameters of the free fit held at a value, by name, e.g. "
             "`{ alpha_low = 1.2, n_low = 4.0 }`. Names: the parameters of `model.signal` "
             "and `model.background`, `signal_yield` and `background_yield`."),
        _Key("constrain", "constraints", {},
             "Parameters of the free fit constrained by an outside measurement, by name: "
             "`{ width = { kind = \"gaussian\", center = 30.0, width = 3.0 } }` (`kind`: "
             "{constraint_kinds}; default gaussian). For `lognormal`, `center` is the median "
             "and `width` the relative uncertainty. `[center, width]` is short for a Gaussian."),
        _Key("bounds", "ranges", {},
             "Lower and upper bounds of free-fit parameters, by name, replacing the defaults: "
             "`{ width = [0.0, 100.0] }`."),
        _Key("sigma_from_resolution", "choice", "free",
             "Tie the Gaussian `sigma` of the signal (gaussian, crystalball, voigt) to "
             "`model.resolution` at the fit's starting mass: `fixed` to it, or `constrained` "
             "by a Gaussian of relative width `resolution_uncertainty`; `free` floats it. "
             "Tie it to measure a natural width with a Voigt signal.",
             choices=("free", "fixed", "constrained")),
        _Key("resolution_uncertainty", "float", None,
             "Relative uncertainty of the resolution model, the width of the constraint when "
             "`sigma_from_resolution = \"constrained\"` (e.g. 0.1 for 10%).",
             lo=0.0, lo_open=True, hi=1.0, nullable=True),
        _Key("intervals", "bool", True,
             "Profile-likelihood (MINOS-type) intervals for the peak mass, its width and the "
             "signal yield of the free fit (in results.json `fit.intervals`, the summary and "
             "the report); `false` leaves only the symmetric errors."),
    ),
    "model.resolution": (
        _Key("relative", "float", None,
             "Relative mass resolution sigma/m (give exactly one of relative, absolute, "
             "table).", lo=0.0, lo_open=True, hi=RELATIVE_MAX, nullable=True,
             check=relative_problem),
        _Key("absolute", "float", None, "Constant mass resolution sigma in GeV.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("table", "pairs", None,
             "Resolution table `[[mass, sigma], ...]` in GeV, interpolated linearly in mass; "
             "it must cover `spectrum.window`.", nullable=True),
        _Key("natural_width", "float", 0.0,
             "Natural width Gamma (GeV) of the hypothesised resonance; with a width > 0 the "
             "scan uses a Voigt signal.", lo=0.0),
    ),
    "scan": (
        _Key("start", "float", None,
             "First mass hypothesis, GeV (default: 3 resolution sigma inside the window).",
             nullable=True),
        _Key("stop", "float", None,
             "Last mass hypothesis, GeV (default: 3 resolution sigma inside the window).",
             nullable=True),
        _Key("step", "float", None,
             "Spacing of hypotheses, GeV (default: half the local resolution sigma).",
             lo=0.0, lo_open=True, nullable=True),
        _Key("points", "int", None, "Number of equally spaced hypotheses (instead of step).",
             lo=2, hi=100000, nullable=True),
        _Key("signal", "str", "",
             "Signal shape used at each hypothesis; empty: `gaussian`, or `voigt` when "
             "`model.resolution.natural_width` > 0."),
    ),
    "significance": (
        _Key("method", "choice", "upcrossings",
             "Global significance: upcrossings (Gross & Vitells 2010) or background-only "
             "toys of the whole scan.", choices=("upcrossings", "toys")),
        _Key("toys", "int", 200,
             "Background-only toys (for `upcrossings`: toys that estimate the upcrossing "
             "rate; 0 uses the observed scan).", lo=0, hi=10_000_000),
        _Key("reference_level", "float", 0.5,
             "Reference level u0 of q0 at which upcrossings are counted.", lo=0.0),
        _Key("seed", "int", 20261201, "Random seed for all toys (results are reproducible).",
             lo=0),
    ),
    "blinding": (
        _Key("enabled", "bool", False,
             "Hide the data in `window` from fits, plots and results until `--unblind`."),
        _Key("window", "window", None, "Blinded mass window `[low, high]`, GeV.",
             nullable=True),
    ),
    "limits": (
        _Key("enabled", "bool", True, "Compute upper limits across the scan range."),
        _Key("cl", "float", 0.95, "Confidence level of the CLs upper limits.",
             lo=0.0, hi=1.0, lo_open=True, hi_open=True),
        _Key("method", "choice", "auto",
             "How the CLs limits are computed: `auto` uses the asymptotic formulae (Cowan "
             "et al. 2011) and toys where too few background events lie under the signal "
             "for them (the expected bands would be misplaced); `asymptotic` uses the "
             "formulae everywhere and flags those masses; `toys` is `auto` plus toys at "
             "`toy_masses`.",
             choices=LIMIT_METHODS),
        _Key("points", "int", 30, "Number of mass points for the limit curve.",
             lo=1, hi=10000),
        _Key("toys", "int", 200, "Toys per mass point where a limit is computed with toys.",
             lo=10, hi=1_000_000),
        _Key("toy_masses", "floats", [],
             "Masses (GeV) where `method = \"toys\"` computes toy-based limits too, each at "
             "the nearest limit point; empty: three masses spread over the range."),
        _Key("luminosity", "float", None,
             "Integrated luminosity in `luminosity_unit`; when given, limits are on "
             "cross-section x branching fraction instead of the signal yield.",
             lo=0.0, lo_open=True, nullable=True),
        _Key("luminosity_unit", "choice", "fb^-1", "Unit of `luminosity`.",
             choices=("fb^-1", "pb^-1")),
        _Key("luminosity_uncertainty", "float", 0.0,
             "Relative uncertainty of the luminosity (constrained nuisance parameter).",
             lo=0.0, hi=1.0),
        _Key("efficiency", "float", 1.0,
             "Signal efficiency times acceptance.", lo=0.0, hi=1.0, lo_open=True),
        _Key("efficiency_uncertainty", "float", 0.0,
             "Relative uncertainty of the efficiency (constrained nuisance parameter).",
             lo=0.0, hi=1.0),
        _Key("constraint", "choice", "lognormal",
             "Distribution constraining the luminosity and efficiency nuisance parameters.",
             choices=("lognormal", "gaussian")),
    ),
    "calibration": (
        _Key("particle", "str", "",
             "Known particle (particle-data table name, e.g. `Z0`) whose peak is fitted as a "
             "calibration check; empty: no calibration fit."),
        _Key("window", "window", None, "Calibration fit window `[low, high]`, GeV.",
             nullable=True),
        _Key("bins", "int", 80, "Bins on the calibration window.", lo=1, hi=100000),
        _Key("signal", "str", "voigt", "Signal shape of the calibration fit."),
        _Key("background", "str", "exponential", "Background shape of the calibration fit."),
        _Key("signal_options", "table", {}, "Options passed to the calibration signal shape."),
        _Key("background_options", "table", {},
             "Options passed to the calibration background shape."),
        _Key("fix_width", "bool", True,
             "Fix the natural width to the tabulated value (fit mass and resolution only)."),
    ),
    "execution": (
        _Key("engine", "choice", "serial",
             "Where the per-chunk work runs: in this process, a local process pool, or Dask.",
             choices=("serial", "processes", "dask")),
        _Key("workers", "int", None,
             "Worker processes (`processes`) or local Dask workers; default: CPU count.",
             lo=1, hi=4096, nullable=True),
        _Key("address", "str", "",
             "Dask scheduler address (e.g. `tcp://scheduler.example:8786`); empty starts a "
             "local cluster."),
        _Key("chunk_events", "int", 250_000, "Events per chunk (bounds memory).",
             lo=1, hi=1_000_000_000),
        _Key("skip_bad_files", "bool", False,
             "Skip unreadable files (listed in results.json and the report) instead of "
             "stopping."),
        _Key("start_method", "choice", "auto",
             "How local worker processes start: `auto` (fork on Linux, else spawn), `fork` "
             "(ready at once, from this process) or `spawn` (fresh interpreters; use it if "
             "code in the calling process is not fork-safe).",
             choices=("auto", "fork", "spawn")),
    ),
    "output": (
        _Key("dir", "str", "peaksift_out",
             "Output directory (relative to the config file); `--out` overrides it."),
        _Key("formats", "strings", ["png", "pdf"], "Figure formats.",
             choices=("png", "pdf", "svg")),
        _Key("log_scale", "bool", False, "Draw the spectrum with a logarithmic y axis."),
        _Key("title", "str", "", "Report title (default: names the searched pair)."),
    ),
}

_TOP = tuple(SCHEMA)


# ---------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True)
class InputConfig:
    files: tuple[str, ...]
    weights: bool = True
    strict: bool = False


@dataclass(frozen=True)
class ObjectsConfig:
    collection: str = "muon"
    cut: str = ""
    second_collection: str = ""
    second_cut: str = ""
    event_cut: str = ""


@dataclass(frozen=True)
class PairingConfig:
    charge: str = "opposite"
    choose: str = "all"
    target_mass: float | None = None
    min_delta_r: float = 0.0


@dataclass(frozen=True)
class SpectrumConfig:
    window: tuple[float, float]
    bins: int = 100
    bin_width: float | None = None

    @property
    def edges(self) -> Any:
        """Bin edges on the window (numpy array)."""
        import numpy as np

        return np.linspace(self.window[0], self.window[1], self.bins + 1)


@dataclass(frozen=True)
class ResolutionConfig:
    """Detector mass resolution: the ``[model.resolution]`` keys, exactly one of the three
    forms, as a :class:`~peaksift.resolution.Resolution` in :attr:`resolution`."""

    relative: float | None = None
    absolute: float | None = None
    table: tuple[tuple[float, float], ...] | None = None
    natural_width: float = 0.0

    @functools.cached_property  # built once: search evaluates sigma(m) mass by mass
    def resolution(self) -> Resolution:
        """The resolution these keys describe."""
        if self.relative is not None:
            return Resolution.relative(self.relative)
        if self.absolute is not None:
            return Resolution.absolute(self.absolute)
        return Resolution.table(self.table)

    def sigma(self, mass: Any) -> Any:
        """Gaussian mass resolution in GeV at ``mass`` (scalar or array), as
        :meth:`Resolution.sigma <peaksift.resolution.Resolution.sigma>`."""
        return self.resolution.sigma(mass)

    @property
    def kind(self) -> str:
        return self.resolution.kind


@dataclass(frozen=True)
class ModelConfig:
    signal: str = "gaussian"
    background: str = "exponential"
    signal_options: Mapping[str, Any] = field(default_factory=dict)
    background_options: Mapping[str, Any] = field(default_factory=dict)
    fit: str = "auto"
    fix: Mapping[str, float] = field(default_factory=dict)
    constrain: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)
    bounds: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    sigma_from_resolution: str = "free"
    resolution_uncertainty: float | None = None
    intervals: bool = True
    resolution: ResolutionConfig = field(default_factory=ResolutionConfig)


@dataclass(frozen=True)
class ScanConfig:
    start: float | None = None
    stop: float | None = None
    step: float | None = None
    points: int | None = None
    signal: str = ""


@dataclass(frozen=True)
class SignificanceConfig:
    method: str = "upcrossings"
    toys: int = 200
    reference_level: float = 0.5
    seed: int = 20261201


@dataclass(frozen=True)
class BlindingConfig:
    enabled: bool = False
    window: tuple[float, float] | None = None


@dataclass(frozen=True)
class LimitsConfig:
    enabled: bool = True
    cl: float = 0.95
    method: str = "auto"
    points: int = 30
    toys: int = 200
    toy_masses: tuple[float, ...] = ()
    luminosity: float | None = None
    luminosity_unit: str = "fb^-1"
    luminosity_uncertainty: float = 0.0
    efficiency: float = 1.0
    efficiency_uncertainty: float = 0.0
    constraint: str = "lognormal"

    @property
    def cross_section_unit(self) -> str:
        """``fb`` or ``pb``: the unit of a limit on cross-section x branching fraction."""
        return "fb" if self.luminosity_unit == "fb^-1" else "pb"


@dataclass(frozen=True)
class CalibrationConfig:
    particle: str = ""
    window: tuple[float, float] | None = None
    bins: int = 80
    signal: str = "voigt"
    background: str = "exponential"
    signal_options: Mapping[str, Any] = field(default_factory=dict)
    background_options: Mapping[str, Any] = field(default_factory=dict)
    fix_width: bool = True

    @property
    def enabled(self) -> bool:
        return bool(self.particle)


@dataclass(frozen=True)
class ExecutionConfig:
    engine: str = "serial"
    workers: int | None = None
    address: str = ""
    chunk_events: int = 250_000
    skip_bad_files: bool = False
    start_method: str = "auto"


@dataclass(frozen=True)
class OutputConfig:
    dir: str = "peaksift_out"
    formats: tuple[str, ...] = ("png", "pdf")
    log_scale: bool = False
    title: str = ""


@dataclass(frozen=True)
class Config:
    """A validated search configuration (see the module guide and ``docs/config.md``).

    Attributes
    ----------
    source : str
        The config file's path, or ``"<dict>"`` for a config given as a mapping.
    base_dir : pathlib.Path
        Directory that relative paths are resolved against.
    sha256 : str
        SHA-256 of the config file's bytes (of the canonical JSON echo for a mapping).
    """

    input: InputConfig
    spectrum: SpectrumConfig
    objects: ObjectsConfig = field(default_factory=ObjectsConfig)
    pairing: PairingConfig = field(default_factory=PairingConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    scan: ScanConfig = field(default_factory=ScanConfig)
    significance: SignificanceConfig = field(default_factory=SignificanceConfig)
    blinding: BlindingConfig = field(default_factory=BlindingConfig)
    limits: LimitsConfig = field(default_factory=LimitsConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    execution: ExecutionConfig = field(default_factory=ExecutionConfig)
    output: OutputConfig = field(default_factory=OutputConfig)
    source: str = "<dict>"
    base_dir: Path = field(default_factory=Path.cwd)
    sha256: str = ""

    def to_dict(self) -> dict[str, Any]:
        """The validated configuration as plain JSON-ready data (echoed in results.json)."""
        out: dict[str, Any] = {}
        for sec in _TOP:
            if sec == "model.resolution":
                continue
            obj = self._section(sec)
            d = {f.name: _plain(getattr(obj, f.name)) for f in fields(obj)
                 if f.name != "resolution"}
            if sec == "model":
                r = self.model.resolution
                d["resolution"] = {f.name: _plain(getattr(r, f.name)) for f in fields(r)}
            out[sec] = d
        return out

    def _section(self, name: str) -> Any:
        if name == "model.resolution":
            return self.model.resolution
        return getattr(self, name)

    def with_overrides(self, **changes: Any) -> Config:
        """Return a copy with ``section__key=value`` overrides applied (validated the same way).

        Example: ``cfg.with_overrides(significance__toys=50, execution__engine="processes")``.
        """
        raw = self.to_dict()
        for k, v in changes.items():
            sec, _, key = k.rpartition("__")
            sec = sec.replace("__", ".")
            target = raw
            for part in sec.split("."):
                target = target.setdefault(part, {})
            target[key] = v
        return _build(raw, source=self.source, base_dir=self.base_dir, sha256=self.sha256,
                      resolve_paths=False)


def _plain(v: Any) -> Any:
    if isinstance(v, tuple):
        return [_plain(x) for x in v]
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, Path):
        return str(v)
    return v


# ----------------------------------------------------------------------------- validation
def _where(source: str) -> str:
    return f"config {source}" if source != "<dict>" else "config"


def _type_name(v: Any) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, int):
        return "an integer"
    if isinstance(v, float):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, Mapping):
        return "a table"
    return type(v).__name__


def _fmt(v: float, integer: bool = False) -> str:
    """A bound or value as text: integer keys as integers (``10000000``, not ``1e+07``)."""
    if integer and float(v).is_integer():
        return str(int(v))
    return f"{v:g}"


def _range_text(key: _Key) -> str:
    """``>= 0 and <= 10000000``: the allowed range of a numeric key."""
    integer = key.kind == "int"
    lo = "" if key.lo is None else (
        f"{'>' if key.lo_open else '>='} {_fmt(key.lo, integer)}")
    hi = "" if key.hi is None else (
        f"{'<' if key.hi_open else '<='} {_fmt(key.hi, integer)}")
    return " and ".join(x for x in (lo, hi) if x)


def _check_range(path: str, key: _Key, v: float, where: str) -> None:
    if not math.isfinite(v):
        raise ConfigError(f"{where}: {path} must be a finite number, got {v!r}")
    bad = False
    if key.lo is not None and (v < key.lo or (key.lo_open and v == key.lo)):
        bad = True
    if key.hi is not None and (v > key.hi or (key.hi_open and v == key.hi)):
        bad = True
    if bad:
        shown = _fmt(v, True) if key.kind == "int" else repr(v)
        raise ConfigError(f"{where}: {path} = {shown} is out of range; it must be "
                          f"{_range_text(key)}")


def _number(path: str, v: Any, where: str, *, integer: bool) -> float | int:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        want = "an integer" if integer else "a number"
        raise ConfigError(f"{where}: {path} must be {want}, got {_type_name(v)} ({v!r})")
    if integer and not isinstance(v, int):
        if float(v).is_integer():
            return int(v)
        raise ConfigError(f"{where}: {path} must be an integer, got {v!r}")
    return v if integer else float(v)


def _window(path: str, v: Any, where: str) -> tuple[float, float]:
    if not isinstance(v, (list, tuple)) or len(v) != 2:
        raise ConfigError(
            f"{where}: {path} must be a list of two numbers [low, high] in GeV, got {v!r}"
        )
    lo = _number(f"{path}[0]", v[0], where, integer=False)
    hi = _number(f"{path}[1]", v[1], where, integer=False)
    if not (math.isfinite(lo) and math.isfinite(hi)) or not hi > lo:
        raise ConfigError(f"{where}: {path} = {list(v)!r} must have finite low < high")
    if lo < 0:
        raise ConfigError(f"{where}: {path} = {list(v)!r}: masses cannot be negative")
    return (float(lo), float(hi))


def _value(path: str, key: _Key, v: Any, where: str) -> Any:
    k = key.kind
    if v is None:
        return None
    if k == "str":
        if not isinstance(v, str):
            raise ConfigError(f"{where}: {path} must be a string, got {_type_name(v)} ({v!r})")
        return v
    if k == "bool":
        if not isinstance(v, bool):
            raise ConfigError(f"{where}: {path} must be true or false, got {v!r}")
        return v
    if k in ("int", "float"):
        x = _number(path, v, where, integer=(k == "int"))
        if key.check is not None:
            problem = key.check(x)
            if problem:
                raise ConfigError(f"{where}: {path} {problem}")
        else:
            _check_range(path, key, float(x), where)
        return x
    if k == "choice":
        if not isinstance(v, str):
            raise ConfigError(
                f"{where}: {path} must be one of {', '.join(map(repr, key.choices))}, got {v!r}"
            )
        if v not in key.choices:
            hint = closest(v, key.choices)
            raise ConfigError(
                f"{where}: {path} = {v!r} is not allowed"
                + (f"; did you mean {hint!r}?" if hint else "")
                + f" (choose one of {', '.join(map(repr, key.choices))})"
            )
        return v
    if k == "window":
        return _window(path, v, where)
    if k in ("paths", "strings"):
        items = [v] if isinstance(v, str) else v
        if not isinstance(items, list) or not all(isinstance(x, str) for x in items):
            raise ConfigError(f"{where}: {path} must be a string or a list of strings, got {v!r}")
        if k == "paths" and not items:
            raise ConfigError(f"{where}: {path} is empty; list at least one file or glob")
        if key.choices:
            for x in items:
                if x not in key.choices:
                    hint = closest(x, key.choices)
                    raise ConfigError(
                        f"{where}: {path} contains {x!r}, which is not allowed"
                        + (f"; did you mean {hint!r}?" if hint else "")
                        + f" (allowed: {', '.join(map(repr, key.choices))})"
                    )
        return tuple(items)
    if k == "floats":
        if isinstance(v, tuple):  # from with_overrides
            v = list(v)
        if not isinstance(v, list):
            raise ConfigError(f"{where}: {path} must be a list of numbers, got {v!r}")
        vals = [float(_number(f"{path}[{i}]", x, where, integer=False)) for i, x in enumerate(v)]
        bad = [x for x in vals if not math.isfinite(x)]
        if bad:
            raise ConfigError(f"{where}: {path} must hold finite numbers, got {bad[0]!r}")
        return tuple(vals)
    if k in ("values", "ranges", "constraints"):
        if not isinstance(v, Mapping):
            raise ConfigError(f"{where}: {path} must be a table of parameter names, e.g. "
                              f"{_SETTING_EXAMPLE[k]}, got {_type_name(v)}")
        return {str(n): _parameter_setting(f"{path}.{n}", k, x, where) for n, x in v.items()}
    if k == "table":
        if not isinstance(v, Mapping):
            raise ConfigError(
                f"{where}: {path} must be a table (e.g. {{ degree = 3 }}), got {_type_name(v)}"
            )
        return dict(v)
    if k == "pairs":
        if (not isinstance(v, list) or len(v) < 2 or not all(
                isinstance(r, (list, tuple)) and len(r) == 2 for r in v)):
            raise ConfigError(
                f"{where}: {path} must be a list of at least two [mass, sigma] pairs, got {v!r}"
            )
        rows = []
        for i, (m, s) in enumerate(v):
            m = float(_number(f"{path}[{i}][0]", m, where, integer=False))
            s = float(_number(f"{path}[{i}][1]", s, where, integer=False))
            if not (math.isfinite(m) and math.isfinite(s)) or s <= 0:
                raise ConfigError(f"{where}: {path}[{i}] = {[m, s]!r}: sigma must be > 0")
            rows.append((m, s))
        ms = [r[0] for r in rows]
        if any(b <= a for a, b in itertools.pairwise(ms)):
            raise ConfigError(f"{where}: {path}: masses must increase from row to row")
        return tuple(rows)
    raise AssertionError(k)  # pragma: no cover - schema kinds are closed


_SETTING_EXAMPLE = {"values": "{ sigma = 2.0 }", "ranges": "{ width = [0.0, 100.0] }",
                    "constraints": "{ width = { kind = \"gaussian\", center = 30.0, width = 3.0 } }"}


def _constraint_kinds() -> tuple[str, ...]:
    """The constraint kinds a config may name (``peaksift.likelihood.CONSTRAINT_KINDS``,
    imported only when needed: the likelihood layer is slow to import)."""
    from .likelihood import CONSTRAINT_KINDS

    return tuple(CONSTRAINT_KINDS)


def _parameter_setting(path: str, kind: str, v: Any, where: str) -> Any:
    """One entry of ``model.fix`` (a number), ``model.bounds`` (``[low, high]``) or
    ``model.constrain`` (``{kind, center, width}`` or ``[center, width]``), checked."""
    if kind == "values":
        x = float(_number(path, v, where, integer=False))
        if not math.isfinite(x):
            raise ConfigError(f"{where}: {path} must be a finite number, got {v!r}")
        return x
    if kind == "ranges":
        if not isinstance(v, (list, tuple)) or len(v) != 2:
            raise ConfigError(f"{where}: {path} must be [low, high], got {v!r}")
        lo = float(_number(f"{path}[0]", v[0], where, integer=False))
        hi = float(_number(f"{path}[1]", v[1], where, integer=False))
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ConfigError(f"{where}: {path} = {list(v)!r} must have finite low < high")
        return (lo, hi)
    if isinstance(v, (list, tuple)):
        if len(v) != 2:
            raise ConfigError(f"{where}: {path} must be [center, width] (Gaussian) or "
                              f"{{ kind = ..., center = ..., width = ... }}, got {v!r}")
        v = {"kind": "gaussian", "center": v[0], "width": v[1]}
    if not isinstance(v, Mapping):
        raise ConfigError(f"{where}: {path} must be {{ kind = ..., center = ..., width = ... }} "
                          f"or [center, width], got {_type_name(v)} ({v!r})")
    fields_ = ("kind", "center", "width")
    for f in v:
        if f not in fields_:
            hint = closest(f, fields_)
            raise ConfigError(f"{where}: unknown key {path}.{f}"
                              + (f"; did you mean {path}.{hint}?" if hint else "")
                              + " (a constraint has kind, center and width)")
    kinds = _constraint_kinds()
    kind_ = v.get("kind", "gaussian")
    if kind_ not in kinds:
        hint = closest(str(kind_), kinds)
        raise ConfigError(f"{where}: {path}.kind = {kind_!r} is not allowed"
                          + (f"; did you mean {hint!r}?" if hint else "")
                          + f" (choose one of {', '.join(map(repr, kinds))})")
    for f in ("center", "width"):
        if f not in v:
            raise ConfigError(f"{where}: {path}.{f} is required (a {kind_} constraint needs "
                              "center and width)")
    center = float(_number(f"{path}.center", v["center"], where, integer=False))
    width = float(_number(f"{path}.width", v["width"], where, integer=False))
    from .likelihood import Constraint

    try:  # the likelihood layer's own rules (finite, positive width, positive median)
        Constraint(kind_, center, width)
    except FitError as exc:
        raise ConfigError(f"{where}: {path}: {' '.join(str(exc).split())}") from None
    return {"kind": kind_, "center": center, "width": width}


def _check_fit_parameters(md: dict[str, Any], window: tuple[float, float], where: str) -> None:
    """``model.fix`` / ``constrain`` / ``bounds`` name parameters of the free fit, each at
    most once across fix and the others, and ``sigma_from_resolution`` has a sigma to tie."""
    try:
        from . import shapes
        from .likelihood import Model

        sig = shapes.get(md["signal"], **dict(md["signal_options"]))
        bkg = shapes.get(md["background"], **dict(md["background_options"]))
        names = list(Model(sig, bkg, window).parameter_names)
    except (ImportError, AttributeError):  # models layer absent: the fit itself reports it
        return
    shape_bounds = {p.name: (p.lower, p.upper) for p in [*sig.parameters, *bkg.parameters]}
    what = f"{md['signal']} + {md['background']}"
    for key in ("fix", "constrain", "bounds"):
        for n in md[key]:
            if n not in names:
                hint = closest(n, names)
                raise ConfigError(
                    f"{where}: model.{key}.{n}: the free fit has no parameter {n!r}"
                    + (f"; did you mean model.{key}.{hint}?" if hint else "")
                    + f" (parameters of {what}: {', '.join(names)})")
    for n, v in md["fix"].items():
        for key in ("constrain", "bounds"):
            if n in md[key]:
                raise ConfigError(f"{where}: model.fix.{n} and model.{key}.{n} are both set; a "
                                  f"fixed parameter is neither constrained nor bounded: "
                                  f"remove one of them")
        lo, hi = shape_bounds.get(n, (-math.inf, math.inf))
        if not lo <= v <= hi:
            raise ConfigError(f"{where}: model.fix.{n} = {v:g} lies outside the range of "
                              f"{n} [{lo:g}, {hi:g}]")
    for n, c in md["constrain"].items():
        lo, hi = md["bounds"].get(n, shape_bounds.get(n, (-math.inf, math.inf)))
        if not lo <= c["center"] <= hi:
            raise ConfigError(f"{where}: model.constrain.{n}.center = {c['center']:g} lies "
                              f"outside the bounds of {n} [{lo:g}, {hi:g}]")
    tie = md["sigma_from_resolution"]
    unc = md["resolution_uncertainty"]
    if tie == "free":
        if unc is not None:
            raise ConfigError(f"{where}: model.resolution_uncertainty is set but "
                              "model.sigma_from_resolution = \"free\"; set it to "
                              "\"constrained\" or remove resolution_uncertainty")
        return
    if "sigma" not in [p.name for p in sig.parameters]:
        raise ConfigError(f"{where}: model.sigma_from_resolution = {tie!r}, but model.signal = "
                          f"{md['signal']!r} has no Gaussian sigma; use gaussian, crystalball "
                          "or voigt, or set sigma_from_resolution = \"free\"")
    for key in ("fix", "constrain") + (("bounds",) if tie == "fixed" else ()):
        if "sigma" in md[key]:
            raise ConfigError(f"{where}: model.{key}.sigma and model.sigma_from_resolution = "
                              f"{tie!r} both set sigma; remove one of them")
    if tie == "constrained" and unc is None:
        raise ConfigError(f"{where}: model.sigma_from_resolution = \"constrained\" needs "
                          "model.resolution_uncertainty, the relative width of the constraint "
                          "(e.g. 0.1 for 10%)")
    if tie == "fixed" and unc is not None:
        raise ConfigError(f"{where}: model.resolution_uncertainty is set but "
                          "model.sigma_from_resolution = \"fixed\" uses no uncertainty; set "
                          "it to \"constrained\" or remove resolution_uncertainty")


def _section(name: str, raw: Any, where: str) -> dict[str, Any]:
    keys = {k.name: k for k in SCHEMA[name]}
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{where}: [{name}] must be a table, got {_type_name(raw)}")
    sub = {s.split(".", 1)[1] for s in SCHEMA if s.startswith(name + ".")}
    out: dict[str, Any] = {}
    for k, v in raw.items():
        if k in sub:
            continue
        if k not in keys:
            valid = list(keys) + sorted(sub)
            hint = closest(k, valid)
            raise ConfigError(
                f"{where}: unknown key {name}.{k}"
                + (f"; did you mean {name}.{hint}?" if hint else "")
                + f" (valid keys in [{name}]: {', '.join(valid)})"
            )
        out[k] = _value(f"{name}.{k}", keys[k], v, where)
    for k, key in keys.items():
        if k not in out or (out[k] is None and not key.nullable):
            if key.default is _REQUIRED:
                raise ConfigError(f"{where}: {name}.{k} is required ({key.doc})")
            d = key.default
            out[k] = tuple(d) if isinstance(d, list) else (dict(d) if isinstance(d, dict) else d)
    return out


def _check_shape(path: str, name: str, where: str, kind: str,
                 options: Mapping[str, Any] | None = None) -> None:
    """The shape must exist, be of the right kind, and accept its options."""
    try:
        from . import shapes
        table = shapes.available()
    except (ImportError, AttributeError):  # models layer absent: the fit itself reports it
        return
    names = [n for n, info in table.items() if info.get("kind") == kind]
    if name not in names:
        hint = closest(name, names)
        other = table.get(name, {}).get("kind")
        what = f"is a {other} shape, not a {kind} shape" if other else f"is not a {kind} shape"
        raise ConfigError(
            f"{where}: {path} = {name!r} {what}"
            + (f"; did you mean {hint!r}?" if hint else "")
            + f" (available: {', '.join(names)})"
        )
    if options:
        for k, v in options.items():  # every shape option is a number (start, order, ...)
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise ConfigError(f"{where}: {path}_options.{k} must be a number, got {v!r}")
        try:
            shapes.get(name, **dict(options))
        except (FitError, TypeError, ValueError) as exc:
            raise ConfigError(f"{where}: {path}_options {dict(options)!r} not accepted by "
                              f"{name!r}: {' '.join(str(exc).split())}") from None


def _check_calibration_outside_blinding(cal: tuple[float, float], blind: tuple[float, float],
                                        spectrum: Mapping[str, Any], where: str) -> None:
    """The calibration fit must not see blinded data: its window may not overlap the spectrum
    bins hidden by the blinding (every bin overlapping ``blinding.window``,
    :func:`peaksift.blinding.blinded_bins`)."""
    import numpy as np

    from .blinding import hidden_range

    lo, hi = spectrum["window"]
    e = np.linspace(lo, hi, int(spectrum["bins"]) + 1)
    h0, h1 = hidden_range(e, blind) or blind
    c0, c1 = cal
    if c0 < h1 and c1 > h0:
        raise ConfigError(
            f"{where}: calibration.window [{c0:g}, {c1:g}] overlaps blinding.window "
            f"[{blind[0]:g}, {blind[1]:g}] (spectrum bins {h0:g}-{h1:g} GeV are hidden), so "
            f"the calibration fit would see blinded data; end calibration.window at or below "
            f"{h0:g} GeV or start it at or above {h1:g} GeV, or disable the calibration "
            "(calibration.particle = \"\")"
        )


def _check_resolution(res: Mapping[str, Any], spectrum: Mapping[str, Any], where: str) -> None:
    """The resolution must be defined on the whole window (a table covers it) and not far
    below the bin width (:func:`peaksift.resolution.check_resolved`), so the scan's grid of
    hypotheses half a sigma apart stays finite."""
    import numpy as np

    cfg = ResolutionConfig(**res)
    lo, hi = spectrum["window"]
    r = cfg.resolution
    try:
        r.sigma(np.array([lo, hi]))
    except FitError:  # only a table can fail here: its rows do not reach the window's ends
        t0, t1 = r.mass_range  # type: ignore[misc]
        raise ConfigError(
            f"{where}: model.resolution.table covers {t0:g}-{t1:g} GeV but spectrum.window "
            f"is [{lo:g}, {hi:g}]; add rows so the table spans the window (sigma is not "
            "guessed beyond the measured points)") from None
    edges = np.linspace(lo, hi, int(spectrum["bins"]) + 1)
    try:
        check_resolved(r, 0.5 * (edges[1:] + edges[:-1]), edges, what="model.resolution")
    except FitError as exc:
        raise ConfigError(f"{where}: {exc}") from None


def _check_cut(path: str, text: str, where: str) -> None:
    """Parse a cut expression now (syntax and whitelist), so a typo stops the run up front."""
    if not text.strip():
        return
    try:
        from . import cuts
    except ImportError:  # pragma: no cover - candidates layer missing
        return
    checker = getattr(cuts, "compile_cut", None)
    if checker is None:
        return
    try:
        checker(text)
    except ConfigError:
        raise
    except Exception as exc:
        from .errors import CutError

        if isinstance(exc, CutError):
            raise CutError(f"{where}: {path}: {' '.join(str(exc).split())}") from None
        raise


def _build(raw: Mapping[str, Any], *, source: str, base_dir: Path, sha256: str,
           resolve_paths: bool = True) -> Config:
    where = _where(source)
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{where}: the configuration must be a table of sections")
    tops = [s for s in _TOP if "." not in s]
    for k, v in raw.items():
        if k not in tops:
            hint = closest(k, tops)
            hint_txt = f"; did you mean [{hint}]?" if hint else ""
            raise ConfigError(
                f"{where}: unknown section [{k}]{hint_txt} (sections: {', '.join(tops)})"
            )
    vals = {name: _section(name, raw.get(name), where) for name in tops}
    model_raw = raw.get("model") or {}
    res = _section("model.resolution", model_raw.get("resolution"), where)

    # ---- cross-key rules
    inp = vals["input"]
    if resolve_paths:
        files = []
        for f in inp["files"]:
            p = Path(f).expanduser()
            files.append(str(p if p.is_absolute() else (base_dir / p)))
        inp["files"] = tuple(files)

    sp = vals["spectrum"]
    lo, hi = sp["window"]
    if sp["bin_width"] is not None:
        n = (hi - lo) / sp["bin_width"]
        if abs(n - round(n)) > 1e-6 * max(1.0, n) or round(n) < 1:
            raise ConfigError(
                f"{where}: spectrum.bin_width = {sp['bin_width']:g} GeV does not divide the "
                f"window [{lo:g}, {hi:g}] into whole bins ({n:.4g}); change the width or window"
            )
        sp["bins"] = round(n)

    given = [k for k in ("relative", "absolute", "table") if res[k] is not None]
    if len(given) != 1:
        raise ConfigError(
            f"{where}: model.resolution needs exactly one of relative, absolute or table "
            f"(got {', '.join(given) if given else 'none'}); e.g. [model.resolution] "
            "relative = 0.01 for sigma = 1% of the mass"
        )
    _check_resolution(res, sp, where)

    pr = vals["pairing"]
    if pr["choose"] == "closest" and pr["target_mass"] is None:
        raise ConfigError(f"{where}: pairing.target_mass is required when pairing.choose = "
                          "\"closest\" (the mass in GeV the chosen pair should be nearest)")

    ob = vals["objects"]
    for key in ("collection",):
        if not ob[key].strip():
            raise ConfigError(f"{where}: objects.{key} must name a collection, e.g. \"muon\"")
    for key in ("cut", "second_cut", "event_cut"):
        _check_cut(f"objects.{key}", ob[key], where)
    if ob["second_cut"] and not ob["second_collection"]:
        raise ConfigError(f"{where}: objects.second_cut is set but objects.second_collection is "
                          "empty; name the second collection or move the cut to objects.cut")

    sc = vals["scan"]
    if sc["step"] is not None and sc["points"] is not None:
        raise ConfigError(f"{where}: give scan.step or scan.points, not both")
    s0 = sc["start"] if sc["start"] is not None else lo
    s1 = sc["stop"] if sc["stop"] is not None else hi
    for k, v in (("start", sc["start"]), ("stop", sc["stop"])):
        if v is not None and not (lo <= v <= hi):
            raise ConfigError(f"{where}: scan.{k} = {v:g} lies outside spectrum.window "
                              f"[{lo:g}, {hi:g}]; the scan must stay inside the fit window")
    if not s1 > s0:
        raise ConfigError(f"{where}: scan.stop ({s1:g}) must be above scan.start ({s0:g})")

    md = vals["model"]
    _check_shape("model.signal", md["signal"], where, "signal", md["signal_options"])
    _check_shape("model.background", md["background"], where, "background",
                 md["background_options"])
    _check_fit_parameters(md, (lo, hi), where)
    if sc["signal"]:
        _check_shape("scan.signal", sc["signal"], where, "signal")

    bl = vals["blinding"]
    if bl["enabled"]:
        if bl["window"] is None:
            raise ConfigError(f"{where}: blinding.window is required when blinding.enabled = "
                              "true, e.g. window = [150.0, 170.0]")
        b0, b1 = bl["window"]
        if b0 < lo or b1 > hi:
            raise ConfigError(f"{where}: blinding.window [{b0:g}, {b1:g}] must lie inside "
                              f"spectrum.window [{lo:g}, {hi:g}]")

    cal = vals["calibration"]
    if cal["particle"]:
        from .resonances import lookup

        try:
            lookup(cal["particle"])
        except ConfigError as exc:
            raise ConfigError(f"{where}: calibration.particle: {exc}") from None
        if cal["window"] is None:
            raise ConfigError(f"{where}: calibration.window is required when "
                              "calibration.particle is set, e.g. window = [70.0, 110.0]")
        if bl["enabled"]:
            _check_calibration_outside_blinding(cal["window"], bl["window"], sp, where)
        _check_shape("calibration.signal", cal["signal"], where, "signal",
                     cal["signal_options"])
        _check_shape("calibration.background", cal["background"], where, "background",
                     cal["background_options"])

    li = vals["limits"]
    if li["toy_masses"] and li["method"] != "toys":
        raise ConfigError(f"{where}: limits.toy_masses is set but limits.method = "
                          f"{li['method']!r}; set method = \"toys\" or remove toy_masses")
    for i, m in enumerate(li["toy_masses"]):
        if not (s0 <= m <= s1):
            raise ConfigError(f"{where}: limits.toy_masses[{i}] = {m:g} lies outside "
                              f"[{s0:g}, {s1:g}] GeV (spectrum.window, or scan.start / "
                              "scan.stop); choose masses inside the scan range")

    ex = vals["execution"]
    if ex["address"] and ex["engine"] != "dask":
        raise ConfigError(f"{where}: execution.address is set but execution.engine = "
                          f"{ex['engine']!r}; set engine = \"dask\" to use a scheduler")

    return Config(
        input=InputConfig(**inp),
        spectrum=SpectrumConfig(**sp),
        objects=ObjectsConfig(**ob),
        pairing=PairingConfig(**pr),
        model=ModelConfig(**md, resolution=ResolutionConfig(**res)),
        scan=ScanConfig(**sc),
        significance=SignificanceConfig(**vals["significance"]),
        blinding=BlindingConfig(**bl),
        limits=LimitsConfig(**vals["limits"]),
        calibration=CalibrationConfig(**cal),
        execution=ExecutionConfig(**ex),
        output=OutputConfig(**vals["output"]),
        source=source,
        base_dir=base_dir,
        sha256=sha256,
    )


def load_config(config: str | Path | Mapping[str, Any] | Config, *,
                base_dir: str | Path | None = None) -> Config:
    """Read and validate a search configuration.

    Parameters
    ----------
    config : path, mapping or Config
        A TOML file, a mapping with the same layout (paths relative to ``base_dir``, default
        the working directory), or an already validated :class:`Config` (returned as is).
    base_dir : path, optional
        Directory for relative paths when ``config`` is a mapping.

    Raises
    ------
    peaksift.errors.ConfigError
        Missing file, TOML syntax error (with line and column), unknown key, wrong type or
        out-of-range value; the message names the key path and suggests a fix.
    """
    if isinstance(config, Config):
        return config
    if isinstance(config, Mapping):
        import json

        text = json.dumps(config, sort_keys=True, default=str).encode()
        return _build(config, source="<dict>",
                      base_dir=Path(base_dir).resolve() if base_dir else Path.cwd(),
                      sha256=hashlib.sha256(text).hexdigest())
    path = Path(config)
    if not path.exists():
        raise ConfigError(f"config file {str(path)!r} does not exist; check the path "
                          "(write one with `peaksift demo OUTDIR` for an example)")
    if path.is_dir():
        raise ConfigError(f"config {str(path)!r} is a directory; give the TOML file itself")
    data = path.read_bytes()
    try:
        raw = _toml.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(f"config {path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except _toml.TOMLDecodeError as exc:
        raise ConfigError(f"config {path}: TOML syntax error: {' '.join(str(exc).split())}") from None
    return _build(raw, source=str(path), base_dir=path.resolve().parent,
                  sha256=hashlib.sha256(data).hexdigest())


# ---------------------------------------------------------------------------- reference
def _default_text(key: _Key) -> str:
    d = key.default
    if d is _REQUIRED:
        return "required"
    if d is None:
        return "unset"
    if isinstance(d, bool):
        return "true" if d else "false"
    if isinstance(d, str):
        return f'"{d}"'
    if isinstance(d, list):
        return "[" + ", ".join(f'"{x}"' for x in d) + "]"
    if isinstance(d, dict):
        return "{}"
    return str(d)


def _allowed_text(key: _Key) -> str:
    if key.choices:
        return ", ".join(f'"{c}"' for c in key.choices)
    rng = _range_text(key)
    kinds = {"str": "string", "int": "integer", "float": "number", "bool": "true/false",
             "window": "[low, high] GeV", "paths": "string or list of strings",
             "strings": "list of strings", "floats": "list of numbers", "table": "table",
             "pairs": "[[mass, sigma], ...]", "values": "table of numbers",
             "ranges": "table of [low, high]", "constraints": "table of constraints"}
    base = kinds.get(key.kind, key.kind)
    return base + (f", {rng}" if rng else "")


def reference_markdown() -> str:
    """The key reference (one table per section) that ``docs/config.md`` embeds."""
    lines: list[str] = []
    for sec, keys in SCHEMA.items():
        lines.append(f"### [{sec}]")
        lines.append("")
        lines.append("| key | default | allowed | meaning |")
        lines.append("|---|---|---|---|")
        for k in keys:
            doc = k.doc.replace("{constraint_kinds}", ", ".join(
                f"`{c}`" for c in _constraint_kinds())).replace("|", "\\|")
            lines.append(f"| `{sec}.{k.name}` | `{_default_text(k)}` | {_allowed_text(k)} | {doc} |")
        lines.append("")
    return "\n".join(lines)
