"""Several channels in one search: :func:`run_combination` (``peaksift search`` on a config
with a ``[combination]`` section).

A combination config names one single-channel search config per channel; each channel is
its own complete search (its input or selection, objects, pairing, window and binning,
background, signal model or resolution, efficiency and luminosity), run through the same
code as ``peaksift search`` on that file alone, so each channel's numbers are exactly those
of its own search.  Channels that select from the same files (with the same execution
settings) read them in one pass: each chunk is read once and every channel's selection runs
on it (:func:`peaksift.execution.collect_shared`; the same result as the channel's own read).  The combination then fits all channels together with one sigma x B
(:func:`peaksift.stats.channels.combine` and
:func:`~peaksift.stats.channel_limits.combined_limits`).

.. code-block:: toml

    [combination]
    channels = ["dimuon.toml", "dielectron.toml"]   # relative to this file
    names = ["dimuon", "dielectron"]                 # default: the files' stems
    shared_luminosity = true     # one luminosity (and its uncertainty) for every channel

    [output]
    dir = "combined_out"

The combination's global significance and limits take their settings from the
``[combination.significance]`` (``method``, ``toys``, ``seed``, ``reference_level``) and
``[combination.limits]`` (``enabled``, ``cl``, ``method``, ``points``, ``toys``,
``toy_masses``) tables, each key as in a search config (same meaning, kind and range); a
key not given there is the first channel's (``[significance]``, ``[limits]``), and
``--toys``/``--seed`` override both.  The mass grid covers the range every channel scans
(from the highest first hypothesis to the lowest last one: each hypothesis is in every
channel's likelihood) with, at each mass, the finest of the channels' steps (a channel
without ``scan.step``/``scan.points`` steps half its resolution, as a search does); channels
with one grid keep it exactly (one channel: its search's grid).  Every
channel needs ``limits.luminosity`` (the same unit in all) and an efficiency
(``[signal_model]`` or ``limits.efficiency``).  Each channel's
``limits.luminosity_uncertainty`` and ``limits.efficiency_uncertainty`` enter the joint
likelihood as log-normal nuisances; with ``shared_luminosity = true`` the channels share one
luminosity nuisance (fully correlated; their uncertainties must agree).  A channel's
``[systematics]`` mass-scale and resolution factors are profiled in the combined scan, its
toys and the combined limits (asymptotic and toys); its background envelope
(the functions its own search kept) is profiled per channel in the combined scan and its
toys and the asymptotic combined limits (the toy limits take each channel's function at
mu = 0; both said in the results and the report).  Blinding is not
supported in a combination yet (refused).
"""

from __future__ import annotations

import dataclasses
import os
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ..config import load_config, output_figures, section_values
from ..config.values import config_path
from ..errors import ConfigError
from .combination_result import CombinedSearchResult

__all__ = ["CombinedSearchResult", "is_combination", "run_combination"]

if sys.version_info >= (3, 11):  # pragma: no cover - version switch
    import tomllib as _toml
else:  # pragma: no cover
    import tomli as _toml

_KEYS = {"channels", "names", "shared_luminosity", "significance", "limits"}
#: the settings a combination may give itself (else its first channel's)
_OWN = {"significance": ("method", "toys", "seed", "reference_level"),
        "limits": ("enabled", "cl", "method", "points", "toys", "toy_masses")}


def is_combination(config: Any) -> bool:
    """True for a TOML file (or mapping) with a ``[combination]`` section."""
    if isinstance(config, Mapping):
        return "combination" in config
    if isinstance(config, (str, os.PathLike)) and Path(config).is_file():
        try:
            return "combination" in _toml.loads(Path(config).read_text())
        except (OSError, UnicodeDecodeError, _toml.TOMLDecodeError):
            return False  # load_config reports the problem
    return False


def _read(config: Any) -> tuple[dict[str, Any], Path, str]:
    if isinstance(config, Mapping):
        return dict(config), Path.cwd(), "<dict>"
    path = Path(config)
    try:
        return _toml.loads(path.read_text()), path.resolve().parent, str(path)
    except _toml.TOMLDecodeError as exc:
        raise ConfigError(f"config {path}: TOML syntax error: {' '.join(str(exc).split())}"
                          ) from None


def run_combination(config: Any, *, out: Any = None, toys: int | None = None,
                    seed: int | None = None, engine: str | None = None,
                    progress: bool = False, share_folder: bool = False
                    ) -> CombinedSearchResult:
    """Run every channel's search and their combination (see the module guide).

    ``out``: output directory (None: ``output.dir`` of the combination config; False: write
    nothing).  ``toys``, ``seed``, ``engine`` override every channel's settings.
    ``share_folder`` as for :func:`~peaksift.search.run_search` (the output-folder contract).
    """
    from ..stats.channel_limits import combined_limits
    from ..stats.channels import combine
    from .common import _toy_executor, _utc
    from .run import _search
    from .staging import _apply_overrides, _check_inputs, _staged

    raw, base, source = _read(config)
    where = f"config {source}"
    unknown = set(raw) - {"combination", "output"}
    if unknown:
        raise ConfigError(f"{where}: unknown section [{min(unknown)}] in a combination config "
                          "(sections: combination, output)")
    comb = raw.get("combination") or {}
    if not isinstance(comb, Mapping) or set(comb) - _KEYS:
        raise ConfigError(f"{where}: [combination] takes the keys {', '.join(sorted(_KEYS))}")
    files = comb.get("channels")
    if not isinstance(files, list) or not files or not all(isinstance(f, str) for f in files):
        raise ConfigError(f"{where}: combination.channels must list the channels' search "
                          "configs, e.g. channels = [\"dimuon.toml\", \"dielectron.toml\"]")
    paths = [Path(config_path(f, base)) for f in files]
    names = comb.get("names") or [p.stem for p in paths]
    shared = comb.get("shared_luminosity", False)
    if not isinstance(shared, bool):
        raise ConfigError(f"{where}: combination.shared_luminosity must be true or false, got "
                          f"{shared!r}")
    if len(names) != len(paths) or len(set(names)) != len(names):
        raise ConfigError(f"{where}: combination.names must give one distinct name per channel")
    own = {sec: section_values(sec, comb.get(sec), where, keys, f"combination.{sec}")
           for sec, keys in _OWN.items()}
    for key, val in (("toys", toys), ("seed", seed)):   # the command line wins
        if val is not None:
            own["significance"][key] = int(val)
    cfgs = []
    for name, p in zip(names, paths):
        try:
            cfg = _apply_overrides(load_config(p), toys=toys, seed=seed, engine=engine)
        except ConfigError as exc:
            raise ConfigError(f"{where}: channel {name!r}: {exc}") from None
        _check_inputs(cfg)
        if cfg.blinding.enabled:
            raise ConfigError(f"{where}: channel {name!r} is blinded; a combination does not "
                              "support blinding yet (disable it in the channel's config)")
        if cfg.limits.luminosity is None:
            raise ConfigError(f"{where}: channel {name!r} needs limits.luminosity (sigma x B "
                              "is shared by the channels through L eff)")
        cfgs.append(cfg)
    if shared and len({c.limits.luminosity_uncertainty for c in cfgs}) > 1:
        raise ConfigError(f"{where}: shared_luminosity = true but the channels give different "
                          "limits.luminosity_uncertainty; one luminosity has one uncertainty "
                          "(make them equal, or set shared_luminosity = false)")
    units = {c.limits.luminosity_unit for c in cfgs}
    if len(units) > 1:
        raise ConfigError(f"{where}: the channels give luminosities in {sorted(units)}; use "
                          "one unit")
    out_cfg = raw.get("output", {})
    figures = output_figures(out_cfg.get("figures", ["all"]), where)
    out_dir = out_cfg.get("dir", "combined_out") if out is None else out
    target = None
    if out_dir is not False:
        t = Path(out_dir).expanduser()
        target = (t if t.is_absolute() or out is not None else base / t).resolve()
    started = _utc()
    with _staged(target, "search", share_folder) as stage:
        shared_reads = _shared_reads(names, cfgs, progress)
        results = {n: _search(c, unblind=False, progress=progress, started=started, stage=None,
                              target=None, collected=shared_reads.get(n))
                   for n, c in zip(names, cfgs)}
        first = cfgs[0]
        masses = combined_masses(cfgs, where)
        channels = [_channel(n, c, results[n], shared) for n, c in zip(names, cfgs)]
        unit = first.limits.cross_section_unit
        cmb = combine(channels, masses, refit=False, unit=unit)
        sig = dataclasses.replace(first.significance, **own["significance"])
        executor = _toy_executor(first, "combined toys")
        best = cmb.global_significance(sig.method, toys=sig.toys, seed=sig.seed,
                                       u0=sig.reference_level, executor=executor)
        lim = None
        fl = dataclasses.replace(first.limits, **own["limits"])
        if fl.enabled:
            n = min(fl.points, masses.size)
            lm = np.linspace(masses[0], masses[-1], n) if n > 1 else masses[:1]
            lim = combined_limits(channels, lm, cl=fl.cl, unit=unit, method=fl.method,
                                  toys=fl.toys, seed=sig.seed,
                                  toy_masses=list(fl.toy_masses) or None,
                                  executor=None if fl.method == "asymptotic" else
                                  _toy_executor(first, "toy limits"))
        # say which systematics each combined number has, rather than let a reader take
        # the combined Z for one with every systematic
        notes: tuple[str, ...] = ()
        with_shape = [n for n, c in zip(names, cfgs)
                      if c.systematics.mass_scale or c.systematics.mass_resolution]
        with_env = [n for n, c in zip(names, cfgs) if c.systematics.background_families]
        if len(cfgs) == 1 and (with_shape or with_env):
            notes += (("a combination of one channel is that channel's scan without its "
                       "[systematics] (its own results show both)"),)
        elif with_shape:
            notes += ((f"the combined scan, its toys (at each toy's highest points) and the "
                       f"combined limits (asymptotic and toys) profile the [systematics] "
                       f"mass-scale and resolution factors of channel(s) "
                       f"{', '.join(with_shape)}"),)
        enveloped = [n for n in names if channels[names.index(n)].background_candidates]
        if enveloped and len(cfgs) > 1:
            notes += ((f"the combined scan and its toys (global significance) profile the "
                       f"[systematics] background envelope of channel(s) "
                       f"{', '.join(enveloped)} as a discrete choice per channel (its "
                       "spurious-signal term left out), and so do the combined limits "
                       "(asymptotic and toys)"),)
        left = [n for n in with_env if n not in enveloped]
        if left and len(cfgs) > 1:
            notes += ((f"the combination does not include the [systematics] background "
                       f"choice of channel(s) {', '.join(left)} (no envelope in their "
                       "results); its numbers use each channel's configured background"),)
        gauss = [n for n, c in zip(names, cfgs) if c.limits.constraint != "lognormal" and (
            c.limits.luminosity_uncertainty or c.limits.efficiency_uncertainty)]
        if gauss:
            notes += ((f"channel(s) {', '.join(gauss)} ask for Gaussian normalisation "
                      "constraints; the combination uses log-normal ones"),)
        res = CombinedSearchResult(channels=results, combination=cmb, best=best, limits=lim,
                                   source=source, outdir=target, notes=notes)
        if stage is not None:
            res = _write(res, stage.path, target, figures)
    return res


def combined_masses(cfgs: list[Any], where: str = "combination") -> np.ndarray:
    """The combined scan's hypotheses (module guide): every channel's own grid
    (:func:`~peaksift.search.common._scan_masses`) when they are one; else from the highest
    first hypothesis to the lowest last one, each step the smallest of the channels' steps
    at that mass (``scan.step``, the spacing of ``scan.points``, or half the resolution)."""
    from .common import _MAX_DEFAULT_HYPOTHESES, _scan_masses

    grids = [_scan_masses(c) for c in cfgs]
    if all(g.shape == grids[0].shape and np.array_equal(g, grids[0]) for g in grids[1:]):
        return grids[0]
    lo, hi = max(float(g[0]) for g in grids), min(float(g[-1]) for g in grids)
    if not hi > lo:
        ranges = ", ".join(f"{g[0]:g}-{g[-1]:g}" for g in grids)
        raise ConfigError(f"{where}: the channels' scan ranges ({ranges} GeV) have no common "
                          "part; a combined hypothesis must lie in every channel's scan "
                          "(set scan.start and scan.stop)")

    def step(cfg: Any, g: np.ndarray) -> Any:
        if cfg.scan.points is not None:
            return lambda m: (float(g[-1]) - float(g[0])) / (cfg.scan.points - 1)
        if cfg.scan.step is not None:
            return lambda m: float(cfg.scan.step)
        return lambda m: 0.5 * float(cfg.model.resolution.sigma(m))

    steps = [step(c, g) for c, g in zip(cfgs, grids)]
    grid = [lo]
    while grid[-1] < hi:
        if len(grid) > _MAX_DEFAULT_HYPOTHESES:
            raise ConfigError(f"{where}: the combined grid would hold more than "
                              f"{_MAX_DEFAULT_HYPOTHESES} hypotheses; set scan.step or "
                              "scan.points in the channels")
        grid.append(grid[-1] + min(f(grid[-1]) for f in steps))
    grid[-1] = min(grid[-1], hi)
    if len(grid) > 1 and grid[-1] - grid[-2] < 1e-9:
        grid.pop()
    return np.asarray(grid)


def _shared_reads(names: list[str], cfgs: list[Any], progress: bool) -> dict[str, Any]:
    """Each channel's events read and selected, one pass per group of channels that read
    the same files alike (same files, execution and read settings): channel name ->
    :class:`~peaksift.execution.Collected`, exactly what the channel's own read gives
    (:func:`peaksift.execution.collect_shared`).  A channel alone on its input, or with dE/dx
    identification (its selection needs a calibration pass first), reads in its search."""
    from ..errors import CutError, InputError
    from ..events import list_files
    from ..execution import collect_shared
    from .common import _keyed_cut_error, _keyed_input_error, _read_window, _selection

    groups: dict[tuple, list[int]] = {}
    for k, cfg in enumerate(cfgs):
        if cfg.identification.enabled:
            continue
        ex, inp = cfg.execution, cfg.input
        try:
            files = tuple(str(f) for f in list_files(inp.files))
        except InputError:
            continue  # the channel's own read reports it, keyed to its config
        key = (files, ex.engine, ex.workers, ex.address, ex.chunk_events, ex.unreadable_files,
               ex.start_method, inp.hash_inputs, inp.strict, inp.column_pattern)
        groups.setdefault(key, []).append(k)
    out: dict[str, Any] = {}
    for key, members in groups.items():
        if len(members) < 2:
            continue
        sels = [_selection(cfgs[k], *_read_window(cfgs[k])) for k in members]
        ex = cfgs[members[0]].execution
        try:
            cols = collect_shared(list(key[0]), sels, engine=ex.engine, workers=ex.workers,
                                  address=ex.address or None, chunk_events=ex.chunk_events,
                                  unreadable_files=ex.unreadable_files, progress=progress,
                                  start_method=ex.start_method,
                                  hash_files=cfgs[members[0]].input.hash_inputs)
        except (CutError, InputError) as exc:
            for k in members:  # the channel whose config key it is, when one is
                keyed = (_keyed_cut_error if isinstance(exc, CutError)
                         else _keyed_input_error)(cfgs[k], exc)
                if keyed is not exc:
                    raise type(exc)(f"channel {names[k]!r}: {keyed}") from None
            raise
        out.update((names[k], c) for k, c in zip(members, cols))
    return out


def _channel(name: str, cfg: Any, res: Any, shared_luminosity: bool = False) -> Any:
    """The :class:`~peaksift.stats.channels.Channel` of one channel's search."""
    from ..stats.channels import Channel
    from .common import _scan_signal_name, _shape

    r = cfg.model.resolution
    bkg = _shape(cfg.model.background, cfg.model.background_options)
    sy = cfg.systematics
    env = (res.systematics or {}).get("envelope") if sy.background_families else None
    cands = {}
    if env and env.get("labels"):
        from ..stats.background_choice import candidate_shapes

        cands = {"background_candidates": candidate_shapes(list(env["labels"]),
                                                           sqrt_s=sy.sqrt_s),
                 "background_parameters": dict(zip(env["labels"], env["n_parameters"])),
                 "background_penalty": float(env["penalty"])}
    norms = {"luminosity_uncertainty": float(cfg.limits.luminosity_uncertainty),
             "efficiency_uncertainty": float(cfg.limits.efficiency_uncertainty),
             "luminosity_group": "shared" if shared_luminosity else None,
             "shape_nuisances": {"mass_scale": float(sy.mass_scale),
                                 "mass_resolution": float(sy.mass_resolution)},
             "shape_constraint": sy.constraint, "toy_constraints": sy.toy_constraints,
             **cands}
    if res.signal_model is not None:
        return Channel(name, res.histogram, bkg, float(cfg.limits.luminosity),
                       signal_model=res.signal_model, window=cfg.spectrum.window, **norms)
    return Channel(name, res.histogram, bkg, float(cfg.limits.luminosity),
                   signal=_shape(_scan_signal_name(cfg), {}), resolution=r.resolution,
                   efficiency=float(cfg.limits.efficiency), window=cfg.spectrum.window,
                   natural_width=float(r.natural_width) if r.natural_width > 0 else None,
                   **norms)


def _write(res: CombinedSearchResult, stage: Path, target: Path,
           figures: tuple[str, ...] = ("all",)) -> CombinedSearchResult:
    """results.json, the figures (the combined p-values, with ``pvalue_scan`` in the
    combination's ``output.figures``; each channel's own figures, as its config's
    ``output.figures`` asks, in ``figures/<channel>/``), report.md and report.html into the
    staging directory."""
    import dataclasses

    from .. import plotting
    from .._files import atomic_write
    from .._vocabulary import FIGURES, figure_wanted
    from ..report import write_results_json
    from .combination_report import render_combination_html, render_combination_markdown

    figdir = stage / "figures"
    figdir.mkdir(parents=True, exist_ok=True)
    figs: dict[str, Path] = {}
    labels = {n: plotting.figure_labels(r.config) for n, r in res.channels.items()}
    if figure_wanted(figures, "pvalue_scan"):
        res.plot(figdir / "pvalue_combined.png", which="pvalue_scan")
        figs["pvalue_combined"] = figdir / "pvalue_combined.png"
    if res.limits is not None and figure_wanted(figures, "limits"):
        res.plot(figdir / "limits_combined.png", which="limits")
        figs["limits_combined"] = figdir / "limits_combined.png"
    for name, r in res.channels.items():
        cfg = r.config
        sub = figdir / name
        made = plotting.search_figures(r, sub, formats=("png",),
                                       log_scale=cfg.output.log_scale, labels=labels[name],
                                       names=[f for f in plotting.SEARCH_FIGURES
                                              if f in FIGURES and cfg.output.draws(f)])
        if r.signal_model is not None and cfg.output.draws("signal_model"):
            made.update(zip(("signal_model_parameters", "signal_model_shapes"),
                            r.signal_model.save_figures(sub, run=labels[name].run,
                                                symbol=labels[name].symbol)))
        figs.update({f"{name}/{k}": Path(v) for k, v in made.items()})
    final = {k: target / Path(v).relative_to(stage) for k, v in figs.items()}
    res = dataclasses.replace(res, figures=final)
    d = res.to_dict()
    write_results_json(d, stage / "results.json")
    rel = {k: Path(v).relative_to(stage).as_posix() for k, v in figs.items()}
    atomic_write(stage / "report.md", render_combination_markdown(d, rel))
    atomic_write(stage / "report.html", render_combination_html(d, figs))
    return res
