r"""The combination's toys: every channel generated, the joint likelihood fitted.

* :func:`combined_toy_scans` -- q0 scans of background-only toys (the global significance);
* :func:`joint_toy_limit`    -- the toy-based CLs limit at one mass, below.

The single-channel recipe of :mod:`peaksift.stats.toy_limits` (Read, J. Phys. G 28 (2002)
2693; Junk, NIM A 434 (1999) 435) on the joint likelihood of
:mod:`peaksift.stats.joint`:

* background-only toys: every channel drawn from its background-only fit to the data, the
  normalisation nuisances' auxiliary measurements from N(0, 1); one set for every signal
  value;
* signal-plus-background toys at each signal value mu of a grid: every channel drawn from
  the data's conditional fit at mu, the auxiliary measurements from N(nu_hat, 1);
* each toy's q~mu (CCGV eq. 16) with every channel's background and the nuisances profiled
  (its own auxiliary measurements in the constraints);
* a channel's shape factors (mass scale, resolution) profiled too, their global observables
  drawn per toy (around 1 for the background-only toys, around the data's conditional fit
  for the signal-plus-background ones, whose signal shape they set), as the single
  channel's toy limits with systematics do (:mod:`peaksift.stats.toy_limits_systematics`);
  every fit, of the data and of the toys, and the global significance toys' refitted top
  points take each channel's lowest well of the mass scale
  (:func:`peaksift.stats.joint_wells.joint_global`);
* CLs+b and CLb from both sets with the balance-heuristic weights (as the single channel:
  unbiased, precise in both tails), ties within 0.01 in q; the observed limit and the
  expected band (the background-only toys' own limits) where ln CLs, linear in mu between
  grid points, falls through ln(1 - CL).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from .cls import _BANDS
from .joint import profile_joint
from .joint_wells import joint_global
from .scale_scan import STARTS_TOYS
from .shape_profile import NUISANCE_REFINE, _fractions, top_points
from .toy_limits import grid_start, limits_on_grid, pooled_cls
from .toy_limits_systematics import _draw_centers, _log_density_ratio
from .toys import bkg_fractions, fit_background, toy_counts

__all__ = ["combined_toy_scans", "joint_toy_limit", "run_joint_toy_limit", "run_toy_scans",
           "toy_q0"]

_TOY_CHUNK = 25   # toys per joint fit stack (toys x masses rows)


class _Set:
    """Stacked data sets of every channel (toys or the data) with their free fits.

    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at the one
    hypothesis (arrays ``(1, 1)`` or scalars); its factors are profiled, their constraints
    centred on ``centers`` (per channel ``(T, J_c)``: each set's global observables), each
    fit at the lowest well of the mass scale (:func:`~peaksift.stats.joint_wells.joint_global`)."""

    def __init__(self, models: list, counts: list[np.ndarray], conv: list[float],
                 norms: Any, aux: np.ndarray, shapes: Any = None,
                 centers: Any = None, memo: dict | None = None) -> None:
        self.models, self.counts, self.norms, self.aux = models, counts, norms, aux
        t = counts[0].shape[0]
        self.f = [np.broadcast_to(m.fractions[0], (t, m.fractions.shape[1])) for m in models]
        self.k = [np.full(t, c) for c in conv]
        self.shapes = None if shapes is None or not any(sp is not None for sp in shapes) \
            else [None if sp is None else (sp[0], [np.repeat(np.asarray(p, float).reshape(
                1, -1), t, axis=0) if np.ndim(p) else p for p in sp[1]], sp[2])
                  for sp in shapes]
        self.centers = centers
        self.memo = {} if memo is None else memo   # joint_global's, shared by the sets
        nll0 = 0.0
        self.theta, self.b = [], []
        for m, n in zip(models, counts):
            th, b, nll = fit_background(m, n)
            self.theta.append(th)
            self.b.append(b)
            nll0 = nll0 + nll
        self.nll_zero = nll0   # mu = 0: the nuisances sit at their auxiliary values
        r = self._fit(None)
        self.mu_hat = r["mu"]
        self.nll_hat = np.minimum(r["nll"], nll0)

    def _fit(self, mu: Any) -> dict[str, Any]:
        def one(**kw: Any) -> dict[str, Any]:
            return profile_joint(self.models, self.counts, self.f, self.k, mu_fixed=mu,
                                 norms=self.norms, nu_start=self.aux, nu_aux=self.aux,
                                 shapes=self.shapes, shape_centers=self.centers, steps=100,
                                 tol=1e-3, **{"theta_start": self.theta, "b_start": self.b,
                                              "factors_start": self.centers, **kw})

        # each channel's mass scale at its lowest well (joint_wells), else the one fit
        return joint_global(one, self.models, self.counts, self.k, self.shapes,
                            mu_fixed=mu, centers=self.centers, starts=STARTS_TOYS,
                            memo=self.memo)

    def q(self, mu: float) -> tuple[np.ndarray, dict[str, Any]]:
        """q~mu of every set (CCGV eq. 16) and the conditional fits at ``mu``."""
        t = self.counts[0].shape[0]
        r = self._fit(np.full(t, mu))
        ref = np.where(self.mu_hat < 0, self.nll_zero, self.nll_hat)
        q = np.where(self.mu_hat > mu, 0.0, np.maximum(2.0 * (r["nll"] - ref), 0.0))
        return q, r


def _draw(rng: np.random.Generator, nus: list[np.ndarray], t: int) -> list[np.ndarray]:
    return [rng.poisson(nu, size=(t, nu.size)).astype(float) for nu in nus]


def _centers(shapes: Any, around: list, rng: np.random.Generator, t: int) -> Any:
    """Per channel the global observables of its shape factors for ``t`` toys, drawn around
    ``around[c]`` (None for a channel without; None without shapes)."""
    if shapes is None:
        return None
    return [None if sp is None else _draw_centers(sp[2], np.asarray(a, float), rng, t)
            for sp, a in zip(shapes, around)]


def joint_toy_limit(models: list, conv: list[float], norms: Any, cl: float, ntoys: int,
                    seed: int, obs_asym: float, exp_asym: np.ndarray,
                    shapes: Any = None) -> dict[str, Any]:
    """Toy-based CLs limit on sigma x B at one hypothesis (see the module guide).

    ``models``: each channel's ScanModel holding that one hypothesis; ``conv``: each
    channel's events per unit of sigma x B there; ``norms``: the normalisation nuisances
    (or None); ``obs_asym``, ``exp_asym``: the asymptotic values that place the grid;
    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at that
    hypothesis (its shape factors profiled, their global observables drawn per toy).
    Returns ``observed``, ``expected`` (band name -> value), ``grid``, ``cls``,
    ``n_toys`` and ``notes``."""
    alpha = 1.0 - cl
    nj = 0 if norms is None else norms.shape[1]
    shapes = None if shapes is None or not any(sp is not None for sp in shapes) \
        else list(shapes)
    ones = [None if sp is None else np.ones(len(sp[2].shape_active))
            for sp in (shapes or [])]
    s_per_mu = sum(k * float(m.fractions[0].sum()) for m, k in zip(models, conv))
    # no CLs limit lies below -ln(1 - CL) signal events (CLs >= exp(-s), Read 2002); a
    # nuisance at +2 sigma moves that floor
    reach = 1.0 if norms is None else math.exp(2.0 * float(np.max(np.sqrt(
        (norms**2).sum(axis=1)))))
    floor = -math.log(alpha) / s_per_mu / reach
    lo, hi = grid_start(floor, obs_asym, exp_asym)
    ss = np.random.SeedSequence(seed)
    rng = np.random.default_rng(ss.spawn(1)[0])
    nu_b = [np.maximum(m.expected_background, 1e-300) for m in models]
    n_b = _draw(rng, nu_b, ntoys)
    aux_b = rng.standard_normal((ntoys, nj))
    # the shape factors do not act without signal: their global observables around the
    # data's (1)
    cen_b = _centers(shapes, ones, rng, ntoys)
    memo: dict = {}   # the mass-scale scans' fractions: one hypothesis, every set's
    toys_b = _Set(models, n_b, conv, norms, aux_b, shapes, cen_b, memo)
    data = _Set(models, [m.counts[None, :] for m in models], conv, norms, np.zeros((1, nj)),
                shapes, None if shapes is None else [None if o is None else o[None, :]
                                                     for o in ones], memo)

    def evaluate(mu: float) -> tuple[float, float, np.ndarray]:
        q_obs_a, r = data.q(mu)
        q_obs = float(q_obs_a[0])
        nu_hat = r["nu"][0]
        # the data's conditional fit at mu generates the s+b toys (the shape factors at
        # their fitted values, their global observables drawn around those)
        nu_sb, k_sb = [], []
        for c, m in enumerate(models):
            e = 1.0 if norms is None else math.exp(float(nu_hat @ norms[c]))
            bkg = r["b"][c][0] * bkg_fractions(m, r["theta"][c][:1])[0]
            sp = None if shapes is None else shapes[c]
            if sp is None:
                f, kc = m.fractions[0], None
            else:
                kc = np.asarray(r["factors"][c], float)[0]
                f = _fractions(m, sp[0], sp[1], sp[2].shape_active, sp[2], kc[None, :],
                               np.arange(1))[0]
            k_sb.append(kc)
            nu_sb.append(np.maximum(mu * conv[c] * e * f + bkg, 1e-300))
        rr = np.random.default_rng(ss.spawn(1)[0])
        n_sb = _draw(rr, nu_sb, ntoys)
        aux_sb = nu_hat + rr.standard_normal((ntoys, nj))
        cen_sb = _centers(shapes, k_sb, rr, ntoys)
        q_sb = _Set(models, n_sb, conv, norms, aux_sb, shapes, cen_sb, memo).q(mu)[0]
        q_b = toys_b.q(mu)[0]
        # log-likelihood ratio of the two generating models for every pooled toy
        llr = 0.0
        for c in range(len(models)):
            pool = np.concatenate([n_b[c], n_sb[c]])
            llr = llr + pool @ (np.log(nu_sb[c]) - np.log(nu_b[c])) - (nu_sb[c].sum()
                                                                        - nu_b[c].sum())
            if shapes is not None and shapes[c] is not None:
                llr = llr + _log_density_ratio(shapes[c][2], np.concatenate(
                    [cen_b[c], cen_sb[c]]), k_sb[c])
        if nj:
            a_pool = np.concatenate([aux_b, aux_sb])
            llr = llr + 0.5 * (a_pool**2).sum(axis=1) - 0.5 * ((a_pool - nu_hat) ** 2).sum(
                axis=1)
        return (q_obs, *pooled_cls(q_obs, q_b, q_sb, llr))

    points, grid, vals, notes = limits_on_grid(evaluate, lo, hi, alpha, "combined toy limit")
    cls_obs = np.array([points[m][1] for m in grid])
    return {"observed": float(vals[0]),
            "expected": {n: float(v) for n, v in zip(_BANDS, vals[1:])},
            "grid": grid, "cls": cls_obs, "n_toys": ntoys,
            "asymptotic_observed": obs_asym, "notes": notes}


def run_joint_toy_limit(task: tuple) -> dict[str, Any]:
    """:func:`joint_toy_limit` of one mass from a picklable tuple of its arguments (a unit
    of work for the limits' executor)."""
    return joint_toy_limit(*task)


def combined_toy_scans(models: list, conv: list[np.ndarray], n_toys: int, *,
                       seed: int = 0, norms: Any = None, shapes: Any = None,
                       ensembles: Any = None, executor: Any = None) -> np.ndarray:
    """q0 scans ``(n_toys, n_masses)`` of background-only toys of every channel, each
    channel fluctuated from its background-only fit (toy ``i`` of channel ``c`` from
    ``SeedSequence(seed, spawn_key=(c, i))``), fitted with the joint likelihood (with the
    normalisation nuisances ``norms`` when given; their auxiliary measurements stay at 0:
    under the background-only hypothesis they do not change the toys).

    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at every
    mass of the scan (:meth:`~peaksift.stats.channels.Channel.shape_spec`): the channels'
    mass-scale and resolution factors are then profiled, as in the observed scan, at each
    toy's ``NUISANCE_REFINE`` highest points (the single channel's method,
    :mod:`peaksift.stats.shape_profile`); ``ensembles`` per channel ``"fixed"`` (the
    constraints centred at 1) or ``"sampled"`` (each toy draws the centres, from
    ``SeedSequence(seed, spawn_key=(c, i, 1))``).  ``executor(func, tasks) -> results in
    task order`` runs the batches of ``_TOY_CHUNK`` toys (e.g. on worker processes; each
    toy has its own seed stream, so the engine does not change the result)."""
    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    tasks = [_ToyScans(tuple(models), tuple(conv), seed, norms,
                       None if shapes is None else tuple(shapes),
                       None if ensembles is None else tuple(ensembles), first,
                       min(_TOY_CHUNK, n_toys - first))
             for first in range(0, n_toys, _TOY_CHUNK)]
    done = list(executor(run_toy_scans, tasks)) if executor is not None and len(tasks) > 1 \
        else [run_toy_scans(t) for t in tasks]
    if len(done) != len(tasks):
        raise FitError(f"the toy executor returned {len(done)} results for {len(tasks)} "
                       "batches of combined toys")
    return np.concatenate(done, axis=0)


@dataclass(frozen=True)
class _ToyScans:
    """Toys ``first .. first+count-1`` of :func:`combined_toy_scans` (picklable: a unit of
    work for the toys' executor)."""

    models: tuple
    conv: tuple
    seed: int
    norms: Any
    shapes: Any
    ensembles: Any
    first: int
    count: int


def run_toy_scans(task: _ToyScans) -> np.ndarray:
    """The q0 scans ``(count, n_masses)`` of one batch of combined toys (pure)."""
    models = list(task.models)
    roots = [np.random.SeedSequence(task.seed, spawn_key=(c,)) for c in range(len(models))]
    raw = [toy_counts(m.expected_background, roots[c], task.first, task.count)
           for c, m in enumerate(models)]
    return toy_q0(models, raw, task)[0]


def toy_q0(models: list, raw: list[np.ndarray], task: Any) -> tuple[np.ndarray, np.ndarray]:
    """q0 ``(toys, masses)`` of toys with counts ``raw`` (per channel ``(toys, n_used)``)
    fitted with ``models`` (one per channel), and the toys' summed background-only NLL
    ``(toys,)``; ``task`` gives conv, norms, shapes, ensembles, seed and first."""
    conv, norms, shapes = list(task.conv), task.norms, task.shapes
    cnt = raw[0].shape[0]
    nm = models[0].masses.size
    counts, th0, b0, nll0 = [], [], [], 0.0
    with np.errstate(all="ignore"):
        for m, n in zip(models, raw):
            th, b, nll = fit_background(m, n)
            counts.append(np.repeat(n, nm, axis=0))
            th0.append(np.repeat(th, nm, axis=0))
            b0.append(np.repeat(b, nm))
            nll0 = nll0 + np.repeat(nll, nm)
    r = profile_joint(models, counts, [np.tile(m.fractions, (cnt, 1)) for m in models],
                      [np.tile(k, cnt) for k in conv], theta_start=th0, b_start=b0,
                      steps=40, tol=3e-2, norms=norms)
    q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
    q[~np.isfinite(r["nll"]) | ~np.isfinite(nll0)] = np.nan
    q = q.reshape(cnt, nm)
    if shapes is not None and any(sp is not None for sp in shapes):
        _refine_shapes(q, r, models, counts, conv, nll0, norms, list(shapes),
                       list(task.ensembles or ["fixed"] * len(models)), task.seed, task.first)
    return q, np.asarray(nll0).reshape(cnt, nm)[:, 0]


def _refine_shapes(q: np.ndarray, r: dict, models: list, counts: list, conv: list,
                   nll0: np.ndarray, norms: Any, shapes: Any, ensembles: Any, seed: int,
                   first: int) -> None:
    """Each toy's highest points refitted with the channels' shape factors free and
    constrained (centres at 1, or drawn per toy), written into ``q (toys, masses)``."""
    nm = q.shape[1]
    toys, cols = top_points(q, NUISANCE_REFINE)
    if toys.size == 0:
        return
    rows = toys * nm + cols       # rows of the stacked (toy, mass) fits
    specs, centers = [], []
    for c, sp in enumerate(shapes):
        if sp is None:
            specs.append(None)
            centers.append(None)
            continue
        sig, base, nuis = sp
        specs.append((sig, [np.asarray(p)[cols] if np.ndim(p) else p for p in base], nuis))
        if ensembles[c] == "sampled":
            names = nuis.shape_active
            cen = np.empty((rows.size, len(names)))
            for j, t in enumerate(toys):  # the toy's own stream, apart from its counts'
                ss = np.random.SeedSequence(seed, spawn_key=(c, first + int(t), 1))
                cen[j] = nuis.sample_centers(names, np.random.default_rng(ss), 1)[0]
            centers.append(cen)
        else:
            centers.append(None)
    n_top, k_top = [n[rows] for n in counts], [k[cols] for k in conv]
    first = {"mu_start": r["mu"][rows], "theta_start": [t[rows] for t in r["theta"]],
             "b_start": [b[rows] for b in r["b"]]}

    def one(**kw: Any) -> dict[str, Any]:
        return profile_joint(models, n_top, [m.fractions[cols] for m in models], k_top,
                             nu_start=r["nu"][rows], norms=norms, shapes=specs,
                             shape_centers=centers, steps=40, tol=3e-2, **{**first, **kw})

    # each channel's mass scale at its lowest well (joint_wells), as the observed scan
    rr = joint_global(one, models, n_top, k_top, specs, centers=centers)
    exact = np.where(rr["mu"] > 0, np.maximum(2.0 * (nll0[rows] - rr["nll"]), 0.0), 0.0)
    # started at the fit with the factors at 1: with centres at 1 never worse (to
    # rounding); with drawn centres the refit is the toy's q0 however it compares
    sampled = np.array([any(ensembles[c] == "sampled" for c, sp in enumerate(shapes)
                            if sp is not None)] * rows.size)
    keep = np.isfinite(exact) & (sampled | (rr["nll"] <= r["nll"][rows]))
    q[toys[keep], cols[keep]] = exact[keep]
