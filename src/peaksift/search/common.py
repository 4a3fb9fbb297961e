"""Steps every command shares: the scan grid, collecting candidates, filling the spectrum, keyed
errors, the toys' engine."""

from __future__ import annotations

import datetime as _dt
import platform
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ..config import SCHEMA, Config
from ..errors import ConfigError, CutError, FitError, InputError


def _in_window(col: Any, cfg: Config, hidden: tuple[float, float] | None = None) -> int:
    """Candidates (not weights) with a mass inside the fit window; with ``hidden`` (the mass
    range of the blinded bins) only those outside it: the sidebands."""
    from ..histogram import MassHistogram

    # counted by the spectrum's own bins, so the edge rule is the histogram's
    h = MassHistogram.from_masses(np.asarray(col.window_mass, dtype=float),
                                  edges=cfg.spectrum.edges)
    counts = h.values()
    if hidden is not None:  # the hidden range is a union of whole bins
        c = h.centers
        counts = counts[~((c > hidden[0]) & (c < hidden[1]))]
    return round(float(counts.sum()))


def _hidden(blinding: Mapping[str, Any]) -> tuple[float, float] | None:
    """The mass range ``[lo, hi)`` of the hidden bins while blinding is active, else None."""
    r = blinding.get("hidden_range") if blinding.get("active") else None
    return (float(r[0]), float(r[1])) if r else None


def _blinded_copy(hist: Any, blind: Any) -> Any:
    """A copy of ``hist`` with the bins overlapping ``blind`` emptied (values = variances = 0)."""
    from ..blinding import blinded_bins

    h = hist.copy()
    mask = blinded_bins(h.edges, blind)
    h.values()[mask] = 0.0
    h.variances()[mask] = 0.0
    return h


def _save_spectrum(hist: Any, path: Path, blinding: Mapping[str, Any]) -> Path:
    """``spectrum.json`` in the MassHistogram format; while blinded the histogram given is
    the emptied copy and a ``blinded`` entry (ignored by ``MassHistogram.load``) says which
    bins hold 0 because they are hidden, not because they are empty."""
    hidden = _hidden(blinding)
    if hidden is None:
        return hist.save(path)
    import json

    from .._files import atomic_write

    d = hist.to_dict()
    d["blinded"] = {
        "window": list(blinding.get("window") or []),
        "hidden_range": list(hidden),
        "note": "the bins overlapping the blinded window are hidden: their values and variances "
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


def _selection(cfg: Config, lo: float, hi: float, nbins: int,
               identification: Any = None) -> Any:
    from ..execution import Selection

    ob, pr = cfg.objects, cfg.pairing
    hyps = tuple(pr.hypotheses)
    return Selection(
        first=ob.collection,
        second=ob.second_collection or None,
        edges=tuple(np.linspace(lo, hi, nbins + 1)),
        window=(lo, hi),
        summary_window=tuple(cfg.spectrum.window),  # pT/rapidity: the search window only
        cut=ob.cut or None,
        second_cut=ob.second_cut or None,
        event_cut=ob.event_cut or None,
        charge=None if pr.charge == "any" else pr.charge,
        choose=pr.choose,
        target_mass=pr.target_mass,
        min_delta_r=pr.min_delta_r or None,
        strict=cfg.input.strict,
        column_pattern=cfg.input.column_pattern,
        hypotheses=(hyps * 2 if len(hyps) == 1 else hyps) or None,
        identification=identification,
        assignment=pr.assignment,
    )


def _read_window(cfg: Config) -> tuple[float, float, int]:
    """The mass range the read collects (the union of the search and calibration windows)
    and the bins of its overview histogram."""
    lo, hi = cfg.spectrum.window
    ulo, uhi = lo, hi
    if cfg.calibration.enabled and cfg.calibration.window is not None:
        ulo = min(ulo, cfg.calibration.window[0])
        uhi = max(uhi, cfg.calibration.window[1])
    # the map-reduce histogram only serves as a progress/overview spectrum on the union;
    # the analysis histograms are filled from the window masses
    width = (hi - lo) / cfg.spectrum.bins
    return ulo, uhi, max(1, min(100_000, int(np.ceil((uhi - ulo) / width))))


def _collect(cfg: Config, *, progress: bool, identification: Any = None
             ) -> tuple[Any, float, float]:
    """Run the read/select/pair map-reduce once over the union of the needed windows.

    ``identification``: the :class:`~peaksift.search.identification.DedxOutcome` of the
    calibration pass (run here when identification is on and none is given)."""
    from ..execution import collect
    from .identification import dedx_identification

    ulo, uhi, nb = _read_window(cfg)
    ex = cfg.execution
    try:
        if identification is None and cfg.identification.enabled:
            identification = dedx_identification(cfg, progress=progress)
        response = identification.response if identification is not None else None
        col = collect(
            cfg.input.files, _selection(cfg, ulo, uhi, nb, response),
            engine=ex.engine, workers=ex.workers, address=ex.address or None,
            chunk_events=ex.chunk_events, unreadable_files=ex.unreadable_files, progress=progress,
            start_method=ex.start_method, hash_files=cfg.input.hash_inputs,
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
    from ..histogram import MassHistogram, in_range

    m = np.asarray(col.window_mass, dtype=float)
    w = np.asarray(col.window_weight, dtype=float) if cfg.input.weights else None
    sel = in_range(m, lo, hi)  # the collected masses may span a wider (union) window
    return MassHistogram.from_masses(m[sel], None if w is None else w[sel], bins=nbins,
                                     range=(lo, hi))


def _shape(name: str, options: Mapping[str, Any]) -> Any:
    from .. import shapes

    return shapes.get(name, **dict(options))


# --------------------------------------------------------------------------- outputs


def _blinding(cfg: Config, unblind: bool) -> dict[str, Any]:
    """The results.json ``blinding`` section; while active it names the hidden bins' mass
    range and what is withheld."""
    b = cfg.blinding
    out: dict[str, Any] = {"enabled": b.enabled, "window": list(b.window) if b.window else None,
                           "unblinded": bool(b.enabled and unblind),
                           "active": bool(b.enabled and not unblind)}
    if out["active"]:
        from ..blinding import hidden_range

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


def _require_candidates(cfg: Config, col: Any, hist: Any) -> None:
    """Stop with a message saying why the fit window is empty: no events, or the selection."""
    lo, hi = cfg.spectrum.window
    _require_finite_weights(cfg, col, hist)
    if hist.total() > 0:
        return
    if int(col.events_read) == 0:
        n = len(col.files_read)
        what = "the input file holds" if n == 1 else f"the {n} input files hold"
        raise InputError(
            f"{_where(cfg)}: input.files: {what} no events (0 events read); point "
            "input.files at files with events"
        )
    _require_positive_weight(cfg, col, hist)
    raise FitError(
        f"no candidates in the fit window [{lo:g}, {hi:g}] GeV after the selection "
        f"({col.events_read} events read); loosen objects.cut or move spectrum.window"
    )


def _require_positive_weight(cfg: Config, col: Any, hist: Any) -> None:
    """Candidates in the window whose weights add up to zero or less: a weighting problem,
    not a selection one, so it gets its own message."""
    from ..histogram import in_range

    lo, hi = cfg.spectrum.window
    m = np.asarray(col.window_mass, dtype=float)
    n = int(np.count_nonzero(in_range(m, lo, hi)))
    if n == 0 or not cfg.input.weights:
        return
    total = float(hist.total())
    raise InputError(
        f"{_where(cfg)}: the {n} candidates in the fit window [{lo:g}, {hi:g}] GeV have a total "
        f"weight of {total:.6g} ({'zero' if total == 0 else 'negative'}): the per-event "
        "'weight' column cannot make a spectrum to fit; check the weights, or set "
        "input.weights = false to count events")


def _require_sidebands(cfg: Config, hist: Any) -> None:
    """While blinded: the sidebands (``hist`` with the blinded bins emptied) must hold
    candidates; otherwise the window is not empty, the blinding hides all of it."""
    if hist.total() > 0:
        return
    lo, hi = cfg.spectrum.window
    b0, b1 = cfg.blinding.window
    raise InputError(
        f"{_where(cfg)}: blinding.window [{b0:g}, {b1:g}] hides every candidate in the fit "
        f"window [{lo:g}, {hi:g}] GeV: the sidebands outside it are empty, so the background "
        "cannot be fitted; narrow blinding.window or widen spectrum.window")


def _require_finite_weights(cfg: Config, col: Any, hist: Any) -> None:
    """Weights so large that their sums (or sums of squares, the variances) overflow make
    every fit meaningless: say so, with the largest weight, instead of a fit failure."""
    sums = np.concatenate([np.asarray(hist.weight_sum, float),
                           np.asarray(hist.weight_sq_sum, float)])
    if np.all(np.isfinite(sums)):
        return
    w = np.asarray(col.window_weight, dtype=float)
    big = float(np.max(np.abs(w))) if w.size else float("nan")
    raise InputError(
        f"{_where(cfg)}: the per-event weights overflow the spectrum's sums (largest |weight| "
        f"in the window {big:.3g}; the sums of squared weights exceed the floating-point "
        "range): rescale the 'weight' column (e.g. to weights near 1), or set "
        "input.weights = false")


def _toy_executor(cfg: Config, desc: str = "toy batches") -> Any:
    """The toys' map on the configured engine (None: serial, in this process).  Toys are
    seeded one by one (global significance) or per mass (limits), so the engine does not
    change the result."""
    ex = cfg.execution
    if ex.engine == "serial":
        return None
    import functools

    from ..execution import map_tasks

    return functools.partial(map_tasks, engine=ex.engine, workers=ex.workers,
                             address=ex.address or None, desc=desc,
                             start_method=ex.start_method)
