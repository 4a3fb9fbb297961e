"""The outcome of :func:`peaksift.stats.channels.combine`: :class:`Combination` (a frozen
value: the combination's scan, every channel's, ``to_dict``/``from_dict``, the global
significance with toys that generate every channel, ``plot``)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._format import format_pm, mass_text, no_best
from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from . import lee
from .channel_envelope import envelope_toy_scans
from .channel_toys import combined_toy_scans
from .envelope_choice import read_channel_entries
from .scan_result import p_text

__all__ = ["Combination"]


@dataclass(frozen=True, repr=False, eq=False)
class Combination(FrozenValue):
    """Outcome of :func:`combine` (a frozen value).

    Attributes
    ----------
    masses, q0, z_local, p_local : ndarray
        The combination's scan (NaN where blinded).
    cross_section, cross_section_error : ndarray
        Fitted sigma x B (``unit``) and its error at every hypothesis.
    channels : mapping
        Channel name -> its own :class:`~peaksift.stats.scan.ScanResult`.
    conversion : mapping
        Channel name -> events per unit sigma x B at every hypothesis (``L eff(m)``).
    z_expected : ndarray or None
        Median expected combined significance of ``expected_cross_section``.
    """

    masses: np.ndarray
    q0: np.ndarray
    z_local: np.ndarray
    p_local: np.ndarray
    cross_section: np.ndarray
    cross_section_error: np.ndarray
    converged: np.ndarray
    best_index: int
    best_mass: float
    channels: Any
    conversion: Any
    luminosity: Any
    blind: tuple[float, float] | None
    blinded: np.ndarray
    z_expected: np.ndarray | None = None
    expected_cross_section: float | None = None
    unit: str = "fb"
    notes: tuple[str, ...] = ()
    prepared: tuple = field(default=(), compare=False)
    nuisances: tuple[str, ...] = ()
    nuisance_values: np.ndarray | None = None   # (n_masses, J) fitted, NaN where blinded
    #: per channel its background functions profiled in the scan (None: none were)
    envelope: Any = None
    norms: Any = field(default=None, compare=False)
    #: per channel its shape factors for the toys (None: none), and their ensemble
    shapes: tuple = field(default=(), compare=False)
    toy_constraints: tuple = field(default=(), compare=False)
    envelope_models: Any = field(default=None, compare=False)

    @property
    def best(self) -> dict[str, float]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i]),
                "cross_section": float(self.cross_section[i])}

    def _cross_section_text(self) -> str:
        """sigma x B at the best mass with its error (two significant digits of the error)."""
        i = self.best_index
        return format_pm(self.cross_section[i], self.cross_section_error[i], self.unit)

    def __repr__(self) -> str:
        b, why = self.best, no_best(self.best["z_local"], self.blinded)
        return (f"Combination({', '.join(self.channels)}; " + (f"no best: {why})" if why else
                f"best {mass_text(b['mass'])} GeV: Z_local = {b['z_local']:.2f}, sigma x B = "
                f"{self._cross_section_text()})"))

    def _summary(self) -> list[tuple[str, str]]:
        b, why = self.best, no_best(self.best["z_local"], self.blinded)
        rows = [("channels", ", ".join(self.channels)),
                ("masses", f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} GeV"),
                ("best mass", f"none: {why}" if why else f"{b['mass']:.2f} GeV"),
                ("Z local", "n/a" if why else f"{b['z_local']:.2f} (p = {p_text(b)})"),
                ("sigma x B at best", "n/a" if why else self._cross_section_text())]
        if self.blind is not None:
            rows.append(("blinded", f"{self.blind[0]:g}-{self.blind[1]:g} GeV"))
        return rows

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict whose keys are the attribute names (``channels``: each channel's
        :meth:`ScanResult.to_dict`), plus the ``best`` summary; blinded entries ``None``;
        without the prepared models (no toys from it)."""
        return plain({
            "masses": self.masses, "q0": self.q0, "z_local": self.z_local,
            "p_local": self.p_local, "cross_section": self.cross_section,
            "cross_section_error": self.cross_section_error,
            "converged": [bool(v) for v in self.converged], "best_index": int(self.best_index),
            "best_mass": float(self.best_mass), "best": self.best,
            "channels": {n: s.to_dict() for n, s in self.channels.items()},
            "conversion": dict(self.conversion), "luminosity": dict(self.luminosity),
            "blind": None if self.blind is None else list(self.blind),
            "blinded": [bool(v) for v in self.blinded], "z_expected": self.z_expected,
            "expected_cross_section": self.expected_cross_section, "unit": self.unit,
            "notes": list(self.notes), "nuisances": list(self.nuisances),
            "nuisance_values": self.nuisance_values, "norms": self.norms,
            "envelope": self.envelope})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Combination:
        """The Combination that :meth:`to_dict` wrote (without the models: no toys)."""
        from .scan_result import ScanResult

        def arr(v: Any) -> np.ndarray | None:  # None entries (blinded, NaN) back to NaN
            return None if v is None else np.array(v, float)

        try:
            blind = d.get("blind")
            return cls(
                masses=arr(d["masses"]), q0=arr(d["q0"]), z_local=arr(d["z_local"]),
                p_local=arr(d["p_local"]), cross_section=arr(d["cross_section"]),
                cross_section_error=arr(d["cross_section_error"]),
                converged=np.array(d["converged"], bool), best_index=int(d["best_index"]),
                best_mass=float(d["best_mass"]),
                channels={n: ScanResult.from_dict(v) for n, v in d["channels"].items()},
                conversion={n: arr(v) for n, v in d["conversion"].items()},
                luminosity={n: float(v) for n, v in d["luminosity"].items()},
                blind=None if blind is None else (float(blind[0]), float(blind[1])),
                blinded=np.array(d["blinded"], bool), z_expected=arr(d.get("z_expected")),
                expected_cross_section=d.get("expected_cross_section"), unit=d["unit"],
                notes=tuple(d.get("notes") or ()), nuisances=tuple(d.get("nuisances") or ()),
                nuisance_values=arr(d.get("nuisance_values")), norms=arr(d.get("norms")),
                envelope=read_channel_entries(d.get("envelope")))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"Combination.from_dict: not a combination written by "
                           f"Combination.to_dict ({exc!r})") from None

    def nuisances_at_best(self) -> dict[str, Any]:
        """Each nuisance at the best mass (results.json's ``combined.nuisances``)."""
        return plain({n: self._nuisance(j) for j, n in enumerate(self.nuisances)})

    def _nuisance(self, j: int) -> dict[str, Any]:
        """A normalisation nuisance (its pull and log-normal scale per channel) or a shape
        factor (its relative shift k - 1) at the best mass."""
        v = (None if self.nuisance_values is None
             else self.nuisance_values[self.best_index, j])
        nj = 0 if self.norms is None else self.norms.shape[1]
        if j < nj:
            return {"pull_at_best": v, "log_scale": self.norms[:, j]}
        return {"shift_at_best": v}

    def global_significance(self, method: str = "upcrossings", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5,
                            executor: Any = None) -> dict[str, Any]:
        """Global significance of the combination's best excess; the toys generate every
        channel from its background-only fit (each channel from its own seed stream) and
        are scanned with the joint likelihood (their batches on ``executor`` when given).
        As :meth:`ScanResult.global_significance`."""
        if method not in ("upcrossings", "toys"):
            raise FitError(f"global_significance method must be 'upcrossings' or 'toys', "
                           f"got {method!r}")
        if len(self.channels) == 1:
            return next(iter(self.channels.values())).global_significance(
                method, toys=toys, seed=seed, u0=u0, executor=executor)
        if not self.prepared:
            raise FitError("this Combination carries no models (rebuilt from a dict?); rerun "
                           "combine")
        mask = ~self.blinded
        if not mask.any():
            raise FitError("every mass hypothesis of this combination is blinded")
        q_obs = float(self.q0[self.best_index])
        gaps = np.diff(np.flatnonzero(mask)) > 1
        n = (1000 if method == "toys" else 200) if toys is None else int(toys)
        if method == "upcrossings" and n == 0:
            res = lee.global_from_upcrossings(q_obs, self.q0[mask][None, :], u0=u0,
                                              source="observed scan", gaps=gaps)
        else:
            conv = [np.asarray(k)[mask] for k in self.conversion.values()]
            kw = {"seed": seed, "norms": self.norms, "shapes": self.shapes or None,
                  "ensembles": self.toy_constraints or None, "executor": executor}
            scans = (combined_toy_scans(list(self.prepared), conv, n, **kw)
                     if self.envelope_models is None else
                     envelope_toy_scans(self.envelope_models, conv, n, **kw))
            res = (lee.global_from_toys(q_obs, scans.max(axis=1)) if method == "toys" else
                   lee.global_from_upcrossings(q_obs, scans, u0=u0, gaps=gaps))
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index])}
        out.update(res)
        return plain(out)

    def plot(self, path: Any = None, *, title: str | None = None, run: Any = None,
             symbol: str = "m", channel_scans: Any = None) -> Any:
        """Local p-value against mass: each channel (thin) and the combination (thick);
        see :func:`peaksift.stats.channel_plot.pvalue_figure` (no pyplot)."""
        from .channel_plot import pvalue_figure

        return pvalue_figure(self, path, title=title, run=run, symbol=symbol,
                             channel_scans=channel_scans)
