"""What a combination of channels returns: :class:`CombinedSearchResult` and its
results.json (every key an attribute of the same name; files of the earlier layout, with
the combined numbers under ``combined``, still load)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["CombinedSearchResult"]


@dataclass(frozen=True, eq=False, repr=False)
class CombinedSearchResult:
    """Outcome of :func:`run_combination`.  :meth:`to_dict` is ``results.json``: every key
    an attribute of the same name (``kind`` tags it as a combination).

    Attributes
    ----------
    channels : mapping
        Channel name -> its own :class:`~peaksift.search.SearchResult`.
    combination : Combination
        The combined scan (:class:`~peaksift.stats.channels.Combination`).
    best : mapping
        The combination's best hypothesis with its global significance.
    limits : CombinedLimits or None
        The combined limits (:class:`~peaksift.stats.channel_limits.CombinedLimits`).
    source : str
        The combination config (a path, or ``<dict>``).
    notes : tuple of str
        What the combined numbers leave out (e.g. a channel's [systematics]).
    outdir, figures
        Where the outputs went (None and empty without an output folder).

    Two results are equal when their combined numbers (``combination``, ``best``,
    ``limits``, ``notes``, ``source``) and each channel's fits, scan, limits and best
    hypothesis are; a result read back with :meth:`from_dict` equals the one written.
    """

    channels: Mapping[str, Any]
    combination: Any
    best: Mapping[str, Any]
    limits: Any
    source: str
    outdir: Path | None = None
    figures: Mapping[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    # ------------------------------------------------------------------------ values
    def __eq__(self, other: object) -> bool:
        from .._values import values_equal

        if type(other) is not type(self):
            return NotImplemented
        if list(self.channels) != list(other.channels):
            return False
        mine = ("combination", "best", "limits", "notes", "source")
        per = ("fit", "background_fit", "scan", "limits", "best")
        return (all(values_equal(getattr(self, k), getattr(other, k)) for k in mine)
                and all(values_equal(getattr(a, k), getattr(b, k))
                        for a, b in zip(self.channels.values(), other.channels.values())
                        for k in per))

    __hash__ = None  # type: ignore[assignment]

    # ------------------------------------------------------------------------ show
    def _summary(self) -> list[tuple[str, str]]:
        from .._format import mass_text, significance

        b = dict(self.best or {})
        rows = [("channels", ", ".join(self.channels)),
                ("best mass", f"{mass_text(b.get('mass'))} GeV"),
                ("local", significance(b, "local")), ("global", significance(b, "global"))]
        if self.limits is not None:
            rows.append(("limits", f"{self.limits.masses.size} masses, {self.limits.unit}"))
        if self.outdir is not None:
            rows.append(("outputs", str(self.outdir)))
        return rows

    def __repr__(self) -> str:
        return ("CombinedSearchResult(" + "; ".join(f"{k} {v}" for k, v in self._summary())
                + "; a local significance is not a discovery)")

    def _repr_html_(self) -> str:
        from .._values import summary_html

        return summary_html("CombinedSearchResult", self._summary(),
                            "A local significance is not a discovery; see the report.")

    # ------------------------------------------------------------------------ figures
    def figure_labels(self) -> Any:
        """The run label and mass symbol of the combination's own figures
        (:class:`peaksift.plotting.FigureLabels`): the first channel's run name, sqrt(s)
        and luminosity with every channel's final state; the channels' mass symbol when
        they share one, else plain m."""
        from .. import plotting
        from .._annotations import RunLabel

        labels = [plotting.figure_labels(r.config) for r in self.channels.values()]
        first = labels[0].run if labels else None
        run = RunLabel(name=first.name if first else "", sqrt_s=first.sqrt_s if first else None,
                       luminosity=first.luminosity if first else None,
                       channel=" + ".join(lb.run.channel for lb in labels
                                          if lb.run and lb.run.channel))
        symbols = {lb.symbol for lb in labels}
        return plotting.FigureLabels(run, symbols.pop() if len(symbols) == 1 else "m")

    def plot(self, path: Any = None, *, which: str = "pvalue_scan", log: bool = False) -> Any:
        """A figure of the combination as a matplotlib Figure drawn without pyplot (the
        user's backend is left alone): ``which`` is ``"pvalue_scan"`` (each channel's and
        the combined local p-value), ``"limits"`` (the combined limits and each channel's
        expected one) or ``"<channel>/<figure>"``, a channel's own figure
        (:meth:`SearchResult.plot`, e.g. ``"mumu/spectrum"``).  Saved to ``path`` when
        given."""
        from ..errors import InputError

        labels = self.figure_labels()
        name, _, sub = which.partition("/")
        if sub:
            if name not in self.channels:
                raise InputError(f"CombinedSearchResult.plot: no channel {name!r} (channels: "
                                 f"{', '.join(self.channels)})")
            fig = self.channels[name].plot(which=sub, log=log)
        elif which == "pvalue_scan":
            fig = self.combination.plot(run=labels.run, symbol=labels.symbol,
                                        channel_scans=self.channel_envelope_scans())
        elif which == "limits" and self.limits is not None:
            fig = self.limits.plot(run=labels.run, symbol=labels.symbol)
        else:
            why = "no combined limits" if which == "limits" else "no such figure"
            raise InputError(f"CombinedSearchResult.plot: {which!r}: {why} (figures: "
                             "pvalue_scan, limits, <channel>/<figure>)")
        if path is not None:
            fig.savefig(path)
        return fig

    def channel_envelope_scans(self) -> dict[str, tuple]:
        """Channel name -> (masses, local p-values) of its own background-envelope scan,
        for the channels whose envelope the combined scan profiles (the p-value figure
        draws those beside the envelope-profiled combined line)."""
        from scipy import stats

        env = (self.combination.envelope or {}) if len(self.channels) > 1 else {}
        out = {}
        for name, r in self.channels.items():
            block = (r.systematics or {}).get("envelope") or {}
            if name not in env or block.get("z_local") is None:
                continue
            z = np.array([np.nan if v is None else v for v in block["z_local"]], float)
            out[name] = (np.asarray(block["masses"], float), stats.norm.sf(z))
        return out

    # ------------------------------------------------------------------------ JSON
    @property
    def peaksift_version(self) -> str:
        """The version of peaksift that writes this result's results.json."""
        from .. import __version__

        return __version__

    @property
    def nuisances_at_best(self) -> dict[str, Any]:
        """Each normalisation nuisance and shape factor of the combined fit at the best
        mass (:meth:`~peaksift.stats.channels.Combination.nuisances_at_best`)."""
        return self.combination.nuisances_at_best()

    @property
    def warnings(self) -> list[dict[str, str]]:
        """What a reader must know before quoting the combination, each ``{"topic",
        "message"}`` (:func:`~peaksift.search.combination_report.combination_warnings`:
        every channel's named by its channel, the combined fit's and limits')."""
        return self.to_dict()["warnings"]

    @property
    def outputs(self) -> dict[str, Any] | None:
        """Where the files went (results.json ``outputs``); None without an output folder."""
        if self.outdir is None:
            return None
        return {"dir": str(self.outdir),
                "figures": {k: Path(v).relative_to(self.outdir).as_posix()
                            if Path(v).is_relative_to(self.outdir) else Path(v).name
                            for k, v in self.figures.items()}}

    def to_dict(self) -> dict[str, Any]:
        """The content of the combination's ``results.json``."""
        from .._json import plain

        out = {"peaksift_version": self.peaksift_version, "kind": "combination",
               "source": self.source,
               "channels": {n: r.to_dict() for n, r in self.channels.items()},
               "combination": self.combination.to_dict(), "best": plain(dict(self.best)),
               "nuisances_at_best": self.nuisances_at_best,
               "limits": None if self.limits is None else self.limits.to_dict(),
               "notes": list(self.notes)}
        from .combination_report import combination_warnings

        out["warnings"] = combination_warnings(out)  # derived: from_dict does not read it
        if self.outdir is not None:
            out["outputs"] = self.outputs
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> CombinedSearchResult:
        """The CombinedSearchResult of a combination's results.json (each channel as
        :meth:`SearchResult.from_dict` reads it: without the event-level data).  Files of
        earlier versions (the combined numbers under ``combined``) still load; what they
        did not record (each channel's scan on the combined grid, the conversion to events)
        is taken from the channels' own results and said in ``notes``."""
        from ..errors import InputError
        from ..stats.channel_limits import CombinedLimits
        from ..stats.channels import Combination
        from .result import SearchResult

        try:
            if "combined" in d:
                d = _upgrade(d)
            outs = d.get("outputs") or {}
            outdir = Path(outs["dir"]) if outs.get("dir") else None
            return cls(
                channels={n: SearchResult.from_dict(v) for n, v in d["channels"].items()},
                combination=Combination.from_dict(d["combination"]),
                best=dict(d["best"]),
                limits=CombinedLimits.from_dict(d["limits"]) if d.get("limits") else None,
                source=str(d.get("source", "")), outdir=outdir,
                figures={k: outdir / v for k, v in (outs.get("figures") or {}).items()}
                if outdir is not None else {},
                notes=tuple(d.get("notes") or ()))
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise InputError(f"not a results.json written by a peaksift combination: {exc!r}"
                             ) from None


def _upgrade(d: Mapping[str, Any]) -> dict[str, Any]:
    """A combination results.json of the earlier layout (``config_path``, ``channel_names``,
    the combined numbers under ``combined``) in today's keys."""
    c = d["combined"]
    names = list(d.get("channel_names") or d["channels"])
    chans = {n: d["channels"][n] for n in names}
    z = [np.nan if v is None else v for v in c["z_local"]]
    masses = c["masses"]
    best = c.get("best") or {}
    i = int(np.argmin(np.abs(np.asarray(masses, float) - float(best.get("mass", masses[0])))))
    note = ("read from a results.json of an earlier layout: each channel's scan and the "
            "events per unit sigma x B are not recorded there (the channels' own scans are "
            "shown)")
    comb = {**{k: c.get(k) for k in ("masses", "q0", "z_local", "p_local", "cross_section",
                                      "cross_section_error", "z_expected",
                                      "expected_cross_section", "unit", "blind", "envelope")},
            "converged": [v is not None for v in c["cross_section"]], "best_index": i,
            "best_mass": masses[i], "channels": {n: r["scan"] for n, r in chans.items()},
            "conversion": {}, "blinded": [not np.isfinite(v) for v in z],
            "luminosity": {n: (r["config"].get("limits") or {}).get("luminosity")
                           for n, r in chans.items()},
            "notes": [note], "nuisances": list(c.get("nuisances") or ())}
    lim = c.get("limits")
    if lim:
        lim = {**lim, "channels": {n: r["limits"] for n, r in chans.items() if r.get("limits")}}
    return {"source": d.get("config_path", ""), "channels": chans, "combination": comb,
            "best": c.get("global") or {}, "limits": lim,
            "notes": [*(c.get("notes") or ()), note],
            **({"outputs": d["outputs"]} if d.get("outputs") else {})}
