r"""Where the joint fit of a combination starts: the channels' own fits, combined to second
order.

Each channel's scan has already fitted every hypothesis alone (signal yield :math:`\hat
s_c`, background yield and shape :math:`\hat\eta_c`) and has the exact Hessian
:math:`H_c` of its NLL there (:func:`~peaksift.stats.toys.profile_signal`).  Near those
minima each channel's NLL is the quadratic form of :math:`H_c`, so the joint minimum of the
product likelihood with :math:`s_c = \mu\,k_c\,e^{a_c\cdot\nu}` is, to second order,

* :math:`\mu` (and the normalisation nuisances :math:`\nu`) minimising
  :math:`\sum_c (s_c - \hat s_c)^2 / 2\sigma_c^2 + |\nu - \nu_{aux}|^2/2`, with
  :math:`\sigma_c^2 = (H_c^{-1})_{ss}` the channel's profiled variance of its yield
  (without nuisances: the inverse-variance average of :math:`\hat s_c / k_c`);
* each channel's nuisances moved along with its yield,
  :math:`\eta_c = \hat\eta_c - H_{\eta\eta}^{-1} H_{\eta s}\,(s_c - \hat s_c)`.

From there one Newton step of :func:`~peaksift.stats.joint.profile_joint` usually lands
within its stopping tolerance, instead of two from the background-only shapes.  Only a
start: the fit itself is exact, and a channel whose own fit is unusable at a hypothesis
(not finite, singular Hessian) keeps its background-only start there.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from .joint_kernels import channel_quadratic, moved_starts

__all__ = ["joint_start"]

_GAUSS_NEWTON = 6   # iterations of the small (mu, nu) problem when there are norms


def joint_start(models: Sequence[Any], fits: Sequence[dict], conv: Sequence[np.ndarray],
                norms: Any = None) -> dict[str, Any]:
    """Starting values of :func:`~peaksift.stats.joint.profile_joint` from each channel's
    own profile fits.

    Parameters
    ----------
    models : sequence of ScanModel
        The channels' models (their background-only fits and parameter bounds).
    fits : sequence of dict
        Per channel ``s``, ``b``, ``theta`` and ``hessian`` at every hypothesis (``(B,)``,
        ``(B,)``, ``(B, K)``, ``(B, 2 + K, 2 + K)``), as the channel's scan fitted them.
    conv : sequence of arrays
        Per channel ``(B,)``: signal events per unit of the parameter of interest.
    norms : array, optional
        ``(n_channels, J)`` log-normal scales of the normalisation nuisances.

    Returns
    -------
    dict with ``mu_start`` ``(B,)``, ``nu_start`` ``(B, J)`` (None without norms),
    ``b_start`` and ``theta_start`` (lists per channel).
    """
    nb = np.asarray(conv[0]).size
    parts = [_channel_quadratic(m, f, np.asarray(k, float)) for m, f, k in
             zip(models, fits, conv)]
    with np.errstate(all="ignore"):
        w = [p[0] for p in parts]
        sh = [p[1] for p in parts]
        k = [np.asarray(c, float) for c in conv]
        den = sum(wc * kc * kc for wc, kc in zip(w, k))
        mu = np.where(den > 0, sum(wc * kc * sc for wc, kc, sc in zip(w, k, sh)) / den, 0.0)
        mu = np.where(np.isfinite(mu), mu, 0.0)
        a = None if norms is None else np.asarray(norms, float).reshape(len(models), -1)
        nu = None
        if a is not None and a.shape[1]:
            mu, nu = _with_norms(mu, w, sh, k, a)
        scale = [np.ones(nb) if nu is None else np.exp(nu @ a[c]) for c in range(len(models))]
        b_start, th_start = [], []
        for c, (m, p) in enumerate(zip(models, parts)):
            ds = mu * k[c] * scale[c] - sh[c]
            # (b, theta) moved along with s; the background-only fit where unusable
            b_start.append(np.empty(nb))
            th_start.append(np.empty((nb, m.theta.size)))
            moved_starts(p[2], p[3], ds, p[4], np.asarray(m.lower, float),
                         np.asarray(m.upper, float), float(m.bkg_yield),
                         np.asarray(m.theta, float), b_start[-1], th_start[-1])
    return {"mu_start": mu, "nu_start": nu, "b_start": b_start, "theta_start": th_start}


def _channel_quadratic(model: Any, fit: dict, k: np.ndarray) -> tuple:
    """``(w, s_hat, eta_hat, slope, ok)`` of one channel: the inverse profiled variance of
    its yield (0 where unusable), its fitted yield, its fitted ``(b, theta)``, their slope
    ``-H_ee^-1 H_es`` along the yield, and where all of that is usable."""
    s = np.ascontiguousarray(fit["s"], float)
    eta = np.concatenate([np.asarray(fit["b"], float)[:, None],
                          np.asarray(fit["theta"], float).reshape(s.size, -1)], axis=1)
    h = np.ascontiguousarray(fit["hessian"], float)
    nb = s.size
    w, sh = np.zeros(nb), np.empty(nb)
    slope = np.zeros((nb, h.shape[1] - 1))
    ok = np.empty(nb, np.bool_)
    # per row: the slope -H_ee^-1 H_es and the profiled curvature in s,
    # H_ss - H_se H_ee^-1 H_es (Schur complement), where the fit is usable
    channel_quadratic(s, eta, h, np.ascontiguousarray(k, float), w, slope, ok, sh)
    return w, sh, eta, slope, ok


def _with_norms(mu: np.ndarray, w: list, sh: list, k: list, a: np.ndarray) -> tuple:
    """Gauss-Newton on ``sum_c w_c (mu k_c e^{a_c nu} - s_c)^2 / 2 + |nu|^2 / 2`` from
    ``(mu, 0)``: the (mu, nu) of the quadratic surrogate (the constraints' auxiliary
    values are 0 for the observed data)."""
    nb, nj = mu.size, a.shape[1]
    nu = np.zeros((nb, nj))
    eye = np.eye(1 + nj)
    for _ in range(_GAUSS_NEWTON):
        g = np.zeros((nb, 1 + nj))
        hh = np.zeros((nb, 1 + nj, 1 + nj))
        g[:, 1:] = nu
        hh[:, 1:, 1:] = np.eye(nj)
        for c in range(len(w)):
            e = np.exp(nu @ a[c])
            r = mu * k[c] * e - sh[c]
            jac = np.concatenate([(k[c] * e)[:, None], (mu * k[c] * e)[:, None] * a[c]],
                                 axis=1)
            g += (w[c] * r)[:, None] * jac
            hh += w[c][:, None, None] * jac[:, :, None] * jac[:, None, :]
        step = np.linalg.solve(hh + 1e-12 * eye, g[..., None])[..., 0]
        step = np.where(np.isfinite(step), step, 0.0)
        mu = mu - step[:, 0]
        nu = np.clip(nu - step[:, 1:], -5.0, 5.0)
    return mu, nu
