"""Independent references shared by the background-choice and spurious-signal tests: an
extended binned Poisson NLL of a Bernstein polynomial plus a Gaussian written here with
scipy (Bernstein 1912 basis, Gauss-Legendre per bin), and the nesting property of the
order test (a higher order contains the lower one, so its minimum cannot be higher)."""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np
from scipy import stats
from scipy.special import comb


def bernstein_gaussian_nll(n: np.ndarray, edges: np.ndarray, degree: int, mass: float,
                           sigma: float) -> tuple[Any, list[str]]:
    """``(nll, names)``: the NLL of counts ``n`` in ``edges`` for sum_k beta_k C(d,k) x^k
    (1-x)^(d-k) (beta_0 = 1, x the mass scaled to the window; 8-point Gauss-Legendre per
    bin, normalised on the window) times ``nb`` plus ``s`` times a Gaussian of fixed mass
    and width normalised on the window; parameters ``s, nb, beta1..beta_d``."""
    lo, hi = edges[0], edges[-1]
    xg, wg = np.polynomial.legendre.leggauss(8)
    a, b = edges[:-1], edges[1:]
    pts = (0.5 * (a + b)[:, None] + 0.5 * (b - a)[:, None] * xg[None, :] - lo) / (hi - lo)
    k = np.arange(degree + 1)
    basis = comb(degree, k)[None, None, :] * pts[..., None] ** k * (
        1 - pts[..., None]) ** (degree - k)
    per_bin = np.einsum("bgk,g->bk", basis, wg) * 0.5 * (b - a)[:, None]   # (bins, k)
    z = stats.norm.cdf(edges, mass, sigma)
    g_frac = np.diff(z) / (z[-1] - z[0])

    def nll(s, nb, *beta):
        shape = per_bin @ np.concatenate([[1.0], beta])
        mu = np.maximum(nb * shape / shape.sum() + s * g_frac, 1e-12)
        return float(np.sum(mu - n * np.log(mu)))

    return nll, ["s", "nb"] + [f"beta{j}" for j in range(1, degree + 1)]


def assert_orders_nested(choice: Any, tol: float) -> None:
    """Within each family of ``choice.candidates`` a higher order's NLL is at most ``tol``
    above the next lower order's (the lower is a special case of the higher)."""
    by_family: dict[str, list] = {}
    for cand in choice.candidates:
        by_family.setdefault(cand.family, []).append(cand)
    for cands in by_family.values():
        cands.sort(key=lambda c: c.order)
        for low, high in itertools.pairwise(cands):
            assert high.nll <= low.nll + tol, (low.label, low.nll, high.label, high.nll)
