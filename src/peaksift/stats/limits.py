"""Upper limits: CLs limits on a signal at each mass, expected bands, exact Poisson limits.

Which function when
-------------------
* :func:`upper_limits`         -- CLs upper limits at every mass hypothesis of a spectrum:
  asymptotic (the q~mu statistic) everywhere, toy-based at chosen masses; the expected
  median and +-1, +-2 sigma bands; optionally on cross-section x branching fraction from an
  integrated luminosity and a signal efficiency, with their uncertainties as constrained
  nuisance parameters.  Returns a :class:`LimitResult` (``to_dict()``, ``plot()``).
* :func:`cls_asymptotic`       -- the CLs value from q~mu and the Asimov sigma (formulae).
* :func:`expected_band_factor` -- Phi^-1(1 - alpha Phi(N)) + N, the Asimov band factor.
* :func:`poisson_upper_limit`  -- counting experiment, exact: classical (Garwood) or CLs.
* :func:`poisson_interval`     -- two-sided exact (Garwood 1936) interval on a Poisson mean.

Statistics follow Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554 (CCGV) and
Read, J. Phys. G 28 (2002) 2693 for CLs.

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
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize, special, stats

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from .scan import _prepare_model
from .toys import ScanModel, bkg_fractions, fit_background, profile_signal

__all__ = [
    "LimitResult",
    "cls_asymptotic",
    "expected_band_factor",
    "poisson_interval",
    "poisson_upper_limit",
    "run_toy_limit",
    "upper_limits",
]

_BANDS = (-2, -1, 0, 1, 2)
_BISECT = 24


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


# --------------------------------------------------------------------- result
@dataclass(frozen=True, repr=False, eq=False)
class LimitResult(FrozenValue):
    """CLs upper limits against mass (a frozen value).

    Attributes
    ----------
    masses : ndarray
    observed : ndarray
        Observed limit (NaN inside a blinded range).
    expected, expected_minus2, expected_minus1, expected_plus1, expected_plus2 : ndarray
        Median expected limit and the +-1, +-2 sigma band edges (background-only).
    unit : str
        ``"events"`` (signal yield) or the cross-section unit (e.g. ``"fb"``).
    cl : float
        Confidence level (0.95).
    method : str
        ``"asymptotic"`` or ``"toys"`` (toys at ``toy_masses``, asymptotic elsewhere: see
        ``methods``).
    """

    masses: np.ndarray
    observed: np.ndarray
    expected: np.ndarray
    expected_minus2: np.ndarray
    expected_minus1: np.ndarray
    expected_plus1: np.ndarray
    expected_plus2: np.ndarray
    unit: str
    cl: float
    method: str
    methods: tuple[str, ...]
    blind: tuple[float, float] | None
    blinded: np.ndarray
    conversion: np.ndarray
    constraint: str | None
    relative_uncertainty: float
    toys: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    mass_unit: str = "GeV"

    def __repr__(self) -> str:
        i = int(np.nanargmin(self.expected))
        return (f"LimitResult({self.masses.size} masses, {self.cl:.0%} CL {self.method}, "
                f"best expected {self.expected[i]:.3g} {self.unit} at {self.masses[i]:g} "
                f"{self.mass_unit})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: the search's ``limits`` keys (``mass``, ``observed``, ``expected``,
        ``expected_minus2``, ``expected_minus1``, ``expected_plus1``, ``expected_plus2``,
        ``unit``) plus ``cl``, ``method`` and details; blinded observed entries are None."""
        return plain({
            "mass": self.masses, "observed": self.observed, "expected": self.expected,
            "expected_minus2": self.expected_minus2, "expected_minus1": self.expected_minus1,
            "expected_plus1": self.expected_plus1, "expected_plus2": self.expected_plus2,
            "unit": self.unit, "cl": self.cl, "method": self.method,
            "methods": list(self.methods),
            "blind": None if self.blind is None else list(self.blind),
            "blinded": [bool(v) for v in self.blinded],
            "conversion": self.conversion, "constraint": self.constraint,
            "relative_uncertainty": self.relative_uncertainty,
            "toys": self.toys, "notes": list(self.notes),
        })

    def plot(self, path: Any = None, *, ax: Any = None, title: str | None = None,
             log: bool = True) -> Any:
        """Observed and expected limits with the +-1 and +-2 sigma bands; returns the Figure."""
        from .._style import COLORS, figure_style, use_headless_backend

        use_headless_backend()
        import matplotlib.pyplot as plt

        with figure_style():
            if ax is None:
                fig, ax = plt.subplots(figsize=(7.0, 4.6))
            else:
                fig = ax.figure
            m = self.masses
            ax.fill_between(m, self.expected_minus2, self.expected_plus2, color=COLORS["band2"],
                            lw=0, label=r"expected $\pm 2\sigma$")
            ax.fill_between(m, self.expected_minus1, self.expected_plus1, color=COLORS["band1"],
                            lw=0, label=r"expected $\pm 1\sigma$")
            ax.plot(m, self.expected, ls="--", color=COLORS["expected"], label="expected")
            obs = np.where(self.blinded, np.nan, self.observed)
            if np.any(np.isfinite(obs)):
                ax.plot(m, obs, color=COLORS["observed"], marker="o", ms=2.5, lw=1.4,
                        label="observed")
            if self.blind is not None:
                ax.axvspan(self.blind[0], self.blind[1], color=COLORS["blind"], alpha=0.45,
                           zorder=3, lw=0, label="blinded (expected only)")
            top = float(np.nanmax(np.r_[self.expected_plus2, obs]))
            bottom = float(np.nanmin(np.r_[self.expected_minus2, obs]))
            if log:
                ax.set_yscale("log")
                ax.set_ylim(bottom / 1.5, top * 4.0)
            else:
                ax.set_ylim(0.0, top * 1.45)
            ax.set_xlim(m[0], m[-1])
            ax.set_xlabel(f"mass [{self.mass_unit}]")
            what = ("signal yield [events]" if self.unit == "events"
                    else rf"$\sigma \times B$ [{self.unit}]")
            ax.set_ylabel(f"{self.cl:.0%} CL upper limit on {what}")
            ax.legend(loc="upper right", ncol=2)
            ax.text(0.01, 1.015, f"CLs, {self.method}", transform=ax.transAxes, fontsize=9,
                    va="bottom")
            if title:
                ax.set_title(title)
            if path is not None:
                fig.savefig(path)
        return fig


# ------------------------------------------------------------ profile helpers
@dataclass
class _Problem:
    """One data set (observed or Asimov) and the signal conversion at each hypothesis."""

    model: ScanModel
    counts: np.ndarray      # (B, N) or (N,)
    fractions: np.ndarray   # (B, N)
    conv: np.ndarray        # (B,) events per unit of the parameter of interest
    delta: float            # combined relative uncertainty (0: none)
    kind: str               # "lognormal" / "gaussian"
    aux: np.ndarray         # (B,) auxiliary measurement of the nuisance (0 for data)
    theta: np.ndarray = None  # warm starts
    b: np.ndarray = None
    t: np.ndarray = None

    def __post_init__(self) -> None:
        nb = self.fractions.shape[0]
        if self.theta is None:
            self.theta = np.repeat(self.model.theta[None, :], nb, axis=0)
        if self.b is None:
            self.b = np.full(nb, self.model.bkg_yield)
        if self.t is None:
            self.t = np.zeros(nb)

    def kappa(self, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """kappa(t) and its first two derivatives."""
        if self.delta == 0:
            one = np.ones_like(t)
            return one, 0 * t, 0 * t
        if self.kind == "lognormal":
            k = np.exp(self.delta * t)
            return k, self.delta * k, self.delta**2 * k
        k = 1.0 + self.delta * t
        small = k < 1e-3
        return np.where(small, 1e-3, k), np.where(small, 0.0, self.delta), 0 * t

    def nll(self, mu: np.ndarray) -> np.ndarray:
        """NLL profiled over background and nuisance at fixed parameter of interest ``mu``."""
        mu = np.asarray(mu, float)
        steps = 1 if self.delta == 0 else 5
        t = self.t.copy()
        for it in range(steps):
            k, dk, d2k = self.kappa(t)
            s = mu * self.conv * k
            r = profile_signal(self.model, self.counts, self.fractions, s_fixed=s,
                               theta_start=self.theta, b_start=self.b)
            self.theta, self.b = r["theta"], r["b"]
            total = r["nll"] + (0.5 * (t - self.aux) ** 2 if self.delta else 0.0)
            if self.delta == 0 or it == steps - 1:
                break
            g = bkg_fractions(self.model, r["theta"])
            nu = np.maximum(s[:, None] * self.fractions + r["b"][:, None] * g, 1e-100)
            n = np.broadcast_to(self.counts, nu.shape)
            ds = mu * self.conv * dk
            d2s = mu * self.conv * d2k
            g1 = np.sum((1.0 - n / nu) * self.fractions, axis=1)
            h1 = np.sum(n / nu**2 * self.fractions**2, axis=1)
            d1 = g1 * ds + (t - self.aux)
            dd = h1 * ds**2 + g1 * d2s + 1.0
            step = d1 / np.maximum(dd, 1e-6)
            t = t - step
            if np.all(np.abs(step) < 1e-5):
                # converged: one more profile at this t gives the value
                steps = it + 2
        self.t = t
        return total


def _unconditional(model: ScanModel, counts: np.ndarray, fractions: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Free fits: (s_hat, nll at s_hat, nll at s = 0) per hypothesis (nuisance at its aux)."""
    nb = fractions.shape[0]
    th = np.repeat(model.theta[None, :], nb, axis=0)
    r = profile_signal(model, counts, fractions, theta_start=th,
                       b_start=np.full(nb, model.bkg_yield))
    c = np.atleast_2d(counts)
    _, _, nll0 = fit_background(model, np.broadcast_to(c, fractions.shape), th)
    return r["s"], np.minimum(r["nll"], nll0), nll0


def _qtilde(prob: _Problem, mu: np.ndarray, mu_hat: np.ndarray, nll_hat: np.ndarray,
            nll_zero: np.ndarray) -> np.ndarray:
    """q~mu (CCGV eq. 16): reference fit at max(mu_hat, 0); 0 when mu_hat > mu."""
    nll_mu = prob.nll(mu)
    ref = np.where(mu_hat < 0, nll_zero, nll_hat)
    q = np.maximum(2.0 * (nll_mu - ref), 0.0)
    return np.where(mu_hat > mu, 0.0, q)


def _bisect(func, lo: np.ndarray, hi: np.ndarray, steps: int = _BISECT,
            xtol: float = 1e-7) -> np.ndarray:
    """Root of an increasing ``func`` in ``[lo, hi]`` for many problems at once.

    Illinois (modified regula falsi) in log space, with a bisection step whenever the
    secant leaves the bracket; stops when every bracket is below ``xtol`` (relative).
    """
    a = np.log(np.array(lo, float))
    b = np.log(np.array(hi, float))
    fa = func(np.exp(a))
    fb = func(np.exp(b))
    side = np.zeros(a.shape, int)
    x = 0.5 * (a + b)
    for _ in range(steps):
        with np.errstate(divide="ignore", invalid="ignore"):
            x = b - fb * (b - a) / (fb - fa)
        bad = ~np.isfinite(x) | (x <= np.minimum(a, b)) | (x >= np.maximum(a, b))
        x = np.where(bad, 0.5 * (a + b), x)
        fx = func(np.exp(x))
        same_b = np.sign(fx) == np.sign(fb)
        # replace b by x where fx has b's sign; otherwise a by b and b by x
        new_a = np.where(same_b, a, b)
        new_fa = np.where(same_b, np.where(side == 1, 0.5 * fa, fa), fb)
        side = np.where(same_b, 1, -1)
        a, fa = new_a, new_fa
        b, fb = x, fx
        done = (np.abs(b - a) < xtol) | (fx == 0)
        if done.all():
            break
    return np.exp(b)


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
    method: str = "asymptotic",
    toy_masses: Sequence[float] | None = None,
    toys: int = 1000,
    seed: int = 0,
    luminosity: float | None = None,
    luminosity_uncertainty: float = 0.0,
    efficiency: Any = 1.0,
    efficiency_uncertainty: float = 0.0,
    constraint: str = "lognormal",
    unit: str = "fb",
    bins: int | None = None,
    progress: bool | None = None,
    executor: Callable[[Callable[[Any], Any], list[Any]], Sequence[Any]] | None = None,
) -> LimitResult:
    """CLs upper limits on the signal at each mass hypothesis.

    Parameters
    ----------
    data, signal, background, masses, resolution, relative_resolution, absolute_resolution,
    window, natural_width, blind, signal_params, bins :
        As in :func:`peaksift.scan` (exactly one of the three resolution forms; a bare
        number for ``resolution`` is refused).
    cl : float
        Confidence level (default 0.95).
    method : "asymptotic" or "toys"
        Asymptotic CLs with q~mu everywhere (CCGV); ``"toys"`` replaces the limits at
        ``toy_masses`` (default: 3 masses spread over the range) by toy-based CLs with
        ``toys`` pseudo-experiments per hypothesis and signal value.
    luminosity : float, optional
        Integrated luminosity (e.g. fb^-1); limits are then on sigma x B in ``unit``
        (``fb`` for fb^-1).  Without it the limits are on the signal yield in events.
    efficiency : float or callable
        Signal efficiency x acceptance, constant or a function of mass.
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
    """
    if not 0 < cl < 1:
        raise FitError(f"cl must be in (0, 1), got {cl!r}; e.g. cl=0.95")
    if method not in ("asymptotic", "toys"):
        raise FitError(f"limit method must be 'asymptotic' or 'toys', got {method!r}")
    if constraint not in ("lognormal", "gaussian"):
        raise FitError(f"constraint must be 'lognormal' or 'gaussian', got {constraint!r}")
    if luminosity_uncertainty < 0 or efficiency_uncertainty < 0:
        raise FitError("luminosity_uncertainty and efficiency_uncertainty must be >= 0")
    model, spec, info = _prepare_model(
        data, signal, background, masses, resolution=resolution,
        relative_resolution=relative_resolution, absolute_resolution=absolute_resolution,
        window=window, natural_width=natural_width, blind=blind, signal_params=signal_params,
        bins=bins)
    m_all = info["masses"]
    bl = info["blinded_mass"]
    nm = m_all.size
    alpha = 1.0 - cl
    # conversion: events per unit of the parameter of interest (effective-count scale)
    if luminosity is None:
        if luminosity_uncertainty or efficiency_uncertainty:
            raise FitError("luminosity/efficiency uncertainties need luminosity=...")
        conv = np.ones(nm)
        out_unit = "events"
        delta, kind = 0.0, None
    else:
        if not luminosity > 0:
            raise FitError(f"luminosity must be > 0, got {luminosity!r}")
        eff = (np.asarray(efficiency(m_all), float) if callable(efficiency)
               else np.full(nm, float(efficiency)))
        if np.any(~np.isfinite(eff) | (eff <= 0)):
            raise FitError("signal efficiency must be > 0 at every scan mass")
        conv = float(luminosity) * eff
        out_unit = unit
        if constraint == "lognormal":
            delta = math.sqrt(math.log1p(luminosity_uncertainty) ** 2
                              + math.log1p(efficiency_uncertainty) ** 2)
        else:
            delta = math.hypot(luminosity_uncertainty, efficiency_uncertainty)
        kind = constraint
    conv_eff = conv  # yields in weighted units (per-bin scaled Poisson inside the model)
    notes: list[str] = []

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
    methods = ["asymptotic"] * nm
    toy_info: dict[str, Any] = {}
    if method == "toys":
        tm = (np.asarray(toy_masses, float) if toy_masses is not None
              else m_all[np.linspace(0, nm - 1, 3).round().astype(int)])
        from tqdm.auto import tqdm

        from .toys import _progress_enabled

        tasks: list[_ToyLimitTask] = []
        where: list[int] = []
        seen: set[int] = set()
        for mass in tm:
            j = int(np.argmin(np.abs(m_all - mass)))
            if j in seen:  # two toy masses nearest the same scan mass
                continue
            seen.add(j)
            if bl[j]:
                notes.append(f"toy limits at {m_all[j]:g} skipped: blinded")
                continue
            where.append(j)
            tasks.append(_ToyLimitTask(model, int(np.sum(keep[:j])), float(conv_eff[j]),
                                       delta, kind or "lognormal", cl, toys, seed + j,
                                       float(obs[j]), exp_lim[:, j].copy()))
        if executor is not None and tasks:
            results = list(executor(run_toy_limit, tasks))
            if len(results) != len(tasks):
                raise FitError(f"the toy executor returned {len(results)} results for "
                               f"{len(tasks)} toy-limit masses")
        else:
            results = [run_toy_limit(t) for t in tqdm(
                tasks, desc="toy limits", unit="mass", leave=False,
                disable=not _progress_enabled(progress))]
        for j, res in zip(where, results):
            obs[j] = res["observed"]
            exp_lim[:, j] = [res["expected"][n] for n in _BANDS]
            methods[j] = "toys"
            toy_info[f"{m_all[j]:.6g}"] = plain(res)
    return LimitResult(
        masses=m_all, observed=obs, expected=exp_lim[2], expected_minus2=exp_lim[0],
        expected_minus1=exp_lim[1], expected_plus1=exp_lim[3], expected_plus2=exp_lim[4],
        unit=out_unit, cl=cl, method=method, methods=tuple(methods),
        blind=None if blind is None else (float(blind[0]), float(blind[1])), blinded=bl,
        conversion=conv, constraint=kind, relative_uncertainty=delta, toys=toy_info,
        notes=tuple(notes), mass_unit=spec.unit)


# --------------------------------------------------------------- toy limits
def _toy_q(model: ScanModel, n: np.ndarray, f: np.ndarray, conv: float, mu: float,
           delta: float, kind: str, aux: np.ndarray) -> np.ndarray:
    """q~mu for stacked toys ``n (T, N)`` at one hypothesis."""
    t = n.shape[0]
    fr = np.broadcast_to(f, (t, f.size))
    s_hat, nll_hat, nll_zero = _unconditional(model, n, fr)
    prob = _Problem(model, n, fr, np.full(t, conv), delta, kind, aux)
    # the free fit has the nuisance at its auxiliary value (it is degenerate with mu)
    return _qtilde(prob, np.full(t, mu), s_hat / (conv * prob.kappa(aux)[0]), nll_hat,
                   nll_zero)


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
    """Toy-based CLs limit and expected band at the unblinded hypothesis ``jj``."""
    alpha = 1.0 - cl
    f = model.fractions[jj]
    n_obs = model.counts
    lo_ref = np.nanmin(np.r_[exp_asym, obs_asym])
    hi_ref = np.nanmax(np.r_[exp_asym, obs_asym])
    grid = np.geomspace(0.7 * lo_ref, 1.5 * hi_ref, 9)
    b_fit = model.expected_background
    q_obs = np.empty(grid.size)
    clsb = np.empty(grid.size)
    clb = np.empty(grid.size)
    q_b_all, q_sb_all = [], []
    ss = np.random.SeedSequence(seed)
    for k, mu in enumerate(grid):
        # observed q~mu and the data-conditional nuisance values at mu
        q_obs[k] = _toy_q(model, n_obs[None, :], f, conv, mu, delta, kind, np.zeros(1))[0]
        prob = _Problem(model, n_obs, f[None, :], np.array([conv]), delta, kind, np.zeros(1))
        prob.nll(np.array([mu]))
        g = bkg_fractions(model, prob.theta)[0]
        s_mu = mu * conv * prob.kappa(prob.t)[0][0]
        exp_sb = s_mu * f + prob.b[0] * g
        rng = np.random.default_rng(ss.spawn(1)[0])
        n_sb = rng.poisson(exp_sb, size=(ntoys, exp_sb.size)).astype(float)
        n_b = rng.poisson(b_fit, size=(ntoys, b_fit.size)).astype(float)
        aux_sb = prob.t[0] + rng.standard_normal(ntoys) if delta else np.zeros(ntoys)
        aux_b = rng.standard_normal(ntoys) if delta else np.zeros(ntoys)
        q_sb = _toy_q(model, n_sb, f, conv, mu, delta, kind, aux_sb)
        q_b = _toy_q(model, n_b, f, conv, mu, delta, kind, aux_b)
        q_sb_all.append(q_sb)
        q_b_all.append(q_b)
        clsb[k] = np.mean(q_sb >= q_obs[k])
        clb[k] = np.mean(q_b >= q_obs[k])
    cls_obs = np.where(clb > 0, clsb / np.maximum(clb, 1e-300), 1.0)

    def crossing(cls_vals: np.ndarray) -> float:
        # first grid interval where CLs falls through alpha, interpolated in log(mu)
        below = np.flatnonzero(cls_vals < alpha)
        if below.size == 0:
            return float("nan")
        i = below[0]
        if i == 0:
            return float(grid[0])
        c1, c2 = cls_vals[i - 1], cls_vals[i]
        w = (c1 - alpha) / (c1 - c2) if c1 != c2 else 0.5
        return float(np.exp(np.log(grid[i - 1]) + w * (np.log(grid[i]) - np.log(grid[i - 1]))))

    expected = {}
    for nsig in _BANDS:
        vals = np.empty(grid.size)
        for k in range(grid.size):
            qn = np.quantile(q_b_all[k], special.ndtr(-nsig))
            sb = np.mean(q_sb_all[k] >= qn)
            b = np.mean(q_b_all[k] >= qn)
            vals[k] = sb / b if b > 0 else 1.0
        expected[nsig] = crossing(vals)
    return {"observed": crossing(cls_obs), "expected": expected, "grid": grid,
            "cls": cls_obs, "q_observed": q_obs, "n_toys": ntoys,
            "asymptotic_observed": obs_asym}
