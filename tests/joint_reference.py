"""Outside references shared by the joint-fit tests (imported by them; pytest collects
only ``test_*.py``).

- :func:`q0_from_two_fits`: q0 from a likelihood written out in a test, minimised by
  iminuit (MIGRAD, strategy 2) with the signal free and fixed at 0 (Cowan, Cranmer, Gross
  and Vitells, Eur. Phys. J. C 71 (2011) 1554, eq. 12: q0 = 0 where the fitted signal is
  negative).
- :func:`assert_matches_iminuit`: a combination's q0 and sigma x B at every mass against
  such a reference, and the injected peak seen.
- the extended binned Poisson NLL and the joint loop's ten Newton sums for an exponential
  channel, bin by bin with numpy: the exponential's bin fractions from its CDF on the
  window (common practice), their slope derivative by complex step (Squire and Trapp,
  SIAM Review 40 (1998) 110); and the closed-form kernel of
  :mod:`peaksift.stats.joint_spans` called on the same inputs.
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit

from peaksift.stats.joint_spans import _MOMENTS, prefix_moments, row_spans, span_channel


def q0_from_two_fits(nll, start: dict, fixed_in_null: tuple = ()) -> tuple[float, float]:
    """(q0, the free fit's signal ``mu``); ``fixed_in_null`` names parameters fixed with
    the signal at 0 (nuisances with nothing left to scale)."""
    fits = []
    for free in (True, False):
        m = Minuit(nll, **{**start, "mu": 10.0 if free else 0.0})
        m.errordef, m.strategy = 0.5, 2
        m.fixed["mu"] = not free
        if not free:
            for name in fixed_in_null:
                m.fixed[name] = True
        m.migrad()
        m.migrad()
        assert m.valid
        fits.append(m)
    mu = fits[0].values["mu"]
    return (2.0 * (fits[1].fval - fits[0].fval) if mu > 0 else 0.0), mu


def background(t, theta):
    """Bin fractions of e^{theta t} normalised on t in [-1, 1] (complex theta allowed)."""
    return np.diff(np.exp(theta * t)) / (np.exp(theta) - np.exp(-theta))


def dbackground(t, theta, h=1e-20):
    return background(t, theta + 1j * h).imag / h   # complex step: exact to rounding


def bin_sums(t, n, f, d2, s, b, theta):
    """The NLL per bin and the ten Newton sums' terms (w = 1 - n/nu, v = n/nu^2)."""
    g, dg = background(t, theta), dbackground(t, theta)
    nu = s * f + b * g
    w, v = 1.0 - n / nu, n / nu ** 2
    terms = [f * w, f * f * v, f * g * v, g * w, g * g * v, f * dg * v, g * dg * v, dg * w,
             dg * dg * v, d2 * w]
    return nu - np.where(n > 0, n * np.log(nu), 0.0), terms


def closed_form(t, dt, n, f, d2, s, b, theta, theta_ref):
    """(done, NLL, the ten sums, the signal's span) from ``span_channel``."""
    pre = np.zeros((_MOMENTS, t.size))
    prefix_moments(t, n, d2, theta_ref, pre)
    spans = np.zeros((1, 2), np.int64)
    row_spans(f[None, :], 1e-22, spans)
    tg, tdg = np.zeros(f.size), np.zeros(f.size)
    lb, sm = np.zeros((3, f.size)), np.zeros(10)
    done, nll = span_channel(t, dt, 0, theta, theta_ref, s, s, b, f, n, d2, spans[0, 0],
                             spans[0, 1], pre, 0, tg, tdg, 0, lb, sm)
    return done, nll, sm, spans[0]


def assert_matches_iminuit(result, masses, reference, *, yield_errors: float,
                           peak_q0: float) -> None:
    """``result`` (a combination) converged, its q0 within 2e-3 absolute and its sigma x B
    within ``yield_errors`` of its error of ``reference(m) -> (q0, sigma x B)`` at every
    mass, and q0 above ``peak_q0`` at the second mass, where the tests inject a peak (so
    the check is not made at q0 = 0 only)."""
    assert result.converged.all()
    for j, m in enumerate(masses):
        q_ref, mu_ref = reference(m)
        assert result.q0[j] == pytest.approx(q_ref, abs=2e-3), m
        assert result.cross_section[j] == pytest.approx(
            mu_ref, abs=yield_errors * result.cross_section_error[j]), m
    assert result.q0[1] > peak_q0
