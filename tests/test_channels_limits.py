"""Toy-based combined CLs limits at low counts (peaksift.stats.channel_limits and
.channel_toys), against exact counting CLs (Read, J. Phys. G 28 (2002) 2693, eq. 5;
scipy.stats.poisson) of the two channels' counts summed."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats

from peaksift import shapes
from peaksift.histogram import MassHistogram
from peaksift.stats.channel_limits import combined_limits
from peaksift.stats.channels import Channel

WINDOW = (100.0, 400.0)


def _counting_histogram(b: float, slope: float, n_total: float = 1e6):
    """A counting experiment inside a spectrum: 10 GeV bins plus one narrow bin [250,
    250 + w] holding ``b`` expected background events; the exponential background of
    ``n_total`` events is pinned to ~0.1% by the other bins; Asimov contents (each bin its
    expectation, Cowan et al. 2011 sec. 3.8).  Returns (histogram, w)."""
    expo = shapes.get("exponential")
    per_gev = n_total * float(expo.bin_fractions(np.array([250.0, 251.0]), [slope],
                                                 WINDOW)[0])
    w = b / per_gev
    edges = np.r_[np.arange(100.0, 250.0, 10.0), 250.0, 250.0 + w,
                  np.arange(260.0, 400.1, 10.0)]
    h = MassHistogram(edges)
    h.weight_sum = n_total * np.asarray(expo.bin_fractions(edges, [slope], WINDOW), float)
    h.weight_sq_sum = h.weight_sum.copy()
    return h, w


def _exact_cls_limit(n: int, b: float, cl: float = 0.95) -> float:
    """Counting CLs limit with known background (Read 2002, eq. 5):
    P(N <= n | s + b) / P(N <= n | b) = 1 - CL (scipy.stats.poisson.cdf,
    scipy.optimize.brentq)."""
    clb = stats.poisson.cdf(n, b)
    return optimize.brentq(lambda s: stats.poisson.cdf(n, s + b) / clb - (1 - cl), 0.0,
                           200.0)


@pytest.mark.slow
def test_combined_toy_limit_of_two_counting_channels_is_the_summed_counting_limit():
    """Two channels, each a counting experiment with 0.5 background events under a signal
    confined to one narrow bin, with equal conversions (s_c / b_c the same in both): the
    likelihood ratio depends on n1 + n2 only, so the combined CLs limit is the counting
    limit of the sum, n = 1 observed (the Asimov data: 0.5 + 0.5) on b = 1 (Read 2002, eq.
    5; scipy.stats.poisson).  The median expected limit is the same (the median of a Poisson
    of mean 1 is 1, scipy.stats.poisson.median).  Tolerance 6%, as the single-channel toy
    limits (3x their measured 2% scatter at 300 toys).  The asymptotic formulae are
    flagged there (0.5 + 0.5 background events under the signal) and "auto" uses toys."""
    h1, w1 = _counting_histogram(0.5, -1.0)
    h2, w2 = _counting_histogram(0.5, -0.6)
    m = 250.0 + min(w1, w2) / 2.0
    from peaksift import Resolution

    chans = [Channel(n, h, "exponential", 10.0, signal="gaussian",
                     resolution=Resolution.absolute(min(w1, w2) / 40.0), efficiency=0.4)
             for n, h in (("one", h1), ("two", h2))]
    lim = combined_limits(chans, [m], method="auto", toys=300, seed=5)
    assert lim.methods == ("toys",)
    k = 10.0 * 0.4   # events per fb in each channel; the whole signal sits in the bin
    assert stats.poisson.median(1.0) == 1
    s_up = _exact_cls_limit(1, 1.0)
    assert lim.observed[0] * 2 * k == pytest.approx(s_up, rel=0.06)
    assert lim.expected[0] * 2 * k == pytest.approx(s_up, rel=0.06)
    asym = combined_limits(chans, [m], method="asymptotic")
    assert asym.methods == ("asymptotic",) and asym.flags[0]
    assert not lim.flags[0]
    d = lim.to_dict()
    assert d["methods"] == ["toys"] and d["toys"]
