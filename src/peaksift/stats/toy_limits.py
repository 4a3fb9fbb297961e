"""Toy-based CLs limits at chosen masses (Read, J. Phys. G 28 (2002) 2693; Junk, NIM A 434
(1999) 435), one seeded task per mass so they run on any execution engine.

:func:`run_toy_limit` is the picklable task function; :func:`_toy_limit` builds the
background-only and signal-plus-background toys, weights them to estimate CLs+b and CLb
from both sets (importance sampling), and reads the observed limit and the expected band.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from .cls import _BANDS, _floor_reach, _Problem, _qtilde, _unconditional
from .toys import ScanModel, bkg_fractions

# --------------------------------------------------------------- toy limits
_TIE = 0.01     # q~mu values closer than this are ties (see _toy_limit)
_GRID = 10      # signal values in a toy-limit grid
_EXTEND = 3     # at most this many grid extensions when a limit falls outside the grid


def _toy_q(model: ScanModel, n: np.ndarray, f: np.ndarray, conv: float, mu: float,
           delta: float, kind: str, aux: np.ndarray,
           free: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None) -> np.ndarray:
    """q~mu for stacked toys ``n (T, N)`` at one hypothesis; ``free`` are their
    unconditional fits when already known (they do not depend on ``mu``)."""
    t = n.shape[0]
    fr = np.broadcast_to(f, (t, f.size))
    s_hat, nll_hat, nll_zero = _unconditional(model, n, fr) if free is None else free
    prob = _Problem(model, n, fr, np.full(t, conv), delta, kind, aux)
    # the free fit has the nuisance at its auxiliary value (it is degenerate with mu)
    return _qtilde(prob, np.full(t, mu), s_hat / (conv * prob.kappa(aux)[0]), nll_hat,
                   nll_zero)


def _tail(q_pool: np.ndarray, w: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Weighted fraction of the pooled toys with q >= c (ties within ``_TIE`` count)."""
    order = np.argsort(q_pool, kind="stable")
    cw = np.concatenate([[0.0], np.cumsum(w[order])])
    idx = np.searchsorted(q_pool[order], np.asarray(c) - _TIE, side="left")
    return (cw[-1] - cw[idx]) / q_pool.size


def _crossings(grid: np.ndarray, cls_vals: np.ndarray, alpha: float) -> np.ndarray:
    """Where each row of CLs (over ``grid``) first falls through ``alpha``: ln CLs
    interpolated linearly in mu (exact for no events, CLs = exp(-s)); -inf when already
    below at the first grid point, +inf when never below."""
    lc = np.log(np.maximum(cls_vals, 1e-300))
    la = math.log(alpha)
    below = lc < la
    i = np.argmax(below, axis=1)
    rows = np.arange(lc.shape[0])
    out = np.where(below.any(axis=1), -np.inf, np.inf)
    mid = below.any(axis=1) & (i > 0)
    r, k = rows[mid], i[mid]
    l1, l2 = lc[r, k - 1], lc[r, k]
    w = (l1 - la) / (l1 - l2)
    out[mid] = grid[k - 1] + w * (grid[k] - grid[k - 1])
    return out


def grid_start(floor: float, obs_asym: float, exp_asym: np.ndarray) -> tuple[float, float]:
    """First grid of signal values: around the asymptotic limits, never below 0.9 of the
    counting floor (no CLs limit lies below it)."""
    refs = np.r_[exp_asym, obs_asym]
    refs = refs[np.isfinite(refs) & (refs > 0)]
    lo = max(0.7 * float(refs.min()), 0.9 * floor) if refs.size else 0.9 * floor
    hi = max(1.5 * float(refs.max()) if refs.size else 0.0, 2.0 * lo)
    return lo, hi


def pooled_cls(q_obs: float, q_b: np.ndarray, q_sb: np.ndarray, llr: np.ndarray
               ) -> tuple[float, np.ndarray]:
    """CLs of the data and of every background-only toy (each taken as the observation)
    from the pooled toys ``[q_b, q_sb]``, weighted by the balance heuristic from ``llr``
    = ln p_s+b - ln p_b of each pooled toy (see :func:`_toy_limit`)."""
    q_pool = np.concatenate([q_b, q_sb])
    c = np.r_[q_obs, q_b]
    num = _tail(q_pool, 2.0 * special.expit(llr), c)
    den = _tail(q_pool, 2.0 * special.expit(-llr), c)
    cls_vals = np.where(den > 0, num / np.maximum(den, 1e-300), 1.0)
    return float(cls_vals[0]), cls_vals[1:]


def limits_on_grid(evaluate: Any, lo: float, hi: float, alpha: float, what: str, *,
                   many: bool = False) -> tuple[dict[float, tuple[float, float, np.ndarray]], np.ndarray,
                              np.ndarray, list[str]]:
    """Observed limit and expected band where CLs falls through ``alpha`` on a grid of
    signal values from ``lo`` to ``hi``, grown (4 points, a factor 2.5 further) where a
    limit falls outside it.  ``evaluate(mu)`` gives ``(q_obs, CLs_obs, CLs of each
    background-only toy)``; with ``many`` it takes the list of a round's signal values
    and gives the list of their tuples (in that order: a caller may fit them together).
    Returns the evaluated points, the grid, ``[observed, band...]`` (NaN outside the grid,
    with a note naming ``what``) and the notes."""
    levels = special.ndtr(np.array(_BANDS, float))
    points: dict[float, tuple[float, float, np.ndarray]] = {}
    todo = list(np.geomspace(lo, hi, _GRID))
    notes: list[str] = []
    for attempt in range(_EXTEND + 1):
        todo = [float(mu) for mu in todo]
        for mu, val in zip(todo, evaluate(todo) if many else map(evaluate, todo)):
            points[mu] = val
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
        notes.append(f"{what} outside the grid [{grid[0]:.4g}, {grid[-1]:.4g}]: "
                     "reported as NaN")
    return points, grid, np.where(np.isfinite(vals), vals, np.nan), notes


@dataclass(frozen=True)
class _ToyLimitTask:
    """One mass's toy limit as a picklable unit of work (see :func:`run_toy_limit`)."""

    model: ScanModel
    jj: int                 # the hypothesis among the unblinded ones
    conv: float
    delta: float
    kind: str
    cl: float
    ntoys: int
    seed: int
    obs_asym: float
    exp_asym: np.ndarray


def run_toy_limit(task: _ToyLimitTask) -> dict[str, Any]:
    """Toy-based CLs limit at one mass: the pure unit of work that ``upper_limits`` hands
    to its ``executor`` (a module-level function, so worker processes can run it)."""
    return _toy_limit(task.model, task.jj, task.conv, task.delta, task.kind, task.cl,
                      task.ntoys, task.seed, task.obs_asym, task.exp_asym)


def _toy_limit(model: ScanModel, jj: int, conv: float, delta: float, kind: str, cl: float,
               ntoys: int, seed: int, obs_asym: float, exp_asym: np.ndarray
               ) -> dict[str, Any]:
    r"""Toy-based CLs limit and expected band at the unblinded hypothesis ``jj``.

    At each signal value mu of a grid: ``ntoys`` signal-plus-background toys drawn at the
    data's conditional fit at mu, and ``ntoys`` background-only toys drawn once at the
    background-only fit (the same set at every mu), with q~mu for each (CCGV eq. 16).

    * CLs+b = P(q >= q_obs | s+b) and CLb = P(q >= q_obs | b) (Read 2002, eqs. 3-5) are
      estimated from *both* sets together, each toy weighted by
      :math:`2p_{s+b}/(p_{s+b}+p_b)` resp. :math:`2p_b/(p_{s+b}+p_b)` (multiple importance
      sampling with the balance heuristic, Veach and Guibas 1995; the Poisson and Gaussian
      densities of the two generating models are known exactly).  Unbiased, and precise
      in both tails: a background-like tail, where few s+b toys land, is measured by the
      background toys and vice versa.  Where the s+b and b models differ only by the
      signal, the weights make CLs = exp(-s) exactly for data without events under the
      signal.
    * q values closer than ``_TIE`` = 0.01 are ties.  At low counts q takes a few values
      (one per count under the signal), blurred only by the sideband's fit; ordering equal
      counts by that blur would turn CLs into a randomised test whose limits fall between
      the exact counting ones.  For a continuous q the tolerance changes a tail probability
      by about its density x 0.01, i.e. CLs by well under 1% (below any toy error here).
    * The expected band is the distribution of the background-only toys' own limits
      (each toy taken as the observation): its 2.3, 15.9, 50, 84.1 and 97.7% quantiles
      (Read 2002, sec. 4; common practice), quantiles as order statistics (a band edge is
      a limit some data set gives).
    * The limit is where ln CLs, interpolated linearly in mu between grid points, falls
      through ln(1 - CL).  The grid starts at the asymptotic values, never below 0.9 of the
      counting floor :math:`-\ln(1-\mathrm{CL})/(\kappa\sum f)`, and grows when a limit
      falls outside it.  Without a normalisation uncertainty (:math:`\kappa` = 1) no CLs
      limit is below that floor: :math:`\mathrm{CL}_s \ge e^{-s}`, since the likelihood
      ratio of the two hypotheses is at least :math:`e^{-s}`; with one, :math:`\kappa` is
      the conversion at +2 sigma of it (a toy's auxiliary measurement moves the floor).
    """
    alpha = 1.0 - cl
    f = model.fractions[jj]
    floor = -math.log(alpha) / (conv * float(f.sum())) / _floor_reach(delta, kind)
    lo, hi = grid_start(floor, obs_asym, exp_asym)
    ss = np.random.SeedSequence(seed)
    rng = np.random.default_rng(ss.spawn(1)[0])
    nu_b = np.maximum(model.expected_background, 1e-300)
    n_b = rng.poisson(nu_b, size=(ntoys, nu_b.size)).astype(float)
    aux_b = rng.standard_normal(ntoys) if delta else np.zeros(ntoys)
    free_b = _unconditional(model, n_b, np.broadcast_to(f, n_b.shape))
    free_o = _unconditional(model, model.counts[None, :], f[None, :])

    def evaluate(mu: float) -> tuple[float, float, np.ndarray]:
        prob = _Problem(model, model.counts, f[None, :], np.array([conv]), delta, kind,
                        np.zeros(1))
        q_obs = float(_qtilde(prob, np.array([mu]), free_o[0] / conv, free_o[1],
                              free_o[2])[0])
        # the data's conditional fit at mu generates the s+b toys
        s_mu = mu * conv * prob.kappa(prob.t)[0][0]
        nu_sb = np.maximum(s_mu * f + prob.b[0] * bkg_fractions(model, prob.theta)[0], 1e-300)
        t_sb = float(prob.t[0])
        r = np.random.default_rng(ss.spawn(1)[0])
        n_sb = r.poisson(nu_sb, size=(ntoys, nu_sb.size)).astype(float)
        aux_sb = t_sb + r.standard_normal(ntoys) if delta else np.zeros(ntoys)
        q_sb = _toy_q(model, n_sb, f, conv, mu, delta, kind, aux_sb)
        q_b = _toy_q(model, n_b, f, conv, mu, delta, kind, aux_b, free_b)
        n_pool = np.concatenate([n_b, n_sb])
        a_pool = np.concatenate([aux_b, aux_sb])
        llr = n_pool @ (np.log(nu_sb) - np.log(nu_b)) - (nu_sb.sum() - nu_b.sum())
        if delta:
            llr = llr + 0.5 * a_pool**2 - 0.5 * (a_pool - t_sb) ** 2
        return (q_obs, *pooled_cls(q_obs, q_b, q_sb, llr))

    points, grid, vals, notes = limits_on_grid(evaluate, lo, hi, alpha, "toy limit")
    cls_obs = np.array([points[m][1] for m in grid])
    return {"observed": float(vals[0]),
            "expected": {n: float(v) for n, v in zip(_BANDS, vals[1:])},
            "grid": grid, "cls": cls_obs,
            "q_observed": np.array([points[m][0] for m in grid]), "n_toys": ntoys,
            "asymptotic_observed": obs_asym, "notes": notes}

