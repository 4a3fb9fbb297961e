"""Brent's root finder, so that a search need not import ``scipy.optimize`` (~0.3 s).

:func:`brentq` is the algorithm of ``scipy.optimize.brentq`` (Brent 1973, "Algorithms for
Minimization without Derivatives", ch. 4, as written in scipy's ``zeros/brentq.c``), step
for step in the same floating-point operations, so it returns the same root to the bit;
``tests/test_roots.py`` compares the two.  The shapes use it for numerical FWHMs.
"""

from __future__ import annotations

import math
from collections.abc import Callable

from ..errors import FitError


def brentq(f: Callable[[float], float], xa: float, xb: float, *, xtol: float = 2e-12,
           rtol: float = 8.881784197001252e-16, maxiter: int = 100) -> float:
    """A root of ``f`` in ``[xa, xb]`` (``f(xa)`` and ``f(xb)`` of opposite signs), to
    ``xtol + rtol * |root|``; scipy's defaults.  Raises :class:`FitError` when the signs
    do not differ or ``maxiter`` iterations do not converge."""
    xpre, xcur = float(xa), float(xb)
    xblk = fblk = spre = scur = 0.0
    fpre, fcur = float(f(xpre)), float(f(xcur))
    if fpre == 0:
        return xpre
    if fcur == 0:
        return xcur
    if math.copysign(1.0, fpre) == math.copysign(1.0, fcur):
        raise FitError("brentq: f(a) and f(b) must have different signs")
    for _ in range(maxiter):
        if fpre != 0 and fcur != 0 and math.copysign(1.0, fpre) != math.copysign(1.0, fcur):
            xblk, fblk = xpre, fpre
            spre = scur = xcur - xpre
        if abs(fblk) < abs(fcur):
            xpre, xcur, xblk = xcur, xblk, xcur
            fpre, fcur, fblk = fcur, fblk, fcur
        delta = (xtol + rtol * abs(xcur)) / 2
        sbis = (xblk - xcur) / 2
        if fcur == 0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:  # interpolate
                stry = -fcur * (xcur - xpre) / (fcur - fpre)
            else:  # extrapolate (inverse quadratic)
                dpre = (fpre - fcur) / (xpre - xcur)
                dblk = (fblk - fcur) / (xblk - xcur)
                stry = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            if 2 * abs(stry) < min(abs(spre), 3 * abs(sbis) - delta):  # a good short step
                spre, scur = scur, stry
            else:  # bisect
                spre = scur = sbis
        else:  # bisect
            spre = scur = sbis
        xpre, fpre = xcur, fcur
        if abs(scur) > delta:
            xcur += scur
        else:
            xcur += delta if sbis > 0 else -delta
        fcur = float(f(xcur))
    raise FitError(f"brentq: no convergence in {maxiter} iterations")
