"""Numbers as text for the command-line summary, the report and the figures.

Base layer (imports only the base helper _json): ``cli``, ``report`` and ``plotting`` all format through
these few functions, so a number reads the same everywhere and no output path can fail on a
value peaksift itself produced.  Every function accepts anything -- None, NaN, infinities,
numpy scalars, strings -- and returns text; a missing or non-finite number is ``"n/a"``.

* :func:`as_finite`     -- a finite float or None (the test every other function makes).
* :func:`number`        -- a plain number (4 significant digits; ints with a thousands mark).
* :func:`fixed`         -- a fixed number of decimals (Z, shifts).
* :func:`chi_square`    -- a goodness-of-fit chi-square, one decimal (one rule everywhere).
* :func:`mass_text`     -- a mass: two decimals from 10 up, five significant digits below
  (a hypothesis at 1.0194 GeV, not 1.02).
* :func:`format_pm`     -- ``value ± error``, the error rounded to two significant digits,
  thousands marked like the counts' (:func:`pm_parts`: the same as two texts, for aligned
  tables).
* :func:`format_interval` -- ``value +upper -lower`` for a profile-likelihood interval, an
  end on the parameter's bound or not found written ``?`` with the reason
  (:func:`fit_interval_text`: the same from a fit's results.json entry).
* :func:`p_value`       -- a p-value; below the smallest normal double (2.2e-308), where the
  float is 0, it is written as a power of ten from its ``log10_p``: ``10^-2173.9``.
* :func:`significance`  -- ``Z sigma (p = ...)`` for the local or the global result of a
  search's ``best`` entry, bounds marked (``> 2.75``, ``p < 3.0e-03``).
"""

from __future__ import annotations

import math
import sys
from collections.abc import Mapping
from typing import Any

from ._json import finite

__all__ = ["NA", "as_finite", "chi_square", "fit_interval_text", "fixed", "format_interval",
           "format_pm", "interval_at_bounds", "mass_text", "no_best", "number", "p_value",
           "pm_parts", "significance", "value_decimals"]

#: what every function prints for a missing or non-finite number
NA = "n/a"

# smallest positive normal double: below it a float p-value has lost precision (or is 0)
_P_FLOOR = sys.float_info.min


def as_finite(x: Any) -> float | None:
    """``x`` as a finite float, or None (None, NaN, inf, bools, text that is not a number)."""
    return None if isinstance(x, bool) else finite(x)


def number(x: Any, digits: int = 4, *, sep: str = ",") -> str:
    """A number in ``digits`` significant digits (scientific notation below 1e-3 and from
    1e6); integers in full with ``sep`` between thousands; bools as yes/no; other text as is.
    """
    if x is None:
        return NA
    kind = getattr(getattr(x, "dtype", None), "kind", "")  # numpy scalars
    if isinstance(x, bool) or kind == "b":
        return "yes" if x else "no"
    if isinstance(x, int) or kind in ("i", "u"):
        return f"{int(x):,}".replace(",", sep)
    if isinstance(x, str) and as_finite(x) is None:
        return x
    v = as_finite(x)
    if v is None:
        return NA
    if v != 0 and (abs(v) < 1e-3 or abs(v) >= 1e6):
        return f"{v:.{max(digits - 1, 1)}e}"
    return f"{v:.{digits}g}"


def fixed(x: Any, decimals: int = 2, *, signed: bool = False) -> str:
    """``x`` with ``decimals`` decimals (``signed``: always with its sign), or ``"n/a"``."""
    v = as_finite(x)
    if v is None:
        return NA
    return f"{v:+.{decimals}f}" if signed else f"{v:.{decimals}f}"


def chi_square(x: Any) -> str:
    """A goodness-of-fit chi-square: one decimal everywhere (``81.97`` -> ``82.0`` in the
    summary, the report, the figures and the reprs alike), or ``"n/a"``."""
    return fixed(x, 1)


def mass_text(x: Any) -> str:
    """A mass (a hypothesis, a best point): two decimals from 10 up (152.62), five significant
    digits below (1.0194, 0.49761), at most six decimals, or ``"n/a"``."""
    v = as_finite(x)
    if v is None:
        return NA
    lead = math.floor(math.log10(abs(v))) if v != 0 else 0
    return fixed(v, 2 if lead >= 1 else min(6, 4 - lead))


def no_best(z_best: Any, blinded: Any) -> str | None:
    """Why a scan or a combination has no best hypothesis to quote (its best's local Z not
    a number: ``"every hypothesis blinded"`` when the mask ``blinded`` is all true, else
    ``"no hypothesis fitted"``), or None when it has one.  Its reprs then say so instead of
    a best mass with ``Z_local = nan`` (the index of a NaN maximum is the first mass)."""
    if as_finite(z_best) is not None:
        return None
    try:
        every = bool(len(blinded)) and all(bool(b) for b in blinded)
    except TypeError:
        every = False
    return "every hypothesis blinded" if every else "no hypothesis fitted"


def format_pm(value: Any, error: Any, unit: str = "") -> str:
    """``value ± error`` with the error rounded to two significant digits (common practice).

    Without a usable error (None, NaN, inf, <= 0) only the value is shown; without a usable
    value, ``"n/a"``.
    """
    u = f" {unit}" if unit else ""
    v = as_finite(value)
    if v is None:
        return NA
    e = as_finite(error)
    if e is None or e <= 0:
        return f"{number(v)}{u}"
    dec = max(0, 1 - math.floor(math.log10(e)))
    # thousands marked as in number()'s counts: 1,053 ± 32 beside 1,053 candidates
    return f"{v:,.{value_decimals(v, e)}f} \u00b1 {e:,.{dec}f}{u}"


def value_decimals(value: float, error: float) -> int:
    """Decimals of a value quoted with ``error`` (finite, > 0): those of the error rounded
    to two significant digits (common practice), but at least three significant digits
    of a value smaller than its error (a width of 0.127 +- 6848 read "0 +- 6848")."""
    dec = max(0, 1 - math.floor(math.log10(error)))
    if value != 0 and abs(value) < error:
        dec = max(dec, 2 - math.floor(math.log10(abs(value))))
    return dec


def pm_parts(value: Any, error: Any) -> tuple[str, str]:
    """``(value, error)`` as the two texts :func:`format_pm` joins with ``±`` (the error
    ``""`` when there is none): for tables that align the ``±`` signs."""
    text = format_pm(value, error)
    v, _, e = text.partition(" \u00b1 ")
    return v, e


def p_value(p: Any, log10_p: Any = None, *, upper_bound: bool = False) -> str:
    """A p-value as text: ``0.0123``, ``4.80e-05``, or ``10^-2173.9`` once it underflows.

    The float ``p`` is used while it is a normal double (>= 2.2e-308); below that (0 after
    underflow) the exponent ``log10_p`` is written instead.  Without an exponent an
    underflowed p reads ``< 2.2e-308``.  ``upper_bound`` prefixes ``<`` (e.g. no toy reached
    the observed value, so only a bound is known).
    """
    lt = "< " if upper_bound else ""
    v = as_finite(p)
    if v is not None and v >= _P_FLOOR:
        return lt + (f"{v:.2e}" if v < 1e-3 else f"{v:.4f}")
    lg = as_finite(log10_p)
    if lg is not None:
        return f"{lt}10^{lg:.1f}"
    if v is not None and 0.0 <= v < _P_FLOOR:  # underflowed and no exponent to show
        return f"< {_P_FLOOR:.1e}"
    return NA


def significance(best: Mapping[str, Any] | None, which: str = "local", *,
                 sigma: str = "\u03c3") -> str:
    """``Z sigma (p = ...)`` of the ``local`` or ``global`` result in a search's ``best``.

    Reads ``z_<which>``, ``p_<which>``, ``log10_p_<which>`` and, for the global result,
    ``z_global_is_lower_bound``, ``p_global_is_upper_bound`` and ``global_method``; any of
    them may be missing or not finite.
    """
    b = best if isinstance(best, Mapping) else {}
    z = fixed(b.get(f"z_{which}"))
    lower = which == "global" and bool(b.get("z_global_is_lower_bound"))
    upper = which == "global" and bool(b.get("p_global_is_upper_bound", lower))
    ztxt = f"> {z}" if lower and z != NA else z
    ztxt = f"{ztxt} {sigma}" if z != NA else ztxt
    ptxt = p_value(b.get(f"p_{which}"), b.get(f"log10_p_{which}"), upper_bound=upper)
    inner = f"p = {ptxt}" if not ptxt.startswith("<") else f"p {ptxt}"
    if which == "global":
        inner += f", {b.get('global_method') or NA}"
        if upper and b.get("p_global_bound_cl") is not None:
            cl, n = as_finite(b.get("p_global_bound_cl")), as_finite(b.get("n_toys"))
            inner += (f"; {number(100 * cl, 3)}% CL bound" if cl is not None else "") + \
                (f", no toy of {int(n)} reached the observed q0" if n else "")
    return f"{ztxt} ({inner})"


def interval_at_bounds(centre: Any, lower: Any, upper: Any, bounds: Any
                       ) -> tuple[bool, bool]:
    """Whether the lower and the upper end of a profile-likelihood interval (``centre +
    lower``, ``centre + upper``) lie on the parameter's ``bounds`` ``(lo, hi)``: where the
    profile had not risen by 1/2 in -ln L before the bound, the minimiser stops there and
    reports the distance to it, which is no error (None or non-finite bounds: never)."""
    c = as_finite(centre)
    try:
        lo, hi = (as_finite(b) for b in bounds)
    except (TypeError, ValueError):
        return False, False

    def on(end: Any, b: float | None) -> bool:
        e = as_finite(end)
        return (c is not None and e is not None and b is not None
                and abs(c + e - b) <= 1e-9 * max(1.0, abs(b)))

    return on(lower, lo), on(upper, hi)


def format_interval(value: Any, lower: Any, upper: Any, unit: str = "", *,
                    bounds: Any = None, centre: Any = None, short: bool = False,
                    label: str = "") -> str:
    """``value +upper -|lower|`` for an asymmetric (profile-likelihood) interval, rounded to
    two significant digits of the smaller of the two errors (common practice), e.g.
    ``152.24 +0.50 -0.55 GeV``.  Without a usable interval: the value alone.

    An end that is not known reads ``?`` with the reason after the unit: one that lies on
    the parameter's ``bounds`` (``(lo, hi)``, the fitted parameter's value ``centre``,
    default ``value``; :func:`interval_at_bounds`) -- ``198.61 +? -0.46 GeV (upper end at
    the bound 200)`` -- or one the minimiser did not find or validate (None, NaN: ``no valid
    upper end``); ``short`` (a figure's table): the reason as ``(bound 200)``, ``(not
    valid)``; ``label``: what the interval is, first in the same parentheses
    (``(profile-likelihood interval; upper end at the bound 200)``)."""
    u = f" {unit}" if unit else ""
    v = as_finite(value)
    if v is None:
        return NA
    at_lo, at_hi = interval_at_bounds(v if centre is None else centre, lower, upper,
                                      bounds if bounds is not None else (None, None))
    ends = {"lower": (lower, at_lo), "upper": (upper, at_hi)}
    errs = [abs(f) for x, at in ends.values() if not at and (f := as_finite(x))]
    if not (at_lo or at_hi or errs):
        return f"{number(v)}{u}"  # no usable interval at all: the value alone (no label)
    dec = max(0, 1 - math.floor(math.log10(min(errs)))) if errs else None

    def side(name: str) -> str:
        x, at = ends[name]
        f = as_finite(x)
        return "?" if at or f is None or dec is None else f"{abs(f):,.{dec}f}"

    why = []
    for name, (x, at) in ends.items():
        if at:
            b = as_finite(bounds[0 if name == "lower" else 1])
            why.append(f"bound {number(b)}" if short else
                       f"{name} end at the bound {number(b)}")
        elif as_finite(x) is None:
            why.append("not valid" if short else f"no valid {name} end")
    why = [label, *why] if label else why
    tail = f" ({'; '.join(why)})" if why else ""
    vtext = f"{v:,.{value_decimals(v, min(errs))}f}" if dec is not None else number(v)
    return f"{vtext} +{side('upper')} -{side('lower')}{u}{tail}"


def fit_interval_text(fit: Mapping[str, Any], key: str, par: str, unit: str = "",
                      label: str = "") -> str:
    """The profile-likelihood interval of parameter ``par`` of a fit's results.json entry
    (``FitResult.to_dict``) around its ``key`` value (``peak_mass``, ``width``, ...), ends
    on the parameter's bounds marked (:func:`format_interval`)."""
    iv = (fit.get("intervals") or {}).get(par) or (None, None)
    p = (fit.get("parameters") or {}).get(par) or {}
    entry = fit.get(key)
    value = entry.get("value") if isinstance(entry, Mapping) else entry
    return format_interval(value, iv[0], iv[1], unit, bounds=p.get("bounds"),
                           centre=p.get("value", value), label=label)
