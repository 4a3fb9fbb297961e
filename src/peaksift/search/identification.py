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

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .._values import FrozenValue
from ..config import Config
from ..errors import InputError

if TYPE_CHECKING:  # energy_loss compiles kernels: imported when identification runs
    from ..energy_loss import DedxFit, DedxResponse

#: momentum axis of the figure's density, GeV (log-spaced)
P_EDGES = np.geomspace(0.05, 20.0, 121)


@dataclass(frozen=True, eq=False, repr=False)
class DedxOutcome(FrozenValue):
    """The identification a search ran with (results.json ``identification``): the response
    the pairing used, the calibration fit that gave it (None when ``identification.scale``
    was given), the number of tracks read, and the tracks' dE/dx-against-momentum density
    (``counts[i, j]`` between ``p_edges[i:i+2]`` GeV and ``dedx_edges[j:j+2]``) that
    :meth:`plot` draws.  Every attribute is a key of :meth:`to_dict`."""

    response: DedxResponse
    calibration_fit: DedxFit | None
    tracks_read: int
    p_edges: np.ndarray
    dedx_edges: np.ndarray
    counts: np.ndarray

    def __repr__(self) -> str:
        r, f = self.response, self.calibration_fit
        scale = f"scale {f.scale} (fitted)" if f is not None else f"scale {r.scale:.5g} (given)"
        return (f"DedxOutcome({r.material.name}, field {r.field!r}, {scale}, resolution "
                f"{r.resolution:.3g}; {self.tracks_read} tracks read)")

    def plot(self, path: Any = None, *, hypotheses: Sequence[str] = (),
             band: float = 3.0, run: Any = None) -> Any:
        """The tracks' dE/dx against momentum with every hypothesis's expected curve and the
        ±``band`` sigma band of ``hypotheses`` (the pairing's), as a matplotlib Figure drawn
        without pyplot; saved to ``path`` when given."""
        from ..plotting_dedx import draw_dedx

        fig = draw_dedx(self, hypotheses=hypotheses, band=band, run=run)
        if path is not None:
            fig.savefig(path)
        return fig

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready; the density's counts as whole numbers (track counts)."""
        fit = self.calibration_fit
        return {"response": self.response.to_dict(),
                "calibration_fit": fit.to_dict() if fit is not None else None,
                "tracks_read": int(self.tracks_read),
                "p_edges": np.asarray(self.p_edges, float).tolist(),
                "dedx_edges": np.asarray(self.dedx_edges, float).tolist(),
                "counts": np.rint(self.counts).astype(np.int64).tolist()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> DedxOutcome:
        """The outcome :meth:`to_dict` wrote."""
        from ..energy_loss import DedxFit, DedxResponse

        try:
            fit = d["calibration_fit"]
            return cls(DedxResponse.from_dict(d["response"]),
                       DedxFit.from_dict(fit) if fit is not None else None,
                       int(d["tracks_read"]),
                       *(np.asarray(d[k], float) for k in ("p_edges", "dedx_edges", "counts")))
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"DedxOutcome.from_dict: not an identification written by "
                             f"DedxOutcome.to_dict (results.json 'identification'; {exc!r})"
                             ) from None


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
    return DedxOutcome(response, fit, tracks, P_EDGES, d_edges, counts)


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
