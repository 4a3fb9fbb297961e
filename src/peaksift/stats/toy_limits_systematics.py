r"""Toy-based CLs limits with the signal-shape nuisances and the background envelope profiled.

Which piece when
----------------
* :func:`systematic_toy_limits` -- the toy limits of
  :func:`peaksift.stats.limits_systematics.systematic_limits` at its low-count masses (and
  chosen ones): one seeded task per mass, on any execution engine.  With every shape size 0
  and one background function each task is :func:`peaksift.stats.toy_limits.run_toy_limit`
  itself, so the numbers are those of :func:`peaksift.stats.upper_limits`, to the bit.
* :func:`run_systematic_toy_limit` -- the picklable task function of one mass.

Prescription
------------
The frequentist CLs construction with nuisance parameters (Cowan, Cranmer, Gross, Vitells,
EPJC 71 (2011) 1554, sec. 2 and eq. 16; Read, J. Phys. G 28 (2002) 2693; Junk, NIM A 434
(1999) 435), with every nuisance profiled as in the asymptotic limits with systematics:

* the test statistic is :math:`\tilde q_\mu`, with the background parameters, the
  normalisation nuisance :math:`t`, the mass-scale and resolution factors :math:`k_m, k_r`
  and the choice of background function (the envelope
  :math:`\min_c[\mathrm{NLL}_c + \tfrac a2 N_c]`, Dauncey, Kenzie, Wardle, Davies,
  JINST 10 (2015) P04015) profiled, on the data and on every toy alike;
* each nuisance's constraint is an auxiliary measurement (a global observable): the data's
  are :math:`t_0 = 0`, :math:`c_m = c_r = 1`.  A toy draws its counts *and* its global
  observables from the model at the data's conditional fit: for the signal-plus-background
  toys at the signal value :math:`\mu` (the function the envelope takes there, its
  background, :math:`\hat{\hat t}`, :math:`\hat{\hat k}`; the global observables drawn
  around those fitted values: :math:`t_0 \sim N(\hat{\hat t}, 1)`, a Gaussian factor's
  centre :math:`\sim N(\hat{\hat k}, \delta)`, a log-normal one's :math:`\ln c \sim
  N(\ln\hat{\hat k}, \ln(1+\delta))`); for the background-only toys at :math:`\mu = 0`
  (the envelope's function without signal; the shape factors and :math:`t` do not act
  there and sit at the data's values, around which their global observables are drawn);
* each toy's :math:`\tilde q_\mu` uses its own global observables as the constraints'
  centres;
* where the mass scale moves the peak further than its width, each fit (free and at every
  mu, of the data and of every toy) takes the lowest well of the profile in the mass scale
  (:func:`peaksift.stats.scale_scan.profile_global`), as the asymptotic limits do.

CLs+b and CLb, the pooled importance weights, ties, the grid and the expected band are
those of :mod:`peaksift.stats.toy_limits`: the densities of the two generating models now
include the global observables' Gaussian densities (log-normal ones in :math:`\ln c`, whose
Jacobian is common to both and cancels).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..likelihood import SignalNuisances
from .cls import _BANDS, _floor_reach, _Problem, _unconditional
from .scale_scan import STARTS_TOYS, profile_global
from .shape_profile import TOY_TOLERANCE, _fractions
from .toy_limits import (
    _ToyLimitTask,
    grid_start,
    limits_on_grid,
    pooled_cls,
    run_toy_limit,
)
from .toys import ScanModel, bkg_fractions, fit_background, profile_signal

__all__ = ["run_systematic_toy_limit", "systematic_toy_limits"]


@dataclass
class _ShapeProblem(_Problem):
    """:class:`~peaksift.stats.cls._Problem` with the signal shape's factors profiled too,
    their constraints centred on each row's global observables ``centers (B, J)``."""

    signal: Any = None
    base: list[Any] = field(default_factory=list)
    nuis: SignalNuisances | None = None
    centers: np.ndarray | None = None
    k: np.ndarray | None = None

    def nll(self, mu: np.ndarray) -> np.ndarray:
        # the factors start where the last fit left them, except on rows the base class
        # starts afresh (a mu ten times away), where they start at their centres
        if self.k is not None and self.last is not None:
            with np.errstate(divide="ignore", invalid="ignore"):
                far = ~(np.abs(np.log(np.maximum(np.asarray(mu, float), 1e-300)
                                      / np.maximum(self.last, 1e-300))) <= math.log(10.0))
            self.k[far] = np.asarray(self.centers)[far]
        return super().nll(mu)

    def _profile(self, s: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray]:
        nuis = self.nuis
        assert nuis is not None
        names = nuis.shape_active
        rows = np.arange(s.size)
        cen = self.centers
        rn = profile_global(self.model, self.counts, self.signal, self.base, nuis,
                            start={"s": s, "b": self.b, "theta": self.theta,
                                   "factors": cen if self.k is None else self.k},
                            centers=cen, fixed_signal=True, tol=TOY_TOLERANCE,
                            starts=STARTS_TOYS)
        self.k = rn["factors"]
        return rn, _fractions(self.model, self.signal, self.base, names, nuis, self.k, rows)


@dataclass(frozen=True)
class _SystematicToyTask:
    """One mass's toy limit with systematics, a picklable unit of work."""

    models: tuple[ScanModel, ...]   # one per candidate function, fitted to the data
    penalties: np.ndarray           # per candidate, NLL units
    jj: int                         # the hypothesis among the unblinded ones
    conv: float
    delta: float
    kind: str
    signal: Any
    base: tuple[Any, ...]           # signal parameters at this hypothesis ((1, 1) or scalars)
    nuisances: SignalNuisances
    cl: float
    ntoys: int
    seed: int
    obs_asym: float
    exp_asym: np.ndarray


class _Ensemble:
    """``T`` data sets (toys, or the data as one row) with their global observables,
    evaluated with every candidate: their free fits once, q~mu at any mu."""

    def __init__(self, task: _SystematicToyTask, counts: np.ndarray, aux: np.ndarray,
                 centers: np.ndarray | None) -> None:
        self.task = task
        t = counts.shape[0]
        nuis = task.nuisances
        names = nuis.shape_active
        self.base = [np.repeat(np.asarray(p, float).reshape(1, -1), t, axis=0)
                     if np.ndim(p) else p for p in task.base]
        rows = np.arange(t)
        hats, zeros, s_hats, self.probs = [], [], [], []
        for model in task.models:
            if names:
                f = _fractions(model, task.signal, self.base, names, nuis, centers, rows)
                s_hat, nll_hat, nll_zero = self._free(model, counts, f, centers)
                prob: _Problem = _ShapeProblem(
                    model, counts, f, np.full(t, task.conv), task.delta, task.kind, aux,
                    signal=task.signal, base=self.base, nuis=nuis, centers=centers)
            else:
                f = np.broadcast_to(model.fractions[task.jj], counts.shape)
                s_hat, nll_hat, nll_zero = _unconditional(model, counts, f)
                prob = _Problem(model, counts, f, np.full(t, task.conv), task.delta,
                                task.kind, aux)
            hats.append(nll_hat)
            zeros.append(nll_zero)
            s_hats.append(s_hat)
            self.probs.append(prob)
        pen = task.penalties[:, None]
        hat, zero = np.stack(hats) + pen, np.stack(zeros) + pen
        c_hat = hat.argmin(axis=0)
        kap = self.probs[0].kappa(aux)[0]
        # the free fit has t at its global observable (it is degenerate with mu)
        self.mu_hat = np.stack(s_hats)[c_hat, rows] / (task.conv * kap)
        self.ref = np.where(self.mu_hat < 0, zero.min(axis=0), hat.min(axis=0))

    def _free(self, model: ScanModel, counts: np.ndarray, f: np.ndarray,
              centers: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Free fits with the shape factors profiled: (s_hat, NLL there, NLL at s = 0)."""
        t = counts.shape[0]
        th = np.repeat(model.theta[None, :], t, axis=0)
        r = profile_signal(model, counts, f, theta_start=th, b_start=np.full(t, model.bkg_yield))
        _, _, nll_zero = fit_background(model, counts, th)
        rn = profile_global(model, counts, self.task.signal, self.base, self.task.nuisances,
                            start={**r, "factors": centers}, centers=centers,
                            tol=TOY_TOLERANCE)
        better = rn["nll"] < r["nll"]
        s_hat = np.where(better, rn["s"], r["s"])
        return s_hat, np.minimum(np.minimum(rn["nll"], r["nll"]), nll_zero), nll_zero

    def q(self, mu: float) -> tuple[np.ndarray, np.ndarray]:
        """q~mu of every row (CCGV eq. 16 with the envelope) and the function chosen."""
        mus = np.full(self.mu_hat.size, mu)
        vals = np.stack([p.nll(mus) for p in self.probs]) + self.task.penalties[:, None]
        q = np.maximum(2.0 * (vals.min(axis=0) - self.ref), 0.0)
        return np.where(self.mu_hat > mu, 0.0, q), vals.argmin(axis=0)


def _draw_centers(nuis: SignalNuisances, around: np.ndarray, rng: np.random.Generator,
                  count: int) -> np.ndarray | None:
    """Global observables of the shape factors drawn around the fitted ``around (J,)``."""
    names = nuis.shape_active
    if not names:
        return None
    unit = nuis.sample_centers(names, rng, count)   # around 1
    out = np.empty_like(unit)
    for j, name in enumerate(names):
        out[:, j] = (around[j] * unit[:, j] if nuis.kind(name) == "lognormal"
                     else around[j] - 1.0 + unit[:, j])
    return out


def _log_density_ratio(nuis: SignalNuisances, c: np.ndarray | None, k_sb: np.ndarray
                       ) -> np.ndarray | float:
    """ln p_s+b - ln p_b of the shape factors' global observables ``c (T, J)``: drawn
    around ``k_sb`` for the s+b toys and around 1 for the background-only ones."""
    if c is None:
        return 0.0
    out = np.zeros(c.shape[0])
    for j, name in enumerate(nuis.shape_active):
        size = getattr(nuis, name)
        if nuis.kind(name) == "lognormal":
            w, x, m = math.log1p(size), np.log(c[:, j]), math.log(k_sb[j])
        else:
            w, x, m = size, c[:, j] - 1.0, k_sb[j] - 1.0
        out += (0.5 * x**2 - 0.5 * (x - m) ** 2) / w**2
    return out


def run_systematic_toy_limit(task: _SystematicToyTask) -> dict[str, Any]:
    """Toy-based CLs limit and expected band at one mass with every nuisance profiled (see
    the module guide; the estimator is :func:`peaksift.stats.toy_limits._toy_limit`'s)."""
    alpha = 1.0 - task.cl
    nuis = task.nuisances
    names = nuis.shape_active
    null = int(np.argmin(np.array([m.nll_background for m in task.models]) + task.penalties))
    f0 = task.models[null].fractions[task.jj]
    floor = (-math.log(alpha) / (task.conv * float(f0.sum()))
             / _floor_reach(task.delta, task.kind))
    lo, hi = grid_start(floor, task.obs_asym, task.exp_asym)
    ss = np.random.SeedSequence(task.seed)
    rng = np.random.default_rng(ss.spawn(1)[0])
    ntoys = task.ntoys
    nu_b = np.maximum(task.models[null].expected_background, 1e-300)
    n_b = rng.poisson(nu_b, size=(ntoys, nu_b.size)).astype(float)
    aux_b = rng.standard_normal(ntoys) if task.delta else np.zeros(ntoys)
    cen_b = _draw_centers(nuis, np.ones(len(names)), rng, ntoys)
    ens_b = _Ensemble(task, n_b, aux_b, cen_b)
    data = _Ensemble(task, task.models[0].counts[None, :], np.zeros(1),
                     None if not names else np.ones((1, len(names))))

    def evaluate(mu: float) -> tuple[float, float, np.ndarray]:
        q_obs, chosen = data.q(mu)
        c = int(chosen[0])
        prob, model = data.probs[c], task.models[c]
        # the data's conditional fit at mu (the envelope's function there) makes the s+b toys
        t_sb = float(prob.t[0])
        s_mu = mu * task.conv * float(prob.kappa(prob.t)[0][0])
        if names:
            k_sb = np.asarray(prob.k, float)[0]   # type: ignore[attr-defined]
            f = _fractions(model, task.signal, data.base, names, nuis, k_sb[None, :],
                           np.arange(1))[0]
        else:
            k_sb, f = np.ones(0), model.fractions[task.jj]
        nu_sb = np.maximum(s_mu * f + prob.b[0] * bkg_fractions(model, prob.theta)[0], 1e-300)
        r = np.random.default_rng(ss.spawn(1)[0])
        n_sb = r.poisson(nu_sb, size=(ntoys, nu_sb.size)).astype(float)
        aux_sb = t_sb + r.standard_normal(ntoys) if task.delta else np.zeros(ntoys)
        cen_sb = _draw_centers(nuis, k_sb, r, ntoys)
        q_sb = _Ensemble(task, n_sb, aux_sb, cen_sb).q(mu)[0]
        q_b = ens_b.q(mu)[0]
        n_pool = np.concatenate([n_b, n_sb])
        llr = n_pool @ (np.log(nu_sb) - np.log(nu_b)) - (nu_sb.sum() - nu_b.sum())
        if task.delta:
            a_pool = np.concatenate([aux_b, aux_sb])
            llr = llr + 0.5 * a_pool**2 - 0.5 * (a_pool - t_sb) ** 2
        if names:
            llr = llr + _log_density_ratio(nuis, np.concatenate([cen_b, cen_sb]), k_sb)
        return (float(q_obs[0]), *pooled_cls(float(q_obs[0]), q_b, q_sb, llr))

    points, grid, vals, notes = limits_on_grid(evaluate, lo, hi, alpha, "toy limit")
    return {"observed": float(vals[0]),
            "expected": {n: float(v) for n, v in zip(_BANDS, vals[1:])},
            "grid": grid, "cls": np.array([points[m][1] for m in grid]),
            "q_observed": np.array([points[m][0] for m in grid]), "n_toys": ntoys,
            "asymptotic_observed": task.obs_asym, "notes": notes}


def systematic_toy_limits(js: Sequence[int], models: Sequence[ScanModel], penalties: np.ndarray,
                          conv: np.ndarray, delta: float, kind: str, signal: Any,
                          base: Sequence[Any], nuisances: SignalNuisances, cl: float,
                          toys: int, seed: int, observed: np.ndarray, expected: np.ndarray,
                          blinded: np.ndarray,
                          executor: Callable[[Callable[[Any], Any], list[Any]], Sequence[Any]]
                          | None = None) -> dict[int, dict[str, Any]]:
    """Toy limits at the scan masses ``js`` (indices into all masses; unblinded ones only),
    one task per mass seeded ``seed + j`` (as :func:`peaksift.stats.upper_limits`).

    ``models`` are the candidates' data models (used bins, unblinded hypotheses),
    ``base`` the signal parameters of every unblinded hypothesis, ``observed`` and
    ``expected (5, M)`` the asymptotic limits that start each grid.  Returns
    ``{j: result}`` (the keys of :func:`peaksift.stats.toy_limits.run_toy_limit`)."""
    from ..errors import FitError

    keep = ~np.asarray(blinded, bool)
    plain = len(models) == 1 and not nuisances.shape_active
    tasks: list[Any] = []
    for j in js:
        jj = int(np.sum(keep[:j]))
        if plain:
            tasks.append(_ToyLimitTask(models[0], jj, float(conv[j]), delta, kind, cl, toys,
                                       seed + j, float(observed[j]), expected[:, j].copy()))
            continue
        one = tuple(np.asarray(p)[jj:jj + 1] if np.ndim(p) else p for p in base)
        tasks.append(_SystematicToyTask(tuple(models), np.asarray(penalties, float), jj,
                                        float(conv[j]), delta, kind, signal, one, nuisances,
                                        cl, toys, seed + j, float(observed[j]),
                                        expected[:, j].copy()))
    func = run_toy_limit if plain else run_systematic_toy_limit
    if executor is not None and tasks:
        results = list(executor(func, tasks))
        if len(results) != len(tasks):
            raise FitError(f"the toy executor returned {len(results)} results for "
                           f"{len(tasks)} toy-limit masses")
    else:
        results = [func(t) for t in tasks]
    return dict(zip(js, results))
