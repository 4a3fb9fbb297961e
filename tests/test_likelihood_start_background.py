"""The background-only start fit of :mod:`peaksift.likelihood.start_background` (the
compiled Fisher scoring on arrays made there directly, and the general path through a
cost) against an outside reference.

Source: the extended binned Poisson NLL sum(mu - n ln mu) (Baker and Cousins, Nucl.
Instrum. Meth. 221 (1984) 437, eq. 11) of a truncated power law or exponential on the bins a
mask keeps (the sidebands of a candidate peak), written here with closed-form CDFs and
minimised by iminuit's MIGRAD (strategy 2, tight tolerance) with HESSE errors.  A start fit
stops at EDM 1e-2, so it must sit within 0.15 HESSE errors of that minimum and within 0.02
of its NLL; the compiled and numpy paths, the same algorithm in different rounding, agree
to 1e-6 of an error.
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit

from peaksift.likelihood import Model
from peaksift.likelihood import start_background as sb
from peaksift.likelihood.starts import background_start

LO, HI = 100.0, 400.0


def _counts(background: str, seed: int, bins: int):
    rng = np.random.default_rng(seed)
    if background == "powerlaw":
        a = 1.0 - 3.0
        x = LO * (1.0 - rng.random(60_000) * (1.0 - (HI / LO) ** a)) ** (1.0 / a)
    else:
        x = LO + rng.exponential(90.0, 120_000)
        x = x[x < HI][:60_000]
    x = np.concatenate([x, rng.normal(250.0, 5.0, 800)])  # a peak the sidebands leave out
    edges = np.linspace(LO, HI, bins + 1)
    return edges, np.histogram(x, edges)[0].astype(float)


def _cdf(background: str, shape: float, x: np.ndarray) -> np.ndarray:
    if background == "powerlaw":  # x^-k on [LO, HI]
        a = 1.0 - shape
        return (x**a - LO**a) / (HI**a - LO**a)
    t = (x - 0.5 * (LO + HI)) / (0.5 * (HI - LO))  # exp(b1 t), t in [-1, 1]
    return (np.exp(shape * t) - np.exp(-shape)) / (np.exp(shape) - np.exp(-shape))


def _by_hand(background, edges, n, mask, start):
    def nll(shape, total):
        mu = total * np.diff(_cdf(background, shape, edges))[mask]
        with np.errstate(all="ignore"):
            v = float(np.sum(mu - n[mask] * np.log(mu)))
        return v if np.isfinite(v) else 1e300
    m = Minuit(nll, shape=start[0], total=start[1])
    m.errordef = 0.5
    m.strategy, m.tol = 2, 1e-6
    m.limits["total"] = (1.0, None)
    m.migrad()
    m.hesse()
    assert m.valid
    return m, nll


@pytest.mark.parametrize("background", ["powerlaw", "exponential"])
@pytest.mark.parametrize("seed", [1, 2])
@pytest.mark.parametrize("masked", [False, True])
def test_background_start_against_iminuit(background, seed, masked, monkeypatch):
    edges, n = _counts(background, seed, 120)
    c = 0.5 * (edges[1:] + edges[:-1])
    mask = np.abs(c - 250.0) > 15.0 if masked else None
    model = Model("gaussian", background, (LO, HI))
    names = list(model.parameter_names)
    lower = np.array([p.lower for p in model.parameters], float)
    upper = np.array([p.upper for p in model.parameters], float)
    lower[names.index("background_yield")], upper[names.index("background_yield")] = 0, 1e7
    base = np.array([p.start for p in model.parameters], float)
    base[names.index("mass")], base[names.index("sigma")] = 250.0, 5.0
    is_fixed = np.zeros(len(names), bool)
    ro = []
    for a in (edges, n, np.ones(n.size)):
        a = a.copy()
        a.flags.writeable = False  # as the free fit gives them
        ro.append(a)
    i_b = names.index("power" if background == "powerlaw" else "b1")
    i_y = names.index("background_yield")

    def run():
        return background_start(model, *ro, mask, base, is_fixed, lower, upper)

    used = []
    real = sb._BackgroundFit.minimum
    monkeypatch.setattr(sb._BackgroundFit, "minimum",
                        lambda self, *a: used.append(1) or real(self, *a))
    compiled = run()
    assert used, "the compiled start fit was not used"
    monkeypatch.setenv("PEAKSIFT_NUMPY_COST", "1")
    reference = run()
    monkeypatch.delenv("PEAKSIFT_NUMPY_COST")
    assert len(used) == 1  # the numpy path made its own cost
    assert compiled[names.index("signal_yield")] == 0.0

    keep = np.ones(n.size, bool) if mask is None else mask
    m, nll = _by_hand(background, edges, n, keep, (base[i_b], float(n[keep].sum())))
    for i, k in ((i_b, "shape"), (i_y, "total")):
        assert abs(compiled[i] - m.values[k]) < 0.15 * m.errors[k], (k, compiled[i], m.values[k])
        assert abs(compiled[i] - reference[i]) < 1e-6 * m.errors[k], (k, compiled, reference)
    assert nll(compiled[i_b], compiled[i_y]) - m.fval < 0.02
