"""A mass grid coarser than the resolution is flagged (``stats.mass_grid``), and the
flag's premise holds: a peak midway between hypotheses keeps exp(-step^2 / 8 sigma^2) of
its q0.

Reference: on a flat background and for a small signal, q0 at a hypothesis d away from a
Gaussian peak of the same width is q0(0) times the squared normalised overlap of the two
Gaussians, whose product integrates to a Gaussian density in d of variance 2 sigma^2 (the
convolution of two normal densities; e.g. Bromiley 2003, "Products and convolutions of
Gaussian probability density functions", sec. 2): exp(-d^2 / 2 sigma^2).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from peaksift import MassHistogram, scan
from peaksift.search.doubts import doubts
from peaksift.stats.mass_grid import COARSE_GRID_SIGMA, coarse_grid_note

WINDOW = (100.0, 300.0)
SIGMA = 3.0


def _asimov(peak: float, n_sig: float = 60.0, n_bkg: float = 200_000.0) -> MassHistogram:
    """Expected counts (no fluctuation): flat background, a Gaussian peak."""
    from scipy.stats import norm

    edges = np.linspace(*WINDOW, 801)
    b = np.full(800, n_bkg / 800)
    s = n_sig * np.diff(norm.cdf(edges, peak, SIGMA))
    return MassHistogram.from_counts(b + s, edges)


@pytest.mark.parametrize("d_sigma", [0.5, 1.0, 1.5])
def test_q0_falls_as_the_gaussian_overlap(d_sigma):
    h = _asimov(200.0)
    r = scan(h, "gaussian", "exponential", [200.0, 200.0 + d_sigma * SIGMA],
             absolute_resolution=SIGMA, refit=False)
    ratio = r.q0[1] / r.q0[0]
    # the overlap of unit Gaussians d apart, 1 / (2 sigma sqrt(pi)) exp(-d^2 / 4 sigma^2);
    # profiling the background's level removes each template's projection on the flat
    # density 1 / W (the window's width W; a profiled nuisance takes out the signal's
    # component along it, Cowan et al., Eur. Phys. J. C 71 (2011) 1554, sec. 3), the slope's
    # share is below 1e-3 here; tolerance 0.005 for the exponential's curvature and the bins
    w = WINDOW[1] - WINDOW[0]

    def overlap(d: float) -> float:
        return math.exp(-d * d / (4 * SIGMA ** 2)) / (2 * SIGMA * math.sqrt(math.pi)) - 1 / w

    assert ratio == pytest.approx((overlap(d_sigma * SIGMA) / overlap(0.0)) ** 2, abs=0.005)
    # the note's round figure, the bare Gaussians' exp(-d^2 / 2 sigma^2), within 0.03
    assert ratio == pytest.approx(math.exp(-d_sigma ** 2 / 2), abs=0.03)


def test_the_note_flags_a_grid_coarser_than_one_width():
    m = np.linspace(110.0, 290.0, 25)          # 7.5 GeV steps: 2.5 widths
    note = coarse_grid_note(m, np.full(m.size, SIGMA))
    assert note is not None and "2.5 resolution widths" in note
    fine = np.arange(110.0, 290.0 + 1e-9, 0.5 * SIGMA)  # the search's default: half a width
    assert coarse_grid_note(fine, SIGMA) is None
    # exactly at the threshold: not flagged; a hair above: flagged
    edge = np.array([150.0, 150.0 + COARSE_GRID_SIGMA * SIGMA])
    assert coarse_grid_note(edge, SIGMA) is None
    assert coarse_grid_note(edge + [0.0, 0.01], SIGMA) is not None
    # unsorted masses and NaN widths (JSON nulls) are taken as they come
    assert coarse_grid_note(m[::-1], np.where(m > 200, np.nan, SIGMA)) is not None


def test_scan_and_search_warnings_carry_it():
    h = _asimov(203.0)
    coarse = scan(h, "gaussian", "exponential", 12, absolute_resolution=SIGMA, refit=False)
    assert any("mass grid steps" in n for n in coarse.notes)
    fine = scan(h, "gaussian", "exponential", 120, absolute_resolution=SIGMA, refit=False)
    assert not any("mass grid steps" in n for n in fine.notes)
    d = {"scan": {"masses": list(coarse.masses), "sigma": list(coarse.sigma)},
         "best": {"N0": 2.0, "N0_error": 1.0, "n0_source": "10 background-only toys"}}
    topics = {w["topic"]: w["message"] for w in doubts(d)}
    assert "mass grid steps" in topics["scan"]
    assert "N0 = 2 +- 1" in topics["significance"]
