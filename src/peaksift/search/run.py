"""The whole search from a config: :func:`run_search`.

How a search runs
-----------------
* :func:`run_search` hands a combination config to :mod:`.combination`; otherwise it loads
  the config, checks the inputs and runs :func:`_search` in a staging folder
  (:mod:`.staging`): the outputs move into place only when every stage succeeded.
* :func:`_search` starts the figure process (:class:`~.parallel.FigureWorker`) before the
  events are read, and stops it and every stage beside when anything fails.
* :func:`_stages`, in order: dE/dx identification, reading and selecting (:mod:`.common`),
  the spectrum (its blinded bins emptied), the calibration fit, the signal model, the mass
  scan, the limits (:mod:`.limits`; in a forked process beside the rest unless
  ``limits.method = "toys"`` or the engine is not serial), the global significance,
  ``[systematics]``, the free and background-only fits (a sideband fit while blinded), the
  known particles, then results.json, figures and the report.
  :class:`_Clock` logs each stage's wall and CPU time (``peaksift -v``).
* A figure job reaches the drawer as plain attributes (:func:`_draw`, :func:`_drawn`), so
  the figure process need not load numba, awkward or the config's modules to unpickle it.
"""

from __future__ import annotations

import dataclasses
import logging
import os
import time
from collections.abc import Mapping
from pathlib import Path
from types import SimpleNamespace
from typing import Any

from .._jit import numba_extensions_deferred
from ..config import Config, load_config
from ..errors import ConfigError
from .calibration import calibrate
from .common import (
    _blinded_copy,
    _blinding,
    _collect,
    _fill,
    _require_candidates,
    _require_sidebands,
    _save_spectrum,
    _scan_masses,
    _scan_signal_name,
    _shape,
    _toy_executor,
    _utc,
    _versions,
)
from .fit import _fit_data, _fit_settings, _fit_start, _note_tie_drift
from .identification import dedx_identification
from .limits import _limit_masses, _limits
from .parallel import Beside, FigureWorker, cpu_seconds
from .result import SearchResult
from .signal import search_signal_model
from .staging import _apply_overrides, _check_inputs, _staged, _Staging, _target

_log = logging.getLogger("peaksift.search")


class _Clock:
    """Wall time of each stage of a search: logged (``peaksift -v``) and kept in the
    provenance (``timings``, seconds).  The log also gives this process's CPU time of each
    stage, and of everything before the first (imports, config, input checks): the stages
    beside run in other processes, so the main line's CPU time is its share of the critical
    path (``scripts/bench_search.py`` reads these lines)."""

    def __init__(self) -> None:
        self.t = time.perf_counter()
        self.cpu = cpu_seconds()
        self.stages: dict[str, float] = {}
        # (a combination's later channels: the process's CPU so far, not a start-up)
        _log.info("%-22s %6s   (CPU %5.2f s)", "CPU so far" if _CLOCKS else "start-up", "",
                  self.cpu)
        _CLOCKS.append(None)

    def lap(self, name: str) -> None:
        now, cpu = time.perf_counter(), cpu_seconds()
        self.stages[name] = round(now - self.t, 3)
        _log.info("%-22s %6.2f s (CPU %5.2f s)", name, now - self.t, cpu - self.cpu)
        self.t, self.cpu = now, cpu


_CLOCKS: list[None] = []  # one entry per _Clock made in this process


def run_search(
    config: str | os.PathLike[str] | Mapping[str, Any] | Config,
    *,
    out: str | os.PathLike[str] | bool | None = None,
    unblind: bool | None = None,
    toys: int | None = None,
    seed: int | None = None,
    engine: str | None = None,
    progress: bool | None = None,
    share_folder: bool = False,
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
    progress : bool or None
        Show progress bars (reading; toys); None (default): when a terminal or a Jupyter
        notebook is watching (``tqdm.auto`` draws notebook widgets).
    share_folder : bool
        Write into an output folder that holds files peaksift did not write (they are never
        touched; a file of the same name as one of ours is refused).  Without it such a
        folder is refused before the run.

    Returns
    -------
    SearchResult
        Its :meth:`~SearchResult.to_dict` is the content of ``results.json``.

    Raises
    ------
    PeaksiftError
        Any user-facing problem (configuration, input, cut, fit); nothing is written then.
    """
    from .._progress import progress_wanted

    progress = progress_wanted(progress)  # None: a terminal or a notebook

    from .combination import is_combination, run_combination

    if is_combination(config):  # several channels: each its own search, then combined
        if unblind:
            raise ConfigError("--unblind does not apply to a combination (blinding is not "
                              "supported there yet)")
        return run_combination(config, out=out, toys=toys, seed=seed, engine=engine,
                               progress=progress,
                               share_folder=share_folder)  # type: ignore[return-value]
    started = _utc()
    cfg = _apply_overrides(load_config(config), toys=toys, seed=seed, engine=engine)
    _check_inputs(cfg)
    target = _target(cfg, out)
    with _staged(target, "search", share_folder) as stage:
        res = _search(cfg, unblind=bool(unblind), progress=progress, started=started,
                      stage=stage, target=target)
    return res


def _search(cfg: Config, *, unblind: bool, progress: bool, started: str,
            stage: _Staging | None, target: Path | None, collected: Any = None
            ) -> SearchResult:
    """The search of one config; ``collected``: its events already read and selected (a
    combination reads a shared input once for its channels), else read here."""
    # the figures are drawn beside the statistics, by a process started before the events
    # are read (it loads matplotlib meanwhile); without an output folder, or with
    # output.figures = "none", none are drawn (and no process is started).  Not before the
    # input checks: they load the events' modules (awkward, vector, pyarrow), which the
    # drawers would otherwise each import to unpickle their first job (~0.6 s of CPU)
    drawer = None
    if stage is not None and cfg.output.figures != ("none",):
        from ..plotting import figure_labels  # (no matplotlib: that loads in the drawer)

        drawer = FigureWorker.adopt(stage.path / "figures", formats=cfg.output.formats,
                                    log_scale=cfg.output.log_scale, labels=figure_labels(cfg))
    besides: list[Beside] = []
    try:
        # only our kernels run in a search: numba's third-party extensions (awkward's,
        # vector's: ~0.3 s) need not load at its first use here or in the stages beside
        with numba_extensions_deferred():
            return _stages(cfg, unblind=unblind, progress=progress, started=started,
                           stage=stage, target=target, drawer=drawer, besides=besides,
                           collected=collected)
    except BaseException:  # nothing may keep writing into the discarded staging folder
        for b in besides:
            b.cancel()
        if drawer is not None:
            drawer.cancel()
        raise


def _stages(cfg: Config, *, unblind: bool, progress: bool, started: str,
            stage: _Staging | None, target: Path | None, drawer: FigureWorker | None,
            besides: list[Beside], collected: Any = None) -> SearchResult:
    from ..fitting import fit
    from ..resonances import fitted_widths, match_known, pair_charge
    from ..stats.scan import scan

    clock = _Clock()
    ident = dedx_identification(cfg, progress=progress)
    col = collected if collected is not None else _collect(cfg, progress=progress,
                                                            identification=ident)[0]
    info = dict(col.engine_info)
    _log.info("read %s events from %d files in %s chunks: engine %s, %s workers",
              f"{col.events_read:,}", len(col.files_read), info.get("chunks"),
              info.get("engine"), info.get("workers"))
    clock.lap("read and select")
    lo, hi = cfg.spectrum.window
    hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
    _require_candidates(cfg, col, hist)
    blind = _blinding(cfg, unblind)
    blind_window = tuple(cfg.blinding.window) if blind["active"] else None
    if blind_window is not None:  # nothing downstream sees the blinded bins' contents
        hist = _blinded_copy(hist, blind_window)
        _require_sidebands(cfg, hist)

    # what a figure job needs of the result, as plain attributes: unpickled in the figure
    # process, a SearchResult (with its config and the collected events) would load the
    # search's, the config's and the events' modules there (numba, awkward, pyarrow)
    events = SimpleNamespace(pt_histogram=col.pt_histogram,
                             rapidity_histogram=col.rapidity_histogram,
                             summary_window=getattr(col, "summary_window", None),
                             window=col.window)

    def partial(**kw: Any) -> SimpleNamespace:
        base: dict[str, Any] = {
            "config": None, "histogram": hist, "collected": events, "background_fit": None,
            "fit": None, "scan": None, "best": {}, "limits": None, "calibration": None,
            "blinding": blind, "systematics": None}
        return SimpleNamespace(**{**base, **kw})

    _draw(drawer, cfg, ["candidates"], partial())
    # the calibration needs only the events: fitted first, so that its figure is drawn
    # while the statistics run instead of after them
    cal, cal_hist, cal_fit = calibrate(cfg, col)
    clock.lap("calibration")
    if cal is not None:
        _draw(drawer, cfg, ["calibration"], partial(calibration=cal),
              calibration=(cal_hist, cal_fit))

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

    smodel = search_signal_model(cfg, progress=progress)
    if smodel is None:
        sres = scan(hist, scan_sig, bkg, masses, resolution=res.resolution, window=(lo, hi),
                    natural_width=width, blind=blind_window, refit=False)
    else:  # shape, resolution and efficiency from the simulated samples
        sres = scan(hist, None, bkg, masses, window=(lo, hi), blind=blind_window,
                    refit=False, signal_model=smodel)
    clock.lap("mass scan")
    # the limits need nothing of what follows: they run beside it, unless toys are asked
    # for (those run here, on the configured engine, with their progress bar).  Started
    # after the scan and with their module loaded here, so the process inherits the loaded
    # modules and compiled kernels instead of loading them a second time.
    limits_job = None
    if cfg.limits.enabled and cfg.limits.method != "toys" and cfg.execution.engine == "serial":
        from ..stats import limits as _  # noqa: F401  (loaded once, shared by the fork)

        limits_job = Beside(_limits, cfg, hist, scan_sig, bkg, masses, width, blind_window,
                            False, smodel)
        besides.append(limits_job)
    best = dict(sres.global_significance(
        method=cfg.significance.method, toys=cfg.significance.toys, seed=seed,
        u0=cfg.significance.reference_level, progress=progress,
        executor=_toy_executor(cfg)))
    clock.lap("global significance")

    syst = None
    syst_limits_job = None
    syst_jobs: dict[str, Beside] = {}  # stages of [systematics] beside it, by name
    syst_pending: list[Any] = []  # what they still add to the block, collected after the fits
    if cfg.systematics.enabled:  # the numbers without systematics stay in the block
        from .systematics import run_systematics, systematic_limits_at

        def scanned(envelope: Any) -> None:
            # the limits with systematics need the envelope, not its toys (nor the fits):
            # they run beside those, like the plain limits
            nonlocal syst_limits_job
            if limits_job is not None and smodel is None:
                syst_limits_job = Beside(systematic_limits_at, cfg, hist, scan_sig, envelope,
                                         _limit_masses(cfg, masses), natural_width=width,
                                         blind=blind_window,
                                         executor=_toy_executor(cfg, "toy limits"))
                besides.append(syst_limits_job)

        def beside(fn: Any, *args: Any, **kw: Any) -> Beside:
            job = Beside(fn, *args, **kw)
            besides.append(job)
            syst_jobs[getattr(fn, "__name__", "stage").replace("_", " ")] = job
            return job

        syst, best, syst_scan = run_systematics(
            cfg, hist, scan_sig, masses, natural_width=width, blind=blind_window,
            best_plain=best, progress=progress, executor=_toy_executor(cfg),
            scanned=scanned, signal_model=smodel, beside=beside, pending=syst_pending)
        clock.lap("systematics")
        _draw(drawer, cfg, ["background_envelope"], partial(systematics=syst))

    # the p-value scan needs the scan and the best hypothesis only: drawn while the fits run.
    # Its expected curve is computed here, where the scan's kernels are loaded: in the
    # drawer it would load numba's compiler state for it (~0.5-1 s CPU)
    expected = None
    if drawer is not None and cfg.output.draws("pvalue_scan"):
        from ..plotting import scan_expectation

        expected = scan_expectation(sres)
    _draw(drawer, cfg, ["pvalue_scan"], partial(scan=sres, best=best, systematics=syst),
          expected=expected)

    m_best = float(best["mass"])
    settings = _fit_settings(cfg, sig_fit, m_best)
    start = _fit_start(cfg, sig_fit, m_best, settings)
    if blind_window is None:
        fres = fit(data, sig_fit, bkg, (lo, hi), binned=binned, start=start,
                   **settings.arguments())
        bonly = fit(data, sig_fit, bkg, (lo, hi), binned=binned, start=start,
                    **settings.background_only(sig_fit, start))
    else:  # while blinded no fit may look inside the blinded window: the background
        fres = None  # is fitted on the sidebands only, extrapolated under the window
        from .sideband import sideband_fit

        bonly = sideband_fit(hist, sig_fit, bkg, (lo, hi), blind_window)
    fres = _note_tie_drift(fres, cfg, settings)
    mass_job = None
    if syst is not None and fres is not None:  # the fitted mass with the mass scale profiled
        from .systematics import fitted_mass

        # beside: its profile loads scipy.optimize (~0.3 s), and nothing drawn needs it
        mass_job = Beside(fitted_mass, cfg, fres.to_dict())
        besides.append(mass_job)
        syst_jobs["fitted mass"] = mass_job
    _draw(drawer, cfg, ["spectrum"],
          partial(background_fit=bonly, fit=fres, scan=sres, best=best, systematics=syst))
    clock.lap("fits")

    def limits_stage() -> tuple[Any, dict[str, Any] | None]:
        """The limits (and those with systematics) collected, their figure sent to the
        drawer; returns ``(limits, the systematics block's "limits" or None)``."""
        lim = (limits_job.result() if limits_job is not None else
               _limits(cfg, hist, scan_sig, bkg, masses, width, blind_window, progress,
                       smodel))
        clock.lap("limits" if limits_job is None else "limits (rest of)")
        block = None
        if syst is not None:
            from .systematics import limits_with_systematics

            block = limits_with_systematics(
                cfg, hist, scan_sig, syst_scan, lim, natural_width=width,
                blind=blind_window, signal_model=smodel,
                executor=_toy_executor(cfg, "toy limits"),
                computed=syst_limits_job.result() if syst_limits_job is not None else None)
            clock.lap("limits with systematics" if syst_limits_job is None
                      else "limits with systematics (rest of)")
        _draw(drawer, cfg, ["limits"], partial(
            limits=lim, systematics=syst if block is None else {**syst, "limits": block}))
        return lim, block

    # limits computed beside and delivered already: collected now, so that their figure is
    # drawn while the known particles are matched and the fitted mass collected
    early = None
    if (cfg.limits.enabled and limits_job is not None and limits_job.ready()
            and (syst is None or (syst_limits_job is not None and syst_limits_job.ready()))):
        early = limits_stage()
    peak = (fres.to_dict().get("peak_mass") or {}) if fres is not None else {}
    m_fit = peak.get("value") or m_best
    m_err = peak.get("error") or 0.0
    known = tuple(match_known(float(m_fit), error=float(m_err),
                              resolution=float(sigma_fn(float(m_fit))),
                              charge=pair_charge(cfg.pairing.charge),
                              **fitted_widths(fres.to_dict().get("parameters") or {}
                                              if fres is not None else {})))
    for finish in syst_pending:  # the spurious-signal test, beside until now
        syst = finish(syst)
    if mass_job is not None:
        syst = {**syst, "fitted_mass": mass_job.result()}
    limits = None
    if cfg.limits.enabled:
        limits, block = early or limits_stage()
        if block is not None:  # after the fitted mass, as results.json has always had it
            syst = {**syst, "limits": block}

    # hashed where the footers were read (on the workers of a cluster); None when
    # input.hash_inputs is off
    inputs = [{"path": str(p), "sha256": col.file_hashes.get(str(p))} for p in col.files_read]
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
        "timings": clock.stages,
    }
    result = SearchResult(
        config=cfg, histogram=hist, collected=col, background_fit=bonly, fit=fres, scan=sres,
        best=best, limits=limits, known_matches=known, calibration=cal, provenance=prov,
        blinding=blind, outdir=target, figures={}, fit_settings=settings.echo(start),
        systematics=syst,
        signal_model=smodel,
        identification=ident.to_dict() if ident is not None else None,
    )
    if stage is None:
        prov["finished"] = _utc()
        return result

    from .. import plotting, plotting_dedx
    from ..plotting import SEARCH_FIGURES
    from ..report import write_report, write_results_json

    figdir = stage.path / "figures"
    more = {}
    if smodel is not None and cfg.output.draws("signal_model"):
        lab = plotting.figure_labels(cfg)
        more.update(zip(("signal_model_parameters", "signal_model_shapes"),
                        smodel.save_figures(figdir, run=lab.run, symbol=lab.symbol)))
    if ident is not None and cfg.output.draws("dedx"):
        more["dedx"] = plotting_dedx.dedx_figure(ident, figdir, formats=cfg.output.formats,
                                            hypotheses=tuple(cfg.pairing.hypotheses),
                                            band=cfg.identification.band,
                                            run=plotting.figure_labels(cfg).run)
    clock.lap("figures (here)")
    drawn = {**(drawer.finish() if drawer is not None else {}), **more}
    # CPU seconds of each process of the run: the main line is the critical path, the
    # others may overlap it (their sum over the cores bounds the wall time from below)
    prov["cpu"] = {"main": round(cpu_seconds(), 2),
                   "figures": round(drawer.cpu if drawer is not None else 0.0, 2),
                   **({"limits": round(limits_job.cpu, 2)} if limits_job is not None else {}),
                   **({"limits with systematics": round(syst_limits_job.cpu, 2)}
                      if syst_limits_job is not None else {}),
                   **{k: round(j.cpu, 2) for k, j in syst_jobs.items()}}
    order = ("spectrum", "spectrum_log", *SEARCH_FIGURES, "dedx")
    figs = {k: drawn[k] for k in sorted(drawn, key=lambda k: (k not in order,
                                                           order.index(k) if k in order else 0))}
    clock.lap("figures (waiting)")
    _save_spectrum(hist, stage.path / "spectrum.json", blind)
    prov["finished"] = _utc()
    final_figs = {k: target / "figures" / Path(v).name for k, v in figs.items()}
    result = SearchResult(**{**result.__dict__, "figures": final_figs})
    d = result.to_dict()
    write_results_json(d, stage.path / "results.json")
    write_report(d, stage.path, figs)
    clock.lap("report")
    return result


def _draw(drawer: FigureWorker | None, cfg: Config, names: list[str], result: Any,
          **extra: Any) -> None:
    """Send the figures among ``names`` that ``output.figures`` asks for to the drawer."""
    names = [n for n in names if cfg.output.draws(n)]
    if drawer is not None and names:
        result = SimpleNamespace(**{k: _drawn(v) for k, v in vars(result).items()})
        extra = {k: tuple(_drawn(x) for x in v) if isinstance(v, tuple) else _drawn(v)
                 for k, v in extra.items()}
        drawer.draw(names, result, **extra)


def _drawn(value: Any) -> Any:
    """A FitResult as a figure job carries it: without its cost function (what
    ``to_minuit`` needs, never a figure), whose compiled kernels would load numba in the
    figure process to unpickle it (~0.35 s of CPU); anything else as it is."""
    from ..fitting.result import FitResult

    if isinstance(value, FitResult) and value.cost is not None:
        return dataclasses.replace(value, cost=None)
    return value
