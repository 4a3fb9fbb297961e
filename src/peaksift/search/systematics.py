"""The search's systematic uncertainties: signal nuisances and the background-function choice.

:func:`run_systematics` runs what ``[systematics]`` asks for, after the plain scan:

1. the order test on each background family (:func:`peaksift.stats.background_choice.
   choose_background`; the sidebands while blinded) and, with a template, the spurious signal
   of every candidate;
2. the scan with the signal nuisances profiled, over the envelope of the kept orders
   (:func:`peaksift.stats.envelope.envelope_scan`) or with the one function (the best kept
   one when ``envelope = false``, else ``model.background``);
3. its global significance from toys with the same profiling;
4. after the plain limits, :func:`limits_with_systematics`: the same limits with the shape
   nuisances and the same background functions profiled
   (:func:`peaksift.stats.limits_systematics.systematic_limits`), beside the plain ones.

It returns the results.json ``systematics`` block (plain JSON) and the best hypothesis with
systematics, which the search then reports as its ``best`` (the numbers without
systematics stay beside it).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from .._format import interval_at_bounds
from ..config import Config
from ..errors import ConfigError, FitError


def _nuisances(cfg: Config) -> Any:
    from ..likelihood import SignalNuisances

    S = cfg.systematics
    return SignalNuisances.make({"mass_scale": S.mass_scale,
                                 "mass_resolution": S.mass_resolution},
                                {"mass_scale": S.constraint, "mass_resolution": S.constraint})


def _pulls(nuis: Any, factors: dict | None, index: int) -> dict[str, float]:
    """(k - 1)/delta (Gaussian) or ln k / ln(1 + delta) (log-normal) at one mass."""
    out: dict[str, float] = {}
    for name, arr in (factors or {}).items():
        k = float(np.asarray(arr)[index])
        size = getattr(nuis, name)
        out[name] = (float(np.log(k) / np.log1p(size)) if nuis.kind(name) == "lognormal"
                     else (k - 1.0) / size)
    return out


def _template(cfg: Config, hist: Any) -> Any:
    from ..histogram import MassHistogram

    path = cfg.systematics.template
    try:
        t = MassHistogram.load(path)
    except OSError as exc:
        raise ConfigError(f"systematics.template: cannot read {path!r} ({exc}); give a "
                          "histogram saved by peaksift (spectrum.json layout)") from None
    return t.restrict(cfg.spectrum.window)


def _spurious_job(cfg: Config, hist: Any, signal: Any, masses: np.ndarray,
                  natural_width: float | None, beside: Callable[..., Any] | None) -> Any:
    """The spurious-signal test started beside the order test (it needs only the candidates'
    names, not their fits to the data): ``beside(fn, *args, **kw)`` returns a job whose
    ``result()`` is ``fn``'s value.  None when there is nothing to start (no template or
    families, no ``beside``, or families the order test will refuse with its own message).
    The test is then the same call as in :func:`run_systematics` (the same candidates in
    the same order), so its numbers are the same bits."""
    from ..stats.background_choice import candidate_shapes, spurious_signal

    S = cfg.systematics
    if beside is None or not (S.template and S.background_families):
        return None
    try:  # the order test fits these, in this order (and refuses what this refuses)
        labels = list(candidate_shapes(list(S.background_families), sqrt_s=S.sqrt_s))
        shapes_ = candidate_shapes(labels)
    except FitError:
        return None
    return beside(spurious_signal, _template(cfg, hist), shapes_, signal, masses,
                  events=float(hist.total()), edges=np.asarray(hist.edges),
                  limit=S.spurious_limit, resolution=cfg.model.resolution.resolution,
                  natural_width=natural_width)


def _with_spurious(block: dict[str, Any], sp: dict[str, dict[str, Any]], cfg: Config,
                   masses: np.ndarray, best: dict[str, Any]) -> dict[str, Any]:
    """``block`` with the spurious-signal results ``sp`` of :func:`spurious_signal` (the
    ratio at ``best``'s mass beside each candidate's largest) and their notes first; a new
    dict, ``block`` untouched (a figure job may be pickling it)."""
    S = cfg.systematics
    out = {k: {kk: vv for kk, vv in v.items() if kk != "ratio"} for k, v in sp.items()}
    notes: list[str] = []
    if S.spurious_uncertainty:  # no 'spurious' here: doubts.py flags those notes
        notes.append("each candidate's largest signal on the template, over the whole range, "
                     "is added in quadrature to the statistical error of the signal yield")
    flagged = [k for k, v in sp.items() if v["flagged"]]
    if flagged:
        notes.append(f"spurious signal above {S.spurious_limit:g} of the statistical error: "
                     f"{', '.join(flagged)}")
    if sp and best.get("mass") is not None:  # each spurious signal at the best hypothesis
        k = int(np.argmin(np.abs(np.asarray(masses, float) - float(best["mass"]))))
        for label, v in sp.items():
            out[label]["ratio_at_best"] = float(v["ratio"][k])
    return {**block, "spurious_signal": out, "notes": notes + list(block["notes"])}


def several_minima_notes(obj: Any) -> list[str]:
    """The notes of a scan (or of each function of an envelope, named: their masses
    differ, and unnamed they read as one warning said several times) where the q0 took a
    lower well of the mass scale than the nearest one."""
    scans = getattr(obj, "scans", None) or (obj,)
    labels = getattr(obj, "labels", None) or ()
    out = []
    for k, sc in enumerate(scans):
        who = f" ({labels[k]})" if len(scans) > 1 and k < len(labels) else ""
        out.extend(f"significance{who}: {note}"
                   for note in dict.fromkeys(sc.notes) if "several minima" in note)
    return out


def run_systematics(cfg: Config, hist: Any, signal: Any, masses: np.ndarray, *,
                    natural_width: float | None, blind: Any, best_plain: dict[str, Any],
                    progress: bool, executor: Any,
                    scanned: Callable[[Any], None] | None = None,
                    signal_model: Any = None, beside: Callable[..., Any] | None = None,
                    pending: list[Callable[[dict[str, Any]], dict[str, Any]]] | None = None
                    ) -> tuple[dict[str, Any], dict[str, Any], Any]:
    """Run ``[systematics]``; returns ``(block, best with systematics, envelope or scan)``.

    See the module guide; the limits with systematics come after the plain limits
    (:func:`limits_with_systematics`).  ``scanned`` is called with the envelope (or the
    single-function scan) as soon as it exists, before its toys: the search starts the
    limits with systematics then, beside the toys.  ``beside(fn, *args, **kw)`` (the search's
    :class:`~peaksift.search.parallel.Beside`) runs the spurious-signal test beside the
    order test, the envelope and its toys.  With ``signal_model`` (``[signal_model]``)
    the scans take the model's shape and resolution (the spurious-signal test keeps the
    configured ones).  With ``pending`` (a list), a spurious-signal test still running
    beside is not waited for: ``pending`` receives ``finish(block) -> block`` that waits
    and adds its results (nothing else here needs them), so the search fits meanwhile.
    """
    from ..stats.background_choice import choose_background, spurious_signal
    from ..stats.envelope import envelope_scan
    from ..stats.scan import scan

    S = cfg.systematics
    res = cfg.model.resolution
    nuis = _nuisances(cfg)
    sig_kw = {"resolution": res.resolution, "window": tuple(cfg.spectrum.window),
              "natural_width": natural_width, "blind": blind}
    scan_sig, scan_kw = signal, sig_kw
    if signal_model is not None:   # the shape and sigma(m) of the simulated samples
        scan_sig = None
        scan_kw = {"signal_model": signal_model, "window": tuple(cfg.spectrum.window),
                   "blind": blind}
    block: dict[str, Any] = {"nuisances": nuis.to_dict(), "toy_constraints": S.toy_constraints,
                             "background_choice": None, "spurious_signal": None,
                             "envelope": None, "notes": []}
    choice = None
    sp: dict[str, dict[str, Any]] | None = None
    ratios: dict[str, float] | None = None
    if S.spurious_uncertainty and not (S.template and S.background_families):
        raise ConfigError("systematics.spurious_uncertainty needs systematics.template and "
                          "systematics.background_families (the spurious signal is measured "
                          "on the template with each candidate); set both or turn it off")
    sp_job = _spurious_job(cfg, hist, signal, masses, natural_width, beside)
    if S.background_families:
        try:
            choice = choose_background(hist, list(S.background_families), blind=blind,
                                       size=S.order_test_size, sqrt_s=S.sqrt_s)
        except FitError as exc:
            raise FitError(f"systematics.background_families: {exc}") from None
        block["background_choice"] = choice.to_dict()
        # the envelope needs the spurious signals only to add them to its errors: else
        # they are collected after the envelope's toys (or later), having run beside them
        if S.template and (S.spurious_uncertainty or sp_job is None):
            sp = (sp_job.result() if sp_job is not None else spurious_signal(
                _template(cfg, hist), choice, signal, masses, events=float(hist.total()),
                edges=np.asarray(hist.edges), limit=S.spurious_limit,
                resolution=res.resolution, natural_width=natural_width))
            if S.spurious_uncertainty:  # each candidate's largest, over the whole range
                ratios = {k: float(v["max_ratio"]) for k, v in sp.items()}
    toys = cfg.significance.toys
    gkw = {"seed": cfg.significance.seed, "progress": progress, "executor": executor}
    single = None
    if choice is not None and not S.envelope:  # the kept function with the best penalised NLL
        kept = min(choice.chosen, key=lambda c: 2 * c.nll + S.penalty * c.n_parameters)
        from ..stats.background_choice import candidate_shapes

        single = candidate_shapes([kept.label], sqrt_s=S.sqrt_s)
        block["notes"].append(f"envelope off: scanned with {kept.label} only")
    if choice is not None and (S.envelope or ratios is not None):
        # a single function with a spurious-signal term is an envelope of one candidate
        env = envelope_scan(hist, choice if single is None else single, scan_sig, masses,
                            penalty=S.penalty, sqrt_s=S.sqrt_s, nuisances=nuis,
                            nuisance_toys=S.toy_constraints, spurious=ratios, **scan_kw)
        if scanned is not None:
            scanned(env)
        method = cfg.significance.method
        if method == "upcrossings" and toys == 0:
            block["notes"].append("envelope: upcrossings need toys; 200 toys were run")
            toys = 200
        best = env.global_significance(method=method, toys=toys,
                                       u0=cfg.significance.reference_level, **gkw)
        j = env.best_index
        chosen = int(env.chosen[j])
        curves = env.profile_curves() if not env.blinded[j] else None
        # EnvelopeResult's own dict (EnvelopeResult.from_dict reads it back), and the
        # curves of the envelope figure at the best mass
        block["envelope"] = {
            **env.to_dict(),
            "profile": None if curves is None else {
                "mass": curves["mass"], "signal_yield": curves["signal_yield"],
                "curves": curves["curves"], "envelope": curves["envelope"]},
        }
        factors = env.scans[chosen].nuisance_factors
        block["nuisance_pulls"] = _pulls(nuis, factors, j)
        obj: Any = env
    else:
        if single is not None:
            bkg = next(iter(single.values()))
        else:
            from .common import _shape

            bkg = _shape(cfg.model.background, cfg.model.background_options)
        sres = scan(hist, scan_sig, bkg, masses, refit=False, nuisances=nuis,
                    nuisance_toys=S.toy_constraints, **scan_kw)
        if scanned is not None:
            scanned(sres)
        best = sres.global_significance(method=cfg.significance.method, toys=toys,
                                        u0=cfg.significance.reference_level, **gkw)
        block["nuisance_pulls"] = _pulls(nuis, sres.nuisance_factors, sres.best_index)
        obj = sres
    # q0 where the mass scale's lowest well was not the nearest one (doubts.py flags it)
    block["notes"].extend(several_minima_notes(obj))
    best = dict(best)
    block["with_systematics"] = best
    block["without_systematics"] = dict(best_plain)
    if choice is not None and S.template and sp is None:  # the test that ran beside
        job = sp_job
        if pending is not None:
            pending.append(lambda blk: _with_spurious(blk, job.result(), cfg, masses, best))
            return block, best, obj
        sp = job.result()
    if sp is not None:
        block = _with_spurious(block, sp, cfg, masses, best)
    return block, best, obj


def fitted_mass(cfg: Config, fit_dict: dict[str, Any]) -> dict[str, Any] | None:
    """The results.json ``systematics.fitted_mass``: the free fit's peak position with the
    mass scale profiled (:meth:`peaksift.likelihood.SignalNuisances.mass_interval`, from the
    fit's profile interval on ``mass``, else its symmetric error); None without a mass
    scale or a usable fit, or when an end of that interval is the mass's bound."""
    nuis = _nuisances(cfg)
    pm = fit_dict.get("peak_mass") or {}
    value, err = pm.get("value"), pm.get("error")
    iv = (fit_dict.get("intervals") or {}).get("mass")
    par = (fit_dict.get("parameters") or {}).get("mass") or {}
    if iv and any(interval_at_bounds(par.get("value", value), *iv, par.get("bounds"))):
        return None  # an end on the mass's bound is no error to widen (the fit notes it)
    em, ep = (-float(iv[0]), float(iv[1])) if iv and None not in iv else (err, err)
    if not nuis.mass_scale or value is None or em is None or ep is None:
        return None
    if not (np.isfinite([value, em, ep]).all() and em > 0 and ep > 0):
        return None
    lo, hi = nuis.mass_interval(float(value), float(em), float(ep))
    return {"value": float(value), "error_minus": lo, "error_plus": hi,
            "stat_error_minus": float(em), "stat_error_plus": float(ep),
            "mass_scale": {"size": nuis.mass_scale, "kind": nuis.kind("mass_scale")}}


def _compact(lim: dict[str, Any]) -> dict[str, Any]:
    keys = ("masses", "observed", "expected", "expected_minus2", "expected_minus1",
            "expected_plus1", "expected_plus2", "unit", "cl", "method")
    return {k: lim.get(k) for k in keys}


def limits_with_systematics(cfg: Config, hist: Any, signal: Any, scanned: Any,
                            plain_limits: Any, *, natural_width: float | None,
                            blind: Any, signal_model: Any = None, executor: Any = None,
                            computed: dict[str, Any] | None = None) -> dict[str, Any]:
    """The results.json ``systematics.limits`` block: the limits at the masses of the
    plain ones (``plain_limits``, a LimitResult) with the mass-scale and resolution factors
    and the same background functions as the significance (``scanned``: the envelope or
    the single-function scan of :func:`run_systematics`) profiled, beside the plain ones.
    Toys where the plain limits' method asks for them (low counts; ``limits.method``), with
    the same profiling; with ``[signal_model]`` the model's shape, resolution and
    efficiency (and its interpolation uncertainty).  ``computed``:
    :func:`systematic_limits_at` at those masses, when it ran already (the search runs it
    beside the envelope's toys)."""
    S = cfg.systematics
    with_s = dict(computed if computed is not None else systematic_limits_at(
        cfg, hist, signal, scanned, np.asarray(plain_limits.masses),
        natural_width=natural_width, blind=blind, signal_model=signal_model,
        executor=executor))
    plain = plain_limits.to_dict()
    notes = list(with_s.pop("notes", []))
    if S.spurious_uncertainty:
        notes.append("the limits leave out the template signal added to the significance")
    n_toys = sum(m == "toys" for m in with_s["methods"])
    plain_toys = sum(m == "toys" for m in plain.get("methods") or ())
    if plain_toys and not S.toy_limits:
        notes.append(f"the plain limits use toys at {plain_toys} masses; the limits with "
                     "systematics are asymptotic there (their bands may be misplaced at low "
                     "counts; systematics.toy_limits = true computes them with toys)")
    if n_toys:
        notes.append(f"{n_toys} of {len(with_s['methods'])} masses with toys that profile "
                     "the same nuisances and background functions")
    return {"with_systematics": with_s, "without_systematics": _compact(plain),
            "profiled": with_s["profiled"], "notes": notes}


def systematic_limits_at(cfg: Config, hist: Any, signal: Any, scanned: Any,
                         masses: np.ndarray, *, natural_width: float | None,
                         blind: Any, signal_model: Any = None,
                         executor: Any = None) -> dict[str, Any]:
    """The limits with systematics at ``masses`` (:func:`peaksift.stats.limits_systematics.
    systematic_limits` with the configured luminosity, efficiency, sizes and method, and the
    background functions of ``scanned``), before the plain limits are known."""
    from ..stats.envelope import EnvelopeResult
    from ..stats.limits_systematics import systematic_limits

    L, S = cfg.limits, cfg.systematics
    if isinstance(scanned, EnvelopeResult):
        shapes = {lab: s.model.background for lab, s in zip(scanned.labels, scanned.scans)}
        counts = dict(zip(scanned.labels, scanned.n_parameters))
    else:
        shapes = {scanned.background_shape: scanned.model.background}
        counts = None
    lum = L.luminosity
    sm = signal_model
    sig_kw: dict[str, Any] = (
        {"signal_model": sm} if sm is not None else
        {"resolution": cfg.model.resolution.resolution, "natural_width": natural_width,
         "efficiency": L.efficiency if lum is not None else 1.0})
    return systematic_limits(
        hist, None if sm is not None else signal, shapes, np.asarray(masses),
        nuisances=_nuisances(cfg), n_parameters=counts, penalty=S.penalty,
        window=tuple(cfg.spectrum.window), blind=blind, cl=L.cl, luminosity=lum,
        luminosity_uncertainty=L.luminosity_uncertainty if lum is not None else 0.0,
        efficiency_uncertainty=L.efficiency_uncertainty if lum is not None else 0.0,
        constraint=L.constraint, unit=L.cross_section_unit,
        # toys with every nuisance profiled cost ~10x the plain toys per mass: on request
        method=L.method if S.toy_limits else "asymptotic",
        toy_masses=list(L.toy_masses) or None, toys=L.toys, seed=cfg.significance.seed,
        executor=executor if L.method != "asymptotic" and S.toy_limits else None, **sig_kw)
