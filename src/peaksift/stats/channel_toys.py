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
* CLs+b and CLb from both sets with the balance-heuristic weights (as the single channel:
  unbiased, precise in both tails), ties within 0.01 in q; the observed limit and the
  expected band (the background-only toys' own limits) where ln CLs, linear in mu between
  grid points, falls through ln(1 - CL).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import special

from ..errors import FitError
from .cls import _BANDS
from .joint import profile_joint
from .toy_limits import _crossings, _tail
from .toys import bkg_fractions, fit_background, toy_counts

__all__ = ["combined_toy_scans", "joint_toy_limit"]

_TOY_CHUNK = 25   # toys per joint fit stack (toys x masses rows)

_GRID = 10
_EXTEND = 3


class _Set:
    """Stacked data sets of every channel (toys or the data) with their free fits."""

    def __init__(self, models: list, counts: list[np.ndarray], conv: list[float],
                 norms: Any, aux: np.ndarray) -> None:
        self.models, self.counts, self.norms, self.aux = models, counts, norms, aux
        t = counts[0].shape[0]
        self.f = [np.broadcast_to(m.fractions[0], (t, m.fractions.shape[1])) for m in models]
        self.k = [np.full(t, c) for c in conv]
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
        return profile_joint(self.models, self.counts, self.f, self.k, mu_fixed=mu,
                             theta_start=self.theta, b_start=self.b, norms=self.norms,
                             nu_start=self.aux, nu_aux=self.aux, steps=100, tol=1e-3)

    def q(self, mu: float) -> tuple[np.ndarray, dict[str, Any]]:
        """q~mu of every set (CCGV eq. 16) and the conditional fits at ``mu``."""
        t = self.counts[0].shape[0]
        r = self._fit(np.full(t, mu))
        ref = np.where(self.mu_hat < 0, self.nll_zero, self.nll_hat)
        q = np.where(self.mu_hat > mu, 0.0, np.maximum(2.0 * (r["nll"] - ref), 0.0))
        return q, r


def _draw(rng: np.random.Generator, nus: list[np.ndarray], t: int) -> list[np.ndarray]:
    return [rng.poisson(nu, size=(t, nu.size)).astype(float) for nu in nus]


def joint_toy_limit(models: list, conv: list[float], norms: Any, cl: float, ntoys: int,
                    seed: int, obs_asym: float, exp_asym: np.ndarray) -> dict[str, Any]:
    """Toy-based CLs limit on sigma x B at one hypothesis (see the module guide).

    ``models``: each channel's ScanModel holding that one hypothesis; ``conv``: each
    channel's events per unit of sigma x B there; ``norms``: the normalisation nuisances
    (or None); ``obs_asym``, ``exp_asym``: the asymptotic values that place the grid.
    Returns ``observed``, ``expected`` (band name -> value), ``grid``, ``cls``,
    ``n_toys`` and ``notes``."""
    alpha = 1.0 - cl
    nj = 0 if norms is None else norms.shape[1]
    s_per_mu = sum(k * float(m.fractions[0].sum()) for m, k in zip(models, conv))
    # no CLs limit lies below -ln(1 - CL) signal events (CLs >= exp(-s), Read 2002); a
    # nuisance at +2 sigma moves that floor
    reach = 1.0 if norms is None else math.exp(2.0 * float(np.max(np.sqrt(
        (norms**2).sum(axis=1)))))
    floor = -math.log(alpha) / s_per_mu / reach
    refs = np.r_[exp_asym, obs_asym]
    refs = refs[np.isfinite(refs) & (refs > 0)]
    lo = max(0.7 * float(refs.min()), 0.9 * floor) if refs.size else 0.9 * floor
    hi = max(1.5 * float(refs.max()) if refs.size else 0.0, 2.0 * lo)
    ss = np.random.SeedSequence(seed)
    rng = np.random.default_rng(ss.spawn(1)[0])
    nu_b = [np.maximum(m.expected_background, 1e-300) for m in models]
    n_b = _draw(rng, nu_b, ntoys)
    aux_b = rng.standard_normal((ntoys, nj))
    toys_b = _Set(models, n_b, conv, norms, aux_b)
    data = _Set(models, [m.counts[None, :] for m in models], conv, norms, np.zeros((1, nj)))
    points: dict[float, tuple[float, float, np.ndarray]] = {}

    def evaluate(mu: float) -> tuple[float, float, np.ndarray]:
        q_obs_a, r = data.q(mu)
        q_obs = float(q_obs_a[0])
        nu_hat = r["nu"][0]
        # the data's conditional fit at mu generates the s+b toys
        nu_sb = []
        for c, m in enumerate(models):
            e = 1.0 if norms is None else math.exp(float(nu_hat @ norms[c]))
            bkg = r["b"][c][0] * bkg_fractions(m, r["theta"][c][:1])[0]
            nu_sb.append(np.maximum(mu * conv[c] * e * m.fractions[0] + bkg, 1e-300))
        rr = np.random.default_rng(ss.spawn(1)[0])
        n_sb = _draw(rr, nu_sb, ntoys)
        aux_sb = nu_hat + rr.standard_normal((ntoys, nj))
        q_sb = _Set(models, n_sb, conv, norms, aux_sb).q(mu)[0]
        q_b = toys_b.q(mu)[0]
        # log-likelihood ratio of the two generating models for every pooled toy
        llr = 0.0
        for c in range(len(models)):
            pool = np.concatenate([n_b[c], n_sb[c]])
            llr = llr + pool @ (np.log(nu_sb[c]) - np.log(nu_b[c])) - (nu_sb[c].sum()
                                                                        - nu_b[c].sum())
        if nj:
            a_pool = np.concatenate([aux_b, aux_sb])
            llr = llr + 0.5 * (a_pool**2).sum(axis=1) - 0.5 * ((a_pool - nu_hat) ** 2).sum(
                axis=1)
        q_pool = np.concatenate([q_b, q_sb])
        c = np.r_[q_obs, q_b]
        num = _tail(q_pool, 2.0 * special.expit(llr), c)
        den = _tail(q_pool, 2.0 * special.expit(-llr), c)
        cls_vals = np.where(den > 0, num / np.maximum(den, 1e-300), 1.0)
        return q_obs, float(cls_vals[0]), cls_vals[1:]

    levels = special.ndtr(np.array(_BANDS, float))
    todo = list(np.geomspace(lo, hi, _GRID))
    notes: list[str] = []
    for attempt in range(_EXTEND + 1):
        for mu in todo:
            points[float(mu)] = evaluate(float(mu))
        grid = np.array(sorted(points))
        cls_obs = np.array([points[m][1] for m in grid])
        cls_b = np.stack([points[m][2] for m in grid], axis=1)
        observed = _crossings(grid, cls_obs[None, :], alpha)[0]
        band = np.quantile(_crossings(grid, cls_b, alpha), levels, method="inverted_cdf")
        vals = np.r_[observed, band]
        if np.all(np.isfinite(vals)) or attempt == _EXTEND:
            break
        todo = []
        if np.any(vals == -np.inf):
            todo += list(np.geomspace(grid[0] / 2.5, grid[0], 4)[:-1])
        if np.any(vals == np.inf):
            todo += list(np.geomspace(grid[-1], grid[-1] * 2.5, 4)[1:])
    if not np.all(np.isfinite(vals)):
        notes.append(f"combined toy limit outside the grid [{grid[0]:.4g}, {grid[-1]:.4g}]: "
                     "reported as NaN")
    vals = np.where(np.isfinite(vals), vals, np.nan)
    return {"observed": float(vals[0]),
            "expected": {n: float(v) for n, v in zip(_BANDS, vals[1:])},
            "grid": grid, "cls": cls_obs, "n_toys": ntoys,
            "asymptotic_observed": obs_asym, "notes": notes}


def combined_toy_scans(models: list, conv: list[np.ndarray], n_toys: int, *,
                       seed: int = 0, norms: Any = None) -> np.ndarray:
    """q0 scans ``(n_toys, n_masses)`` of background-only toys of every channel, each
    channel fluctuated from its background-only fit (toy ``i`` of channel ``c`` from
    ``SeedSequence(seed, spawn_key=(c, i))``), fitted with the joint likelihood (with the
    normalisation nuisances ``norms`` when given; their auxiliary measurements stay at 0:
    under the background-only hypothesis they do not change the toys)."""
    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    nm = models[0].masses.size
    out = np.empty((n_toys, nm))
    roots = [np.random.SeedSequence(seed, spawn_key=(c,)) for c in range(len(models))]
    for first in range(0, n_toys, _TOY_CHUNK):
        cnt = min(_TOY_CHUNK, n_toys - first)
        counts, th0, b0, nll0 = [], [], [], 0.0
        for c, m in enumerate(models):
            n = toy_counts(m.expected_background, roots[c], first, cnt)
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
        out[first:first + cnt] = q.reshape(cnt, nm)
    return out
