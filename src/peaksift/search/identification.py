"""dE/dx identification for a search: the calibration pass over the tracks and its record.

When ``[identification]`` is on, :func:`dedx_identification` reads the paired collection's
momentum and dE/dx once (streamed chunk by chunk), fills the dE/dx-against-momentum density
for the report's figure, and -- unless ``identification.scale`` is given -- fits the Bethe
curve's scale (and, with ``fit_resolution``, the resolution) on the tracks of
``calibration_hypothesis`` in ``calibration_momentum``
(:func:`peaksift.energy_loss.fit_dedx_response`).  The pairing then runs with the resulting
:class:`~peaksift.energy_loss.DedxResponse`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..config import Config
from ..errors import InputError

#: momentum axis of the figure's density, GeV (log-spaced)
P_EDGES = np.geomspace(0.05, 20.0, 121)


@dataclass(frozen=True)
class DedxOutcome:
    """The identification a search ran with: response, calibration fit and the density."""

    response: Any
    fit: Any
    p_edges: np.ndarray
    dedx_edges: np.ndarray
    counts: np.ndarray
    tracks: int

    def to_dict(self) -> dict[str, Any]:
        r = self.response
        out: dict[str, Any] = {"response": r.to_dict(), "tracks_read": int(self.tracks),
                               "material_z_over_a": r.material.z_over_a,
                               "material_mean_excitation_ev": r.material.mean_excitation_ev}
        if self.fit is not None:
            f = self.fit
            out["calibration_fit"] = {
                "scale": {"value": f.scale, "error": f.scale_error},
                "resolution": {"value": f.resolution, "error": f.resolution_error}
                if f.resolution_error > 0 else None,
                "tracks_used": int(f.n_tracks),
                "method": "Gaussian maximum likelihood of measured / Bethe mean, iterated "
                          "3-sigma clip",
            }
        else:
            out["calibration_fit"] = None
        return out


def dedx_identification(cfg: Config, *, progress: bool = False) -> DedxOutcome | None:
    """The calibration pass (module guide); None when identification is off."""
    idc = cfg.identification
    if not idc.enabled:
        return None
    from ..energy_loss import fit_dedx_response
    from ..events import iter_events

    base = idc.response()
    coll = cfg.objects.collection
    fields = [f for f in (idc.field, idc.samples_field) if f]
    p_lo, p_hi = idc.calibration_momentum
    band_p, band_d, band_n = [], [], []
    counts = None
    d_edges = None
    tracks = 0
    for ev in _chunks(cfg, coll, fields, iter_events):
        import awkward as ak

        t = ev[coll]
        missing = [f for f in fields if f not in t.fields]
        if missing:
            raise InputError(
                f"collection {coll!r} has no field {missing[0]!r} (identification."
                f"{'field' if missing[0] == idc.field else 'samples_field'}); it has "
                f"{', '.join(t.fields)}")
        flat = {f: ak.to_numpy(ak.flatten(t[f], axis=1)).astype(np.float64)
                for f in ("pt", "eta", *fields)}
        p = flat["pt"] * np.cosh(flat["eta"])
        d = flat[idc.field]
        tracks += p.size
        if d_edges is None:
            ok = d[np.isfinite(d) & (d > 0)]
            top = 6.0 * float(np.median(ok)) if ok.size else 1.0
            d_edges = np.linspace(0.0, top, 121)
            counts = np.zeros((P_EDGES.size - 1, d_edges.size - 1))
        counts += np.histogram2d(p, d, bins=(P_EDGES, d_edges))[0]
        s = (p >= p_lo) & (p <= p_hi)
        band_p.append(p[s])
        band_d.append(d[s])
        if idc.samples_field:
            band_n.append(flat[idc.samples_field][s])
    fit = None
    response = base
    if idc.scale is None:
        p = np.concatenate(band_p) if band_p else np.zeros(0)
        try:
            fit = fit_dedx_response(
                p, np.concatenate(band_d) if band_d else p,
                base, hypothesis=idc.calibration_hypothesis,
                samples=np.concatenate(band_n) if band_n else None,
                fit_resolution=idc.fit_resolution)
        except InputError as exc:
            raise InputError(f"identification calibration on {idc.calibration_hypothesis} "
                             f"tracks with {p_lo:g} <= p <= {p_hi:g} GeV: {exc}; widen "
                             "identification.calibration_momentum or set "
                             "identification.scale") from None
        response = fit.response
    if counts is None or d_edges is None:
        d_edges = np.linspace(0.0, 1.0, 2)
        counts = np.zeros((P_EDGES.size - 1, 1))
    return DedxOutcome(response, fit, P_EDGES, d_edges, counts, tracks)


def _chunks(cfg: Config, coll: str, fields: list[str], iter_events: Any) -> Any:
    """The collection's chunks; a missing dE/dx field is named by its config key."""
    idc = cfg.identification
    try:
        yield from iter_events(cfg.input.files, collections=[coll], fields=fields,
                               chunk_events=cfg.execution.chunk_events, strict=cfg.input.strict)
    except InputError as exc:
        msg = " ".join(str(exc).split())
        for key, name in (("field", idc.field), ("samples_field", idc.samples_field)):
            if name and f"'{name}'" in msg:
                where = f"config {cfg.source}" if cfg.source != "<dict>" else "config"
                raise InputError(f"{where}: identification.{key}: collection {coll!r} has no "
                                 f"field {name!r} ({msg})") from None
        raise
