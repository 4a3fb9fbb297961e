r"""The combination's toy-based CLs limit at one mass: :func:`joint_toy_limit` (and
:func:`run_joint_toy_limit`, its picklable task for the limits' executor).

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
  every fit, of the data and of the toys, takes each channel's lowest well of the mass
  scale (:func:`peaksift.stats.joint_wells.joint_global`);
* a channel's background candidates profiled as a discrete choice (its envelope; Dauncey,
  Kenzie, Wardle, Davies, JINST 10 (2015) P04015): every q~mu, of the data and of every
  toy, is the envelope's, 2 [min_i (NLL_i + a N_i / 2) - ref] over the assignments i of one
  function per channel (one joint fit each), as the asymptotic combined limits and the
  single channel's toy limits with systematics do; the background-only toys come from
  each channel's function at mu = 0, the s+b toys from the assignment the data's envelope
  takes at mu;
* CLs+b and CLb from both sets with the balance-heuristic weights (as the single channel:
  unbiased, precise in both tails), ties within 0.01 in q; the observed limit and the
  expected band (the background-only toys' own limits) where ln CLs, linear in mu between
  grid points, falls through ln(1 - CL).

Cost: a grid's signal values are evaluated together, the data's conditional fits in one
stack, every value's s+b toys in one stack of free fits and the conditional fits of both
toy sets in stacks of up to ``_LIMIT_ROWS`` rows (whole sets), rather than one small stack
per set and value: the fits' Python work per iteration is then shared by ten sets.  Each
set's numbers are those it has fitted alone (``joint_global``'s ``groups``; the rows of a
stack are independent problems), its toys drawn from the same streams in the same order.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

import numpy as np

from .cls import _BANDS
from .joint import profile_joint
from .joint_wells import joint_global
from .scale_scan import STARTS_TOYS
from .shape_profile import _fractions
from .toy_limits import grid_start, limits_on_grid, pooled_cls
from .toy_limits_systematics import _draw_centers, _log_density_ratio
from .toys import bkg_fractions, fit_background

__all__ = ["joint_toy_limit", "run_joint_toy_limit"]

_LIMIT_ROWS = 2000   # rows of a toy limit's stacked fits (whole sets; memory ~ rows x bins)


class _Set:
    """Stacked data sets of every channel (toys or the data) with their free fits.

    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at the one
    hypothesis (arrays ``(1, 1)`` or scalars); its factors are profiled, their constraints
    centred on ``centers`` (per channel ``(T, J_c)``: each set's global observables), each
    fit at the lowest well of the mass scale (:func:`~peaksift.stats.joint_wells.joint_global`).
    ``groups``: a label per row where the rows are several independent ensembles (the s+b
    toys of several signal values) fitted in one stack, each as if alone."""

    def __init__(self, models: list, counts: list[np.ndarray], conv: list[float],
                 norms: Any, aux: np.ndarray, shapes: Any = None,
                 centers: Any = None, memo: dict | None = None,
                 groups: np.ndarray | None = None) -> None:
        self.models, self.counts, self.norms, self.aux = models, counts, norms, aux
        self.conv, self.spec = conv, shapes
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
        r = self._fit(None, groups)
        self.mu_hat = r["mu"]
        self.nll_hat = np.minimum(r["nll"], nll0)

    def _fit(self, mu: Any, groups: np.ndarray | None = None) -> dict[str, Any]:
        t = self.counts[0].shape[0]
        f = [np.broadcast_to(m.fractions[0], (t, m.fractions.shape[1])) for m in self.models]
        k = [np.full(t, c) for c in self.conv]
        shapes = _rows_of(self.spec, t)

        def one(**kw: Any) -> dict[str, Any]:
            return profile_joint(self.models, self.counts, f, k, mu_fixed=mu,
                                 norms=self.norms, nu_start=self.aux, nu_aux=self.aux,
                                 shapes=shapes, shape_centers=self.centers, steps=100,
                                 tol=1e-3, **{"theta_start": self.theta, "b_start": self.b,
                                              "factors_start": self.centers, **kw})

        # each channel's mass scale at its lowest well (joint_wells), else the one fit
        return joint_global(one, self.models, self.counts, k, shapes, mu_fixed=mu,
                            centers=self.centers, starts=STARTS_TOYS, memo=self.memo,
                            groups=groups)

    def q(self, mu: Any, groups: np.ndarray | None = None
          ) -> tuple[np.ndarray, dict[str, Any]]:
        """q~mu of every set (CCGV eq. 16) and the conditional fits at ``mu`` (one value,
        or one per row with the rows' ``groups``)."""
        t = self.counts[0].shape[0]
        mu = np.broadcast_to(np.asarray(mu, float), (t,))
        r = self._fit(np.array(mu), groups)
        ref = np.where(self.mu_hat < 0, self.nll_zero, self.nll_hat)
        q = np.where(self.mu_hat > mu, 0.0, np.maximum(2.0 * (r["nll"] - ref), 0.0))
        return q, r


def _rows_of(shapes: Any, t: int) -> Any:
    """The channels' shape specs at the one hypothesis repeated for ``t`` rows (None
    without a shaped channel)."""
    if shapes is None or not any(sp is not None for sp in shapes):
        return None
    return [None if sp is None else (sp[0], [np.repeat(np.asarray(p, float).reshape(1, -1),
                                                       t, axis=0) if np.ndim(p) else p
                                             for p in sp[1]], sp[2]) for sp in shapes]


def _joined(parts: list[tuple[_Set, np.ndarray]]) -> _Set:
    """One stack of the rows ``rows`` of each set in ``parts`` (same models, conversion,
    norms, shapes and memo), their free fits carried along: the conditional fits of
    several sets and signal values in one call (each row's numbers are its own set's)."""
    first = parts[0][0]
    out = object.__new__(_Set)
    out.models, out.norms, out.conv = first.models, first.norms, first.conv
    out.spec, out.memo = first.spec, first.memo

    def cat(get: Any) -> Any:
        return np.concatenate([np.asarray(get(s))[rows] for s, rows in parts])

    nc = len(first.models)
    out.counts = [cat(lambda s, c=c: s.counts[c]) for c in range(nc)]
    out.theta = [cat(lambda s, c=c: s.theta[c]) for c in range(nc)]
    out.b = [cat(lambda s, c=c: s.b[c]) for c in range(nc)]
    out.aux = cat(lambda s: s.aux)
    out.centers = None if first.centers is None else [
        None if first.centers[c] is None else cat(lambda s, c=c: s.centers[c])
        for c in range(nc)]
    for key in ("nll_zero", "mu_hat", "nll_hat"):
        setattr(out, key, cat(lambda s, key=key: np.broadcast_to(
            getattr(s, key), (s.counts[0].shape[0],))))
    return out


def _conditional(parts: list[tuple[_Set, float]]) -> list[dict[str, Any]]:
    """The conditional fits of every set of ``parts`` at its signal value, in stacks of
    at most ``_LIMIT_ROWS`` rows (whole sets): per part the fit ``set.q(mu)`` gives."""
    out: list[dict[str, Any]] = []
    i = 0
    while i < len(parts):
        j, rows = i, 0
        while j < len(parts) and (j == i or rows + parts[j][0].counts[0].shape[0]
                                  <= _LIMIT_ROWS):
            rows += parts[j][0].counts[0].shape[0]
            j += 1
        chunk = parts[i:j]
        sizes = [s.counts[0].shape[0] for s, _ in chunk]
        stack = _joined([(s, np.arange(n)) for (s, _), n in zip(chunk, sizes)])
        r = stack._fit(np.repeat([mu for _, mu in chunk], sizes),
                       np.repeat(np.arange(len(chunk)), sizes))
        edges = np.cumsum([0] + sizes)
        out += [_slice_fit(r, a, b) for a, b in itertools.pairwise(edges)]
        i = j
    return out


class _Choice:
    """Data sets fitted with every assignment of one background function per channel
    (one :class:`_Set` each, ``combos[i]`` its models): the envelope of Dauncey, Kenzie,
    Wardle, Davies, JINST 10 (2015) P04015, ``min_i [NLL_i + pens[i] / 2]`` (``pens`` in
    2 NLL units), at mu = 0, at the free fit and at any mu; with one assignment and no
    penalty it is that assignment's q~mu, to the bit."""

    def __init__(self, combos: list, pens: list[float], counts: list[np.ndarray],
                 *args: Any, groups: np.ndarray | None = None) -> None:
        self.pens = pens
        self.sets = [_Set(models, counts, *args, groups=groups) for models in combos]
        t = counts[0].shape[0]
        hat = np.stack([st.nll_hat + 0.5 * p for st, p in zip(self.sets, pens)])
        zero = np.stack([np.broadcast_to(st.nll_zero + 0.5 * p, (t,))
                         for st, p in zip(self.sets, pens)])
        pick = hat.argmin(axis=0)
        # the free fit's mu is the chosen function's; mu < 0 takes the envelope at 0
        self.mu_hat = np.stack([st.mu_hat for st in self.sets])[pick, np.arange(t)]
        self.ref = np.where(self.mu_hat < 0, zero.min(axis=0), hat.min(axis=0))

    def take(self, rows: np.ndarray) -> _Choice:
        """The rows ``rows`` alone (each assignment's fits carried along)."""
        out = object.__new__(_Choice)
        out.pens, out.mu_hat, out.ref = self.pens, self.mu_hat[rows], self.ref[rows]
        out.sets = [_joined([(st, rows)]) for st in self.sets]
        return out


def _envelope_q(parts: list[tuple[_Choice, float]]) -> list[tuple]:
    """Per part ``(q~mu, the fits of every assignment, the assignment chosen)`` at its
    signal value: each assignment's conditional fits of every part in shared stacks
    (:func:`_conditional`), then q~mu = 2 [min_i (NLL_i + pens_i / 2) - ref] (CCGV eq. 16
    with the envelope; 0 where mu_hat > mu)."""
    fits = [_conditional([(ch.sets[i], mu) for ch, mu in parts])
            for i in range(len(parts[0][0].sets))]
    out = []
    for k, (ch, mu) in enumerate(parts):
        vals = np.stack([f[k]["nll"] + 0.5 * p for f, p in zip(fits, ch.pens)])
        q = np.where(ch.mu_hat > mu, 0.0, np.maximum(2.0 * (vals.min(axis=0) - ch.ref),
                                                     0.0))
        out.append((q, [f[k] for f in fits], vals.argmin(axis=0)))
    return out


def _slice_fit(r: dict[str, Any], a: int, b: int) -> dict[str, Any]:
    """Rows ``a:b`` of a joint fit's result (per-channel lists element-wise)."""
    nb = np.asarray(r["nll"]).size
    out: dict[str, Any] = {}
    for key, v in r.items():
        if isinstance(v, list):
            out[key] = [x if np.ndim(x) == 0 or np.shape(x)[0] != nb else np.asarray(x)[a:b]
                        for x in v]
        else:
            out[key] = v if np.ndim(v) == 0 or np.shape(v)[0] != nb else np.asarray(v)[a:b]
    return out


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
                    shapes: Any = None, candidates: Any = None,
                    penalties: Any = None) -> dict[str, Any]:
    """Toy-based CLs limit on sigma x B at one hypothesis (see the module guide).

    ``models``: each channel's ScanModel holding that one hypothesis (the background-only
    toys are generated from them); ``conv``: each
    channel's events per unit of sigma x B there; ``norms``: the normalisation nuisances
    (or None); ``obs_asym``, ``exp_asym``: the asymptotic values that place the grid;
    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at that
    hypothesis (its shape factors profiled, their global observables drawn per toy);
    ``candidates``: the channels' background functions profiled as a discrete choice,
    per assignment of one function per channel its models (as ``models``), with
    ``penalties`` per assignment (2 NLL units; default: ``models`` alone).
    Returns ``observed``, ``expected`` (band name -> value), ``grid``, ``cls``,
    ``n_toys`` and ``notes``.

    The signal values of a grid are evaluated together: the data's conditional fits in
    one stack, then every value's toys drawn in turn (the same streams as one at a time),
    their free fits in one stack and the conditional fits of both toy sets in stacks of
    whole sets (joint_global's ``groups``: each set's numbers as if fitted alone)."""
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
    combos = [list(models)] if candidates is None else [list(c) for c in candidates]
    pens = [0.0] if candidates is None else [float(p) for p in penalties]
    # the background-only toys' free fits and the data's in one stack, each set alone
    both = _Choice(combos, pens, [np.concatenate([n, m.counts[None, :]])
                                  for n, m in zip(n_b, models)], conv, norms,
                   np.concatenate([aux_b, np.zeros((1, nj))]), shapes,
                   None if shapes is None else [None if o is None else np.concatenate(
                       [cb, o[None, :]]) for cb, o in zip(cen_b, ones)], memo,
                   groups=np.repeat([0, 1], [ntoys, 1]))
    toys_b, data = both.take(np.arange(ntoys)), both.take(np.array([ntoys]))

    def generate(mu: float, r: dict[str, Any], models: list) -> tuple:
        """The s+b toys at ``mu`` from the data's conditional fit ``r`` there with the
        assignment of functions the envelope takes there (``models``; the shape factors
        at their fitted values, their global observables drawn around those)."""
        nu_hat = r["nu"][0]
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
        return nu_sb, k_sb, n_sb, aux_sb, _centers(shapes, k_sb, rr, ntoys), nu_hat

    def cls_of(q_obs: float, q_b: np.ndarray, q_sb: np.ndarray, drawn: tuple) -> tuple:
        nu_sb, k_sb, n_sb, aux_sb, cen_sb, nu_hat = drawn
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

    def evaluate(mus: list[float]) -> list[tuple]:
        g = len(mus)
        obs = _envelope_q([(data, mu) for mu in mus])
        # in order: the toys' streams; each from the assignment the data's envelope takes
        drawn = [generate(mu, fits[int(pick[0])], combos[int(pick[0])])
                 for mu, (_, fits, pick) in zip(mus, obs)]
        # every value's s+b toys in one stack of free fits, each value's set on its own
        sb = _Choice(combos, pens, [np.concatenate([d[2][c] for d in drawn])
                                    for c in range(len(models))], conv, norms,
                     np.concatenate([d[3] for d in drawn]), shapes,
                     None if shapes is None else [
                         None if shapes[c] is None else np.concatenate([d[4][c]
                                                                        for d in drawn])
                         for c in range(len(models))], memo,
                     groups=np.repeat(np.arange(g), ntoys))
        parts: list[tuple[_Choice, float]] = []
        for i, mu in enumerate(mus):
            parts += [(sb.take(np.arange(i * ntoys, (i + 1) * ntoys)), mu), (toys_b, mu)]
        qs = _envelope_q(parts)
        return [cls_of(float(obs[i][0][0]), qs[2 * i + 1][0], qs[2 * i][0], drawn[i])
                for i in range(g)]

    points, grid, vals, notes = limits_on_grid(evaluate, lo, hi, alpha, "combined toy limit",
                                               many=True)
    cls_obs = np.array([points[m][1] for m in grid])
    return {"observed": float(vals[0]),
            "expected": {n: float(v) for n, v in zip(_BANDS, vals[1:])},
            "grid": grid, "cls": cls_obs, "n_toys": ntoys,
            "asymptotic_observed": obs_asym, "notes": notes}


def run_joint_toy_limit(task: tuple) -> dict[str, Any]:
    """:func:`joint_toy_limit` of one mass from a picklable tuple of its arguments (a unit
    of work for the limits' executor)."""
    return joint_toy_limit(*task)
