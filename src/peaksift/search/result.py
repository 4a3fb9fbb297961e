"""What a search returns: :class:`SearchResult` (and :class:`SpectrumResult`) and their JSON form."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .._vocabulary import FITS
from ..config import Config
from ..report_sections import fit_models, fitted_text
from .common import _blinded_fit, _events_selected, _hidden, _in_window, _scan_signal_name
from .doubts import doubts


# ----------------------------------------------------------------------------- results
@dataclass(frozen=True, repr=False, eq=False)
class SpectrumResult:
    """What :func:`run_spectrum` produced: the spectrum, the collected data and the files.

    :meth:`to_dict` names every key as the attribute holding it (``input``, ``histogram``,
    ``blinding``, ...); :meth:`from_dict` reads it back without the event-level data
    (``collected`` None, ``input_record`` keeping the counts).  Two results are equal when
    their spectra, configurations (as written) and input counts are."""

    config: Config
    histogram: Any
    collected: Any
    outdir: Path | None = None
    files: Mapping[str, Path] = field(default_factory=dict)
    input_record: Mapping[str, Any] | None = None

    def _summary(self) -> list[tuple[str, str]]:
        h = self.histogram
        rows = [("window", f"{h.edges[0]:g}-{h.edges[-1]:g} GeV in {h.edges.size - 1} bins"),
                ("entries", f"{h.total():,.0f}")]
        read = self.input.get("events_read")
        if read is not None:
            rows.insert(0, ("events read", f"{int(read):,}"))
        if self.outdir is not None:
            rows.append(("outputs", str(self.outdir)))
        return rows

    def __repr__(self) -> str:
        return "SpectrumResult(" + "; ".join(f"{k} {v}" for k, v in self._summary()) + ")"

    def _repr_html_(self) -> str:
        from .._values import summary_html

        return summary_html("SpectrumResult", self._summary())

    def __eq__(self, other: object) -> bool:
        if type(other) is not type(self):
            return NotImplemented
        return (self.histogram == other.histogram
                and self.config.to_dict() == other.config.to_dict()
                and _plain(self.input) == _plain(other.input))

    __hash__ = None  # type: ignore[assignment]

    @property
    def peaksift_version(self) -> str:
        from .. import __version__

        return __version__

    @property
    def blinding(self) -> dict[str, Any]:
        """As results.json's ``blinding`` (``peaksift spectrum`` always hides the window)."""
        from .common import _blinding

        return _blinding(self.config, unblind=False)

    @property
    def input(self) -> dict[str, Any]:
        """Files, events read and selected, candidates, cut flow (as results.json's)."""
        if self.collected is None:
            return _plain(dict(self.input_record or {}))
        return _input_record(self.collected, self.histogram, self.config, self.blinding)

    def to_dict(self) -> dict[str, Any]:
        """The spectrum's record: config, input counts, the histogram (``spectrum.json``'s
        MassHistogram format, blinded bins emptied) and the blinding."""
        out = {"peaksift_version": self.peaksift_version, "kind": "spectrum",
               "config": self.config.to_dict(), "input": self.input,
               "histogram": self.histogram.to_dict(), "blinding": self.blinding}
        if self.outdir is not None:
            out["outputs"] = {"dir": str(self.outdir),
                              "files": {k: Path(v).name for k, v in self.files.items()}}
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SpectrumResult:
        """The SpectrumResult :meth:`to_dict` wrote (without the event-level data)."""
        from ..config import load_config
        from ..errors import InputError
        from ..histogram import MassHistogram

        try:
            outs = d.get("outputs") or {}
            outdir = Path(outs["dir"]) if outs.get("dir") else None
            return cls(config=load_config(dict(d["config"])),
                       histogram=MassHistogram.from_dict(dict(d["histogram"])), collected=None,
                       outdir=outdir, input_record=dict(d.get("input") or {}),
                       files={k: outdir / ("" if k.endswith(".json") else "figures") / v
                              for k, v in (outs.get("files") or {}).items()}
                       if outdir is not None else {})
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"not a spectrum record written by SpectrumResult.to_dict: "
                             f"{exc!r}") from None

    def plot(self, path: Any = None, *, log: bool = False) -> Any:
        """The spectrum figure (``peaksift spectrum``'s, blinded bins hidden) as a matplotlib
        Figure drawn without pyplot, with the run label and the pair's mass symbol; saved to
        ``path`` when given."""
        from .. import plotting
        from .spectrum import _short_title

        fig = plotting.spectrum_figure(self.histogram, log=log, labels=plotting.figure_labels(
            self.config), blind=self.blinding["window"] if self.blinding["active"] else None,
            title=_short_title(self.config))
        if path is not None:
            fig.savefig(path)
        return fig


@dataclass(frozen=True, repr=False)
class SearchResult:
    """The outcome of :func:`run_search`.

    Attributes
    ----------
    config : Config
        The validated configuration (with command-line overrides applied).
    histogram : MassHistogram
        The spectrum in the fit window (blinded bins emptied unless unblinded).
    collected : peaksift.execution.Collected
        Everything the read/select/pair step returned (cut flow, files, pT and rapidity).
    background_fit : FitResult or SidebandFit
        Background-only fit; while blinded, a :class:`~peaksift.search.sideband.SidebandFit`
        on the sidebands only, extrapolated under the blinded window.
    fit : FitResult or None
        The signal-plus-background fit at the best hypothesis with free mass and width
        (profile-likelihood intervals of mass, width and signal yield unless
        ``model.intervals = false``); None while blinded.
    scan : ScanResult
        The mass scan.
    best : dict
        Best hypothesis with local and global significance (the results.json ``best``).
    limits : LimitResult or None
        Upper limits (None when ``limits.enabled = false``).
    known_matches : tuple of KnownMatch
        Known particles near the fitted peak, nearest first.
    calibration : dict or None
        The calibration check (fitted vs tabulated mass) when configured; its ``fit`` is
        the calibration fit (``FitResult.to_dict``), which ``plot(which="calibration")`` draws.
    provenance : dict
        Inputs with sha256, config sha256, seed, versions, start and finish times.
    outdir : Path or None
        Where the outputs were written (None when ``out=False``).
    figures : dict
        Figure name -> PNG path.
    signal_model : SignalModel or None
        The signal model from ``[signal_model]`` (results.json ``signal_model``), which gave
        the scan and the limits their shape, resolution and efficiency.
    fit_settings : dict
        What the free fit held, constrained and bounded (``model.fix``, ``constrain``,
        ``bounds``, ``sigma_from_resolution``), its start and the intervals asked for: the
        results.json ``fit.settings``.
    systematics : dict or None
        With ``[systematics]``: the nuisances, the background choice and order tests, the
        spurious signal, the envelope, the pulls, and the best hypothesis with and without
        systematics (``best`` is then the one with them); None otherwise.
    identification : dict or None
        The dE/dx identification the pairing used (response, calibration fit), when on.
    input_record : dict or None
        The results.json ``input`` of a result read back with :meth:`from_dict` (which has
        no ``collected`` data); None for a result of a run.
    """

    config: Config
    histogram: Any
    collected: Any
    background_fit: Any
    fit: Any
    scan: Any
    best: Mapping[str, Any]
    limits: Any
    known_matches: tuple[Any, ...]
    calibration: Mapping[str, Any] | None
    provenance: Mapping[str, Any]
    blinding: Mapping[str, Any]
    outdir: Path | None = None
    figures: Mapping[str, Path] = field(default_factory=dict)
    fit_settings: Mapping[str, Any] = field(default_factory=dict)
    systematics: Mapping[str, Any] | None = None
    signal_model: Any = None
    identification: Mapping[str, Any] | None = None
    input_record: Mapping[str, Any] | None = None

    # ------------------------------------------------------------------------ show
    def _summary(self) -> list[tuple[str, str]]:
        from .._format import mass_text, significance

        b = dict(self.best or {})
        with_syst = " with systematics" if self.systematics else ""  # best is then theirs
        rows = [("best mass", f"{mass_text(b.get('mass'))} GeV"),
                ("local", significance(b, "local") + with_syst),
                ("global", significance(b, "global") + with_syst)]
        if self.fit is not None:  # as the summary quotes them: intervals where made
            fit, free = _fit_dict(self.fit), FITS["free_fit"][0]
            # an invalid fit's numbers flagged beside them, as the report's tables do (the
            # combined demo's dielectron fit, its mass at its bound, read '110 ± 81 GeV')
            bad = "" if fit.get("valid", True) else " (NOT valid)"
            rows += [(f"{free} mass", fitted_text(fit, "peak_mass", "GeV") + bad),
                     (f"{free} signal yield", fitted_text(fit, "signal_yield") + bad)]
            if bad:
                rows.append((f"{free} valid", "NO: " + "; ".join(
                    str(x) for x in fit.get("problems") or ["no reason recorded"])))
        elif (self.blinding or {}).get("active"):
            rows.append(("fit", "not made: blinded as configured"))
        if self.limits is not None:
            rows.append(("limits", f"{self.limits.masses.size} masses, {self.limits.unit}"))
        # the doubts the summary and the report print (the invalid free fit has its row)
        warned = [w for w in self.warnings if w.get("topic") != "fit"]
        if warned:
            rows.append(("WARNINGS", " | ".join(str(w.get("message")) for w in warned)))
        if self.outdir is not None:
            rows.append(("outputs", str(self.outdir)))
        return rows

    def __repr__(self) -> str:
        return ("SearchResult(" + "; ".join(f"{k} {v}" for k, v in self._summary())
                + "; a local significance is not a discovery)")

    def _repr_html_(self) -> str:
        import html

        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>"
                       for k, v in self._summary())
        return (f"<div><b>SearchResult</b><table>{rows}</table><p>A local significance is "
                f"not a discovery; see the report.</p></div>")

    # ------------------------------------------------------------------------ JSON
    # Every results.json key is an attribute of the same name: the fields, and these.
    @property
    def peaksift_version(self) -> str:
        """The version of peaksift that writes this result's results.json."""
        from .. import __version__

        return __version__

    @property
    def input(self) -> dict[str, Any]:
        """The results.json ``input``: files, events read and selected, candidates, cut
        flow and per-requirement counts."""
        return self._input()

    @property
    def warnings(self) -> list[dict[str, Any]]:
        """The doubtful results flagged (results.json ``warnings``)."""
        return list(self.to_dict()["warnings"])

    @property
    def models(self) -> dict[str, dict[str, Any]]:
        """The models of the scan and of the free fit, each with the name of its fit
        (results.json ``models``; every output names them so)."""
        return dict(self.to_dict()["models"])

    @property
    def outputs(self) -> dict[str, Any] | None:
        """Where the files went (results.json ``outputs``); None without an output folder."""
        return self.to_dict().get("outputs")

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SearchResult:
        """The SearchResult of a results.json: fits, scan, limits, best, calibration,
        provenance and the validated config, without the event-level data (``collected``
        is None, ``histogram`` None; ``input_record`` keeps the counts).  ``to_dict`` of it
        gives the same results.json sections back."""
        from ..config import load_config
        from ..errors import InputError
        from ..fitting.result import FitResult
        from ..resonances import KnownMatch
        from ..stats.limit_result import LimitResult
        from ..stats.scan_result import ScanResult
        from ..stats.signal_model_result import SignalModel

        try:
            cfg = load_config(dict(d["config"]))
            fit = d.get("fit") or {}
            settings = fit.get("settings") or {}
            outs = d.get("outputs") or {}
            return cls(
                config=cfg, histogram=None, collected=None,
                background_fit=_background_fit(d),
                fit=FitResult.from_dict(fit) if fit.get("shapes") else None,
                scan=ScanResult.from_dict(d["scan"]), best=dict(d["best"]),
                limits=LimitResult.from_dict(d["limits"]) if d.get("limits") else None,
                known_matches=tuple(KnownMatch.from_dict(k)
                                    for k in d.get("known_matches") or ()),
                calibration=d.get("calibration"), provenance=dict(d.get("provenance") or {}),
                blinding=dict(d.get("blinding") or {}),
                outdir=Path(outs["dir"]) if outs.get("dir") else None,
                figures={k: Path(outs["dir"]) / "figures" / v
                         for k, v in (outs.get("figures") or {}).items()},
                fit_settings=settings, input_record=dict(d.get("input") or {}),
                identification=d.get("identification"),
                systematics=_systematics(d.get("systematics")),
                signal_model=SignalModel.from_dict(d["signal_model"])
                if d.get("signal_model") else None)
        except (KeyError, TypeError, ValueError) as exc:
            raise InputError(f"not a results.json written by peaksift search: {exc!r}") \
                from None

    def _input(self) -> dict[str, Any]:
        """The results.json ``input``: from the collected data, or as recorded."""
        if self.collected is None:  # read back with from_dict
            return _plain(dict(self.input_record or {}))
        return _input_record(self.collected, self.histogram, self.config, self.blinding)

    # ------------------------------------------------------------------------ figures
    def plot(self, path: Any = None, *, which: str = "spectrum", log: bool = False) -> Any:
        """One figure of the search as a matplotlib Figure, drawn without pyplot (the
        user's backend is left alone) exactly as the run writes it: ``which`` is
        ``"spectrum"`` (the fit with pulls and numbers; while blinded the sideband fit),
        ``"pvalue_scan"``, ``"limits"``, ``"candidates"``, ``"background_envelope"``,
        ``"calibration"`` (the calibration peak's fit, which the result keeps) or ``"dedx"``
        (the dE/dx identification, :meth:`DedxOutcome.plot
        <peaksift.search.identification.DedxOutcome.plot>`).
        Saved to ``path`` when given.  A result read back with :meth:`from_dict` has no
        event-level data: its blinded spectrum is the sideband fit's own figure and it has
        no candidates figure."""
        from .. import plotting
        from ..errors import InputError, closest

        names = [*plotting.SEARCH_FIGURES, "dedx"]
        if which not in names:
            hint = closest(which, names)
            raise InputError(f"SearchResult.plot: no figure {which!r}"
                             + (f"; did you mean {hint!r}?" if hint else "")
                             + f" (figures: {', '.join(names)})")
        labels = plotting.figure_labels(self.config)
        if which == "dedx":
            fig = self._dedx_figure(labels.run)
        elif which == "spectrum" and self.fit is None and self.histogram is None:
            fig = self.background_fit.plot(run=labels.run, symbol=labels.symbol, log=log)
        else:
            fig = plotting.search_figure(self, which, labels=labels, log=log)
        if fig is None:
            why = ("no event-level data (read back from results.json)"
                   if which == "candidates" and self.collected is None else
                   "blinded (it shows the blinded window)" if which == "candidates" else
                   "no calibration fit (none configured, or a results.json written before "
                   "the result kept it)" if which == "calibration" else
                   "no identification (none configured, or a results.json written before "
                   "the result kept its density)" if which == "dedx" else
                   "no results for it")
            raise InputError(f"SearchResult.plot: this result has no {which!r} figure: {why}")
        if path is not None:
            fig.savefig(path)
        return fig

    def _dedx_figure(self, run: Any = None) -> Any:
        """The identification figure from the record results.json keeps (None without)."""
        from .identification import DedxOutcome

        d = self.identification
        if not d or "counts" not in d:
            return None
        return DedxOutcome.from_dict(d).plot(hypotheses=tuple(self.config.pairing.hypotheses),
                                             band=self.config.identification.band, run=run)

    def to_dict(self) -> dict[str, Any]:
        """The content of ``results.json``."""
        from .. import __version__

        fit = _fit_dict(self.fit) if self.fit is not None else _blinded_fit()
        if self.fit_settings:
            fit["settings"] = _plain(dict(self.fit_settings))
        scan = _plain(self.scan.to_dict())
        lg_scan, lg_best = _scan_log10_p(self.scan)
        scan["best"] = {**(scan.get("best") or {}), "log10_p_local": lg_best}
        scan_extra = {"resolution_model": self.config.model.resolution.kind,
                      "signal_shape": _scan_signal_name(self.config),
                      "log10_p_local": lg_scan}
        if self.signal_model is not None:  # the scan's shape and sigma(m) came from samples
            scan_extra.update(resolution_model="signal_model",
                              signal_shape=self.signal_model.shape)
        out: dict[str, Any] = {
            "peaksift_version": __version__,
            "config": self.config.to_dict(),
            "input": self._input(),
            "fit": fit,
            "background_fit": None if self.background_fit is None else
            _plain(self.background_fit.to_dict()) if _is_sideband(self.background_fit)
            else _fit_dict(self.background_fit),
            "scan": {**scan, **scan_extra},
            "best": _plain(dict(self.best)),
            "limits": _plain(self.limits.to_dict()) if self.limits is not None else None,
            "known_matches": [k.to_dict() for k in self.known_matches],
            "calibration": _plain(dict(self.calibration)) if self.calibration else None,
            "identification": _plain(dict(self.identification))
            if self.identification else None,
            "blinding": dict(self.blinding),
            "provenance": _plain(dict(self.provenance)),
            "systematics": _plain(dict(self.systematics)) if self.systematics else None,
        }
        if self.signal_model is not None:  # absent without [signal_model]: today's keys
            out["signal_model"] = self.signal_model.to_dict()
        out["models"] = fit_models(out)  # which fit each number comes from, by name
        out["warnings"] = doubts(out)  # after every section it reads
        if self.outdir is not None:
            out["outputs"] = {"dir": str(self.outdir),
                              "figures": {k: Path(v).name for k, v in self.figures.items()}}
        return out


def _input_record(col: Any, hist: Any, cfg: Config, blinding: Mapping[str, Any]
                  ) -> dict[str, Any]:
    """The results.json ``input`` from the collected data: files, events read and
    selected, candidates in the window (the sidebands' while blinded), the cut flow and
    the per-requirement counts."""
    cutflow = {str(k): int(v) for k, v in dict(col.cutflow).items()}
    return {
        "files": list(col.files_read),
        "files_skipped": [s.to_dict() for s in col.files_skipped],
        "events_read": int(col.events_read),
        "events_selected": _events_selected(cutflow),
        "candidates": _in_window(col, cfg, _hidden(blinding)),
        "candidates_all_masses": int(col.candidates),
        "sum_of_weights": float(hist.total()),
        "cutflow": cutflow,
        "requirements": {str(k): int(v) for k, v in
                         dict(getattr(col, "requirements", {}) or {}).items()},
    }


def _is_sideband(fr: Any) -> bool:
    from .sideband import SidebandFit

    return isinstance(fr, SidebandFit)


def _background_fit(d: Mapping[str, Any]) -> Any:
    """The background fit of a results.json: a sideband fit (blinded runs) or a FitResult.
    results.json files written before the key took the attribute's name call it
    ``background_only_fit``: still read, so the results of earlier runs load."""
    from ..fitting.result import FitResult
    from .sideband import SidebandFit

    b = d.get("background_fit", d.get("background_only_fit"))
    if not b:
        return None
    return SidebandFit.from_dict(b) if b.get("kind") == "sideband_fit" else \
        FitResult.from_dict(b)


def _systematics(sy: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """The results.json ``systematics`` block, its envelope in EnvelopeResult's format.
    Files written before the envelope took that format (``functions``, ``chosen_at_best``,
    ``spurious_weights``, ``null_choice`` by label) are read with those keys renamed, so the
    report and the summary read one format; what they did not keep stays absent."""
    env = (sy or {}).get("envelope")
    if not env or "labels" in env or "functions" not in env:
        return sy
    new = {k: v for k, v in env.items() if k not in (
        "functions", "chosen_at_best", "spurious_weights", "candidate_z_local")}
    labels = list(env["functions"])
    new.update(labels=labels, spurious=list(env.get("spurious_weights") or ()),
               best={"function": env.get("chosen_at_best")})
    if isinstance(env.get("null_choice"), str) and env["null_choice"] in labels:
        new["null_choice"] = labels.index(env["null_choice"])
    return {**sy, "envelope": new}


def _plain(o: Any) -> Any:
    if isinstance(o, Mapping):
        return {str(k): _plain(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_plain(v) for v in o]
    if isinstance(o, np.ndarray):
        return _plain(o.tolist())
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, Path):
        return str(o)
    return o


def _scan_log10_p(sres: Any) -> tuple[list[float | None], float]:
    """``log10_p_local`` per hypothesis (None where blinded) and at the best one: the scan's
    p_local as a power of ten, finite where the float p_local underflows to 0 (Z > 37.5).
    Computed from q0 as the scan computes p_local (a NaN q0 counts as 0)."""
    from ..stats.significance import log10_p, log_p_from_q0

    q = np.nan_to_num(np.asarray(sres.q0, dtype=float))
    lg = np.asarray(log10_p(log_p_from_q0(q)), dtype=float)
    hidden = np.asarray(sres.blinded, dtype=bool)
    return ([None if h else float(v) for v, h in zip(lg, hidden)],
            float(lg[sres.best_index]))


def _fit_dict(fr: Any) -> dict[str, Any]:
    d = _plain(fr.to_dict())
    keep = ("valid", "peak_mass", "width", "signal_yield", "background_yield", "gof")
    return {**{k: d.get(k) for k in keep}, **{k: v for k, v in d.items() if k not in keep}}
