"""Brent's scalar root finder and bounded minimiser, so that a search need not import
``scipy.optimize`` (~0.2-0.3 s of CPU in every process that would).

:func:`brentq` is the algorithm of ``scipy.optimize.brentq`` (Brent 1973, "Algorithms for
Minimization without Derivatives", ch. 4, as written in scipy's ``zeros/brentq.c``), and
:func:`bounded_minimum` that of ``scipy.optimize.minimize_scalar(method="bounded")`` (Brent
1973, ch. 5: golden sections and parabolic steps), each step for step in the same
floating-point operations, so they return the same root and minimum to the bit;
``tests/test_roots.py`` compares them.  The shapes use :func:`brentq` for numerical
FWHMs, :meth:`peaksift.likelihood.SignalNuisances.mass_interval` both.
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


def bounded_minimum(f: Callable[[float], float], lower: float, upper: float, *,
                    xatol: float = 1e-5, maxiter: int = 500) -> tuple[float, float]:
    """``(x, f(x))`` at a minimum of ``f`` on ``[lower, upper]`` (finite bounds) to
    ``xatol``: ``minimize_scalar(f, bounds=(lower, upper), method="bounded")``'s ``x`` and
    ``fun`` (its defaults), without its result object; ``maxiter`` evaluations at most."""
    sqrt_eps = math.sqrt(2.2e-16)
    golden_mean = 0.5 * (3.0 - math.sqrt(5.0))
    a, b = float(lower), float(upper)
    fulc = a + golden_mean * (b - a)
    nfc, xf = fulc, fulc
    rat = e = 0.0
    fx = float(f(xf))
    num = 1
    ffulc = fnfc = fx
    xm = 0.5 * (a + b)
    tol1 = sqrt_eps * abs(xf) + xatol / 3.0
    tol2 = 2.0 * tol1
    while abs(xf - xm) > (tol2 - 0.5 * (b - a)):
        golden = True
        if abs(e) > tol1:  # try a parabola through the three best points
            golden = False
            r = (xf - nfc) * (fx - ffulc)
            q = (xf - fulc) * (fx - fnfc)
            p = (xf - fulc) * q - (xf - nfc) * r
            q = 2.0 * (q - r)
            if q > 0.0:
                p = -p
            q = abs(q)
            r = e
            e = rat
            if abs(p) < abs(0.5 * q * r) and p > q * (a - xf) and p < q * (b - xf):
                rat = (p + 0.0) / q
                x = xf + rat
                if (x - a) < tol2 or (b - x) < tol2:
                    rat = tol1 * (_sign(xm - xf) + float(xm - xf == 0))
            else:
                golden = True
        if golden:  # a golden-section step into the larger part
            e = (a - xf) if xf >= xm else (b - xf)
            rat = golden_mean * e
        x = xf + (_sign(rat) + float(rat == 0)) * _nan_max(abs(rat), tol1)
        fu = float(f(x))
        num += 1
        if fu <= fx:
            if x >= xf:
                a = xf
            else:
                b = xf
            fulc, ffulc = nfc, fnfc
            nfc, fnfc = xf, fx
            xf, fx = x, fu
        else:
            if x < xf:
                a = x
            else:
                b = x
            if fu <= fnfc or nfc == xf:
                fulc, ffulc = nfc, fnfc
                nfc, fnfc = x, fu
            elif fu <= ffulc or fulc == xf or fulc == nfc:
                fulc, ffulc = x, fu
        xm = 0.5 * (a + b)
        tol1 = sqrt_eps * abs(xf) + xatol / 3.0
        tol2 = 2.0 * tol1
        if num >= maxiter:
            break
    return xf, fx


def _sign(v: float) -> float:
    """numpy's sign of a float: -1, 0 or 1 (NaN stays NaN)."""
    return v if math.isnan(v) else float((v > 0) - (v < 0))


def _nan_max(u: float, v: float) -> float:
    """numpy's maximum: NaN when either is NaN."""
    return u if math.isnan(u) else (v if math.isnan(v) else max(u, v))
