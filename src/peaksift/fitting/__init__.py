"""Free fits of signal-plus-background models to a mass spectrum.

* :func:`fit` -- the one call: ``fit(hist_or_masses, "gaussian", "exponential", (lo, hi))``.
  It finds starting values itself (sideband background, candidate peaks from a coarse
  likelihood scan), keeps the lowest minimum of all starts, and flags what is doubtful.
* :class:`FitResult` -- values, errors, intervals, covariance, validity and notes, peak
  summary, goodness of fit, pulls, ``to_dict()``/``from_dict()``, ``plot()``, ``to_minuit()``.
* :class:`Model` -- the expected spectrum (from :mod:`peaksift.likelihood`), re-exported.

The likelihood itself lives in :mod:`peaksift.likelihood`; this package only uses it.
"""

from __future__ import annotations

from ..likelihood import Model
from .core import fit
from .data import DEFAULT_BINS, UNBINNED_LIMIT
from .result import FitResult, format_value

__all__ = ["DEFAULT_BINS", "UNBINNED_LIMIT", "FitResult", "Model", "fit", "format_value"]
