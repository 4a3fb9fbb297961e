"""Look-elsewhere effect: from the local p-value of the best excess to a global one.

Which function when
-------------------
* :func:`upcrossings`              -- count upcrossings of a level in q0 scans.
* :func:`global_from_upcrossings`  -- Gross and Vitells (2010): extrapolate the mean number
  of upcrossings at a low level ``u0`` to the observed q0.
* :func:`global_from_toys`         -- fraction of background-only toys whose largest q0 is at
  least the observed one, with its binomial error.
* :func:`binomial_error`           -- the error of such a fraction.
* :func:`finite_scans`             -- drop (and count) toys whose fit failed (NaN q0).

Both estimates are floored at the local p-value: the largest q0 of a scan is never below its
value at the best mass, so p_global >= p_local.  Z_global = Phi^-1(1 - p_global) is reported
as 0 when p_global >= 0.5.

Both work in log space: a local excess of 40 sigma or more has p_local below the smallest
double (it is 0 as a float), yet its global p-value and Z_global are finite numbers.  Every
result carries ``log10_p_local`` and ``log10_p_global`` beside the plain floats, which are 0.0
when they underflow.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import FitError
from .significance import log10_p, log_p_from_q0, p_from_q0, z_from_log_p

__all__ = ["binomial_error", "finite_scans", "global_from_scan", "global_from_toys",
           "global_from_upcrossings", "upcrossings"]


def upcrossings(q0: Any, level: float, *, gaps: Any = None) -> np.ndarray:
    """Number of upcrossings of ``level`` along the mass axis of each scan.

    An upcrossing is a pair of neighbouring hypotheses with ``q0[i] <= level < q0[i+1]``
    (Gross, Vitells, EPJC 70 (2010) 525, sec. 2).  ``q0`` is ``(n_masses,)`` or
    ``(n_scans, n_masses)`` and must be finite (drop failed toys first, see
    :func:`finite_scans`).

    ``gaps`` (``n_masses - 1`` booleans) marks neighbouring entries that are *not*
    neighbours in mass, e.g. the two sides of a blinded range whose hypotheses were left
    out.  The scan is then a set of contiguous segments: upcrossings are counted within each
    segment and summed; a pair across a gap is never an upcrossing.
    """
    q = np.atleast_2d(np.asarray(q0, float))
    if not np.all(np.isfinite(q)):
        raise FitError("upcrossings: q0 scans contain NaN or infinite values (failed fits); "
                       "drop those scans first (lee.finite_scans) and report how many")
    above = q > level
    pairs = ~above[:, :-1] & above[:, 1:]
    if gaps is not None:
        gaps = np.asarray(gaps, bool).ravel()
        if gaps.size != max(q.shape[1] - 1, 0):
            raise FitError(f"upcrossings: gaps needs {q.shape[1] - 1} entries (one per "
                           f"neighbouring pair), got {gaps.size}")
        pairs = pairs & ~gaps[None, :]
    return np.sum(pairs, axis=1)


def finite_scans(scans: Any) -> tuple[np.ndarray, int]:
    """Split off failed toys: ``(scans with every q0 finite, number of scans dropped)``.

    A toy whose fit failed has NaN (or infinite) q0 somewhere; it is neither a low nor a
    high value, so it is left out of the estimates and counted (``n_failed_toys``).
    """
    s = np.atleast_2d(np.asarray(scans, float))
    ok = np.all(np.isfinite(s), axis=1)
    return s[ok], int(np.sum(~ok))


def binomial_error(k: int, n: int) -> float:
    """Standard error sqrt(p(1-p)/n) of a fraction p = k/n (common practice)."""
    if n <= 0:
        raise FitError("binomial_error needs n > 0 trials")
    p = k / n
    return math.sqrt(max(p * (1.0 - p), 0.0) / n)


def global_from_upcrossings(q_obs: float, scans: Any, *, u0: float = 0.5,
                            source: str | None = None, gaps: Any = None) -> dict[str, Any]:
    """Gross-Vitells estimate of the global p-value.

    .. math:: p_\\mathrm{global} \\approx p_\\mathrm{local}(u) + \\langle N(u_0)\\rangle\\,
              e^{-(u - u_0)/2}

    for the one-degree-of-freedom q0 (Gross, Vitells, EPJC 70 (2010) 525, eq. 4 with
    s = 1), ``u`` the observed q0 and ``<N(u0)>`` the mean number of upcrossings of ``u0``,
    estimated from ``scans`` (toys, or the observed scan alone); ``gaps`` as in
    :func:`upcrossings` (blinded ranges: upcrossings per contiguous segment, summed).

    The sum is taken in log space, so a local Z of 100 (q0 = 1e4) gives a finite Z_global
    just below it; ``log10_p_global`` and ``log10_p_local`` hold the exponents (the floats
    ``p_global`` and ``p_global_error`` are 0.0 once they underflow).

    Scans with a non-finite q0 (failed toy fits) are dropped and counted in
    ``n_failed_toys``.  The estimate is capped at 1; when capped, ``p_global_error`` is
    None (the linear error of the uncapped sum means nothing there) and
    ``p_global_capped`` is True.
    """
    s, failed = finite_scans(scans)
    if s.shape[0] == 0:
        raise FitError(f"global_from_upcrossings: all {failed} scans contain failed fits "
                       "(NaN q0); nothing to count upcrossings on")
    n = upcrossings(s, u0, gaps=gaps).astype(float)
    n0 = float(n.mean())
    n0_err = float(n.std(ddof=1) / math.sqrt(n.size)) if n.size > 1 else float(math.sqrt(n0))
    log_p_loc = float(log_p_from_q0(q_obs))
    # ln of the upcrossing term N0 exp(-(u - u0)/2): at q0 ~ 1e4 both terms are ~e^-5000,
    # far below the smallest double, so the sum is taken in log space (logaddexp)
    log_fac = -(q_obs - u0) / 2.0
    log_term = math.log(n0) + log_fac if n0 > 0 else -math.inf
    log_raw = float(np.logaddexp(log_p_loc, log_term))
    capped = log_raw >= 0.0
    log_p_glob = min(0.0, log_raw)
    err = math.exp(math.log(n0_err) + log_fac) if n0_err > 0 else 0.0
    # the float is floored at the float p_local, which exp(ln p) may miss by a rounding
    p_glob = min(1.0, max(math.exp(log_p_glob), float(p_from_q0(q_obs))))
    return {
        "z_global": max(float(z_from_log_p(log_p_glob)), 0.0),
        "p_global": p_glob,
        "log10_p_global": float(log10_p(log_p_glob)),
        "log10_p_local": float(log10_p(log_p_loc)),
        "global_method": "upcrossings",
        "p_global_error": None if capped else err,
        "p_global_capped": bool(capped),
        "n_toys": int(s.shape[0]) if source is None else 0,
        "n_failed_toys": failed if source is None else 0,
        "u0": float(u0),
        "N0": n0,
        "N0_error": n0_err,
        "n0_source": source or f"{s.shape[0]} background-only toys",
    }


def global_from_toys(q_obs: float, max_q0: Any) -> dict[str, Any]:
    """Global p-value as the fraction of toys with ``max q0 >= q_obs`` (binomial error).

    When no toy reaches the observed value, ``p_global`` is reported as the 95% upper bound
    ``1 - 0.05**(1/n)`` (about 3/n; Clopper-Pearson for k = 0), never 0:
    ``p_global_is_upper_bound`` and ``z_global_is_lower_bound`` are True and
    ``p_global_bound_cl`` is 0.95 (None otherwise).
    The estimate is floored at p_local.  Toys whose largest q0 is not finite (a failed fit)
    are left out and counted in ``n_failed_toys``.
    """
    mq = np.asarray(max_q0, float).ravel()
    good = np.isfinite(mq)
    failed = int(np.sum(~good))
    mq = mq[good]
    ntoy = mq.size
    if ntoy == 0:
        raise FitError("global_from_toys needs at least one toy with a finite q0"
                       + (f" ({failed} failed)" if failed else ""))
    k = int(np.sum(mq >= q_obs))
    log_p_loc = float(log_p_from_q0(q_obs))
    bound = k == 0
    p = (1.0 - 0.05 ** (1.0 / ntoy)) if bound else k / ntoy
    log_p = max(math.log(p), log_p_loc)
    return {
        "z_global": max(float(z_from_log_p(log_p)), 0.0),
        "p_global": max(p, float(p_from_q0(q_obs))),
        "log10_p_global": float(log10_p(log_p)),
        "log10_p_local": float(log10_p(log_p_loc)),
        "global_method": "toys",
        "p_global_error": binomial_error(k, ntoy),
        "n_toys": ntoy,
        "n_failed_toys": failed,
        "n_toys_above": k,
        "z_global_is_lower_bound": bound,
        "p_global_is_upper_bound": bound,
        "p_global_bound_cl": 0.95 if bound else None,
    }


def global_from_scan(q0: Any, best_index: int, blinded: Any, toy_scans: Any, *,
                     method: str, toys: int | None, u0: float,
                     observed_fallback: bool = True) -> dict[str, Any]:
    """The global p-value of a scan's best excess, the way every scan result asks for it.

    ``q0`` and ``blinded`` run over all hypotheses; ``toy_scans(n)`` gives ``(n, unblinded)``
    background-only q0 scans.  ``"toys"`` (default 1000 toys): :func:`global_from_toys`;
    ``"upcrossings"`` (default 200 toys): :func:`global_from_upcrossings`, counted within
    each unblinded segment; with ``toys=0`` and ``observed_fallback`` the observed scan
    stands in for the toys' N0.
    """
    if method not in ("upcrossings", "toys"):
        raise FitError(f"global_significance method must be 'upcrossings' or 'toys', "
                       f"got {method!r}")
    q0 = np.asarray(q0, float)
    q_obs = float(q0[best_index])
    mask = ~np.asarray(blinded, bool)
    # a blinded range splits the unblinded hypotheses into contiguous segments: no
    # upcrossing is counted across it (the two sides are not neighbours in mass)
    gaps = np.diff(np.flatnonzero(mask)) > 1
    n = (1000 if method == "toys" else 200) if toys is None else int(toys)
    if method == "toys":
        return global_from_toys(q_obs, toy_scans(n).max(axis=1))
    if n > 0 or not observed_fallback:
        return global_from_upcrossings(q_obs, toy_scans(n), u0=u0, gaps=gaps)
    return global_from_upcrossings(q_obs, q0[mask][None, :], u0=u0,
                                   source="observed scan", gaps=gaps)
