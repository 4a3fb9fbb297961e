"""The mass-scale scan of the limits with systematics holds at most ``_CHUNK`` cells (grid
values x bins) of signal fractions at once, however many masses are asked for.

Its grid has (factor range) x mass / (half the peak's width) points per hypothesis: a peak
of sigma 0.05 GeV at 180 GeV with a 5 % mass scale (range +-6 standard deviations) has
4,321, so 400 bins hold 1.7e6 fractions (14 MB) per mass; made for every mass at once,
twelve masses took 0.92 GB of memory (measured).  Reference: that arithmetic, written
here, with ``_CHUNK`` lowered so that three masses of the default peak cross it; the
limits themselves must not depend on the chunking (the same numbers to 1e-12 relative:
every hypothesis's fractions are its own rows).
"""

from __future__ import annotations

import numpy as np

from peaksift.likelihood import SignalNuisances
from peaksift.resolution import resolution_from
from peaksift.stats import scale_scan, shape_profile
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.limits_systematics import systematic_limits

WINDOW, BINS, SIGMA, SCALE = (100.0, 200.0), 200, 0.5, 0.05
MASSES = np.array([130.0, 150.0, 170.0])


def _limits() -> dict:
    rng = np.random.default_rng(1)
    x = 100.0 + rng.exponential(40.0, 20000)
    x = x[x < WINDOW[1]]
    nuis = SignalNuisances.make({"mass_scale": SCALE, "mass_resolution": 0.2})
    return systematic_limits((x, np.ones_like(x)), "gaussian", candidate_shapes(["exppoly1"]),
                             MASSES, resolution=resolution_from(None, absolute=SIGMA),
                             window=WINDOW, bins=BINS, nuisances=nuis, method="asymptotic")


def test_the_scan_holds_at_most_a_chunk_of_fractions(monkeypatch):
    before = _limits()
    # grid points of the widest hypothesis: 12 standard deviations x mass / (sigma / 2)
    g = int(np.ceil(12 * SCALE * MASSES.max() / (0.5 * SIGMA))) + 1
    one = g * BINS  # fractions of one mass (every bin used)
    chunk = 2 * one  # two masses' worth: three cross it
    assert MASSES.size * one > chunk
    sizes = []
    real = shape_profile._fractions

    def recording(model, signal, base, names, nuis, k, rows, grad=False):
        out = real(model, signal, base, names, nuis, k, rows, grad)
        if not grad and k.shape[0] >= g:  # the grid's (the fits ask for a few rows)
            sizes.append(k.shape[0] * model.used.size)
        return out

    monkeypatch.setattr(scale_scan, "_CHUNK", chunk)
    monkeypatch.setattr(scale_scan, "_fractions", recording)
    after = _limits()
    assert sizes and max(sizes) <= chunk
    for key in ("observed", "expected"):
        a = np.array(before[key], float)
        b = np.array(after[key], float)
        assert np.allclose(a, b, rtol=1e-12, atol=0.0, equal_nan=True)
