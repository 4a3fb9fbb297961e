"""Bin fractions shared by the tests of a Gaussian on an exponential in 100 bins on
100-200 GeV (``test_likelihood_width_path.py``, ``test_fit_width_mass_minima.py``), written
from closed forms: an exponential exp(b1 t), t = (x - 150) / 50, integrated exactly, and a
normal distribution truncated to the window from ``scipy.special.ndtr``."""

from __future__ import annotations

import numpy as np
from scipy import special

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 101)


def exp_fractions(b1: float) -> np.ndarray:
    """The fractions of exp(b1 t) in each bin of ``EDGES``."""
    c = np.exp(b1 * ((EDGES - 150.0) / 50.0 - 1.0))  # a primitive of exp(b1 t), scaled
    return np.diff(c) / (c[-1] - c[0])


def gauss_fractions(m: float, w: float) -> np.ndarray:
    """The fractions of a normal distribution (mean ``m``, width ``w``) truncated to the
    window in each bin of ``EDGES``."""
    c = special.ndtr((EDGES - m) / w)
    return np.diff(c) / (c[-1] - c[0])
