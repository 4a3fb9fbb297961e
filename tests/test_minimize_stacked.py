"""The stacked minimiser (peaksift.likelihood.minimize_stacked) on independent bounded
problems, against scipy.optimize.minimize (L-BFGS-B) run on each problem separately.

Problems: binned Poisson fits of ``mu = a f + c g`` (two fixed templates) to 40 spectra,
``a >= 0`` bounded (several spectra have a deficit, so the bound is active there), ``c``
free; NLL = sum(mu - n ln mu) (extended Poisson, constant dropped).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize

from peaksift.likelihood import minimize_stacked

X = np.linspace(-1.0, 1.0, 30)
F = np.exp(-0.5 * (X / 0.15) ** 2)
F /= F.sum()
G = np.full(X.size, 1.0 / X.size)


def _counts() -> np.ndarray:
    rng = np.random.default_rng(7)
    a_true = np.where(np.arange(40) % 4 == 0, 0.0, 40.0)
    return rng.poisson(a_true[:, None] * F + 300.0 * G).astype(float)


def _problem(n: np.ndarray):
    def value(x, rows):
        mu = x[:, :1] * F + x[:, 1:] * G
        val = np.sum(mu - n[rows] * np.log(np.where(mu > 0, mu, 1.0)), axis=1)
        return np.where(np.all(mu > 0, axis=1), val, np.inf), (mu,)

    def grad_hess(x, state, rows):
        mu = state[0]
        a = np.stack([np.broadcast_to(F, mu.shape), np.broadcast_to(G, mu.shape)], axis=1)
        w = 1.0 - n[rows] / mu
        grad = np.einsum("bpn,bn->bp", a, w)
        hess = np.einsum("bpn,bqn,bn->bpq", a, a, n[rows] / mu**2)
        return grad, hess

    return value, grad_hess


def _scipy(nrow: np.ndarray) -> np.ndarray:
    def f(x):
        mu = x[0] * F + x[1] * G
        return float(np.sum(mu - nrow * np.log(mu)))

    def g(x):
        mu = x[0] * F + x[1] * G
        w = 1.0 - nrow / mu
        return np.array([F @ w, G @ w])

    r = optimize.minimize(f, [10.0, nrow.sum()], jac=g, method="L-BFGS-B",
                          bounds=[(0.0, None), (1.0, None)],
                          options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000})
    return r.x


def test_stacked_minima_equal_separate_scipy_fits():
    """Every problem's minimum within 1e-4 absolute (a: events) of L-BFGS-B's, the bound
    held exactly where active, every problem flagged converged."""
    n = _counts()
    value, grad_hess = _problem(n)
    x0 = np.column_stack([np.full(40, 10.0), n.sum(axis=1)])
    r = minimize_stacked(value, grad_hess, x0, np.array([0.0, -np.inf]),
                         np.array([np.inf, np.inf]))
    assert r.converged.all()
    ref = np.array([_scipy(row) for row in n])
    np.testing.assert_allclose(r.x, ref, atol=1e-4, rtol=0)
    at_bound = ref[:, 0] < 1e-6
    assert at_bound.sum() >= 3  # the case exercises the bound
    assert np.all(r.x[at_bound, 0] == 0.0)
    assert np.all(np.isfinite(r.nll)) and r.hessian.shape == (40, 2, 2)


def test_iteration_cap_and_inactive_problems():
    """One iteration cannot converge a start far away; problems not active keep their start
    and are not flagged converged."""
    n = _counts()
    value, grad_hess = _problem(n)
    x0 = np.column_stack([np.full(40, 200.0), 0.5 * n.sum(axis=1)])
    one = minimize_stacked(value, grad_hess, x0, np.array([0.0, -np.inf]),
                           np.array([np.inf, np.inf]), steps=1)
    assert one.iterations == 1 and not one.converged.any()
    active = np.arange(40) % 2 == 0
    part = minimize_stacked(value, grad_hess, x0, np.array([0.0, -np.inf]),
                            np.array([np.inf, np.inf]), active=active)
    assert np.array_equal(part.x[~active], x0[~active])
    assert part.converged[active].all() and not part.converged[~active].any()
    full = minimize_stacked(value, grad_hess, x0, np.array([0.0, -np.inf]),
                            np.array([np.inf, np.inf]))
    assert part.x[active] == pytest.approx(full.x[active], abs=1e-9)
