"""The joint loop's closed form outside the signal's span (peaksift.stats.joint_spans) at
the edges of its domain, against the extended binned Poisson NLL and its Newton sums
written out here bin by bin with numpy: exponential bin fractions from the exponential's
CDF on the window (common practice), their slope derivative by complex step (Squire and
Trapp, SIAM Review 40 (1998) 110), a Gaussian signal's fractions from ``scipy.stats.norm``.

Edges from ``np.arange`` (widths equal only to rounding), edges short of the window, a
span at either end of the window, three bins, slopes of +-20 and +-45 in the
window-scaled variable with a vanishing signal (the background-only fit), 10^10 events,
no event outside the span, and slopes near the 1e-3 where the kernel stops."""

from __future__ import annotations

import numpy as np
import pytest
from joint_reference import background, bin_sums, closed_form, dbackground
from scipy import stats

WINDOW = (100.0, 300.0)


def _scaled(edges):
    """The window-scaled edges and widths (t = 2 (x - centre) / (hi - lo))."""
    lo, hi = WINDOW
    x = np.asarray(edges, float)
    return (x - 0.5 * (lo + hi)) * (2.0 / (hi - lo)), np.diff(x) * (2.0 / (hi - lo))


def _case(edges, theta_ref, shift, b, mass, sigma, s, counts="poisson"):
    t, dt = _scaled(edges)
    g0 = background(t, theta_ref)
    c = stats.norm.cdf(edges, mass, sigma)
    f = np.diff(c) / (c[-1] - c[0])
    if counts == "poisson":
        n = np.random.default_rng(3).poisson(b * g0).astype(float)
    elif counts == "outlier":   # the expectation rounded, one event at the emptiest end
        n = np.round(b * g0)
        n[0 if theta_ref > 0 else -1] += 1.0
    else:                       # events only in the signal's span
        n = np.where(f > 1e-22, 100.0, 0.0)
    h = 1e-4   # the curvature held at theta_ref, by central differences
    d2 = (dbackground(t, theta_ref + h) - dbackground(t, theta_ref - h)) / (2 * h)
    # the widths as span_tables hands them to the kernel (one per edge, the last 0)
    return t, np.r_[dt, 0.0], n, f, d2, s, b, theta_ref + shift, theta_ref


E401 = np.linspace(*WINDOW, 401)
CASES = {
    # widths equal only to rounding (0.1 GeV steps summed by arange: ~1e-14 apart)
    "arange edges": (np.arange(100.0, 300.01, 0.1), -1.67, 0.3, 6e4, 180.0, 1.8, 250.0),
    # the edges stop short of the window at both ends (t from -0.8 to 0.8)
    "edges inside the window": (np.linspace(120.0, 280.0, 321), -1.67, -0.4, 6e4, 180.0,
                                1.8, 250.0),
    "span at the window's low edge": (E401, -1.67, 0.2, 6e4, 100.2, 1.0, 250.0),
    "span at the window's high edge": (E401, -1.67, 0.2, 6e4, 299.8, 1.0, 250.0),
    "three bins": (np.array([100.0, 150.0, 200.0, 250.0]), -1.67, 0.2, 6e4, 120.0, 3.0,
                   250.0),
    "1e10 events": (E401, -1.67, 0.2, 1e10, 180.0, 1.8, 2500.0),
    "no event outside the span": (E401, -1.67, 0.2, 6e4, 180.0, 1.8, 250.0, "span"),
    "rising, +20, no signal": (E401, 20.0, 0.45, 6e4, 290.0, 2.9, 0.0, "outlier"),
    "falling, -20, no signal": (E401, -20.0, -0.45, 6e4, 110.0, 1.1, 0.0, "outlier"),
    "rising, +45, no signal": (E401, 45.0, -0.3, 6e4, 295.0, 2.95, 0.0),
    "falling, -45, no signal": (E401, -45.0, 0.3, 6e4, 105.0, 1.05, 0.0),
}


@pytest.mark.parametrize("name", list(CASES))
def test_closed_form_at_the_edges_of_its_domain(name):
    """Taken (``done``), NLL within 1e-13 of its summed magnitude, each Newton sum within
    1e-12 of its summed magnitude (rounding of <= 2000 terms and of the closed forms;
    ~1e-13 seen at the steepest slopes) of the sums written out bin by bin."""
    args = _case(*CASES[name])
    done, nll, sm, span = closed_form(*args)
    assert done, name
    assert span[1] > span[0]
    ref_nll, terms = bin_sums(args[0], *args[2:8])
    assert nll == pytest.approx(ref_nll.sum(), rel=0, abs=1e-13 * np.abs(ref_nll).sum())
    for k, term in enumerate(terms):
        assert sm[k] == pytest.approx(term.sum(), rel=0, abs=1e-12 * np.abs(term).sum()), k


@pytest.mark.parametrize("theta", [1.2e-3, -1.2e-3])
def test_closed_form_near_a_flat_background(theta):
    """Slopes just above the kernel's 1e-3 floor with 10^8 events, where the background's
    constants (and the telescoped sum, and d ln g / d theta) lose ~1/|theta| of their
    digits to cancellation: the NLL within 1e-13 of its summed magnitude; each sum within
    1e-9 of its terms' magnitude before w = 1 - n/nu cancels (|x| (1 + n/nu)), 1e-7 for
    the sums carrying dg (the bin kernel's own dg, shared with the bin-by-bin path, keeps
    ~1e-9 of its digits there: 1.5e-9 seen); the slope's
    gradient sum (index 7) within 1e-5 of its statistical scale sqrt(sum dg^2 n/nu^2) (the
    fit stops at steps of 0.03 errors; ~7e-7 seen, ~4e-8 bin by bin)."""
    args = _case(E401, theta, 0.0, 1e8, 180.0, 1.8, 250.0)
    done, nll, sm, _ = closed_form(*args)
    assert done
    t, n, f, d2, s, b, th = args[0], *args[2:8]
    ref_nll, terms = bin_sums(t, n, f, d2, s, b, th)
    assert nll == pytest.approx(ref_nll.sum(), rel=0, abs=1e-13 * np.abs(ref_nll).sum())
    g, dg = background(t, th), dbackground(t, th)
    big = 1.0 + n / (s * f + b * g)
    size = [f * big, f * f, f * g, g * big, g * g, f * dg, g * dg, dg * big, dg * dg, d2 * big]
    for k, term in enumerate(terms):
        mag = np.abs(size[k] * (1.0 if k in (0, 3, 7, 9) else n / (s * f + b * g) ** 2))
        tol = 1e-7 if k in (5, 6, 7, 8) else 1e-9
        assert sm[k] == pytest.approx(term.sum(), rel=0, abs=tol * mag.sum()), k
    assert sm[7] == pytest.approx(terms[7].sum(), rel=0, abs=1e-5 * np.sqrt(terms[8].sum()))


@pytest.mark.parametrize("jitter", [1e-9, 1e-6])
def test_declines_on_bins_not_equal(jitter):
    """Widths that differ by more than rounding (relative ``jitter``): the closed form's
    e^{theta t_i} expm1(theta dt) / (e^theta - e^-theta) for every outside bin would be
    off by ~theta dt jitter; the channel must go bin by bin (span_tables' check)."""
    from peaksift.stats.joint_spans import span_tables
    t, dt = _scaled(E401)
    t = t.copy()
    t[1:-1] += jitter * dt[0] * np.cos(np.arange(1, t.size - 1))
    dt = np.diff(t)
    c = stats.norm.cdf(E401, 180.0, 1.8)
    f = (np.diff(c) / (c[-1] - c[0]))[None, :]
    n = np.full((1, dt.size), 100.0)
    fast, _, _ = span_tables(np.array([1]), np.array([1]), np.array([True]), t,
                             np.r_[dt, 0.0], np.array([0, t.size]), np.array([0, dt.size]),
                             (n,), (f,), (np.zeros((1, dt.size)),), np.array([-1.67]))
    assert not fast[0]
