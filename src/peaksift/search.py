"""The whole search as one call: :func:`run_search` (``peaksift search CONFIG``).

Which function
--------------
* :func:`run_search` -- config in, everything out: read, select and pair (through
  :func:`peaksift.execution.collect`, on the configured engine), the spectrum, the
  background-only and signal-plus-background fits, the mass scan, the global significance,
  the upper limits, the known-particle matching, the calibration check, figures,
  ``results.json`` and the meeting report.  Returns a :class:`SearchResult`.
* :func:`run_spectrum` -- only the selected spectrum: its histogram file and figure.
* :func:`run_fit` -- one signal-plus-background fit started (or held) at a chosen mass, with
  its figure and JSON on request.

Outputs are written into a temporary directory next to the target and renamed into place at
the very end, so a failed or interrupted run leaves no partial outputs.  An existing target
directory is replaced only when it holds a previous peaksift result (``results.json``).

Steps and where their numbers come from
---------------------------------------
1. Candidates: :func:`peaksift.execution.collect` with a :class:`~peaksift.execution.Selection`
   built from ``[objects]`` and ``[pairing]``.  The spectrum (and the calibration window, when
   configured) are filled from the candidate masses it returns, so one pass over the data
   serves both windows.
2. Scan: :func:`peaksift.scan` over the ``[scan]`` grid with the signal width fixed by the
   resolution model; q0 and Z_local = sqrt(q0) (Cowan, Cranmer, Gross, Vitells 2011).
3. Global significance: :meth:`ScanResult.global_significance` (upcrossings, Gross and
   Vitells 2010; or background-only toys).
4. Free fit at the best hypothesis with ``model.signal`` (mass and width float, unless
   ``model.fix`` / ``constrain`` / ``bounds`` / ``sigma_from_resolution`` say otherwise),
   with profile-likelihood intervals of mass, width and yield: the ``fit`` section of
   results.json (``fit.settings`` echoes what was held or constrained).
5. Limits: :func:`peaksift.upper_limits` (CLs, asymptotic or toys).
6. Known particles: :func:`peaksift.resonances.match_known` around the fitted mass.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import hashlib
import os
import platform
import shutil
import uuid
import warnings
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .config import SCHEMA, Config, load_config
from .errors import ConfigError, CutError, FitError, InputError, PeaksiftError

__all__ = ["FIT_FILES", "SearchResult", "SpectrumResult", "run_fit", "run_search", "run_spectrum"]


# ----------------------------------------------------------------------------- results
@dataclass(frozen=True)
class SpectrumResult:
    """What :func:`run_spectrum` produced: the spectrum, the collected data and the files."""

    config: Config
    histogram: Any
    collected: Any
    outdir: Path | None = None
    files: Mapping[str, Path] = field(default_factory=dict)


@dataclass(frozen=True)
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
    background_fit, fit : FitResult
        Background-only fit, and the signal-plus-background fit at the best hypothesis
        with free mass and width (profile-likelihood intervals of mass, width and signal
        yield unless ``model.intervals = false``).
    scan : ScanResult
        The mass scan.
    best : dict
        Best hypothesis with local and global significance (the results.json ``best``).
    limits : LimitResult or None
        Upper limits (None when ``limits.enabled = false``).
    known_matches : tuple of KnownMatch
        Known particles near the fitted peak, nearest first.
    calibration : dict or None
        The calibration check (fitted vs tabulated mass) when configured.
    provenance : dict
        Inputs with sha256, config sha256, seed, versions, start and finish times.
    outdir : Path or None
        Where the outputs were written (None when ``out=False``).
    figures : dict
        Figure name -> PNG path.
    fit_settings : dict
        What the free fit held, constrained and bounded (``model.fix``, ``constrain``,
        ``bounds``, ``sigma_from_resolution``), its start and the intervals asked for: the
        results.json ``fit.settings``.
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

    def to_dict(self) -> dict[str, Any]:
        """The content of ``results.json``."""
        from . import __version__

        col = self.collected
        cutflow = {str(k): int(v) for k, v in dict(col.cutflow).items()}
        fit = _fit_dict(self.fit) if self.fit is not None else _blinded_fit()
        if self.fit_settings:
            fit["settings"] = _plain(dict(self.fit_settings))
        scan = _plain(self.scan.to_dict())
        lg_scan, lg_best = _scan_log10_p(self.scan)
        scan["best"] = {**(scan.get("best") or {}), "log10_p_local": lg_best}
        scan_extra = {"resolution_model": self.config.model.resolution.kind,
                      "signal_shape": _scan_signal_name(self.config),
                      "log10_p_local": lg_scan}
        out: dict[str, Any] = {
            "peaksift_version": __version__,
            "config": self.config.to_dict(),
            "input": {
                "files": list(col.files_read),
                "files_skipped": [s.to_dict() for s in col.files_skipped],
                "events_read": int(col.events_read),
                "events_selected": _events_selected(cutflow),
                "candidates": _in_window(col, self.config, _hidden(self.blinding)),
                "candidates_all_masses": int(col.candidates),
                "sum_of_weights": float(self.histogram.total()),
                "cutflow": cutflow,
            },
            "fit": fit,
            "background_only_fit": _fit_dict(self.background_fit)
            if self.background_fit is not None else None,
            "scan": {**scan, **scan_extra},
            "best": _plain(dict(self.best)),
            "limits": _plain(self.limits.to_dict()) if self.limits is not None else None,
            "known_matches": [k.to_dict() for k in self.known_matches],
            "calibration": _plain(dict(self.calibration)) if self.calibration else None,
            "blinding": dict(self.blinding),
            "provenance": _plain(dict(self.provenance)),
        }
        if self.outdir is not None:
            out["outputs"] = {"dir": str(self.outdir),
                              "figures": {k: Path(v).name for k, v in self.figures.items()}}
        return out


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
    from .stats.significance import log10_p, log_p_from_q0

    q = np.nan_to_num(np.asarray(sres.q0, dtype=float))
    lg = np.asarray(log10_p(log_p_from_q0(q)), dtype=float)
    hidden = np.asarray(sres.blinded, dtype=bool)
    return ([None if h else float(v) for v, h in zip(lg, hidden)],
            float(lg[sres.best_index]))


def _fit_dict(fr: Any) -> dict[str, Any]:
    d = _plain(fr.to_dict())
    keep = ("valid", "peak_mass", "width", "signal_yield", "background_yield", "gof")
    return {**{k: d.get(k) for k in keep}, **{k: v for k, v in d.items() if k not in keep}}


def _in_window(col: Any, cfg: Config, hidden: tuple[float, float] | None = None) -> int:
    """Candidates (not weights) with a mass inside the fit window; with ``hidden`` (the mass
    range of the blinded bins) only those outside it: the sidebands."""
    from .histogram import MassHistogram

    # counted by the spectrum's own bins, so the edge rule is the histogram's
    h = MassHistogram.from_masses(np.asarray(col.window_mass, dtype=float),
                                  edges=cfg.spectrum.edges)
    counts = h.weight_sum
    if hidden is not None:  # the hidden range is a union of whole bins
        c = h.centers
        counts = counts[~((c > hidden[0]) & (c < hidden[1]))]
    return round(float(counts.sum()))


def _hidden(blinding: Mapping[str, Any]) -> tuple[float, float] | None:
    """The mass range ``[lo, hi)`` of the hidden bins while blinding is active, else None."""
    r = blinding.get("hidden_range") if blinding.get("active") else None
    return (float(r[0]), float(r[1])) if r else None


def _blinded_copy(hist: Any, blind: Any) -> Any:
    """A copy of ``hist`` with the bins overlapping ``blind`` emptied (weight_sum = weight_sq_sum = 0)."""
    from .blinding import blinded_bins

    h = hist.copy()
    mask = blinded_bins(h.edges, blind)
    h.weight_sum[mask] = 0.0
    h.weight_sq_sum[mask] = 0.0
    return h


def _save_spectrum(hist: Any, path: Path, blinding: Mapping[str, Any]) -> Path:
    """``spectrum.json`` in the MassHistogram format; while blinded the histogram given is
    the emptied copy and a ``blinded`` entry (ignored by ``MassHistogram.load``) says which
    bins hold 0 because they are hidden, not because they are empty."""
    hidden = _hidden(blinding)
    if hidden is None:
        return hist.save(path)
    import json

    from ._files import atomic_write

    d = hist.to_dict()
    d["blinded"] = {
        "window": list(blinding.get("window") or []),
        "hidden_range": list(hidden),
        "note": "the bins overlapping the blinded window are hidden: their weight_sum and weight_sq_sum "
                "are set to 0 (not measured empty); rerun with --unblind for the full spectrum",
    }
    return atomic_write(path, json.dumps(d, indent=1))


def _blinded_fit() -> dict[str, Any]:
    """The ``fit`` section while blinded: no fit looked inside, so no numbers."""
    none = {"value": None, "error": None}
    return {"valid": False, "peak_mass": dict(none), "width": dict(none),
            "signal_yield": dict(none), "background_yield": dict(none),
            "gof": {"chi2": None, "ndf": None, "p_value": None},
            "problems": ["blinded: no signal-plus-background fit until --unblind"]}


def _events_selected(cutflow: Mapping[str, int]) -> int:
    """Events with at least one candidate: the last event-level counter of the cut flow."""
    ev = [v for k, v in cutflow.items() if "event" in k and "candidate" not in k]
    for k, v in cutflow.items():
        if "pair" in k and "event" in k:
            return int(v)
    return int(ev[-1]) if ev else 0


# ------------------------------------------------------------------------------ helpers
def _utc() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _versions() -> dict[str, str]:
    from importlib import metadata

    out = {"python": platform.python_version()}
    for name in ("peaksift", "numpy", "scipy", "iminuit", "awkward", "pyarrow", "vector",
                 "matplotlib", "particle"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:  # pragma: no cover
            out[name] = "not installed"
    return out


def _scan_signal_name(cfg: Config) -> str:
    if cfg.scan.signal:
        return cfg.scan.signal
    return "voigt" if cfg.model.resolution.natural_width > 0 else "gaussian"


#: most hypotheses the default grid may hold: as many as ``scan.points`` allows
_MAX_DEFAULT_HYPOTHESES = int(next(k.hi for k in SCHEMA["scan"] if k.name == "points"))


def _scan_masses(cfg: Config) -> np.ndarray:
    """The grid of hypotheses: ``[scan]`` keys, or half the local resolution apart."""
    lo, hi = cfg.spectrum.window
    res = cfg.model.resolution
    start = cfg.scan.start if cfg.scan.start is not None else lo + 3.0 * res.sigma(lo)
    stop = cfg.scan.stop if cfg.scan.stop is not None else hi - 3.0 * res.sigma(hi)
    if not stop > start:
        raise ConfigError(
            f"config {cfg.source}: the scan range is empty (start {start:g}, stop {stop:g} GeV): "
            "the window is narrower than six resolution widths; widen spectrum.window or set "
            "scan.start and scan.stop"
        )
    if cfg.scan.points is not None:
        return np.linspace(start, stop, cfg.scan.points)
    if cfg.scan.step is not None:
        n = max(2, int(np.floor((stop - start) / cfg.scan.step + 1e-9)) + 1)
        return start + cfg.scan.step * np.arange(n)
    grid = [start]
    while grid[-1] < stop:
        if len(grid) > _MAX_DEFAULT_HYPOTHESES:  # config validation keeps sigma >= 1% of a bin
            raise ConfigError(
                f"config {cfg.source}: hypotheses half a resolution sigma apart would number "
                f"more than {_MAX_DEFAULT_HYPOTHESES} ({res.resolution.describe()}); set "
                "scan.step or scan.points, or check model.resolution")
        grid.append(grid[-1] + 0.5 * float(res.sigma(grid[-1])))
    grid[-1] = min(grid[-1], stop)
    if len(grid) > 1 and grid[-1] - grid[-2] < 1e-9:
        grid.pop()
    return np.asarray(grid)


def _selection(cfg: Config, lo: float, hi: float, nbins: int) -> Any:
    from .execution import Selection

    ob, pr = cfg.objects, cfg.pairing
    return Selection(
        first=ob.collection,
        second=ob.second_collection or None,
        edges=tuple(np.linspace(lo, hi, nbins + 1)),
        window=(lo, hi),
        cut=ob.cut or None,
        second_cut=ob.second_cut or None,
        event_cut=ob.event_cut or None,
        charge=None if pr.charge == "any" else pr.charge,
        choose=pr.choose,
        target_mass=pr.target_mass,
        min_delta_r=pr.min_delta_r or None,
        strict=cfg.input.strict,
    )


def _collect(cfg: Config, *, progress: bool) -> tuple[Any, float, float]:
    """Run the read/select/pair map-reduce once over the union of the needed windows."""
    from .execution import collect

    lo, hi = cfg.spectrum.window
    ulo, uhi = lo, hi
    if cfg.calibration.enabled and cfg.calibration.window is not None:
        ulo = min(ulo, cfg.calibration.window[0])
        uhi = max(uhi, cfg.calibration.window[1])
    # the map-reduce histogram only serves as a progress/overview spectrum on the union;
    # the analysis histograms are filled from the window masses below
    width = (hi - lo) / cfg.spectrum.bins
    nb = max(1, min(100_000, int(np.ceil((uhi - ulo) / width))))
    ex = cfg.execution
    try:
        col = collect(
            cfg.input.files, _selection(cfg, ulo, uhi, nb),
            engine=ex.engine, workers=ex.workers, address=ex.address or None,
            chunk_events=ex.chunk_events, skip_bad_files=ex.skip_bad_files, progress=progress,
            start_method=ex.start_method,
        )
    except CutError as exc:
        raise _keyed_cut_error(cfg, exc) from None
    except InputError as exc:
        raise _keyed_input_error(cfg, exc) from None
    return col, ulo, uhi


def _where(cfg: Config) -> str:
    return f"config {cfg.source}" if cfg.source != "<dict>" else "config"


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


def _keyed_cut_error(cfg: Config, exc: CutError) -> CutError:
    """A cut that failed on the data, prefixed with the config key that holds it."""
    ob = cfg.objects
    expr = getattr(exc, "expression", None)
    msg = _one_line(exc)
    keys = [k for k in ("cut", "second_cut", "event_cut") if getattr(ob, k)
            and (getattr(ob, k) == expr or msg.startswith(f"cut {getattr(ob, k)!r}"))]
    if not keys:
        return exc
    path = " / ".join(f"objects.{k}" for k in keys)
    new = CutError(f"{_where(cfg)}: {path}: {msg}")
    for a in ("expression", "position"):
        if hasattr(exc, a):
            setattr(new, a, getattr(exc, a))
    return new


def _keyed_input_error(cfg: Config, exc: InputError) -> InputError:
    """A collection missing from the files, named by its config key."""
    msg = _one_line(exc)
    ob = cfg.objects
    for key in ("collection", "second_collection"):
        name = getattr(ob, key)
        if name and msg.startswith(f"collection '{name}' is not in"):
            msg = msg.replace("Name one of those in 'collections'",
                              f"Name one of those in objects.{key}")
            return InputError(f"{_where(cfg)}: objects.{key}: {msg}")
    return exc


def _fill(col: Any, cfg: Config, lo: float, hi: float, nbins: int) -> Any:
    from .histogram import MassHistogram, in_range

    m = np.asarray(col.window_mass, dtype=float)
    w = np.asarray(col.window_weight, dtype=float) if cfg.input.weights else None
    sel = in_range(m, lo, hi)  # the collected masses may span a wider (union) window
    return MassHistogram.from_masses(m[sel], None if w is None else w[sel], bins=nbins,
                                     range=(lo, hi))


def _shape(name: str, options: Mapping[str, Any]) -> Any:
    from . import shapes

    return shapes.get(name, **dict(options))


# --------------------------------------------------------------------------- outputs
class _Staging:
    """A temporary directory next to ``target``, renamed into place by :meth:`commit`."""

    def __init__(self, target: Path) -> None:
        self.target = target
        if target.exists() and not target.is_dir():
            raise ConfigError(f"output path {str(target)!r} exists and is not a directory; "
                              "choose another --out")
        if target.is_dir() and any(target.iterdir()) and not (target / "results.json").exists() \
                and not (target / "spectrum.json").exists():
            raise ConfigError(
                f"output directory {str(target)!r} exists and does not hold a previous peaksift "
                "result; choose an empty or new directory with --out (nothing was overwritten)"
            )
        self.created: list[Path] = []
        p = target.parent
        while not p.exists():
            self.created.append(p)
            p = p.parent
        target.parent.mkdir(parents=True, exist_ok=True)
        self.path = target.parent / f".{target.name}.partial-{uuid.uuid4().hex[:8]}"
        self.path.mkdir()

    def commit(self) -> Path:
        old = None
        if self.target.exists():
            old = self.target.parent / f".{self.target.name}.old-{uuid.uuid4().hex[:8]}"
            os.replace(self.target, old)
        os.replace(self.path, self.target)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        return self.target

    def discard(self) -> None:
        shutil.rmtree(self.path, ignore_errors=True)
        for p in self.created:  # parents this run made, innermost first
            with contextlib.suppress(OSError):
                p.rmdir()


@contextlib.contextmanager
def _staged(target: Path | None) -> Iterator[_Staging | None]:
    if target is None:
        yield None
        return
    st = _Staging(target)
    try:
        yield st
    except BaseException:
        st.discard()
        raise
    st.commit()


def _target(cfg: Config, out: str | os.PathLike[str] | bool | None) -> Path | None:
    if out is False:
        return None
    if out is None or out is True:
        p = Path(cfg.output.dir).expanduser()
        return (p if p.is_absolute() else cfg.base_dir / p).resolve()
    return Path(out).expanduser().resolve()


def _check_inputs(cfg: Config) -> None:
    """Resolve the input files before anything is written (a missing file stops the run)."""
    from .events import list_files

    try:
        list_files(list(cfg.input.files))
    except PeaksiftError as exc:
        raise type(exc)(f"config {cfg.source}: input.files: {' '.join(str(exc).split())}") from None


def _apply_overrides(cfg: Config, *, toys: int | None, seed: int | None,
                     engine: str | None) -> Config:
    ov: dict[str, Any] = {}
    if toys is not None:
        ov["significance__toys"] = int(toys)
    if seed is not None:
        ov["significance__seed"] = int(seed)
    if engine is not None:
        ov["execution__engine"] = engine
    return cfg.with_overrides(**ov) if ov else cfg


# ------------------------------------------------------------------------------ search
def run_search(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    *,
    out: str | os.PathLike[str] | bool | None = None,
    unblind: bool | None = None,
    toys: int | None = None,
    seed: int | None = None,
    engine: str | None = None,
    progress: bool = False,
) -> SearchResult:
    """Run the whole search described by a configuration.

    Parameters
    ----------
    config : path, mapping or Config
        The TOML file (see ``docs/config.md``), a mapping of the same layout, or a
        :class:`~peaksift.config.Config`.
    out : path, False or None
        Output directory; None uses ``output.dir`` from the config (relative to the config
        file); False writes nothing and only returns the result.
    unblind : bool, optional
        Lift the configured blinding for this run.
    toys, seed, engine : optional
        Override ``significance.toys``, ``significance.seed`` and ``execution.engine``.
    progress : bool
        Show progress bars (reading; toys).

    Returns
    -------
    SearchResult
        Its :meth:`~SearchResult.to_dict` is the content of ``results.json``.

    Raises
    ------
    PeaksiftError
        Any user-facing problem (configuration, input, cut, fit); nothing is written then.
    """
    started = _utc()
    cfg = _apply_overrides(load_config(config), toys=toys, seed=seed, engine=engine)
    _check_inputs(cfg)
    target = _target(cfg, out)
    with _staged(target) as stage:
        res = _search(cfg, unblind=bool(unblind), progress=progress, started=started,
                      stage=stage, target=target)
    return res


def _blinding(cfg: Config, unblind: bool) -> dict[str, Any]:
    """The results.json ``blinding`` section; while active it names the hidden bins' mass
    range and what is withheld."""
    b = cfg.blinding
    out: dict[str, Any] = {"enabled": b.enabled, "window": list(b.window) if b.window else None,
                           "unblinded": bool(b.enabled and unblind),
                           "active": bool(b.enabled and not unblind)}
    if out["active"]:
        from .blinding import hidden_range

        hidden = hidden_range(cfg.spectrum.edges, b.window)
        out["hidden_range"] = list(hidden) if hidden else None
        out["counts"] = ("input.candidates and input.sum_of_weights count the sidebands only "
                         "(the fit window outside hidden_range); input.cutflow and "
                         "input.candidates_all_masses count the selection at all masses")
        out["withheld"] = ["signal-plus-background fit",
                           "observed scan and limit values inside the window",
                           "spectrum.json bins in hidden_range (set to 0)",
                           "candidates figure (pT and rapidity)"]
    return out


def _search(cfg: Config, *, unblind: bool, progress: bool, started: str,
            stage: _Staging | None, target: Path | None) -> SearchResult:
    from .fitting import fit
    from .resonances import match_known, pair_charge
    from .stats.scan import scan

    col, _, _ = _collect(cfg, progress=progress)
    lo, hi = cfg.spectrum.window
    hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
    _require_candidates(cfg, col, hist)
    blind = _blinding(cfg, unblind)
    blind_window = tuple(cfg.blinding.window) if blind["active"] else None
    if blind_window is not None:  # nothing downstream sees the blinded bins' contents
        hist = _blinded_copy(hist, blind_window)

    res = cfg.model.resolution
    sig_fit = _shape(cfg.model.signal, cfg.model.signal_options)
    bkg = _shape(cfg.model.background, cfg.model.background_options)
    scan_sig = _shape(_scan_signal_name(cfg), {})
    masses = _scan_masses(cfg)
    binned, data = _fit_data(cfg, col, hist)

    sigma_fn = res.sigma
    if res.natural_width > 0:
        width = float(res.natural_width)
    else:
        width = None
    seed = cfg.significance.seed

    sres = scan(hist, scan_sig, bkg, masses, resolution=res.resolution, window=(lo, hi),
                natural_width=width, blind=blind_window, refit=False)
    best = dict(sres.global_significance(
        method=cfg.significance.method, toys=cfg.significance.toys, seed=seed,
        u0=cfg.significance.reference_level, progress=progress,
        executor=_toy_executor(cfg)))

    m_best = float(best["mass"])
    settings = _fit_settings(cfg, sig_fit, m_best)
    start = _fit_start(cfg, sig_fit, m_best, settings)
    if blind_window is None:
        fres = fit(data, sig_fit, bkg, (lo, hi), binned=binned, start=start,
                   **settings.arguments())
    else:  # while blinded no fit may look inside the blinded window
        fres = None
    fres = _note_tie_drift(fres, cfg, settings)
    bonly = fit(data, sig_fit, bkg, (lo, hi), binned=binned, start=start,
                **settings.background_only(sig_fit, start)) if blind_window is None else None

    limits = None
    if cfg.limits.enabled:
        limits = _limits(cfg, hist, scan_sig, bkg, masses, width, blind_window, progress)

    peak = (fres.to_dict().get("peak_mass") or {}) if fres is not None else {}
    m_fit = peak.get("value") or m_best
    m_err = peak.get("error") or 0.0
    known = tuple(match_known(float(m_fit), error=float(m_err),
                              resolution=float(sigma_fn(float(m_fit))),
                              charge=pair_charge(cfg.pairing.charge)))
    cal, cal_hist, cal_fit = _calibration(cfg, col)

    inputs = [{"path": str(p), "sha256": _sha256(p)} for p in col.files_read]
    prov: dict[str, Any] = {
        "inputs": inputs,
        "files_skipped": [s.to_dict() for s in col.files_skipped],
        "config_path": cfg.source,
        "config_sha256": cfg.sha256,
        "seed": seed,
        "versions": _versions(),
        "execution": {k: v for k, v in dict(col.engine_info).items()
                      if k in ("engine", "workers", "address", "start_method", "chunks",
                               "chunk_events")},
        "started": started,
        "finished": "",
    }
    result = SearchResult(
        config=cfg, histogram=hist, collected=col, background_fit=bonly, fit=fres, scan=sres,
        best=best, limits=limits, known_matches=known, calibration=cal, provenance=prov,
        blinding=blind, outdir=target, figures={}, fit_settings=settings.echo(start),
    )
    if stage is None:
        prov["finished"] = _utc()
        return result

    from . import plotting
    from .report import write_report, write_results_json

    figdir = stage.path / "figures"
    figs = plotting.search_figures(result, figdir, formats=cfg.output.formats,
                                   log_scale=cfg.output.log_scale, calibration=(cal_hist, cal_fit))
    _save_spectrum(hist, stage.path / "spectrum.json", blind)
    prov["finished"] = _utc()
    final_figs = {k: target / "figures" / Path(v).name for k, v in figs.items()}
    result = SearchResult(**{**result.__dict__, "figures": final_figs})
    d = result.to_dict()
    write_results_json(d, stage.path / "results.json")
    write_report(d, stage.path, figs)
    return result


def _require_candidates(cfg: Config, col: Any, hist: Any) -> None:
    """Stop with a message saying why the fit window is empty: no events, or the selection."""
    lo, hi = cfg.spectrum.window
    if hist.total() > 0:
        return
    if int(col.events_read) == 0:
        n = len(col.files_read)
        what = "the input file holds" if n == 1 else f"the {n} input files hold"
        raise InputError(
            f"{_where(cfg)}: input.files: {what} no events (0 events read); point "
            "input.files at files with events"
        )
    raise FitError(
        f"no candidates in the fit window [{lo:g}, {hi:g}] GeV after the selection "
        f"({col.events_read} events read); loosen objects.cut or move spectrum.window"
    )


def _opt(**kw: Any) -> dict[str, Any]:
    """Keyword arguments whose value is not None (optional features of the layers)."""
    return {k: v for k, v in kw.items() if v is not None}


def _toy_executor(cfg: Config, desc: str = "toy batches") -> Any:
    """The toys' map on the configured engine (None: serial, in this process).  Toys are
    seeded one by one (global significance) or per mass (limits), so the engine does not
    change the result."""
    ex = cfg.execution
    if ex.engine == "serial":
        return None
    import functools

    from .execution import map_tasks

    return functools.partial(map_tasks, engine=ex.engine, workers=ex.workers,
                             address=ex.address or None, desc=desc,
                             start_method=ex.start_method)


def _limits(cfg: Config, hist: Any, sig: Any, bkg: Any, masses: np.ndarray,
            width: float | None, blind: Any, progress: bool) -> Any:
    from .stats.limits import upper_limits

    n = min(cfg.limits.points, masses.size)
    lm = np.linspace(masses[0], masses[-1], n) if n > 1 else masses[:1]
    L = cfg.limits
    half = (lm[-1] - lm[0]) / (2 * (lm.size - 1)) if lm.size > 1 else 0.0
    for i, m in enumerate(L.toy_masses):
        if not lm[0] - half <= m <= lm[-1] + half:
            raise ConfigError(
                f"{_where(cfg)}: limits.toy_masses[{i}] = {m:g} lies outside the limit scan "
                f"[{lm[0]:g}, {lm[-1]:g}] GeV (the scan keeps 3 resolution sigma inside the "
                "window unless scan.start / scan.stop say otherwise); choose masses inside it")
    return upper_limits(
        hist, sig, bkg, lm, resolution=cfg.model.resolution.resolution,
        window=cfg.spectrum.window, cl=L.cl,
        method=L.method,
        **_opt(toys=L.toys if L.method != "asymptotic" else None, seed=cfg.significance.seed,
               toy_masses=list(L.toy_masses) or None,
               natural_width=width, blind=blind, luminosity=L.luminosity,
               luminosity_uncertainty=L.luminosity_uncertainty or None,
               efficiency=L.efficiency if L.luminosity is not None else None,
               efficiency_uncertainty=L.efficiency_uncertainty or None,
               unit=L.cross_section_unit if L.luminosity is not None else None),
        constraint=L.constraint, progress=progress,
        executor=_toy_executor(cfg, "toy limits") if L.method != "asymptotic" else None,
    )


def _sigma_near(cfg: Config, mass: float) -> float:
    """sigma at ``mass``, or at the nearest row of a resolution table that stops short of it:
    for the calibration peak, whose window may lie beyond the table (which must cover only
    the search window), where sigma is a fit's starting value or a matching tolerance."""
    r = cfg.model.resolution.resolution
    m = float(mass) if r.mass_range is None else float(np.clip(mass, *r.mass_range))
    return float(r.sigma(m))


def _calibration(cfg: Config, col: Any) -> tuple[dict[str, Any] | None, Any, Any]:
    c = cfg.calibration
    if not c.enabled:
        return None, None, None
    from .fitting import fit
    from .resonances import lookup

    ref = lookup(c.particle)
    lo, hi = c.window
    h = _fill(col, cfg, lo, hi, c.bins)
    sig = _shape(c.signal, c.signal_options)
    bkg = _shape(c.background, c.background_options)
    names = [p.name for p in sig.parameters]
    start: dict[str, float] = {"mass": ref.mass}
    fixed: dict[str, float] = {}
    if "sigma" in names:
        start["sigma"] = _sigma_near(cfg, ref.mass)
    if "width" in names:
        start["width"] = ref.width
        if c.fix_width:
            fixed["width"] = ref.width
    try:
        fr = fit(h, sig, bkg, (lo, hi), start=start, fixed=fixed or None)
    except FitError as exc:
        raise FitError(f"calibration fit of {c.particle} in [{lo:g}, {hi:g}] GeV: {exc}") from None
    d = fr.to_dict()
    pm = d.get("peak_mass") or {}
    m, e = float(pm.get("value", np.nan)), float(pm.get("error") or np.nan)
    out = {
        "particle": ref.name,
        "pdgid": ref.pdgid,
        "table_mass": ref.mass,
        "table_mass_error": ref.mass_error,
        "table_width": ref.width,
        "window": [lo, hi],
        "signal_shape": c.signal,
        "background_shape": c.background,
        "width_fixed_to_table": bool(fixed),
        "valid": bool(d.get("valid")),
        "fitted_mass": {"value": m, "error": e},
        "fitted_resolution": _value_error(d, "sigma"),
        "signal_yield": d.get("signal_yield"),
        "shift": m - ref.mass,
        "shift_relative_permille": 1000.0 * (m - ref.mass) / ref.mass,
        "shift_sigma": (m - ref.mass) / np.hypot(e, ref.mass_error) if e > 0 else None,
        "source": "particle package (PDG tables)",
    }
    from .resonances import match_known, pair_charge

    res_sigma = _sigma_near(cfg, m) if np.isfinite(m) else 0.0
    out["known_matches"] = [k.to_dict() for k in match_known(
        m, error=e if np.isfinite(e) else 0.0, resolution=res_sigma,
        charge=pair_charge(cfg.pairing.charge))] if np.isfinite(m) else []
    return out, h, fr


def _value_error(d: Mapping[str, Any], name: str) -> dict[str, Any] | None:
    """``{"value", "error"}`` of a fit parameter from ``FitResult.to_dict()``."""
    p = (d.get("parameters") or {}).get(name)
    if not isinstance(p, Mapping):
        return None
    return {"value": p.get("value"), "error": p.get("error")}


# ---------------------------------------------------------------------------- spectrum
def run_spectrum(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    *,
    out: str | os.PathLike[str] | bool | None = None,
    engine: str | None = None,
    progress: bool = False,
) -> SpectrumResult:
    """Only the selected spectrum: ``spectrum.json`` (MassHistogram format) and its figure.

    With ``blinding.enabled`` the bins overlapping ``blinding.window`` are emptied in the
    histogram returned and saved (marked in the file's ``blinded`` entry) and hidden in the
    figure, and the candidates' pT/rapidity figure is not written (it includes them).
    """
    cfg = _apply_overrides(load_config(config), toys=None, seed=None, engine=engine)
    _check_inputs(cfg)
    target = _target(cfg, out)
    with _staged(target) as stage:
        col, _, _ = _collect(cfg, progress=progress)
        lo, hi = cfg.spectrum.window
        hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
        blinding = _blinding(cfg, unblind=False)
        blind = cfg.blinding.window if blinding["active"] else None
        if blind is not None:  # `peaksift spectrum` has no --unblind: always hidden
            hist = _blinded_copy(hist, blind)
        files: dict[str, Path] = {}
        if stage is not None:
            from . import plotting

            _save_spectrum(hist, stage.path / "spectrum.json", blinding)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                figs = plotting.spectrum_only(hist, stage.path / "figures",
                                              formats=cfg.output.formats,
                                              log_scale=cfg.output.log_scale, blind=blind,
                                              title=_short_title(cfg))
                if blind is None:  # pT/rapidity include the blinded window: withheld
                    figs.update(plotting.candidates(col, stage.path / "figures",
                                                    formats=cfg.output.formats))
            files = {"spectrum.json": target / "spectrum.json",
                     **{k: target / "figures" / Path(v).name for k, v in figs.items()}}
    return SpectrumResult(config=cfg, histogram=hist, collected=col, outdir=target, files=files)


def _short_title(cfg: Config) -> str:
    a, b = cfg.objects.collection, cfg.objects.second_collection
    ch = {"opposite": "opposite-charge ", "same": "same-charge "}.get(cfg.pairing.charge, "")
    return f"{ch}{a}-{b} pairs" if b and b != a else f"{ch}{a} pairs"


# --------------------------------------------------------------------------------- fit
#: what ``run_fit(..., out=DIR)`` writes into DIR (and the only names it will replace there)
FIT_FILES = ("fit.json", "fit.png")
#: the mark in fit.json that says ``peaksift fit`` wrote it
_FIT_MARK = "peaksift fit"


@dataclass(frozen=True)
class _FitSettings:
    """The free fit's parameter settings from ``[model]``, as :func:`peaksift.fit` takes them."""

    fixed: Mapping[str, float]
    constraints: Mapping[str, Any]  # name -> peaksift.likelihood.Constraint
    limits: Mapping[str, tuple[float, float]]
    intervals: tuple[str, ...]
    tie: Mapping[str, Any] | None

    def arguments(self) -> dict[str, Any]:
        """``fixed=``, ``limits=``, ``constraints=``, ``intervals=`` for :func:`fit`."""
        return {"fixed": dict(self.fixed) or None, "limits": dict(self.limits) or None,
                "constraints": dict(self.constraints) or None,
                "intervals": list(self.intervals) or False}

    def background_only(self, signal: Any, start: Mapping[str, float]) -> dict[str, Any]:
        """The same for the background-only fit: the signal yield is 0, so the signal's
        parameters are held (at the start) and their constraints and bounds do not apply."""
        sig = {p.name for p in signal.parameters} | {"signal_yield"}
        fixed = {**self.fixed, **start, "signal_yield": 0.0}
        return {"fixed": fixed,
                "limits": {k: v for k, v in self.limits.items() if k not in sig} or None,
                "constraints": {k: v for k, v in self.constraints.items()
                                if k not in sig and k not in fixed} or None}

    def echo(self, start: Mapping[str, float]) -> dict[str, Any]:
        """The results.json ``fit.settings``: what was held, constrained, bounded, where
        the fit started and which intervals were asked for."""
        return {"fixed": dict(self.fixed),
                "constraints": {k: c.to_dict() for k, c in self.constraints.items()},
                "bounds": {k: list(v) for k, v in self.limits.items()},
                "sigma_from_resolution": dict(self.tie) if self.tie else None,
                "start": dict(start), "intervals": list(self.intervals)}


def _fit_settings(cfg: Config, signal: Any, mass: float, *, hold_mass: bool = False
                  ) -> _FitSettings:
    """``model.fix`` / ``constrain`` / ``bounds`` / ``sigma_from_resolution`` for a free fit
    starting at ``mass`` (the resolution sigma is taken there); ``hold_mass`` fixes the mass.

    The intervals asked for (``model.intervals``) are those of the peak mass, the signal's
    width parameter and the signal yield, each only while it floats.
    """
    from .likelihood import Constraint

    md = cfg.model
    fixed = dict(md.fix)
    cons = {k: Constraint(c["kind"], c["center"], c["width"]) for k, c in md.constrain.items()}
    tie = None
    if md.sigma_from_resolution != "free":
        s = float(md.resolution.sigma(mass))
        tie = {"mode": md.sigma_from_resolution, "at_mass": float(mass), "sigma": s,
               "relative_uncertainty": md.resolution_uncertainty,
               "resolution_model": md.resolution.kind}
        if md.sigma_from_resolution == "fixed":
            fixed["sigma"] = s
        else:  # Gaussian around the resolution, of relative width resolution_uncertainty
            cons["sigma"] = Constraint.gaussian(s, float(md.resolution_uncertainty) * s)
    if hold_mass:
        fixed["mass"] = float(mass)
    wanted: tuple[str, ...] = ()
    if md.intervals and fixed.get("signal_yield") != 0.0:  # no signal: its shape is held too
        widths = signal.width_parameters()
        wanted = tuple(k for k in ("mass", widths[0] if widths else "", "signal_yield")
                       if k and k not in fixed)
    return _FitSettings(fixed=fixed, constraints=cons, limits=dict(md.bounds),
                        intervals=wanted, tie=tie)


def _fit_start(cfg: Config, signal: Any, mass: float, settings: _FitSettings
               ) -> dict[str, float]:
    """Starting values of the signal: the mass, sigma from the resolution model there, the
    natural width (at least a tenth of sigma); held parameters are left to ``fixed``, and a
    start outside ``model.bounds`` is moved inside (the search's best scan mass may lie
    outside the bounds of the fitted mass)."""
    res = cfg.model.resolution
    names = [p.name for p in signal.parameters]
    start = {"mass": float(mass)}
    if "sigma" in names:
        start["sigma"] = float(res.sigma(mass))
    if "width" in names:
        start["width"] = max(float(res.natural_width), 0.1 * float(res.sigma(mass)))
    out = {}
    for k, v in start.items():
        if k not in settings.fixed:
            a, b = settings.limits.get(k, (-np.inf, np.inf))
            out[k] = min(max(v, a), b)
    return out


def run_fit(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    mass: float,
    *,
    hold_mass: bool = False,
    out: str | os.PathLike[str] | None = None,
    engine: str | None = None,
    unblind: bool = False,
    progress: bool = False,
) -> Any:
    """One signal-plus-background fit of the configured spectrum, started at ``mass`` GeV.

    The fit's mass starts at ``mass`` (no search for other starting peaks) and floats, or
    stays there with ``hold_mass``; everything else is set as for the search's free fit
    (``model.fix``, ``constrain``, ``bounds``, ``sigma_from_resolution`` with sigma taken at
    ``mass``, ``intervals``).  A free fit that settles in a minimum above the lowest one the
    fitter finds from its own starts is told so in its notes.  Refused while the
    configuration is blinded unless ``unblind`` is given.

    Parameters
    ----------
    out : path, optional
        Directory for ``fit.json`` (:meth:`FitResult.to_dict` plus a ``run`` entry: config,
        start, held mass, settings) and ``fit.png`` (the fit figure), each written
        atomically.  The directory must be new, empty, or hold a previous ``peaksift fit``
        output; nothing else in it is touched.

    Returns
    -------
    FitResult
    """
    from .fitting import fit

    cfg = _apply_overrides(load_config(config), toys=None, seed=None, engine=engine)
    lo, hi = cfg.spectrum.window
    mass = float(mass)
    if cfg.blinding.enabled and not unblind:
        raise ConfigError(f"config {cfg.source}: blinding.enabled = true: a free fit would look "
                          "inside the blinded window; pass --unblind to fit anyway")
    if not (lo < mass < hi):
        raise ConfigError(f"--mass {mass:g} GeV lies outside spectrum.window [{lo:g}, {hi:g}]; "
                          "choose a mass inside the fit window")
    if "mass" in cfg.model.fix:
        raise ConfigError(f"{_where(cfg)}: model.fix.mass = {cfg.model.fix['mass']:g} holds the "
                          "mass, so a fit at --mass cannot start elsewhere; remove model.fix.mass "
                          "(use --hold-mass to hold the mass at --mass)")
    a, b = cfg.model.bounds.get("mass", (lo, hi))
    if not a <= mass <= b:
        raise ConfigError(f"{_where(cfg)}: --mass {mass:g} GeV lies outside model.bounds.mass "
                          f"[{a:g}, {b:g}]; choose a mass inside them")
    sig = _shape(cfg.model.signal, cfg.model.signal_options)
    bkg = _shape(cfg.model.background, cfg.model.background_options)
    settings = _fit_settings(cfg, sig, mass, hold_mass=hold_mass)
    start = _fit_start(cfg, sig, mass, settings)
    target = None if out is None else Path(out).expanduser().resolve()
    if target is not None:
        _check_fit_dir(target)
    col, _, _ = _collect(cfg, progress=progress)
    hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
    _require_candidates(cfg, col, hist)
    binned, data = _fit_data(cfg, col, hist)
    fr = fit(data, sig, bkg, (lo, hi), binned=binned, start=start, **settings.arguments())
    if not hold_mass:
        fr = _note_lower_minimum(fr, fit, data, sig, bkg, (lo, hi), binned, start, settings)
    fr = _note_tie_drift(fr, cfg, settings)
    if target is not None:
        _write_fit(target, fr, {
            "written_by": _FIT_MARK, "config": cfg.source, "config_sha256": cfg.sha256,
            "mass_start": mass, "mass_held": bool(hold_mass),
            "settings": settings.echo(start)})
    return fr


def _note_lower_minimum(fr: Any, fit: Any, data: Any, sig: Any, bkg: Any,
                        window: tuple[float, float], binned: bool | None,
                        start: Mapping[str, float], settings: _FitSettings) -> Any:
    """``fr`` with a note when the fitter's own starts (a coarse likelihood scan of the
    window) reach a lower minimum than the fit started at the given mass."""
    free_start = {k: v for k, v in start.items() if k != "mass"}
    try:
        ref = fit(data, sig, bkg, window, binned=binned, start=free_start,
                  **{**settings.arguments(), "intervals": False})
    except FitError:
        return fr
    gap = 2.0 * (fr.nll - ref.nll)
    if not gap > 0.1:  # Delta(-2 ln L) below 0.1: the same minimum for any purpose here
        return fr
    return _with_note(fr, f"a lower minimum exists at mass {ref.peak_mass:.6g} {fr.unit} "
                          f"(-2 ln L lower by {gap:.3g}): this fit, started at the given "
                          "mass, is a local minimum")


def _with_note(fr: Any, note: str) -> Any:
    """``fr`` (a frozen FitResult) with one more note."""
    import dataclasses

    return dataclasses.replace(fr, notes=(*fr.notes, note))


#: the tied sigma and the resolution at the fitted mass may differ by this fraction before
#: the fit says so (our choice)
_TIE_DRIFT = 0.01


def _note_tie_drift(fr: Any, cfg: Config, settings: _FitSettings) -> Any:
    """``fr`` with a note when sigma was tied to the resolution at a starting mass where the
    resolution differs by more than ``_TIE_DRIFT`` from the one at the fitted mass."""
    tie = settings.tie
    if fr is None or not tie or not np.isfinite(fr.peak_mass):
        return fr
    there = float(cfg.model.resolution.sigma(fr.peak_mass))
    if abs(there - tie["sigma"]) <= _TIE_DRIFT * there:
        return fr
    return _with_note(fr, f"sigma was tied to the resolution at the starting mass "
                          f"{tie['at_mass']:.6g} {fr.unit} ({tie['sigma']:.4g} {fr.unit}); at the "
                          f"fitted mass {fr.peak_mass:.6g} {fr.unit} it is {there:.4g} {fr.unit}: "
                          "start the fit there (peaksift fit --mass) for a consistent sigma")


def _check_fit_dir(target: Path) -> None:
    """``run_fit``'s output directory may be new, empty, or hold only a previous
    ``peaksift fit`` output (its ``fit.json`` carries the mark); anything else is refused."""
    import json

    if target.exists() and not target.is_dir():
        raise ConfigError(f"output path {str(target)!r} exists and is not a directory; "
                          "choose another --out")
    if not target.is_dir():
        return
    # a temporary file of an interrupted atomic write (".fit.json.XXXX") is ours too
    names = {p.name for p in target.iterdir()
             if not any(p.name.startswith(f".{f}.") for f in FIT_FILES)}
    foreign = sorted(n for n in names if n not in FIT_FILES)
    if foreign:
        raise ConfigError(
            f"output directory {str(target)!r} holds files peaksift fit did not write "
            f"({', '.join(foreign[:3])}{', ...' if len(foreign) > 3 else ''}); choose an empty "
            "or new directory with --out (nothing was overwritten)")
    if not names:
        return
    try:
        ours = json.loads((target / "fit.json").read_text()).get("run", {}).get(
            "written_by") == _FIT_MARK
    except (OSError, ValueError, AttributeError):
        ours = False
    if not ours:
        raise ConfigError(
            f"output directory {str(target)!r} holds {', '.join(sorted(names))} not written by "
            "peaksift fit; choose an empty or new directory with --out (nothing was "
            "overwritten)")


def _write_fit(target: Path, fr: Any, run: Mapping[str, Any]) -> dict[str, Path]:
    """``fit.png`` and ``fit.json`` into ``target``, each atomically; the figure is drawn
    in memory first, so a failure to draw leaves no file."""
    import io

    from ._style import use_headless_backend
    from .report import write_results_json

    use_headless_backend()
    import matplotlib.pyplot as plt

    from ._files import atomic_write

    fig = fr.plot(title=f"fit started at {run['mass_start']:g} GeV"
                  + (" (mass held)" if run["mass_held"] else ""))
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format="png")
    finally:
        plt.close(fig)
    d = {**_plain(fr.to_dict()), "run": _plain(dict(run))}
    png = atomic_write(target / "fit.png", buf.getvalue())
    return {"fit.json": write_results_json(d, target / "fit.json"), "fit.png": png}


def _fit_data(cfg: Config, col: Any, hist: Any) -> tuple[bool | None, Any]:
    """What the free fits get: the histogram (binned, or ``auto``: the fitter's choice for a
    histogram is binned), or the window masses with their weights for ``fit = "unbinned"``."""
    binned = {"auto": None, "binned": True, "unbinned": False}[cfg.model.fit]
    if binned is not False:
        return binned, hist
    from .histogram import in_range

    lo, hi = cfg.spectrum.window
    m = np.asarray(col.window_mass, dtype=float)
    sel = in_range(m, lo, hi)
    if cfg.input.weights and hist.is_weighted:
        return binned, (m[sel], np.asarray(col.window_weight, dtype=float)[sel])
    return binned, m[sel]


# ------------------------------------------------------------------------------- demo
#: the configuration of the demo search; ``demo_data/search.toml`` is this text, and
#: ``peaksift demo OUTDIR`` writes it next to the data it generates (``{files}`` filled in)
DEMO_CONFIG = """\
# The demo search: opposite-charge isolated muon pairs in the invented collider run.
# Every key is documented, with its default, in docs/config.md.

[input]
files = {files}              # relative to this file

[objects]
collection = "muon"
cut = "pt > 20 and abs(eta) < 2.4 and isolation < 0.15"

[pairing]
charge = "opposite"
choose = "leading"             # one pair per event: the two hardest selected muons

[spectrum]
# The search window starts above the Z peak, which would otherwise dominate the
# background model; the Z is fitted separately as a calibration check (below).
window = [110.0, 200.0]
bin_width = 1.0

[model]
signal = "gaussian"            # free fit at the best mass: mass and width float
background = "powerlaw"        # m^-k: the falling opposite-charge continuum

[model.resolution]
# sigma(m) of the dimuon mass, measured on the simulated-sample variant
# (`peaksift demo --weighted`: reconstructed vs generated mass, central 68%).
table = [[90.0, 0.99], [120.0, 1.44], [150.0, 1.98], [200.0, 2.80]]

[significance]
method = "upcrossings"         # Gross and Vitells (2010), N0 from background-only toys
toys = 100
seed = 20261201

[limits]
cl = 0.95
points = 25
luminosity = 10.0              # fb^-1 of the invented run
luminosity_uncertainty = 0.02
efficiency = 0.55              # dimuon selection efficiency x acceptance (assumed)
efficiency_uncertainty = 0.05

[calibration]
particle = "Z0"                # fitted in its own window; compared with the particle tables
window = [70.0, 110.0]
bins = 80
signal = "crystalball"         # Gaussian core with radiative tails
background = "exponential"

[execution]
engine = "serial"

[output]
dir = "../demo_out"
formats = ["png", "pdf"]
log_scale = false
"""


def demo_config_text(files: list[str] | tuple[str, ...]) -> str:
    """The demo search configuration with ``input.files`` set to ``files``."""
    import json

    return DEMO_CONFIG.format(files=json.dumps(list(files)))


def write_demo_config(outdir: str | os.PathLike[str]) -> Path | None:
    """Write ``search.toml`` for the demo data in ``outdir`` (read from its ``truth.json``).

    Returns the path, or None when ``outdir`` holds no demo truth file.  The config's output
    directory is ``search_out`` inside ``outdir``.
    """
    import json

    from ._files import atomic_write

    out = Path(outdir)
    truth = out / "truth.json"
    if not truth.exists():
        return None
    files = json.loads(truth.read_text()).get("files") or ["*.parquet"]
    text = demo_config_text(files).replace('dir = "../demo_out"', 'dir = "search_out"')
    return atomic_write(out / "search.toml", text)
