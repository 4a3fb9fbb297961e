"""The profile likelihood of the CLs limits: q~mu for stacked hypotheses (CCGV).

:class:`_Problem` holds one data set (observed, Asimov or toys) with the signal conversion
at each hypothesis and profiles the background and the normalisation nuisance at a fixed
parameter of interest; :func:`_qtilde` is the test statistic q~mu (Cowan, Cranmer, Gross,
Vitells, Eur. Phys. J. C 71 (2011) 1554, eq. 16); :func:`_bisect` finds where a monotone
function of mu crosses a level, for all hypotheses at once.  Used by :mod:`.limits` and
:mod:`.toy_limits`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .toys import ScanModel, bkg_fractions, fit_background, profile_signal

_BANDS = (-2, -1, 0, 1, 2)
_BISECT = 24


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
    last: np.ndarray = None   # the mu of the warm starts

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

    def _profile(self, s: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray]:
        """The fit at signal yields ``s`` (background free) and the signal fractions it
        used; :mod:`.limits_systematics` also frees the signal shape's factors here."""
        r = profile_signal(self.model, self.counts, self.fractions, s_fixed=s,
                           theta_start=self.theta, b_start=self.b)
        return r, self.fractions

    def nll(self, mu: np.ndarray) -> np.ndarray:
        """NLL profiled over background and nuisance at fixed parameter of interest ``mu``."""
        mu = np.asarray(mu, float)
        if self.last is not None:
            # a warm start from a mu ten times away (the bisection's far bracket end: a
            # signal 1000 times too large) can leave the background fit in a poor place it
            # does not leave again; start those rows afresh
            with np.errstate(divide="ignore", invalid="ignore"):
                far = ~(np.abs(np.log(np.maximum(mu, 1e-300)
                                      / np.maximum(self.last, 1e-300))) <= math.log(10.0))
            if far.any():
                self.theta[far] = self.model.theta
                self.b[far] = self.model.bkg_yield
                self.t[far] = self.aux[far]
        self.last = np.array(np.broadcast_to(mu, self.t.shape), float)
        steps = 1 if self.delta == 0 else 5
        t = self.t.copy()
        for it in range(steps):
            k, dk, d2k = self.kappa(t)
            s = mu * self.conv * k
            r, f = self._profile(s)
            self.theta, self.b = r["theta"], r["b"]
            total = r["nll"] + (0.5 * (t - self.aux) ** 2 if self.delta else 0.0)
            if self.delta == 0 or it == steps - 1:
                break
            g = bkg_fractions(self.model, r["theta"])
            nu = np.maximum(s[:, None] * f + r["b"][:, None] * g, 1e-100)
            n = np.broadcast_to(self.counts, nu.shape)
            ds = mu * self.conv * dk
            d2s = mu * self.conv * d2k
            g1 = np.sum((1.0 - n / nu) * f, axis=1)
            h1 = np.sum(n / nu**2 * f**2, axis=1)
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


def _floor_reach(delta: float, kind: str | None) -> float:
    """How far below the nominal counting floor a limit can legitimately go when the
    signal normalisation has a constrained uncertainty: a toy (or data) whose auxiliary
    measurement sits 2 sigma high reads each signal event as worth kappa(2) of the
    parameter of interest.  1 without such an uncertainty."""
    if not delta:
        return 1.0
    return math.exp(2.0 * delta) if kind == "lognormal" else 1.0 + 2.0 * delta
