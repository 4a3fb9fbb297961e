"""One channel of a combination: :class:`Channel` (its spectrum, background, signal,
efficiency, luminosity and their uncertainties, shape nuisances and background candidates)
and its preparation on the combination's grid of masses (:func:`_prepare_all`).

:func:`peaksift.stats.channels.combine` scans channels, :func:`peaksift.stats.channel_limits.
combined_limits` sets limits on them; both start from :func:`_prepare_all`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from .scan_inputs import _prepare_model, _signal_params

__all__ = ["Channel"]


@dataclass(frozen=True)
class Channel:
    """One channel of a combination.

    Parameters
    ----------
    name : str
    data : MassHistogram, masses, or (masses, weights)
    background : str or Shape
    luminosity : float
        Integrated luminosity (e.g. fb^-1; sigma x B then comes in fb).
    signal_model : SignalModel, optional
        Shape, resolution and efficiency as functions of mass (else give ``signal``,
        ``resolution`` and ``efficiency``).
    signal, resolution, signal_params, natural_width, window, bins :
        As in :func:`peaksift.scan`.
    efficiency : float or callable, optional
        Efficiency x acceptance (default the signal model's).
    luminosity_uncertainty, efficiency_uncertainty : float
        Relative uncertainties (e.g. 0.02), each a log-normal constrained nuisance of the
        joint likelihood (0: none).
    luminosity_group : str, optional
        Channels with the same group share one luminosity (one nuisance, fully correlated;
        their ``luminosity_uncertainty`` must agree); default: the channel's own.
    shape_nuisances : mapping, optional
        Relative sizes of the channel's signal-shape nuisances (``mass_scale``,
        ``mass_resolution``), profiled with their constraints in the combined scan;
        ``shape_constraint`` their kind (``"gaussian"`` or ``"lognormal"``);
        ``toy_constraints`` whether the combination's toys keep their constraints' centres
        at 1 (``"fixed"``) or draw them per toy (``"sampled"``).
    background_candidates : mapping, optional
        Label -> background shape: the channel's function is profiled as a discrete choice
        among them in the combined scan (:mod:`peaksift.stats.channel_envelope`), with
        ``background_penalty`` per free parameter (``background_parameters`` label ->
        count; default the shape's parameters and its yield).
    """

    name: str
    data: Any
    background: Any
    luminosity: float
    signal_model: Any = None
    signal: Any = None
    resolution: Any = None
    efficiency: Any = None
    signal_params: Mapping[str, float] | None = None
    natural_width: Any = None
    window: tuple[float, float] | None = None
    bins: int | None = None
    luminosity_uncertainty: float = 0.0
    efficiency_uncertainty: float = 0.0
    luminosity_group: str | None = None
    shape_nuisances: Mapping[str, float] | None = None
    shape_constraint: str = "gaussian"
    toy_constraints: str = "fixed"
    background_candidates: Mapping[str, Any] | None = None
    background_parameters: Mapping[str, int] | None = None
    background_penalty: float = 1.0

    def shape_spec(self, prepared: tuple, blinded: np.ndarray, *, every_mass: bool = False,
                   repeat: int = 1) -> Any:
        """``(signal, base_params, SignalNuisances)`` of this channel's shape factors for
        :func:`~peaksift.stats.joint.profile_joint` (None without any): at the unblinded
        hypotheses (``every_mass``: at all), the stack repeated ``repeat`` times."""
        sizes = {k: float(v) for k, v in (self.shape_nuisances or {}).items() if v}
        if not sizes:
            return None
        if self.toy_constraints not in ("fixed", "sampled"):
            raise FitError(f"channel {self.name!r}: toy_constraints must be 'fixed' or "
                           f"'sampled', got {self.toy_constraints!r}")
        from ..likelihood import SignalNuisances

        try:
            nuis = SignalNuisances.make(sizes, {k: self.shape_constraint for k in sizes})
        except FitError as exc:
            raise FitError(f"channel {self.name!r}: {exc}") from None
        if nuis.shape_active != tuple(k for k in nuis.shape_active if k in sizes) or set(
                sizes) - set(nuis.shape_active):
            raise FitError(f"channel {self.name!r}: shape_nuisances takes mass_scale and "
                           f"mass_resolution, got {sorted(sizes)}")
        _, spec, info = prepared
        keep = np.ones(blinded.size, bool) if every_mass else ~blinded
        base = _signal_params(info["signal"], spec.window, info["masses"][keep],
                              info["sigma"][keep], self.natural_width, info["signal_params"])
        base = [np.tile(np.asarray(v), (repeat,) + (1,) * (np.ndim(v) - 1)) if np.ndim(v)
                else v for v in base]
        return info["signal"], base, nuis

    def conversion(self, masses: np.ndarray) -> np.ndarray:
        """Signal events per unit of sigma x B at ``masses``: ``L eff(m)``."""
        if not (isinstance(self.luminosity, (int, float)) and self.luminosity > 0):
            raise FitError(f"channel {self.name!r}: luminosity must be a number > 0, got "
                           f"{self.luminosity!r}")
        eff = self.efficiency
        if eff is None:
            if self.signal_model is None:
                raise FitError(f"channel {self.name!r} has no efficiency: give efficiency= or "
                               "a signal_model")
            eff = self.signal_model.efficiency
        e = (np.asarray(eff(masses), float) if callable(eff)
             else np.full(masses.shape, float(eff)))
        if np.any(~np.isfinite(e) | (e < 0)):
            raise FitError(f"channel {self.name!r}: the efficiency must be finite and >= 0 at "
                           "every mass")
        return float(self.luminosity) * e


def _prepare(ch: Channel, masses: Any, blind: Any) -> tuple[Any, Any, dict[str, Any]]:
    try:
        return _prepare_model(ch.data, ch.signal, ch.background, masses,
                              resolution=ch.resolution, window=ch.window,
                              natural_width=ch.natural_width, blind=blind,
                              signal_params=ch.signal_params, bins=ch.bins,
                              signal_model=ch.signal_model)
    except FitError as exc:
        raise FitError(f"channel {ch.name!r}: {exc}") from None


def _prepare_all(channels: Any, masses: Any, blind: Any) -> tuple:
    """Every channel checked and prepared on one grid of masses (given, or spread over the
    first channel's window when a number): (channels,
    their (model, spectrum, info), the masses, the blinded-mass mask, the sigma x B to
    signal-yield conversion of each channel at those masses)."""
    chans = _check(channels)
    prepared = []
    for k, ch in enumerate(chans):
        prepared.append(_prepare(ch, masses, blind))
        if k == 0:
            masses = prepared[0][2]["masses"]
    m_all = np.asarray(masses, float)
    bl = prepared[0][2]["blinded_mass"]
    conv = [ch.conversion(m_all) for ch in chans]
    return chans, prepared, m_all, bl, conv


def _check(channels: Sequence[Channel]) -> list[Channel]:
    chans = list(channels)
    if not chans:
        raise FitError("combine needs at least one channel")
    names = [c.name for c in chans]
    if len(set(names)) != len(names):
        raise FitError(f"channel names must differ, got {names}")
    return chans
