"""Look-elsewhere effect: from the local p-value of the best excess to a global one.

Which function when
-------------------
* :func:`upcrossings`              -- count upcrossings of a level in q0 scans.
* :func:`global_from_upcrossings`  -- Gross and Vitells (2010): extrapolate the mean number
  of upcrossings at a low level ``u0`` to the observed q0.
* :func:`global_from_toys`         -- fraction of background-only toys whose largest q0 is at
  least the observed one, with its binomial error.
* :func:`binomial_error`           -- the error of such a fraction.

Both estimates are floored at the local p-value: the largest q0 of a scan is never below its
value at the best mass, so p_global >= p_local.  Z_global = Phi^-1(1 - p_global) is reported
as 0 when p_global >= 0.5.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import FitError
from .significance import p_from_q0, z_from_p

__all__ = ["binomial_error", "global_from_toys", "global_from_upcrossings", "upcrossings"]


def upcrossings(q0: Any, level: float) -> np.ndarray:
    """Number of upcrossings of ``level`` along the mass axis of each scan.

    An upcrossing is a pair of neighbouring hypotheses with ``q0[i] <= level < q0[i+1]``
    (Gross, Vitells, EPJC 70 (2010) 525, sec. 2).  ``q0`` is ``(n_masses,)`` or
    ``(n_scans, n_masses)``; NaN entries (blinded) count as below the level.
    """
    q = np.atleast_2d(np.nan_to_num(np.asarray(q0, float), nan=-np.inf))
    above = q > level
    return np.sum(~above[:, :-1] & above[:, 1:], axis=1)


def binomial_error(k: int, n: int) -> float:
    """Standard error sqrt(p(1-p)/n) of a fraction p = k/n (common practice)."""
    if n <= 0:
        raise FitError("binomial_error needs n > 0 trials")
    p = k / n
    return math.sqrt(max(p * (1.0 - p), 0.0) / n)


def global_from_upcrossings(q_obs: float, scans: Any, *, u0: float = 0.5,
                            source: str | None = None) -> dict[str, Any]:
    """Gross-Vitells estimate of the global p-value.

    .. math:: p_\\mathrm{global} \\approx p_\\mathrm{local}(u) + \\langle N(u_0)\\rangle\\,
              e^{-(u - u_0)/2}

    for the one-degree-of-freedom q0 (Gross, Vitells, EPJC 70 (2010) 525, eq. 4 with
    s = 1), ``u`` the observed q0 and ``<N(u0)>`` the mean number of upcrossings of ``u0``,
    estimated from ``scans`` (toys, or the observed scan alone).  Capped at 1.
    """
    s = np.atleast_2d(np.asarray(scans, float))
    n = upcrossings(s, u0).astype(float)
    n0 = float(n.mean())
    n0_err = float(n.std(ddof=1) / math.sqrt(n.size)) if n.size > 1 else float(math.sqrt(n0))
    p_loc = float(p_from_q0(q_obs))
    fac = math.exp(-(q_obs - u0) / 2.0)
    p_glob = min(1.0, p_loc + n0 * fac)
    err = n0_err * fac
    return {
        "z_global": max(float(z_from_p(p_glob)), 0.0),
        "p_global": p_glob,
        "global_method": "upcrossings",
        "p_global_error": err,
        "n_toys": int(s.shape[0]) if source is None else 0,
        "u0": float(u0),
        "N0": n0,
        "N0_error": n0_err,
        "n0_source": source or f"{s.shape[0]} background-only toys",
    }


def global_from_toys(q_obs: float, max_q0: Any) -> dict[str, Any]:
    """Global p-value as the fraction of toys with ``max q0 >= q_obs`` (binomial error).

    When no toy reaches the observed value, ``p_global`` is reported as the 95% upper bound
    ``1 - 0.05**(1/n)`` (Clopper-Pearson for k = 0) and ``z_global_is_lower_bound`` is True.
    The estimate is floored at p_local.
    """
    mq = np.asarray(max_q0, float).ravel()
    ntoy = mq.size
    if ntoy == 0:
        raise FitError("global_from_toys needs at least one toy")
    k = int(np.sum(mq >= q_obs))
    p_loc = float(p_from_q0(q_obs))
    bound = k == 0
    p = (1.0 - 0.05 ** (1.0 / ntoy)) if bound else k / ntoy
    p = max(p, p_loc)
    return {
        "z_global": max(float(z_from_p(p)), 0.0),
        "p_global": p,
        "global_method": "toys",
        "p_global_error": binomial_error(k, ntoy),
        "n_toys": ntoy,
        "n_toys_above": k,
        "z_global_is_lower_bound": bound,
    }
