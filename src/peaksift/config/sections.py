"""The validated configuration as frozen dataclasses, one per section."""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

from ..resolution import Resolution
from .schema import _TOP


# ---------------------------------------------------------------------------- dataclasses
@dataclass(frozen=True)
class SignalModelConfig:
    """``[signal_model]``: simulated samples (or a saved model) that give the scan and the
    limits their signal shape, resolution and efficiency as functions of mass."""

    files: tuple[str, ...] = ()
    masses: tuple[float, ...] = ()
    mass_column: str = ""
    generated: tuple[float, ...] = ()
    shape: str = "crystalball"
    order: int = 1
    efficiency_order: int = 2
    raise_order: bool = False
    fix: Any = field(default_factory=dict)
    saved: str = ""

    @property
    def enabled(self) -> bool:
        return bool(self.files or self.saved)


@dataclass(frozen=True)
class InputConfig:
    files: tuple[str, ...]
    weights: bool = True
    strict: bool = False
    column_pattern: str = "{collection}.{field}"
    hash_inputs: bool = True


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
    hypotheses: tuple[str, ...] = ()
    assignment: str = "both"


@dataclass(frozen=True)
class OwnMaterialConfig:
    z_over_a: float | None = None
    mean_excitation_ev: float | None = None
    density: float | None = None
    density_effect: tuple[float, ...] = ()


@dataclass(frozen=True)
class IdentificationConfig:
    """The ``[identification]`` keys: dE/dx identification (on when ``resolution`` is set)."""

    resolution: float | None = None
    material: str = "argon_co2_70_30"
    field: str = "dedx"
    scale: float | None = None
    calibration_hypothesis: str = "pion"
    calibration_momentum: tuple[float, float] = (0.4, 0.6)
    fit_resolution: bool = False
    samples_field: str = ""
    reference_samples: float | None = None
    samples_exponent: float = 0.5
    band: float = 3.0
    own_material: OwnMaterialConfig = dataclasses.field(default_factory=OwnMaterialConfig)

    @property
    def enabled(self) -> bool:
        return self.resolution is not None

    def response(self, scale: float | None = None, resolution: float | None = None) -> Any:
        """The :class:`peaksift.energy_loss.DedxResponse` these keys describe (``scale``:
        the fitted one when the config leaves it unset; 1 until then)."""
        from ..energy_loss import DedxResponse, Material

        mat: Any = self.material
        if self.material == "own":
            o = self.own_material
            c = tuple(o.density_effect) or (0.0,) * 6
            mat = Material("own", o.z_over_a, o.mean_excitation_ev, o.density, *c)
        with_n = bool(self.samples_field)
        return DedxResponse(
            mat, scale=float(scale or self.scale or 1.0),
            resolution=float(resolution or self.resolution),
            field=self.field, samples_field=self.samples_field or None,
            reference_samples=self.reference_samples if with_n else None,
            samples_exponent=self.samples_exponent if with_n else None)


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
class SystematicsConfig:
    mass_scale: float = 0.0
    mass_resolution: float = 0.0
    constraint: str = "gaussian"
    toy_constraints: str = "fixed"
    background_families: tuple[str, ...] = ()
    order_test_size: float = 0.05
    envelope: bool = True
    penalty: float = 1.0
    template: str = ""
    spurious_limit: float = 0.2
    spurious_uncertainty: bool = False
    toy_limits: bool = False
    sqrt_s: float | None = None

    @property
    def enabled(self) -> bool:
        """Any systematic uncertainty configured (nuisances or a background family)."""
        return bool(self.mass_scale or self.mass_resolution or self.background_families)


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
    unreadable_files: str = "stop"
    start_method: str = "auto"


@dataclass(frozen=True)
class RunConfig:
    """What the figures' run label says: the run's name, sqrt(s) in TeV, the channel."""

    name: str = ""
    sqrt_s: float | None = None
    channel: str = ""


@dataclass(frozen=True)
class OutputConfig:
    dir: str = "peaksift_out"
    formats: tuple[str, ...] = ("png",)
    figures: tuple[str, ...] = ("all",)
    log_scale: bool = False
    title: str = ""

    def draws(self, name: str) -> bool:
        """Whether ``figures`` asks for the figure ``name`` (one of ``_vocabulary.FIGURES``)."""
        from .._vocabulary import figure_wanted

        return figure_wanted(self.figures, name)


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
    identification: IdentificationConfig = field(default_factory=IdentificationConfig)
    model: ModelConfig = field(default_factory=ModelConfig)
    scan: ScanConfig = field(default_factory=ScanConfig)
    significance: SignificanceConfig = field(default_factory=SignificanceConfig)
    blinding: BlindingConfig = field(default_factory=BlindingConfig)
    limits: LimitsConfig = field(default_factory=LimitsConfig)
    systematics: SystematicsConfig = field(default_factory=SystematicsConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    signal_model: SignalModelConfig = field(default_factory=SignalModelConfig)
    execution: ExecutionConfig = field(default_factory=ExecutionConfig)
    run: RunConfig = field(default_factory=RunConfig)
    output: OutputConfig = field(default_factory=OutputConfig)
    source: str = "<dict>"
    base_dir: Path = field(default_factory=Path.cwd)
    sha256: str = ""

    def to_dict(self) -> dict[str, Any]:
        """The validated configuration as plain JSON-ready data (echoed in results.json)."""
        out: dict[str, Any] = {}
        for sec in _TOP:
            if sec in ("model.resolution", "identification.own_material"):
                continue
            obj = self._section(sec)
            d = {f.name: _plain(getattr(obj, f.name)) for f in fields(obj)
                 if not (sec == "model" and f.name == "resolution")
                 and not (sec == "identification" and f.name == "own_material")}
            if sec == "model":
                r = self.model.resolution
                d["resolution"] = {f.name: _plain(getattr(r, f.name)) for f in fields(r)}
            if sec == "identification":
                o = self.identification.own_material
                d["own_material"] = {f.name: _plain(getattr(o, f.name)) for f in fields(o)}
            out[sec] = d
        return out

    def _section(self, name: str) -> Any:
        if name == "model.resolution":
            return self.model.resolution
        if name == "identification.own_material":
            return self.identification.own_material
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
        from .build import _build  # build imports these dataclasses; import at call time

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
