"""The exponential background's bin fractions and their slope derivative at steep slopes.

Sources: the exact fractions of exp(b t) on t in [-1, 1] by mpmath at 50 digits (the
integral e^{bt}/b written out, its b derivative by hand; b = 0 as the limit), from the
same doubles the code is given; for the fits, an extended binned Poisson NLL (Baker and
Cousins, Nucl. Instrum. Meth. 221 (1984) 437, eq. 11) minimised by iminuit (MIGRAD, HESSE)
with the fractions written here from the falling end, ``e^{b(t_i + 1)} expm1(b dt) /
expm1(2b)``.

Until 2026-12-05 the fractions were differences of the CDF from the window's lower end,
wrong in every digit beyond b ~ -20 (tested here: 1e-3 relative at b = -15, 300 % at
-25), which left a steep fall's fit with a non-invertible Hessian.
"""

from __future__ import annotations

import itertools

import mpmath as mp
import numpy as np
import pytest
from iminuit import Minuit

import peaksift
from peaksift.likelihood.kernels import edge_kernel
from peaksift.shapes import Exponential
from peaksift.shapes.compiled_exponential import exponential_rows

SLOPES = [-40.0, -25.0, -15.0, -5.0, -1e-8, 0.0, 1e-8, 5.0, 15.0, 25.0]
WINDOW = (100.0, 300.0)


def _binnings():
    lo, hi = WINDOW
    rng = np.random.default_rng(4)
    widths = rng.uniform(0.5, 1.5, 60)
    ragged = lo + (hi - lo) * np.concatenate([[0.0], np.cumsum(widths) / widths.sum()])
    ragged[-1] = hi
    return {
        "7 bins": np.linspace(lo, hi, 8),
        "100 bins": np.linspace(lo, hi, 101),
        "1000 bins": np.linspace(lo, hi, 1001),
        "ragged": ragged,                                  # unequal widths
        "geometric": np.geomspace(lo, hi, 81),
        "beyond": np.linspace(lo - 20.0, hi + 20.0, 125),  # clipped to the window
    }


def _exact(t, b, window=None):
    """mpmath: bin fractions F_i of exp(b t) over edges ``t`` (doubles, taken exactly) on
    [-1, 1], and dF_i/db; with ``window``, ``t`` are masses (clipped to it) scaled there
    exactly.  P(t) = int_{-1}^t e^{bu} du = (e^{bt} - e^{-b})/b,
    dP/db = e^{bt}(t/b - 1/b^2) + e^{-b}(1/b + 1/b^2); b = 0: t + 1 and (t^2 - 1)/2."""
    with mp.workdps(50):
        b = mp.mpf(b)
        ts = [mp.mpf(float(v)) for v in t]
        if window is not None:
            lo, hi = (mp.mpf(v) for v in window)
            ts = [(min(max(v, lo), hi) - (lo + hi) / 2) / ((hi - lo) / 2) for v in ts]

        def prim(v):
            return v + 1 if b == 0 else (mp.exp(b * v) - mp.exp(-b)) / b

        def dprim(v):
            if b == 0:
                return (v * v - 1) / 2
            return mp.exp(b * v) * (v / b - 1 / b**2) + mp.exp(-b) * (1 / b + 1 / b**2)

        z, dz = prim(mp.mpf(1)), dprim(mp.mpf(1))
        f = [(prim(c) - prim(a)) / z for a, c in itertools.pairwise(ts)]
        g = [((dprim(c) - dprim(a)) - (prim(c) - prim(a)) * dz / z) / z
             for a, c in itertools.pairwise(ts)]
        return np.array([float(v) for v in f]), np.array([float(v) for v in g])


def _check(frac, grad, want_f, want_g, tol, label):
    """Every fraction to ``tol`` relative; every derivative to ``tol`` of |dF/db| + F (the
    derivative F (mean of t in the bin - mean in the window) crosses 0 inside the window,
    where its own digits are those of a t-difference times F)."""
    keep = want_f > 0  # (bins clipped to zero width beyond the window)
    np.testing.assert_array_equal(frac[~keep], 0.0)
    rel = np.abs(frac[keep] / want_f[keep] - 1.0)
    assert rel.max() <= tol, (label, rel.max())
    dg = np.abs(grad[keep] - want_g[keep]) / (np.abs(want_g[keep]) + want_f[keep])
    assert dg.max() <= tol, (label, dg.max())


@pytest.mark.parametrize("b", SLOPES)
def test_fractions_and_slope_derivative_against_mpmath(b):
    """``Exponential.fractions_and_grad`` (numpy), ``bin_fractions`` and the compiled rows
    (stacked slopes, ``exponential_rows``): mpmath at 50 digits on t as the code computes
    from the edges (seen: <= 2e-14); tolerance 1e-12 relative."""
    shape = Exponential()
    for name, edges in _binnings().items():
        want_f, want_g = _exact(edges, b, WINDOW)
        frac, grad = shape.fractions_and_grad(edges, [b], WINDOW)
        _check(frac, grad[0], want_f, want_g, 1e-12, name)
        np.testing.assert_array_equal(shape.bin_fractions(edges, [b], WINDOW), frac)
        rows, drows = shape.fractions_and_grad(edges, [np.array([[b], [b]])], WINDOW)
        for r in range(2):
            _check(rows[r], drows[0, r], want_f, want_g, 1e-12, name)
        # the kernel on the window-scaled edges and widths it is given (row_inputs')
        _, tk, dtk, _, _ = shape.row_inputs(edges, WINDOW)
        f1, g1 = np.empty((1, tk.size - 1)), np.empty((1, tk.size - 1))
        assert exponential_rows(tk, dtk, np.array([b]), f1, g1)
        _check(f1[0], g1[0], want_f, want_g, 1e-12, name)


@pytest.mark.parametrize("b", SLOPES)
def test_fit_edge_rows_against_mpmath(b):
    """The fit's compiled edge kernel (``edge_kernel``): the differences of its rows are
    the fractions and derivatives the cost uses.  Against mpmath on the kernel's own t:
    each row's value to 1e-12 relative (each exact to rounding; the reference's sums in
    doubles add < 1e-13), their differences to 2e-12 relative (a difference of rows loses
    eps times the rows' ratio to the fraction, up to ~1000 here: 5e-13 seen at 1000 bins;
    no longer e^{|b|} eps)."""
    for name, edges in _binnings().items():
        if name == "beyond":
            continue  # the cost's edges are the window's bins
        kern = edge_kernel(Exponential(), edges, WINDOW)
        t = kern.data[0]
        out = np.empty((2, t.size))
        assert kern([b], out)
        want_f, want_g = _exact(t, b)
        _check(np.diff(out[0]), np.diff(out[1]), want_f, want_g, 2e-12, name)
        # each row's value: the share beyond the edge away from the dense end (signed)
        far = want_f[::-1].cumsum()[::-1] if b <= 0 else want_f.cumsum()
        row = -out[0, :-1] if b <= 0 else out[0, 1:]
        np.testing.assert_allclose(row, far, rtol=1e-12, atol=0, err_msg=name)


def _falling(edges, b):
    """Bin fractions of exp(b t), t in [-1, 1] on WINDOW, written from the falling end
    (b < 0): e^{b(t_i + 1)} expm1(b dt_i) / expm1(2b), no difference of close numbers."""
    t = (edges - 200.0) / 100.0
    return np.exp(b * (t[:-1] + 1.0)) * np.expm1(b * np.diff(t)) / np.expm1(2.0 * b)


def _poisson_nll(n, edges):
    def nll(y, b):
        mu = np.maximum(y * _falling(edges, b), 1e-300)
        return float(np.sum(mu - n * np.log(mu)))
    return nll


@pytest.mark.parametrize("b_true", [-30.0, -20.0])
def test_steep_fall_fit_against_iminuit(b_true):
    """Poisson toys of a steep exponential (1e5 events, 100 bins; the last bins expect
    ~e^{2b} of the first): peaksift.fit (background only) valid, with slope and yield
    within 1e-3 of an error of iminuit's minimum of the NLL written here and the errors
    within 1e-3 relative of HESSE's (its minimum is good to ~1e-4 of an error, its
    numerical second derivatives to ~1e-5)."""
    edges = np.linspace(*WINDOW, 101)
    rng = np.random.default_rng(3)
    for _ in range(3):
        n = rng.poisson(1e5 * _falling(edges, b_true)).astype(float)
        m = Minuit(_poisson_nll(n, edges), y=n.sum(), b=b_true)
        m.errordef = Minuit.LIKELIHOOD
        m.strategy = 2
        m.tol = 1e-6
        m.limits["b"] = (-59.0, -1.0)
        m.migrad()
        m.hesse()
        assert m.valid
        res = peaksift.fit((n, edges), "gaussian", "exponential", WINDOW,
                           fixed={"signal_yield": 0.0})
        assert res.valid, res.problems
        for ours, theirs in (("b1", "b"), ("background_yield", "y")):
            assert abs(res.values[ours] - m.values[theirs]) <= 1e-3 * m.errors[theirs]
            assert res.errors[ours] == pytest.approx(m.errors[theirs], rel=1e-3)
