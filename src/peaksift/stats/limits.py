"""Upper limits: CLs limits on a signal at each mass, expected bands, exact Poisson limits.

Which function when
-------------------
* :func:`upper_limits`         -- CLs upper limits at every mass hypothesis of a spectrum:
  asymptotic (the q~mu statistic), toy-based where few background events lie under the
  signal (``method="auto"``) and at chosen masses; the expected median and +-1, +-2 sigma
  bands; optionally on cross-section x branching fraction from an integrated luminosity
  and a signal efficiency, with their uncertainties as constrained nuisance parameters.
  Returns a :class:`LimitResult` (``to_dict()``, ``plot()``).
* :func:`cls_asymptotic`       -- the CLs value from q~mu and the Asimov sigma (formulae).
* :func:`expected_band_factor` -- Phi^-1(1 - alpha Phi(N)) + N, the Asimov band factor.
* :func:`poisson_upper_limit`  -- counting experiment, exact: classical (Garwood) or CLs.
* :func:`poisson_interval`     -- two-sided exact (Garwood 1936) interval on a Poisson mean.

Statistics follow Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554 (CCGV) and
Read, J. Phys. G 28 (2002) 2693 for CLs.

Low counts
----------
The asymptotic formulae treat q~mu as continuous.  With few background events under the
signal the data are nearly a count n, the CLs limit takes one value per n, and no limit
is below the n = 0 value -ln(1 - CL) = 2.996 signal events at 95% (CLs >= exp(-s)
whatever the background; Read 2002).  The asymptotic bands then sit in the wrong place:
their lower edges fall below that floor, where no data set can put its limit.  Each mass
therefore carries b_eff, the background under the signal (see :func:`upper_limits`);
below ``LOW_COUNT_BACKGROUND`` events ``method="auto"`` computes the limit with toys, and
``method="asymptotic"`` keeps the formulae but flags the mass.  Any value below the
counting floor is flagged too.

Luminosity and efficiency
-------------------------
With ``luminosity`` (e.g. in fb^-1) the parameter of interest is sigma x B with
``s = (sigma x B) * L * eff(m) * kappa``.  The relative uncertainties ``dL`` and ``deff``
enter through one nuisance parameter ``t`` with a unit Gaussian constraint ``t^2/2`` in the
NLL (the auxiliary measurement is at 0 for the data):

* ``constraint="lognormal"`` (default): ``kappa = exp(t * sqrt(ln(1+dL)^2 + ln(1+deff)^2))``,
  i.e. each factor log-normal with scale 1+d; exact for the product of the two.
* ``constraint="gaussian"``: ``kappa = 1 + t * sqrt(dL^2 + deff^2)`` (first order in the
  product), truncated at kappa = 1e-3.

Blinding: with ``blind=(lo, hi)`` the blinded bins are left out of every fit, the observed
limits inside the range are NaN (``None`` in ``to_dict()``) and not drawn; the expected
limits (Asimov data from the background fit, all bins) are given everywhere.  The sigma of
the observed limit (CCGV eq. 32) comes from the Asimov set restricted to the bins actually
in the observed likelihood, so near a blinded range the observed limit is the one those
bins support (on background-like data it equals the expected limit computed on the same
bins, which is weaker than the all-bins expected limit).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np
from scipy import special

from .._json import plain
from .._vocabulary import LIMIT_METHODS
from ..errors import FitError
from .cls import _BANDS, _bisect, _floor_reach, _Problem, _qtilde, _unconditional
from .limit_result import LOW_COUNT_BACKGROUND, LimitResult
from .normalisation import _assumptions, check_normalisation, normalisation
from .scan_inputs import _prepare_model, weighted_note
from .toy_limits import _ToyLimitTask, run_toy_limit
from .toys import ScanModel, fit_background

__all__ = [
    "LOW_COUNT_BACKGROUND",
    "LimitResult",
    "cls_asymptotic",
    "expected_band_factor",
    "poisson_interval",
    "poisson_upper_limit",
    "run_toy_limit",
    "upper_limits",
]

_FLOOR_SLACK = 0.01   # a value this far (relative) below the counting floor is flagged




# ------------------------------------------------------------------ formulae
def cls_asymptotic(qmu: Any, mu: Any, sigma: Any) -> np.ndarray:
    r"""Asymptotic CLs from the observed :math:`\tilde q_\mu` (CCGV eqs. 65-66 and sec. 3.7).

    With :math:`a = \mu/\sigma` (``sigma`` from the Asimov data set, :math:`\sigma^2 =
    \mu^2/q_{\mu,A}`, CCGV eq. 32):

    .. math::
        \mathrm{CL}_{s+b} = 1 - F(\tilde q_\mu|\mu),\quad
        \mathrm{CL}_b = 1 - F(\tilde q_\mu|0),\quad
        \mathrm{CL}_s = \mathrm{CL}_{s+b}/\mathrm{CL}_b

    where for :math:`\tilde q \le a^2`: :math:`F(\tilde q|\mu) = \Phi(\sqrt{\tilde q})`,
    :math:`F(\tilde q|0) = \Phi(\sqrt{\tilde q} - a)`; and for :math:`\tilde q > a^2`:
    :math:`F(\tilde q|\mu) = \Phi((\tilde q + a^2)/2a)`, :math:`F(\tilde q|0) =
    \Phi((\tilde q - a^2)/2a)`.
    """
    q = np.maximum(np.asarray(qmu, float), 0.0)
    a = np.asarray(mu, float) / np.asarray(sigma, float)
    a2 = a * a
    sq = np.sqrt(q)
    with np.errstate(divide="ignore", invalid="ignore"):
        low = q <= a2
        clsb = np.where(low, special.ndtr(-sq), special.ndtr(-(q + a2) / (2 * a)))
        clb = np.where(low, special.ndtr(a - sq), special.ndtr(-(q - a2) / (2 * a)))
        out = clsb / clb
    return np.where(clb > 0, out, 0.0)


def expected_band_factor(n_sigma: float, cl: float = 0.95) -> float:
    r"""Asimov expected-limit factor :math:`\Phi^{-1}(1 - \alpha\Phi(N)) + N`, so that :math:`\mu_{\mathrm{up}+N} = \sigma\,[\Phi^{-1}(1-\alpha\Phi(N)) + N]`
    with :math:`\alpha = 1 - \mathrm{CL}`.

    Derived from Cowan et al. 2011 eq. 89 (the CLs+b band :math:`\sigma(\Phi^{-1}(1-\alpha)
    + N)`) with CLs = CLs+b/CLb and, on the band edge, CLb = :math:`\Phi(N)` (common
    practice)."""
    alpha = 1.0 - cl
    return float(special.ndtri(1.0 - alpha * special.ndtr(n_sigma)) + n_sigma)


def poisson_interval(n: Any, cl: float = 0.6827) -> tuple[np.ndarray, np.ndarray]:
    r"""Exact central interval on a Poisson mean from ``n`` observed (Garwood 1936):

    .. math:: \mu_{lo} = \tfrac12\chi^2_{(1-\mathrm{CL})/2}(2n),\qquad
              \mu_{hi} = \tfrac12\chi^2_{(1+\mathrm{CL})/2}(2n+2)

    (``scipy.stats.chi2.ppf``), with :math:`\mu_{lo} = 0` for n = 0.
    """
    from scipy import stats  # here, not at import: scipy.stats costs ~0.5 s to load

    n = np.asarray(n, float)
    a = 1.0 - cl
    lo = np.where(n > 0, 0.5 * stats.chi2.ppf(a / 2, 2 * np.maximum(n, 1e-300)), 0.0)
    hi = 0.5 * stats.chi2.ppf(1 - a / 2, 2 * n + 2)
    return lo, hi


def poisson_upper_limit(n: int, cl: float = 0.95, background: float = 0.0, *,
                        method: str = "cls") -> float:
    r"""Upper limit on a Poisson signal mean with ``n`` observed and known ``background``.

    * ``"classical"``: :math:`s_{up} = \tfrac12\chi^2_{CL}(2n+2) - b` (one-sided Garwood
      1936 limit, ``scipy.stats.chi2.ppf``; may be negative for b > 0).
    * ``"cls"``: solve :math:`P(N\le n|s+b)/P(N\le n|b) = 1-\mathrm{CL}` (Read 2002, eq. 5);
      for n = 0 it equals :math:`-\ln(1-\mathrm{CL})` whatever b (2.996 at 95%).
    """
    if n < 0 or int(n) != n:
        raise FitError(f"poisson_upper_limit: n must be a non-negative integer, got {n!r}")
    if not 0 < cl < 1:
        raise FitError(f"confidence level must be in (0, 1), got {cl!r}")
    if background < 0:
        raise FitError(f"background must be >= 0, got {background!r}")
    from scipy import optimize, stats  # here, not at import (slow to load)

    alpha = 1.0 - cl
    if method == "classical":
        return float(0.5 * stats.chi2.ppf(cl, 2 * n + 2) - background)
    if method != "cls":
        raise FitError(f"method must be 'cls' or 'classical', got {method!r}")
    clb = stats.poisson.cdf(n, background) if background > 0 else 1.0

    def f(s: float) -> float:
        return stats.poisson.cdf(n, s + background) / clb - alpha

    hi = 0.5 * stats.chi2.ppf(cl, 2 * n + 2) + 10.0
    return float(optimize.brentq(f, 0.0, hi, xtol=1e-12))


# ------------------------------------------------------------- upper limits
def upper_limits(
    data: Any,
    signal: Any,
    background: Any,
    masses: Any,
    *,
    resolution: Any = None,
    relative_resolution: float | None = None,
    absolute_resolution: float | None = None,
    window: tuple[float, float] | None = None,
    natural_width: Any = None,
    blind: tuple[float, float] | None = None,
    signal_params: Mapping[str, float] | None = None,
    cl: float = 0.95,
    method: str = "auto",
    toy_masses: Sequence[float] | None = None,
    toys: int = 1000,
    seed: int = 0,
    luminosity: float | None = None,
    luminosity_uncertainty: float = 0.0,
    efficiency: Any = None,
    efficiency_uncertainty: float = 0.0,
    constraint: str = "lognormal",
    unit: str = "fb",
    bins: int | None = None,
    progress: bool | None = None,
    executor: Callable[[Callable[[Any], Any], list[Any]], Sequence[Any]] | None = None,
    low_count_background: float = LOW_COUNT_BACKGROUND,
    signal_model: Any = None,
) -> LimitResult:
    r"""CLs upper limits on the signal at each mass hypothesis.

    Parameters
    ----------
    data, signal, background, masses, resolution, relative_resolution, absolute_resolution,
    window, natural_width, blind, signal_params, bins :
        As in :func:`peaksift.scan` (exactly one of the three resolution forms; a bare
        number for ``resolution`` is refused).
    cl : float
        Confidence level (default 0.95).
    method : "auto", "asymptotic" or "toys"
        ``"auto"`` (default): asymptotic CLs with q~mu (CCGV), and toy-based CLs (``toys``
        pseudo-experiments per hypothesis and signal value) at the masses with fewer than
        ``low_count_background`` background events under the signal, where the formulae
        misplace the expected bands.  ``"asymptotic"``: the formulae everywhere, those
        masses flagged (``asymptotic_doubtful``, ``flags``).  ``"toys"``: as ``"auto"``,
        and toys also at ``toy_masses`` (default: 3 masses spread over the range).
    low_count_background : float
        The threshold on the effective background under the signal,
        :math:`b_\mathrm{eff} = (\sum_i f_i)^2 / \sum_i (f_i^2 / b_i)` over the window's
        bins (``f`` the signal's bin fractions, ``b`` the background-only fit): the
        background of a counting experiment with the same Fisher information on the
        signal (CCGV eqs. 28-30), so that the asymptotic band scale is
        :math:`\sigma_s = \sqrt{b_\mathrm{eff}}/\sum f`.  For a signal in one bin it is
        that bin's background.  Default :data:`LOW_COUNT_BACKGROUND`.
    luminosity : float, optional
        Integrated luminosity (e.g. fb^-1); limits are then on sigma x B in ``unit``
        (``fb`` for fb^-1).  Without it the limits are on the signal yield in events.
    efficiency : float or callable
        Signal efficiency x acceptance, constant or a function of mass (default 1, or the
        signal model's interpolated efficiency).
    signal_model : SignalModel, optional
        Shape, resolution and efficiency as functions of mass from simulated samples (as in
        :func:`peaksift.scan`); with ``luminosity`` the limits are on sigma x B with its
        interpolated efficiency.
    luminosity_uncertainty, efficiency_uncertainty : float
        Relative uncertainties, constrained nuisance parameters (see the module guide).
    constraint : "lognormal" or "gaussian"
    progress : bool, optional
        Progress bar over the toy masses (default: when stderr is a terminal).
    executor : callable, optional
        ``executor(func, tasks) -> results in task order`` for the toy limits, one task per
        toy mass, e.g. ``functools.partial(peaksift.execution.map_tasks,
        engine="processes")``.  Each mass draws from its own seed (``seed + j`` for scan
        mass ``j``), so the engine does not change the toys; worker processes may round
        sums differently (relative 1e-9 at most in the tests).

    Returns
    -------
    LimitResult
        With ``background_under_signal`` (b_eff per mass), ``counting_floor`` (the
        lowest possible CLs limit, :math:`-\ln(1-\mathrm{CL})` signal events, in the
        result's unit), and per mass ``asymptotic_doubtful``, ``below_floor`` and a text
        ``flags``; ``notes`` sums them up.
    """
    if not 0 < cl < 1:
        raise FitError(f"cl must be in (0, 1), got {cl!r}; e.g. cl=0.95")
    if method not in LIMIT_METHODS:
        raise FitError(f"limit method must be one of {', '.join(map(repr, LIMIT_METHODS))}, "
                       f"got {method!r}")
    if not low_count_background >= 0:
        raise FitError(f"low_count_background must be >= 0, got {low_count_background!r}")
    if constraint not in ("lognormal", "gaussian"):
        raise FitError(f"constraint must be 'lognormal' or 'gaussian', got {constraint!r}")
    check_normalisation(luminosity=luminosity, luminosity_uncertainty=luminosity_uncertainty,
                        efficiency=efficiency, efficiency_uncertainty=efficiency_uncertainty)
    if luminosity is None and efficiency is not None:
        # refused rather than applied: without L the limit is on the signal events in the
        # data, which the efficiency already thins; dividing by it would give a limit on
        # produced events under the same unit ("events"), one reader's number for another's
        raise FitError(f"efficiency={efficiency!r} without luminosity=: the limits are then on "
                       "the signal yield in the data (events), the efficiency already in it; "
                       "give luminosity= for limits on sigma x B, or leave efficiency out")
    model, spec, info = _prepare_model(
        data, signal, background, masses, resolution=resolution,
        relative_resolution=relative_resolution, absolute_resolution=absolute_resolution,
        window=window, natural_width=natural_width, blind=blind, signal_params=signal_params,
        bins=bins, signal_model=signal_model, what="upper_limits")
    if signal_model is not None and efficiency is not None:
        raise FitError("give the efficiency either through signal_model= or efficiency=, "
                       "not both")
    assumed = efficiency is None and signal_model is None and luminosity is not None
    if efficiency is None:
        efficiency = 1.0 if signal_model is None else signal_model.efficiency
    m_all = info["masses"]
    bl = info["blinded_mass"]
    nm = m_all.size
    alpha = 1.0 - cl
    conv, out_unit, delta, kind, eff_values = normalisation(
        m_all, luminosity=luminosity, efficiency=efficiency, unit=unit,
        luminosity_uncertainty=luminosity_uncertainty,
        efficiency_uncertainty=efficiency_uncertainty, constraint=constraint)
    conv_eff = conv  # yields in weighted units (per-bin scaled Poisson inside the model)
    notes: list[str] = []
    if spec.bin_scale is not None:
        notes.append(weighted_note(spec.scale))
    if assumed:
        notes.append(f"efficiency not given: 1 assumed, so these are limits on sigma x B x "
                     f"efficiency [{unit}]; give efficiency= (x acceptance) for sigma x B")

    # expected: Asimov background-only data over all window bins (blinding does not matter)
    f_win = info["window_fractions"]
    full = dataclasses.replace(model, used=np.arange(spec.edges.size - 1),
                               counts=spec.counts, masses=m_all, fractions=f_win)
    asimov = full.expected_background
    nb5 = len(_BANDS)
    stack_f = np.tile(f_win, (nb5, 1))
    stack_c = np.tile(conv_eff, nb5)
    prob_a = _Problem(full, asimov, stack_f, stack_c, delta, kind or "lognormal",
                      np.zeros(nb5 * nm))
    _, _, nll_a0 = fit_background(full, asimov[None, :])
    nll_a0 = float(nll_a0[0])
    target = np.repeat([expected_band_factor(n, cl) ** 2 for n in _BANDS], nm)
    sig_fisher = 1.0 / np.sqrt(np.sum(f_win**2 / np.maximum(asimov, 1e-300), axis=1))
    scale0 = np.tile(sig_fisher / conv_eff, nb5)

    def f_exp(mu: np.ndarray) -> np.ndarray:
        return 2.0 * (prob_a.nll(mu) - nll_a0) - target

    exp_lim = _bisect(f_exp, 1e-2 * scale0, 1e3 * scale0).reshape(nb5, nm)

    # observed: data in the used bins; sigma from the Asimov set on the *same* bins (the
    # blinded ones are out of the observed likelihood, so they must be out of sigma too)
    obs = np.full(nm, np.nan)
    keep = ~bl
    if keep.any():
        fo = model.fractions
        co = conv_eff[keep]
        mu_hat_s, nll_hat, nll_zero = _unconditional(model, model.counts, fo)
        mu_hat = mu_hat_s / co
        prob_o = _Problem(model, model.counts, fo, co, delta, kind or "lognormal",
                          np.zeros(fo.shape[0]))
        asimov_used = model.expected_background
        prob_s = _Problem(model, asimov_used, fo, co, delta, kind or "lognormal",
                          np.zeros(fo.shape[0]))
        nll_u0 = float(fit_background(model, asimov_used[None, :])[2][0])

        def f_obs(mu: np.ndarray) -> np.ndarray:
            q = _qtilde(prob_o, mu, mu_hat, nll_hat, nll_zero)
            qa = np.maximum(2.0 * (prob_s.nll(mu) - nll_u0), 1e-300)
            sigma = mu / np.sqrt(qa)
            return alpha - cls_asymptotic(q, mu, sigma)

        s0 = 1.0 / np.sqrt(np.sum(fo**2 / np.maximum(asimov_used, 1e-300), axis=1)) / co
        lo = np.maximum(1e-2 * s0, 0.5 * np.maximum(mu_hat, 0.0))
        obs[keep] = _bisect(f_obs, lo, 1e3 * s0 + 3.0 * np.maximum(mu_hat, 0.0))
    # where the asymptotic bands are trustworthy: the background under the signal
    f_sum = f_win.sum(axis=1)
    b_under = (f_sum * sig_fisher) ** 2
    floor = -math.log(alpha) / (conv_eff * f_sum)
    low = b_under < low_count_background
    want: list[float] = []
    if method != "asymptotic":
        want = list(m_all[low])
    if method == "toys":
        want += list(np.asarray(toy_masses, float) if toy_masses is not None
                     else m_all[np.linspace(0, nm - 1, 3).round().astype(int)])
    methods = ["asymptotic"] * nm
    toy_info: dict[str, Any] = {}
    if want and not int(toys) >= 1:
        raise FitError(f"toy-based limits are needed at {len(want)} mass(es) (below "
                       f"low_count_background = {low_count_background:g} background events "
                       f"under the signal, or method={method!r}) but toys={toys!r}; pass "
                       "toys >= 100, or method='asymptotic' (those masses are then flagged)")
    if want:
        _toy_limits(want, m_all, bl, model, conv_eff, delta, kind or "lognormal", cl, toys,
                    seed, obs, exp_lim, methods, toy_info, notes, progress, executor)
    flags, doubtful, below = _flags(m_all, methods, bl, b_under, floor, low, obs, exp_lim,
                                    low_count_background, out_unit, cl,
                                    _floor_reach(delta, kind))
    notes += _summary_notes(method, methods, low, doubtful, below, low_count_background, cl)
    return LimitResult(
        masses=m_all, observed=obs, expected=exp_lim[2], expected_minus2=exp_lim[0],
        expected_minus1=exp_lim[1], expected_plus1=exp_lim[3], expected_plus2=exp_lim[4],
        unit=out_unit, cl=cl, method=method, methods=tuple(methods),
        blind=None if blind is None else (float(blind[0]), float(blind[1])), blinded=bl,
        conversion=conv, constraint=kind, relative_uncertainty=delta, toys=toy_info,
        notes=tuple(notes), mass_unit=spec.unit, background_under_signal=b_under,
        counting_floor=floor, low_count_background=low_count_background,
        asymptotic_doubtful=doubtful, below_floor=below, flags=tuple(flags),
        assumptions=_assumptions(luminosity, luminosity_uncertainty, efficiency,
                                 efficiency_uncertainty, eff_values, kind, assumed))


def _toy_limits(want: list[float], m_all: np.ndarray, bl: np.ndarray, model: ScanModel,
                conv_eff: np.ndarray, delta: float, kind: str, cl: float, toys: int,
                seed: int, obs: np.ndarray, exp_lim: np.ndarray, methods: list[str],
                toy_info: dict[str, Any], notes: list[str], progress: bool | None,
                executor: Any) -> None:
    """Toy-based limits at the scan masses nearest ``want`` (in place)."""
    from .._progress import bar as progress_bar
    from .toys import _progress_enabled

    keep = ~bl
    tasks: list[_ToyLimitTask] = []
    where: list[int] = []
    # each scan mass once (two toy masses may be nearest the same), in mass order
    for j in sorted({int(np.argmin(np.abs(m_all - mass))) for mass in want}):
        if bl[j]:
            notes.append(f"toy limits at {m_all[j]:g} skipped: blinded")
            continue
        where.append(j)
        tasks.append(_ToyLimitTask(model, int(np.sum(keep[:j])), float(conv_eff[j]),
                                   delta, kind, cl, toys, seed + j,
                                   float(obs[j]), exp_lim[:, j].copy()))
    if executor is not None and tasks:
        results = list(executor(run_toy_limit, tasks))
        if len(results) != len(tasks):
            raise FitError(f"the toy executor returned {len(results)} results for "
                           f"{len(tasks)} toy-limit masses")
    else:
        bar = progress_bar(len(tasks), shown=_progress_enabled(progress), desc="toy limits",
                           unit="mass", leave=False)
        results = []
        try:
            for t in tasks:
                results.append(run_toy_limit(t))
                bar.update(1)
        finally:
            bar.close()
    for j, res in zip(where, results):
        obs[j] = res["observed"]
        exp_lim[:, j] = [res["expected"][n] for n in _BANDS]
        methods[j] = "toys"
        toy_info[f"{m_all[j]:.6g}"] = plain(res)
        notes.extend(f"{m_all[j]:g}: {n}" for n in res["notes"])


def _flags(m_all: np.ndarray, methods: list[str], bl: np.ndarray, b_under: np.ndarray,
           floor: np.ndarray, low: np.ndarray, obs: np.ndarray, exp_lim: np.ndarray,
           threshold: float, unit: str, cl: float, reach: float
           ) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Per-mass flag text, 'asymptotic bands doubtful' and 'a value below the floor'."""
    n0 = -math.log(1.0 - cl)
    vals = np.vstack([exp_lim, np.where(bl, np.nan, obs)])
    with np.errstate(invalid="ignore"):
        below = np.any(vals < (1.0 - _FLOOR_SLACK) * floor / reach, axis=0)
    doubtful = low & (np.array(methods) == "asymptotic")
    flags = []
    for j in range(m_all.size):
        parts = []
        few = (f"{b_under[j]:.3g} background events expected under the signal "
               f"(< {threshold:g})")
        if low[j] and methods[j] == "toys":
            parts.append(f"toys: {few}")
        elif low[j]:
            parts.append(f"asymptotic bands doubtful: {few}")
        if below[j]:
            parts.append(f"below the counting floor ({floor[j]:.4g} {unit}: {n0:.4g} "
                         "signal events in the fit)")
        flags.append("; ".join(parts))
    return flags, doubtful, below


def _summary_notes(method: str, methods: list[str], low: np.ndarray, doubtful: np.ndarray,
                   below: np.ndarray, threshold: float, cl: float) -> list[str]:
    n0 = -math.log(1.0 - cl)
    out = []
    nm = low.size
    if low.any():
        toy_low = int(np.sum(low & (np.array(methods) == "toys")))
        out.append(f"{int(low.sum())} of {nm} masses have fewer than {threshold:g} background "
                   "events expected under the signal, where the asymptotic formulae misplace "
                   f"the expected bands: {toy_low} computed with toys"
                   + (f", {int(doubtful.sum())} asymptotic and flagged doubtful"
                      + (" (method = \"auto\" computes them with toys)"
                         if method == "asymptotic" else "")
                      if doubtful.any() else ""))
    if below.any():
        out.append(f"{int(below.sum())} of {nm} masses have a limit or band edge below the "
                   f"counting floor: no CLs limit is below {n0:.4g} signal events "
                   "(CLs >= exp(-s); Read 2002), so those values are artefacts of the "
                   "asymptotic formulae (or of toy scatter)")
    return out
