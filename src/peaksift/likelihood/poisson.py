r"""The Poisson likelihood of a binned spectrum, and of unbinned masses, as pure functions.

Every binned number peaksift reports (fits, scans, significances, limits, toys) is built on
:func:`binned_nll`; write no other copy.  All functions work on stacked arrays: bins on the
last axis, any leading axes (toys, mass hypotheses) broadcast, so many problems are one numpy
call.

Which function when
-------------------
* :func:`binned_nll`  -- extended binned Poisson NLL of counts ``n`` given expectations ``mu``;
  ``saturated=True`` (default) subtracts the saturated model so twice the minimum is the
  Baker-Cousins goodness-of-fit chi-square.  ``scale`` turns it into the scaled-Poisson form
  for weighted bins.
* :func:`binned_gradient`, :func:`binned_information` -- its gradient and expected (Fisher)
  information from the Jacobian ``dmu`` (shape ``(..., P, N)``).
* :func:`baker_cousins_chi2` -- the goodness-of-fit statistic.
* :func:`unbinned_nll` -- extended unbinned NLL from per-event densities.

Formulae
--------
Binned, bin :math:`i`, scaled-Poisson factor :math:`s_i` (1 for unweighted bins),
effective count :math:`\tilde n_i = s_i n_i` and expectation :math:`\tilde\mu_i = s_i\mu_i`:

.. math:: -\ln L = \sum_i \tilde\mu_i - \tilde n_i \ln\tilde\mu_i
          \;[\; + \tilde n_i\ln\tilde n_i - \tilde n_i \;]_{\text{saturated}}

(Baker and Cousins, Nucl. Instrum. Meth. 221 (1984) 437, eq. 11; scaled Poisson: Bohm and
Zech, Nucl. Instrum. Meth. A 748 (2014) 1, from memory).  Gradient
:math:`\partial_p = \sum_i s_i (1 - n_i/\mu_i)\,\partial_p\mu_i`; expected information
:math:`I_{pq} = \sum_i (s_i/\mu_i)\,\partial_p\mu_i\,\partial_q\mu_i`.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np

__all__ = [
    "MU_FLOOR",
    "WALL_FRACTION",
    "WALL_MU",
    "baker_cousins_chi2",
    "binned_gradient",
    "binned_information",
    "binned_nll",
    "saturated_term",
    "unbinned_nll",
    "use_compiled",
]

def use_compiled() -> bool:
    """Whether the compiled fast paths of :mod:`.kernels` (and the shapes' compiled rows)
    are used: yes unless the environment sets ``PEAKSIFT_NUMPY_COST=1``, which selects the
    numpy reference everywhere (for comparisons and debugging).

    Read from ``os.environ``'s own table of encoded variables (what its ``get`` looks up
    after encoding the name): ``os.environ.get`` runs four Python-level calls, 1.5 us, and
    ~18 us when the processor's caches are cold (a 100-bin scan asks twice).  Any other
    ``os.environ`` (replaced, or without that table) is asked as usual."""
    env = os.environ
    if env is _ENV and _ENV_DATA is not None:
        return _ENV_DATA.get(_NUMPY_KEY) != _ONE
    return env.get("PEAKSIFT_NUMPY_COST") != "1"


_ENV = os.environ
_ENV_DATA = getattr(_ENV, "_data", None)
try:
    _NUMPY_KEY = _ENV.encodekey("PEAKSIFT_NUMPY_COST")  # type: ignore[attr-defined]
    _ONE = _ENV.encodevalue("1")  # type: ignore[attr-defined]
except AttributeError:  # not CPython's os.environ: always the public lookup
    _ENV_DATA = None


#: the modules of the compiled paths, imported at their first use
#: (:func:`peaksift._jit.compiled_module`): importing the likelihood loads no numba
KERNELS_MODULE = "peaksift.likelihood.kernels"
DRIVER_MODULE = "peaksift.likelihood.driver"
NEWTON_MODULE = "peaksift.likelihood.driver_newton"
SHAPE_ROWS_MODULE = "peaksift.shapes.compiled"
START_KERNELS_MODULE = "peaksift.likelihood.start_kernels"

#: expectations are floored here before a logarithm: an empty prediction in a filled bin
#: costs ~700 per event instead of an infinity that stops every minimiser
MU_FLOOR = 1e-300

#: an empty bin whose expectation is below this sits at the wall ``mu >= 0`` (a minimum
#: pressed there is closer to it than the minimiser's EDM goal of 1e-7 in NLL); see
#: :func:`.minimize.fisher_scoring`
WALL_MU = 1e-8

#: a step that would cross the wall is cut to this fraction of the way there (fraction to
#: the boundary): each such step takes the bin 100x closer, so the EDM, which falls with
#: the bin's expectation, meets its goal in a few steps
WALL_FRACTION = 0.99


def _scaled(n: np.ndarray, scale: Any) -> tuple[np.ndarray, Any]:
    if scale is None:
        return n, 1.0
    s = np.asarray(scale, float)
    return n * s, s


def saturated_term(n: Any, scale: Any = None) -> np.ndarray:
    r""":math:`\sum_i \tilde n_i \ln \tilde n_i - \tilde n_i` over the last axis (0 ln 0 = 0)."""
    nt, _ = _scaled(np.asarray(n, float), scale)
    # the logarithm of 1, 0, where nt <= 0: its product with nt is 0 (-0 for a negative nt,
    # the same difference below), as the 0 the rule asks for, without a second select;
    # in one buffer through the ufuncs themselves (np.where's and np.sum's wrappers were
    # ~8 of a fit's ~20 us here), the same operations on the same numbers
    t = np.zeros(nt.shape)
    np.log(nt, out=t, where=nt > 0)
    np.multiply(nt, t, out=t)
    np.subtract(t, nt, out=t)
    return np.add.reduce(t, axis=-1)


def binned_nll(n: Any, mu: Any, scale: Any = None, *, saturated: bool = True,
               small_terms: bool = False) -> np.ndarray:
    """Extended binned Poisson negative log-likelihood, summed over the last axis.

    Parameters
    ----------
    n : array (..., N)
        Observed counts (sums of weights for weighted bins).
    mu : array (..., N)
        Expected counts, same units as ``n``; floored at :data:`MU_FLOOR`.
    scale : array (N,) or None
        Scaled-Poisson factors ``sum(w)/sum(w^2)`` per bin (None: unweighted).
    saturated : bool
        Subtract the saturated model's value, so that ``2 * nll`` at the minimum is the
        Baker-Cousins chi-square and differences between fits are unchanged.
    small_terms : bool
        Sum the terms as ``mu - n + n ln(n/mu)`` (each of order one near a fit) and add the
        data-only part at the end: the same value, but two nearby parameter points differ
        by the true amount to ~1e-12 instead of the rounding of ``sum n ln mu`` (~2e-8 in
        10,000 bins of 5x10^5 events), which defeats convergence tests at 1e-9.  Costs a
        second logarithm per bin.

    Returns
    -------
    ndarray (...) or float
    """
    n = np.asarray(n, float)
    mu = np.maximum(np.asarray(mu, float), MU_FLOOR)
    if small_terms:
        nt, s = _scaled(n, scale)
        smu = s * mu
        with np.errstate(divide="ignore", invalid="ignore"):
            pos = nt > 0
            lr = np.where(pos, nt * np.log(np.where(pos, nt, 1.0) / smu), 0.0)
        val = np.sum(smu - nt + lr, axis=-1)
        # + sum(nt - nt ln nt) - (saturated: that same sum), added last
        return val if saturated else val - saturated_term(n, scale)
    if scale is None:
        val = np.sum(mu - n * np.log(mu), axis=-1)
    else:
        nt, s = _scaled(n, scale)
        smu = s * mu
        val = np.sum(smu - nt * np.log(smu), axis=-1)
    if saturated:
        val = val + saturated_term(n, scale)
    return val


def binned_gradient(n: Any, mu: Any, dmu: Any, scale: Any = None) -> np.ndarray:
    """Gradient of :func:`binned_nll`: ``dmu`` is (..., P, N); returns (..., P)."""
    n = np.asarray(n, float)
    mu = np.maximum(np.asarray(mu, float), MU_FLOOR)
    s = 1.0 if scale is None else np.asarray(scale, float)
    r = s * (1.0 - n / mu)
    return np.matmul(np.asarray(dmu, float), r[..., None])[..., 0]


def binned_information(mu: Any, dmu: Any, scale: Any = None) -> np.ndarray:
    """Expected (Fisher) information of :func:`binned_nll`: (..., P, P) from ``dmu`` (..., P, N)."""
    mu = np.maximum(np.asarray(mu, float), MU_FLOOR)
    s = 1.0 if scale is None else np.asarray(scale, float)
    dmu = np.asarray(dmu, float)
    return np.matmul(dmu * (s / mu)[..., None, :], np.swapaxes(dmu, -1, -2))


def baker_cousins_chi2(n: Any, mu: Any, scale: Any = None) -> np.ndarray:
    """Saturated-model likelihood-ratio chi-square ``2 sum(mu - n + n ln(n/mu))`` (Baker and
    Cousins 1984, eq. 11), in effective counts for weighted bins."""
    return 2.0 * binned_nll(n, mu, scale, saturated=True)


def unbinned_nll(total_yield: Any, density: Any, weights: Any = None) -> np.ndarray:
    r"""Extended unbinned NLL :math:`\sum_k\nu_k - \sum_j w_j \ln \mu(x_j)`.

    ``density`` (..., J) holds :math:`\mu(x_j) = \sum_k \nu_k f_k(x_j)` (expected events per
    unit mass); ``total_yield`` (...) is :math:`\sum_k \nu_k`.
    """
    logd = np.log(np.maximum(np.asarray(density, float), MU_FLOOR))
    tot = np.asarray(total_yield, float)
    if weights is None:
        return tot - np.sum(logd, axis=-1)
    return tot - np.sum(np.asarray(weights, float) * logd, axis=-1)
