"""Local significance: the discovery statistic q0, p-values, Z and Asimov sensitivities.

Which function when
-------------------
* :func:`q0_from_nll`            -- you have the NLL of the background-only fit and of the
  signal-plus-background fit: returns the one-sided q0 (0 when the fitted signal is negative).
* :func:`z_from_q0`, :func:`p_from_q0` -- Z = sqrt(q0) and p = 1 - Phi(sqrt(q0)) (half chi-square).
* :func:`z_from_p`, :func:`p_from_z`   -- convert between a one-sided p-value and Z.
* :func:`log_p_from_q0`, :func:`log_p_from_z`, :func:`z_from_log_p` -- the same in log space
  (natural log of p), for significances beyond about 37 sigma where p underflows a double
  (p < 1e-308); Z -> ln p -> Z round-trips to ~1e-12 relative up to Z = 1e4.
* :func:`log10_p`                -- ln p as a base-10 exponent, the form results.json stores.
* :func:`counting_significance`  -- median expected Z of a counting experiment, with or
  without an uncertainty on the background (closed forms).
* :func:`binned_q0`              -- q0 of a binned spectrum with known signal and background
  templates, maximised numerically (optionally with the background normalisation constrained
  by an auxiliary measurement); with Asimov data it gives the expected (median) q0.
* :func:`asimov_counts`          -- the Asimov data set (expected counts) for a template.

All statistics follow Cowan, Cranmer, Gross, Vitells, "Asymptotic formulae for likelihood-
based tests of new physics", Eur. Phys. J. C 71 (2011) 1554 (CCGV below).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import special

from ..errors import FitError
from ..likelihood import binned_gradient, binned_information, binned_nll, minimize

__all__ = [
    "asimov_counts",
    "binned_q0",
    "counting_significance",
    "log10_p",
    "log_p_from_q0",
    "log_p_from_z",
    "p_from_q0",
    "p_from_z",
    "q0_from_nll",
    "z_from_log_p",
    "z_from_p",
    "z_from_q0",
]


def q0_from_nll(nll_background: Any, nll_best: Any, signal_yield: Any) -> np.ndarray | float:
    r"""One-sided discovery statistic from two negative log-likelihoods.

    .. math:: q_0 = 2\,[\mathrm{NLL}(0, \hat{\hat\theta}) - \mathrm{NLL}(\hat\mu, \hat\theta)]
              \ \text{if}\ \hat\mu \ge 0, \qquad q_0 = 0\ \text{otherwise}

    (CCGV eq. 12).  Rounding-level negative differences are clipped to 0.  Works on arrays.
    """
    q = 2.0 * (np.asarray(nll_background, float) - np.asarray(nll_best, float))
    q = np.where(np.asarray(signal_yield, float) > 0.0, np.maximum(q, 0.0), 0.0)
    return float(q) if q.ndim == 0 else q


def z_from_q0(q0: Any) -> np.ndarray | float:
    r"""Local significance :math:`Z = \sqrt{q_0}` (CCGV eq. 53)."""
    z = np.sqrt(np.maximum(np.asarray(q0, float), 0.0))
    return float(z) if z.ndim == 0 else z


def p_from_q0(q0: Any) -> np.ndarray | float:
    r"""Asymptotic p-value :math:`p_0 = 1 - \Phi(\sqrt{q_0})` (CCGV eq. 52).

    Under the background-only hypothesis q0 follows a half chi-square distribution with one
    degree of freedom (Wilks 1938; CCGV eq. 49), so :math:`p_0 = \tfrac12 P(\chi^2_1 > q_0)`.
    """
    p = special.ndtr(-np.sqrt(np.maximum(np.asarray(q0, float), 0.0)))
    return float(p) if np.ndim(p) == 0 else p


def p_from_z(z: Any) -> np.ndarray | float:
    r"""One-sided p-value of a significance: :math:`p = 1 - \Phi(Z)`."""
    p = special.ndtr(-np.asarray(z, float))
    return float(p) if np.ndim(p) == 0 else p


def z_from_p(p: Any) -> np.ndarray | float:
    r"""Significance of a one-sided p-value: :math:`Z = \Phi^{-1}(1 - p)` (CCGV eq. 2)."""
    z = -special.ndtri(np.asarray(p, float))
    return float(z) if np.ndim(z) == 0 else z


def log_p_from_z(z: Any) -> np.ndarray | float:
    r"""Natural log of the one-sided p-value, :math:`\ln p = \ln \Phi(-Z)`, without underflow.

    ``scipy.special.log_ndtr`` computes the logarithm directly, never forming p, so it stays
    accurate where :math:`p = 1 - \Phi(Z)` itself (``scipy.special.ndtr``) underflows
    (subnormal, below 2.2e-308, from Z = 37.5 and 0 from Z = 37.7).  For large Z it follows the normal-tail series (Abramowitz, Stegun, Handbook
    of Mathematical Functions, 26.2.12), :math:`\ln p \approx -Z^2/2 - \ln Z -
    \tfrac12\ln 2\pi + \ln(1 - Z^{-2} + 3Z^{-4} - \dots)`.
    """
    lp = special.log_ndtr(-np.asarray(z, float))
    return float(lp) if np.ndim(lp) == 0 else lp


def log_p_from_q0(q0: Any) -> np.ndarray | float:
    r"""Natural log of the asymptotic p-value of q0: :math:`\ln p_0 = \ln \Phi(-\sqrt{q_0})`.

    The log-space twin of :func:`p_from_q0` (CCGV eq. 52); finite for any finite q0.
    """
    return log_p_from_z(np.sqrt(np.maximum(np.asarray(q0, float), 0.0)))


def z_from_log_p(log_p: Any) -> np.ndarray | float:
    r"""Significance of a one-sided p-value given as its natural log: :math:`Z = -\Phi^{-1}(p)`.

    Uses ``scipy.special.ndtri_exp`` (the inverse of ``log_ndtr``), so
    ``z_from_log_p(log_p_from_z(z)) == z`` to about 1e-12 relative for Z up to 1e4, far past
    the point where :func:`z_from_p` returns infinity (p = 0).  ``log_p = 0`` (p = 1) gives
    ``-inf``, ``log_p = ln 0.5`` gives 0; positive values (p > 1) give NaN.
    """
    lp = np.asarray(log_p, float)
    with np.errstate(invalid="ignore"):
        z = np.where(lp > 0.0, np.nan, -special.ndtri_exp(np.minimum(lp, 0.0)))
    return float(z) if np.ndim(z) == 0 else z


def log10_p(log_p: Any) -> np.ndarray | float:
    """A natural-log p-value as a base-10 exponent: ``p = 10**log10_p(log_p)``."""
    out = np.asarray(log_p, float) / np.log(10.0)
    return float(out) if np.ndim(out) == 0 else out


def counting_significance(s: Any, b: Any, sigma_b: Any = None) -> np.ndarray | float:
    r"""Median expected discovery significance of a counting experiment.

    Without a background uncertainty (CCGV eq. 97):

    .. math:: Z_A = \sqrt{2\,[(s+b)\ln(1+s/b) - s]}

    With an uncertainty :math:`\sigma_b` on the background, the background being constrained by
    an auxiliary Poisson measurement (Cowan, "Discovery sensitivity for a counting experiment
    with background uncertainty", 2012 note; also CCGV sec. 5 and Cousins, Linnemann, Tucker,
    NIM A 595 (2008) 480):

    .. math:: Z_A = \Big\{2\Big[(s+b)\ln\frac{(s+b)(b+\sigma_b^2)}{b^2+(s+b)\sigma_b^2}
              - \frac{b^2}{\sigma_b^2}\ln\Big(1+\frac{\sigma_b^2 s}{b(b+\sigma_b^2)}\Big)\Big]\Big\}^{1/2}

    For s << b both reduce to :math:`s/\sqrt{b + \sigma_b^2}`.
    """
    s = np.asarray(s, float)
    b = np.asarray(b, float)
    if np.any(b <= 0) or np.any(s < 0):
        raise FitError(
            f"counting_significance needs b > 0 and s >= 0, got s={s!r}, b={b!r}"
        )
    if sigma_b is None or np.all(np.asarray(sigma_b) == 0):
        q = 2.0 * ((s + b) * np.log1p(s / b) - s)
    else:
        v = np.asarray(sigma_b, float) ** 2
        if np.any(v < 0):
            raise FitError(f"counting_significance: sigma_b must be >= 0, got {sigma_b!r}")
        t1 = (s + b) * np.log((s + b) * (b + v) / (b * b + (s + b) * v))
        t2 = (b * b / v) * np.log1p(v * s / (b * (b + v)))
        q = 2.0 * (t1 - t2)
    z = np.sqrt(np.maximum(q, 0.0))
    return float(z) if z.ndim == 0 else z


def asimov_counts(signal: Any, background: Any, mu: float = 1.0) -> np.ndarray:
    """The Asimov data set: every bin set to its expected count ``mu*signal + background``
    (CCGV sec. 3.2)."""
    return mu * np.asarray(signal, float) + np.asarray(background, float)


class _TemplateCost:
    """NLL of ``nu = mu s + beta b`` (plus the auxiliary count of beta) over the free ones of
    (mu, beta), on the likelihood core's Poisson functions, for its minimiser."""

    errordef = 0.5

    def __init__(self, n, s, b, tau, m, free, fixed_values):
        self.n, self.t = n, np.vstack([s, b])
        self.tau, self.m, self.btot = tau, m, float(b.sum())
        self.free, self.full = free, np.asarray(fixed_values, float)

    def value_grad_info(self, x: np.ndarray, info: bool = True):
        v = self.full.copy()
        v[self.free] = x
        mu = v @ self.t
        val = float(binned_nll(self.n, mu, saturated=False))
        g = binned_gradient(self.n, mu, self.t)
        fi = binned_information(mu, self.t)
        if self.tau is not None:  # auxiliary m ~ Pois(tau beta B): one more Poisson bin
            aux = np.array([self.tau * self.btot])
            mu_a = v[1] * aux
            val += float(binned_nll(np.array([self.m]), mu_a, saturated=False))
            g[1] += float(binned_gradient(np.array([self.m]), mu_a, aux[None, :])[0])
            fi[1, 1] += float(binned_information(mu_a, aux[None, :])[0, 0])
        return val, g[self.free], (fi[np.ix_(self.free, self.free)] if info else None)

    def __call__(self, *x: float) -> float:
        val = self.value_grad_info(np.asarray(x, float), info=False)[0]
        return val if np.isfinite(val) else 1e300

    def grad(self, *x: float) -> np.ndarray:
        return self.value_grad_info(np.asarray(x, float), info=False)[1]


def binned_q0(
    counts: Any,
    signal: Any,
    background: Any,
    *,
    background_uncertainty: float | None = None,
    auxiliary: float | None = None,
) -> dict[str, float]:
    r"""Discovery q0 for binned data with fixed signal and background templates.

    The model is :math:`\nu_i = \mu s_i + \beta b_i` with the signal strength :math:`\mu`
    free and the background scale :math:`\beta` either fixed to 1 (default) or, when a
    relative ``background_uncertainty`` :math:`\delta` is given, constrained by an auxiliary
    Poisson count :math:`m \sim \mathrm{Pois}(\tau\beta B)` with :math:`B = \sum b_i` and
    :math:`\tau = 1/(\delta^2 B)` (so that :math:`\sigma_\beta = \delta`); ``auxiliary`` is the
    observed m (default its Asimov value :math:`\tau B`).  The likelihood ratio is maximised
    numerically; with Asimov counts the result is the median expected q0 (CCGV sec. 3.2).

    Returns
    -------
    dict with ``q0``, ``z``, ``p``, ``log10_p`` (p as a power of ten, finite where the float
    ``p`` underflows to 0), ``mu_hat``, ``beta_hat``.
    """
    n = np.atleast_1d(np.asarray(counts, float))
    s = np.atleast_1d(np.asarray(signal, float))
    b = np.atleast_1d(np.asarray(background, float))
    if not (n.shape == s.shape == b.shape):
        raise FitError(
            f"binned_q0: counts, signal and background need the same shape, got "
            f"{n.shape}, {s.shape}, {b.shape}"
        )
    if np.any(b <= 0):
        raise FitError("binned_q0: every background expectation must be > 0")
    btot = float(b.sum())
    if background_uncertainty:
        tau = 1.0 / (background_uncertainty**2 * btot)
        m = tau * btot if auxiliary is None else float(auxiliary)
    else:
        tau = None
        m = 0.0

    # beta > 0 keeps every expectation positive; mu >= 0 because q0 is one-sided
    smax = max(float(n.sum()), 1.0) / max(float(s.sum()), 1e-300)
    lower, upper = np.array([0.0, 1e-9]), np.array([3.0 * smax + 10.0, np.inf])

    def profile(free: list[int], start: list[float]) -> tuple[float, np.ndarray]:
        cost = _TemplateCost(n, s, b, tau, m, np.array(free), start)
        mo = minimize(cost, np.asarray(start)[free], lower[free], upper[free],
                      ["mu", "beta"][free[0]:free[-1] + 1], edm_goal=1e-12)
        v = np.asarray(start, float)
        v[free] = mo.x
        return float(mo.fval), v

    if tau is None:
        nll0 = float(binned_nll(n, b, saturated=False))
        nll1, (mu_hat, beta1) = profile([0], [max(float((n - b).sum()), 0.0) / max(
            float(s.sum()), 1e-300) + 1e-3, 1.0])
    else:
        nll0, _ = profile([1], [0.0, 1.0])
        nll1, (mu_hat, beta1) = profile([0, 1], [max(float((n - b).sum()), 0.0) / max(
            float(s.sum()), 1e-300) + 1e-3, 1.0])
    mu_hat, beta1 = float(mu_hat), float(beta1)
    q0 = q0_from_nll(nll0, min(nll1, nll0), mu_hat)
    return {"q0": q0, "z": z_from_q0(q0), "p": p_from_q0(q0),
            "log10_p": log10_p(log_p_from_q0(q0)), "mu_hat": mu_hat, "beta_hat": beta1}
