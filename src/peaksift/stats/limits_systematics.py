r"""Upper limits with systematic uncertainties: the signal shape's nuisances and the envelope.

Which piece when
----------------
* :func:`systematic_limits` -- asymptotic CLs upper limits at every mass with, beside the
  background and the normalisation nuisance of :func:`peaksift.stats.upper_limits`, the
  signal shape's mass-scale and resolution factors (:class:`~peaksift.likelihood.
  SignalNuisances`) and the choice of background function (discrete profiling over a set of
  candidates) profiled.  The search reports it beside the plain limits.

Method
------
For each candidate function :math:`c` with :math:`N_c` free parameters the conditional NLL
at a value :math:`\mu` of the parameter of interest is profiled over the background
parameters, the normalisation nuisance :math:`t` and the shape factors
:math:`k_m, k_r` (their constraint terms included, :mod:`peaksift.likelihood.nuisances`):

.. math:: \mathrm{NLL}_c(\mu) = \min_{\theta, b, t, k}\ \mathrm{NLL}(\mu\,L\epsilon\,\kappa(t),
          \theta, b, k) + \tfrac12 t^2 + \textstyle\sum_j C_j(k_j).

The envelope (Dauncey, Kenzie, Wardle, Davies, JINST 10 (2015) P04015) is
:math:`\mathrm{NLL}_{env}(\mu) = \min_c[\mathrm{NLL}_c(\mu) + \tfrac a2 N_c]` and enters
:math:`\tilde q_\mu` (Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 16) in place
of the single function's profile: the reference fit is the envelope's unconditional
minimum (its best function and signal).  The Asimov data set (for the sigma of eq. 32 and
the expected bands, eq. 89 with CLs) is the background-only fit of the function the
envelope takes without signal, and it is evaluated with the same envelope.  With one
candidate and every shape size 0 the computation is :func:`~peaksift.stats.upper_limits`'s
asymptotic one, to the bit.

A mass scale whose three standard deviations move the peak further than its width gives
the profile in :math:`k_m` a well at every upward fluctuation within reach; the profile
likelihood is the lowest well, which :func:`.scale_scan.profile_global` finds by a scan of
:math:`k_m` (the unconditional fit and every point of the curves), and the result's
``notes`` name the masses whose limits took a well away from the nearest one.

Low counts: where few background events lie under the signal the asymptotic formulae
misplace the bands (see :mod:`peaksift.stats.limits`); there ``method="auto"`` computes the
limits with toys that profile the same nuisances and the same envelope
(:mod:`peaksift.stats.toy_limits_systematics`), and ``"toys"`` also at ``toy_masses``.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from types import SimpleNamespace
from typing import Any

import numpy as np

from .._json import plain
from .._vocabulary import LIMIT_METHODS
from ..errors import FitError
from ..likelihood import SignalNuisances
from .cls import _BANDS, _bisect, _Problem, _unconditional
from .limit_result import LOW_COUNT_BACKGROUND
from .limits import cls_asymptotic, expected_band_factor
from .normalisation import check_normalisation, normalisation
from .scale_scan import asimov_band_note, needs_scan, profile_global, several_minima_note
from .scan_inputs import _prepare_model, _signal_params
from .toys import fit_background

__all__ = ["systematic_limits"]


#: points of the profiled-NLL curve in the signal yield per hypothesis (shape factors free)
_GRID = 17
#: the same where the mass scale is scanned (:mod:`.scale_scan`): there the profile is the
#: lower of several wells, with a kink where they cross, which the spline rounds off over
#: about one knot interval (measured: 4.5e-3 relative on a limit with 17 knots)
_GRID_WELLS = 65
#: the curve reaches this many Fisher standard deviations of the signal yield (plus 3 times
#: a fitted signal): beyond every limit's +2 sigma band with room for the nuisances
_REACH = 10.0
#: the grid's fits stop when a step gains less than this in NLL: at 1e-4 the limits moved
#: by up to 4e-3 relative on narrow peaks with a 5-10% mass scale (1.3e-7 on the demo); at
#: 1e-5 by at most 4.6e-5 there, a fifth of the spline's own 2e-4 (docs/performance.md,
#: 2026-12-04)
_TOL = 1e-5
#: the normalisation nuisance is profiled over [-_T_RANGE, _T_RANGE] (unit constraint)
_T_RANGE = 5.0


def _spline_coefficients(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Piecewise-cubic coefficients ``(4, n - 1, m)`` of the not-a-knot cubic spline through
    ``(x, y[:, j])`` for every column ``j`` (the piece on ``[x_i, x_{i+1}]`` is
    ``((c0 dx + c1) dx + c2) dx + c3`` with ``dx = t - x_i``), for ``n >= 4`` knots.

    The slopes at the knots solve the tridiagonal system of C2 continuity with the
    not-a-knot ends (third derivative continuous at the second and the last-but-one
    knot; de Boor, A Practical Guide to Splines, 1978, ch. IV), written as
    ``scipy.interpolate.CubicSpline`` writes it, so the coefficients are its own to
    rounding (a test compares them): written out because importing ``scipy.interpolate``
    cost the limits with systematics ~0.3 s, more than their whole spline work."""
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    n = x.size
    dx = np.diff(x)
    slope = np.diff(y, axis=0) / dx[:, None]
    a = np.zeros((n, n))
    rhs = np.empty_like(y)
    i = np.arange(1, n - 1)
    a[i, i - 1] = dx[1:]
    a[i, i] = 2.0 * (dx[:-1] + dx[1:])
    a[i, i + 1] = dx[:-1]
    rhs[1:-1] = 3.0 * (dx[1:, None] * slope[:-1] + dx[:-1, None] * slope[1:])
    d0, d1 = x[2] - x[0], x[-1] - x[-3]
    a[0, 0], a[0, 1] = dx[1], d0
    rhs[0] = ((dx[0] + 2.0 * d0) * dx[1] * slope[0] + dx[0] ** 2 * slope[1]) / d0
    a[-1, -2], a[-1, -1] = d1, dx[-2]
    rhs[-1] = (dx[-1] ** 2 * slope[-2] + (2.0 * d1 + dx[-1]) * dx[-2] * slope[-1]) / d1
    s = np.linalg.solve(a, rhs)
    t = (s[:-1] + s[1:] - 2.0 * slope) / dx[:, None]
    return np.stack([t / dx[:, None], (slope - s[:-1]) / dx[:, None] - t, s[:-1], y[:-1]])


class _Curve:
    """The NLL profiled over the background and the shape factors at fixed signal yields,
    on a grid ``s = s_max u`` per hypothesis (one stacked fit of every grid point), a cubic
    spline in between; :meth:`nll` then profiles the normalisation nuisance on it.

    Why a curve: each conditional fit with the shape factors free costs tens of damped
    Newton steps, and the root finding of the limits needs the profile at some 30 values
    of mu per hypothesis and data set; the profile is smooth in s (about a parabola), so
    one stacked fit of its grid and a spline give the limits to ~2e-4 relative (checked
    against an independent iminuit profile in the tests)."""

    def __init__(self, model: Any, counts: np.ndarray, fractions: np.ndarray,
                 conv: np.ndarray, delta: float, kind: str, sig: Any, base: list[Any],
                 nuis: SignalNuisances, s_max: np.ndarray) -> None:
        from .toys import profile_signal

        nb = fractions.shape[0]
        grid = _GRID_WELLS if needs_scan(sig, base, nuis, nb).any() else _GRID
        self.u = np.linspace(0.0, 1.0, grid)
        self.norm = SimpleNamespace(delta=delta, kind=kind)
        # the grid reaches s_max at the largest normalisation factor the profile tries
        top = float(_Problem.kappa(self.norm, np.array([_T_RANGE]))[0][0])  # type: ignore
        self.s_max, self.conv = np.asarray(s_max, float) * top, np.asarray(conv, float)
        s = (self.s_max[:, None] * self.u[None, :]).ravel()
        rep = np.repeat(np.arange(nb), grid)
        n = np.asarray(counts, float)
        r = profile_signal(model, n, fractions[rep], s_fixed=s,
                           theta_start=np.repeat(model.theta[None, :], rep.size, axis=0),
                           b_start=np.maximum(model.bkg_yield - s, 1.0))
        base_rep = [np.asarray(p)[rep] if np.ndim(p) else p for p in base]
        start = {"s": s, "b": r["b"], "theta": r["theta"]}
        rn = profile_global(model, n, sig, base_rep, nuis, start=start, fixed_signal=True,
                            tol=_TOL)
        prof = np.fmin(rn["nll"], r["nll"]).reshape(nb, grid)
        # per grid point: the profile's lowest well in the mass scale is not the nearest
        self._moved = rn["moved"].reshape(nb, grid)
        self._top = top
        self.coef = _spline_coefficients(self.u, prof.T)  # (4, grid - 1, nb)

    def moved(self, mu: np.ndarray) -> np.ndarray:
        """Per hypothesis: a grid point the profile at ``mu`` can reach (yields up to
        ``mu`` times the conversion and the largest normalisation factor) had its lowest
        well in the mass scale away from the nearest one."""
        y = np.nan_to_num(np.asarray(mu, float), nan=np.inf) * self.conv * self._top
        reach = self.s_max[:, None] * self.u[None, :] <= y[:, None]
        return np.any(self._moved & reach, axis=1)

    def _at(self, s: np.ndarray) -> np.ndarray:
        """The spline at yields ``s (B, T)`` (one row per hypothesis)."""
        rows = np.arange(s.shape[0]) % self.s_max.size  # stacked copies share the curve
        x = np.clip(s / self.s_max[rows, None], 0.0, 1.0)  # the limits' brackets stay inside
        g = self.u.size - 1
        # the piece of each point: searchsorted(u, x) - 1 in closed form, exact because the
        # knots are k / g with g a power of two (x g is exact); else searchsorted (slower)
        i = (np.ceil(x * g).astype(np.intp) - 1 if g & (g - 1) == 0
             else np.searchsorted(self.u, x) - 1)
        i = np.minimum(np.maximum(i, 0), g - 1)
        dx = x - self.u[i]
        # the coefficients of each point's piece: one flat gather per power (a broadcast
        # fancy index of the (4, pieces, hypotheses) table cost most of the limits' search)
        flat = i * self.s_max.size + rows[:, None]
        c0, c1, c2, c3 = (self.coef[j].ravel().take(flat) for j in range(4))
        return ((c0 * dx + c1) * dx + c2) * dx + c3

    def nll(self, mu: np.ndarray) -> np.ndarray:
        """NLL at ``mu`` profiled over everything, the normalisation nuisance included."""
        mu = np.asarray(mu, float)
        conv = np.tile(self.conv, mu.size // self.conv.size)  # the bands stack the masses
        if not self.norm.delta:
            return self._at((mu * conv)[:, None])[:, 0]
        t = np.linspace(-_T_RANGE, _T_RANGE, 201)
        kap = _Problem.kappa(self.norm, t)[0]  # type: ignore[arg-type]
        val = self._at((mu * conv)[:, None] * kap[None, :]) + 0.5 * t[None, :] ** 2
        j = np.clip(np.argmin(val, axis=1), 1, t.size - 2)
        rows = np.arange(val.shape[0])
        y0, y1, y2 = val[rows, j - 1], val[rows, j], val[rows, j + 1]
        den = y0 - 2.0 * y1 + y2   # the parabola's minimum through the three points
        return np.where(den > 0, y1 - (y0 - y2) ** 2 / (8.0 * np.where(den > 0, den, 1.0)),
                        y1)


def _top(probs: list[Any], wide: np.ndarray, reach: np.ndarray) -> np.ndarray:
    """The upper end of the root's bracket: the curves' reach (their grid ends there)."""
    return reach if isinstance(probs[0], _Curve) else wide


def _beyond(func: Any, root: np.ndarray, top: np.ndarray, notes: list[str],
            what: str) -> np.ndarray:
    """NaN (and a note) where the function has not crossed zero by the bracket's top: the
    root lies beyond the profile curves' reach, and the bisection's edge is no limit."""
    with np.errstate(invalid="ignore"):
        out = np.where(func(top) < 0, np.nan, root)
    lost = int(np.sum(np.isnan(out) & ~np.isnan(root)))
    if lost:
        notes.append(f"{lost} {what} limit(s) beyond the profiled range ({_REACH:g} Fisher "
                     "standard deviations of the signal yield): not given")
    return out


def _problem(model: Any, counts: np.ndarray, fractions: np.ndarray, conv: np.ndarray,
             delta: float, kind: str, sig: Any, base: list[Any], nuis: SignalNuisances,
             s_max: np.ndarray, stack: int | None = None) -> Any:
    """The exact profile of the plain limits without shape nuisances (``stack`` copies of
    the hypotheses: the expected bands), else a curve (which serves every copy)."""
    if not nuis.shape_active:
        reps = 1 if stack is None else stack
        return _Problem(model, counts, np.tile(fractions, (reps, 1)), np.tile(conv, reps),
                        delta, kind, np.zeros(reps * fractions.shape[0]))
    return _Curve(model, counts, fractions, conv, delta, kind, sig, base, nuis, s_max)


def _free_fit(model: Any, counts: np.ndarray, sig: Any, base: list[Any],
              nuis: SignalNuisances
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(s_hat, NLL at s_hat, NLL at s = 0, the mass scale's lowest well not the nearest)
    per hypothesis with the shape factors free (:func:`.scale_scan.profile_global`)."""
    from .toys import profile_signal

    nb = model.fractions.shape[0]
    th = np.repeat(model.theta[None, :], nb, axis=0)
    s_hat, nll_hat, nll_zero = _unconditional(model, counts, model.fractions)
    if not nuis.shape_active:
        return s_hat, nll_hat, nll_zero, np.zeros(nb, bool)
    r = profile_signal(model, counts, model.fractions, theta_start=th,
                       b_start=np.full(nb, model.bkg_yield))
    rn = profile_global(model, counts, sig, base, nuis, start=r)
    better = rn["nll"] < nll_hat
    return (np.where(better, rn["s"], s_hat), np.where(better, rn["nll"], nll_hat),
            nll_zero, rn["moved"])


def systematic_limits(data: Any, signal: Any, backgrounds: Mapping[str, Any], masses: Any, *,
                      nuisances: SignalNuisances | None = None,
                      n_parameters: Mapping[str, int] | None = None, penalty: float = 1.0,
                      resolution: Any = None, window: tuple[float, float] | None = None,
                      natural_width: Any = None, blind: tuple[float, float] | None = None,
                      signal_params: Mapping[str, float] | None = None, cl: float = 0.95,
                      luminosity: float | None = None, luminosity_uncertainty: float = 0.0,
                      efficiency: Any = 1.0, efficiency_uncertainty: float = 0.0,
                      constraint: str = "lognormal", unit: str = "fb",
                      bins: int | None = None, method: str = "auto",
                      toy_masses: Sequence[float] | None = None, toys: int = 1000,
                      seed: int = 0, low_count_background: float = LOW_COUNT_BACKGROUND,
                      executor: Any = None, signal_model: Any = None) -> dict[str, Any]:
    r"""Asymptotic CLs upper limits with the signal-shape nuisances and the envelope profiled.

    Parameters
    ----------
    data, signal, masses, resolution, window, natural_width, blind, signal_params, bins :
        As in :func:`peaksift.stats.upper_limits`.
    backgrounds : mapping label -> shape
        The candidate functions of the envelope (one entry: that function alone).
    nuisances : SignalNuisances
        Sizes of the mass-scale and resolution factors (the luminosity and efficiency come
        from ``luminosity_uncertainty`` and ``efficiency_uncertainty`` as in
        :func:`~peaksift.stats.upper_limits`).
    n_parameters : mapping label -> int
        Free parameters of each candidate (default: its shape parameters plus its yield).
    penalty : float
        Per free parameter, in units of -2 ln L (the paper's 1).
    cl, luminosity, luminosity_uncertainty, efficiency, efficiency_uncertainty, constraint,
    unit, method, toy_masses, toys, seed, low_count_background, executor :
        As in :func:`~peaksift.stats.upper_limits`; the toys profile every nuisance and
        the envelope (:mod:`peaksift.stats.toy_limits_systematics`).
    signal_model : SignalModel, optional
        Shape, resolution and efficiency as functions of mass from simulated samples
        (instead of ``signal``, ``resolution`` and ``efficiency``; as in
        :func:`~peaksift.stats.upper_limits`).  With ``luminosity`` the limits use its
        interpolated efficiency, and the interpolation's own uncertainty (the efficiency
        polynomial's 1-sigma band relative to its value, the largest over the limit
        masses: one scalar, conservative elsewhere) is added in quadrature to
        ``efficiency_uncertainty``.

    Returns
    -------
    dict (plain JSON)
        ``mass``, ``observed`` (None where blinded), ``expected`` and the bands
        ``expected_minus2`` .. ``expected_plus2``, ``unit``, ``cl``, ``method`` and
        ``methods`` ("asymptotic" or "toys" per mass), ``toys`` (per toy mass: grid, CLs,
        notes), ``background_under_signal``, ``functions``, ``profiled`` (what was profiled, in words) and
        ``chosen`` (the function the envelope takes at each observed limit).
    """
    if not 0 < cl < 1:
        raise FitError(f"cl must be in (0, 1), got {cl!r}; e.g. cl=0.95")
    if not backgrounds:
        raise FitError("systematic_limits needs at least one background function")
    if constraint not in ("lognormal", "gaussian"):
        raise FitError(f"constraint must be 'lognormal' or 'gaussian', got {constraint!r}")
    if method not in LIMIT_METHODS:
        raise FitError(f"limit method must be one of {', '.join(map(repr, LIMIT_METHODS))}, "
                       f"got {method!r}")
    if not (np.isfinite(penalty) and penalty >= 0):
        raise FitError(f"the envelope's penalty must be >= 0, got {penalty!r}")
    check_normalisation(luminosity=luminosity, luminosity_uncertainty=luminosity_uncertainty,
                        efficiency=efficiency, efficiency_uncertainty=efficiency_uncertainty)
    nuis = nuisances if nuisances is not None else SignalNuisances()
    labels = tuple(backgrounds)
    prepared = [_prepare_model(data, signal, backgrounds[lab], masses, resolution=resolution,
                               window=window, natural_width=natural_width, blind=blind,
                               signal_params=signal_params, bins=bins,
                               signal_model=signal_model,
                               what="upper limits with systematics") for lab in labels]
    model0, spec, info = prepared[0]
    signal_params = info["signal_params"]   # the signal model's functions of mass, if any
    interpolation = 0.0
    if signal_model is not None:
        efficiency = signal_model.efficiency
        if luminosity is not None:   # the polynomial's own uncertainty on the efficiency
            m_i = np.asarray(info["masses"], float)
            interpolation = float(np.max(signal_model.band("efficiency", m_i)
                                         / signal_model.efficiency(m_i)))
            efficiency_uncertainty = float(np.hypot(efficiency_uncertainty, interpolation))
    for lab, (m, _, _) in zip(labels, prepared):
        if m.used.size != model0.used.size:
            raise FitError(f"limit candidate {lab} sees different bins than {labels[0]}")
    counts_k = dict(n_parameters or {})
    pen = 0.5 * float(penalty) * np.array(
        [counts_k.get(lab, len(info_c["background"].parameters) + 1)
         for lab, (_, _, info_c) in zip(labels, prepared)], float)   # in NLL units
    m_all, bl, sig = info["masses"], info["blinded_mass"], info["signal"]
    nm = m_all.size
    alpha = 1.0 - cl
    conv, out_unit, delta, kind, _ = normalisation(
        m_all, luminosity=luminosity, efficiency=efficiency, unit=unit,
        luminosity_uncertainty=luminosity_uncertainty,
        efficiency_uncertainty=efficiency_uncertainty, constraint=constraint)
    kind = kind or "lognormal"
    nll_b = np.array([m.nll_background for m, _, _ in prepared]) + pen
    null = int(np.argmin(nll_b))   # the envelope's function without signal

    def env(probs: list[_Problem], mu: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        vals = np.stack([p.nll(mu) for p in probs]) + pen[:, None]
        return vals.min(axis=0), vals.argmin(axis=0)

    # expected: Asimov data from the null function over all window bins, every candidate
    f_win = info["window_fractions"]
    all_bins = np.arange(spec.edges.size - 1)
    fulls = [dataclasses.replace(m, used=all_bins, counts=spec.counts, masses=m_all,
                                 fractions=f_win) for m, _, _ in prepared]
    asimov = fulls[null].expected_background
    nb5 = len(_BANDS)
    base_all = _signal_params(sig, spec.window, m_all, info["sigma"], natural_width,
                              signal_params)
    stack_c = np.tile(conv, nb5)
    sig_fisher = 1.0 / np.sqrt(np.sum(f_win**2 / np.maximum(asimov, 1e-300), axis=1))
    reach_a = np.tile(_REACH * sig_fisher, nb5)
    probs_a = [_problem(full, asimov, f_win, conv, delta, kind, sig, base_all, nuis,
                        _REACH * sig_fisher, stack=nb5) for full in fulls]
    nll_a0 = min(float(fit_background(full, asimov[None, :])[2][0]) + pen[c]
                 for c, full in enumerate(fulls))
    target = np.repeat([expected_band_factor(n, cl) ** 2 for n in _BANDS], nm)
    scale0 = np.tile(sig_fisher / conv, nb5)
    notes: list[str] = []
    wide = needs_scan(sig, base_all, nuis, nm)   # the mass scale reaches beyond the peak

    def f_exp(mu: np.ndarray) -> np.ndarray:
        return 2.0 * (env(probs_a, mu)[0] - nll_a0) - target

    top_a = _top(probs_a, 1e3 * scale0, reach_a / stack_c)
    exp_lim = _beyond(f_exp, _bisect(f_exp, 1e-2 * scale0, top_a), top_a, notes,
                      "expected").reshape(nb5, nm)

    obs = np.full(nm, np.nan)
    chosen_at = np.full(nm, -1)
    # where a limit's profile took a well of the mass scale away from the nearest one
    wells = np.zeros(nm, bool)
    for p in probs_a:
        if isinstance(p, _Curve):
            wells |= p.moved(exp_lim[-1])
    keep = ~bl
    if keep.any():
        co = conv[keep]
        base = _signal_params(sig, spec.window, model0.masses, info["sigma"][keep],
                              natural_width, signal_params)
        free = [_free_fit(m, m.counts, sig, base, nuis) for m, _, _ in prepared]
        hat = np.stack([f[1] for f in free]) + pen[:, None]
        zero = np.stack([f[2] for f in free]) + pen[:, None]
        c_hat = hat.argmin(axis=0)
        cols = np.arange(c_hat.size)
        mu_hat = np.stack([f[0] for f in free])[c_hat, cols] / co
        nll_hat, nll_zero = hat.min(axis=0), zero.min(axis=0)
        ref = np.where(mu_hat < 0, nll_zero, nll_hat)
        asimov_used = prepared[null][0].expected_background
        s_fisher = 1.0 / np.sqrt(np.sum(model0.fractions**2
                                        / np.maximum(asimov_used, 1e-300), axis=1))
        reach = _REACH * s_fisher + 3.0 * np.maximum(mu_hat * co, 0.0)
        probs_o = [_problem(m, m.counts, m.fractions, co, delta, kind, sig, base, nuis, reach)
                   for m, _, _ in prepared]
        if keep.all() and isinstance(probs_a[0], _Curve):  # the same Asimov problem
            probs_s = probs_a
        else:
            probs_s = [_problem(m, asimov_used, m.fractions, co, delta, kind, sig, base,
                                nuis, _REACH * s_fisher) for m, _, _ in prepared]
        nll_u0 = min(float(fit_background(m, asimov_used[None, :])[2][0]) + pen[c]
                     for c, (m, _, _) in enumerate(prepared))
        last: dict[str, np.ndarray] = {}

        def f_obs(mu: np.ndarray) -> np.ndarray:
            nll_mu, last["chosen"] = env(probs_o, mu)
            q = np.where(mu_hat > mu, 0.0, np.maximum(2.0 * (nll_mu - ref), 0.0))
            qa = 2.0 * (env(probs_s, mu)[0] - nll_u0)
            # q_A <= 0: the Asimov profile is not above its background-only value at mu
            # (with an envelope another function plus signal can fit the null's Asimov
            # data as well, e.g. with blinded bins): no expected sensitivity there, so mu
            # is not excluded (CLs = 1) -- never read as an exclusion at any small mu
            cls = cls_asymptotic(q, mu, mu / np.sqrt(np.maximum(qa, 1e-300)))
            return alpha - np.where(qa > 0.0, cls, 1.0)

        s0 = s_fisher / co
        lo = np.maximum(1e-2 * s0, 0.5 * np.maximum(mu_hat, 0.0))
        top_o = _top(probs_o, 1e3 * s0 + 3.0 * np.maximum(mu_hat, 0.0), reach / co)
        obs[keep] = _beyond(f_obs, _bisect(f_obs, lo, top_o), top_o, notes, "observed")
        f_obs(np.where(np.isfinite(obs[keep]), obs[keep], top_o))
        chosen_at[keep] = last["chosen"]
        wells[keep] = np.any([f[3] for f in free], axis=0)
        for p in probs_o + probs_s:
            if isinstance(p, _Curve):
                wells[keep] |= p.moved(obs[keep])
    if wells.any():
        notes.append(several_minima_note(m_all[wells], nuis.mass_scale, "limits"))
    # low counts: toys with the same profiling (as upper_limits decides where)
    b_under = (f_win.sum(axis=1) * sig_fisher) ** 2
    want = list(m_all[b_under < low_count_background]) if method != "asymptotic" else []
    if method == "toys":
        want += list(np.asarray(toy_masses, float) if toy_masses is not None
                     else m_all[np.linspace(0, nm - 1, 3).round().astype(int)])
    methods = ["asymptotic"] * nm
    toy_info: dict[str, Any] = {}
    js = sorted({int(np.argmin(np.abs(m_all - m))) for m in want})
    notes += [f"toy limits at {m_all[j]:g} skipped: blinded" for j in js if bl[j]]
    js = [j for j in js if not bl[j]]
    if js:
        from .toy_limits_systematics import systematic_toy_limits

        base_u = _signal_params(sig, spec.window, model0.masses, info["sigma"][keep],
                                natural_width, signal_params)
        done = systematic_toy_limits(js, [m for m, _, _ in prepared], pen, conv, delta, kind,
                                     sig, base_u, nuis, cl, toys, seed, obs, exp_lim, bl,
                                     executor)
        for j, r in done.items():
            obs[j] = r["observed"]
            exp_lim[:, j] = [r["expected"][n] for n in _BANDS]
            methods[j] = "toys"
            toy_info[f"{m_all[j]:.6g}"] = plain(r)
            notes.extend(f"{m_all[j]:g}: {n}" for n in r["notes"])
    asimov_wide = [j for j in range(nm) if wide[j] and methods[j] == "asymptotic"]
    if asimov_wide:
        notes.append(asimov_band_note(m_all[asimov_wide]))
    profiled = ["background parameters"]
    profiled += [f"{n.replace('_', ' ')} ({100 * getattr(nuis, n):.3g}%, {nuis.kind(n)})"
                 for n in nuis.shape_active]
    if delta:
        profiled.append(f"signal normalisation ({100 * delta:.3g}%, {kind})")
    if interpolation:
        profiled.append(f"signal model's efficiency interpolation (up to "
                        f"{100 * interpolation:.3g}%, inside the normalisation)")
    if len(labels) > 1:
        profiled.append(f"background function (envelope of {', '.join(labels)}, penalty "
                        f"{penalty:g} per free parameter)")
    bands = dict(zip(("expected_minus2", "expected_minus1", "expected", "expected_plus1",
                      "expected_plus2"), exp_lim))
    return plain({"masses": m_all, "observed": obs, **bands, "unit": out_unit, "cl": cl,
                  "notes": notes,
                  "method": method, "methods": methods, "toys": toy_info,
                  "background_under_signal": b_under,
                  "low_count_background": low_count_background, "functions": list(labels),
                  "null_choice": labels[null], "profiled": profiled,
                  "chosen": [labels[c] if c >= 0 else None for c in chosen_at],
                  "blinded": [bool(v) for v in bl]})
