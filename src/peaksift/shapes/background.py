"""Background shapes: smooth, falling (or turning-on) densities on the fit window.

Which to use
------------
* ``exppoly`` (``order=1..3``; ``exponential`` is order 1) -- exp(b1 t + b2 t^2 + b3 t^3)
  with t in [-1, 1] across the window: the first choice for a falling spectrum.
* ``bernstein`` (``degree=n``) -- non-negative polynomial of any shape on the window.
* ``powerlaw``  -- x^-power: steeply falling spectra over a wide range.
* ``powersum``  (``terms=1..3``) -- a sum of power laws, for the background-family choice.
* ``dijet``     -- p0 (1-x)^p1 / x^(p2 + p3 ln x), x = m / sqrt_s (``npar=2..4``):
  the smoothly falling family of published dijet resonance searches
  (e.g. Phys. Rev. D 79 (2009) 112002).
* ``turnon``    -- a Gaussian-CDF trigger turn-on times an exponential fall
  (:mod:`peaksift.shapes.turnon`).

Where they live: :mod:`.polynomial` (exppoly, exponential, bernstein), :mod:`.power`
(powerlaw, powersum), :mod:`.dijet`, :mod:`.turnon`; what they share:
:mod:`.background_base`.  This module names them all, as ``peaksift.shapes`` does.

Background parameter names never collide with signal names: ``b1..b3`` (exppoly),
``c1..cn`` (bernstein), ``power`` (and ``power_j``/``weight_j``, powersum), ``p1..p3`` (dijet), ``threshold``/``resolution``/``slope``
(turnon).  The overall normalisation (p0 and friends) is the fit's ``background_yield``.
"""

from __future__ import annotations

from .dijet import Dijet
from .polynomial import Bernstein, Exponential, ExpPoly
from .power import PowerLaw, PowerSum
from .turnon import TurnOn

__all__ = ["Bernstein", "Dijet", "ExpPoly", "Exponential", "PowerLaw", "PowerSum", "TurnOn"]
