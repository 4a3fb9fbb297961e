"""Restarts of an invalid fit: starts of another kind where its lowest point lies in another
basin than any of its starts reached.

:func:`peaksift.fitting.fit` minimises from every start :func:`~peaksift.likelihood.
starts.fit_starts` offers and keeps the lowest minimum; :mod:`.polish` then takes an invalid
one on to the lowest point of its own valley.  Three kinds of basin lie beyond both, each
behind a wall no start's path crosses, and each shows in the invalid minimum itself:

* **the other sign of the signal.**  At a signal yield of zero the NLL does not depend on
  the peak's mass or width, so a minimiser rarely crosses zero: the fit's starts are peaks
  (a positive yield) and dips (negative), each narrow, and a wide term of the other sign
  is reached from neither.  Where the invalid minimum's yield lies within
  :data:`SIGN_ERRORS` errors of zero -- the data do not establish its sign -- the fit starts
  once more from that minimum with the yield's sign reversed (the background's yield taking
  the difference, so the total stays).  On ``scripts/check_fit_minima.py``'s set:
  gauss_exp_z0/9, a deficit of -1,015 events at the window's lower edge (sigma 35 GeV,
  -1,015 +- 3,399) 0.021 above a wide excess of +1,580 at 158 GeV (sigma at its upper
  bound 50 GeV); given_start/18, a spike of +10 +- 6 events at its width's floor 0.82 above
  a valid peak of +24 at 187 GeV, which the reversed spike's path reaches (a fit started
  at a given mass: it scans no dips, and two lie lower still, 158 and 108 GeV).
* **a Crystal Ball's core.**  A Crystal Ball whose core is narrower than the data's bins
  has its tails meeting at the peak (alpha at its lower bound): sigma, alpha and n then
  trade off along flat valleys, and the continuation of :mod:`.polish` follows one to its
  end.  A peak with a core of its own can lie lower (crystalball/38: a 0.25 GeV core with
  alpha_low 0.052, 0.0137 above a 2.1 GeV core with alpha_low 0.44, alpha_high 0.93).
  Where the invalid minimum's core is narrower than the narrowest bin (its width below
  its floor / ``FLOOR_FRACTION``), the fit starts once more from that minimum with the core
  at the width the fit's first start had and the tails at their starts (the shape's
  defaults, or the caller's).
* **a Crystal Ball's tail switched off.**  A tail whose alpha is :data:`TAIL_OFF` or more
  starts where the core has no density left: its alpha and n do not change the NLL, and
  a heavier tail from nearer the core, lower still, is not reached from there
  (crystalball/31: alpha_high 9.2, 0.0091 above a tail from 2.8 widths with n_high at
  1.01; /40 0.0085, /41 0.0016, /22 0.0009).  Where the core is resolved (not restarted as
  above), each such tail is restarted alone, at its starts, the rest of the minimum kept.

A valid fit is never restarted: its numbers and its cost are the same as without this
module.  Each restart is minimised as the fit's starts are, after them, and kept only when
lower (its evaluations count in ``n_calls``, not among ``starts_tried``); it costs only
where a fit is invalid and its minimum shows the sign, the core or a tail undetermined
(14, 16 and 6 of the set's 195 invalid fits).
"""

from __future__ import annotations

import math

import numpy as np

from ..likelihood import Model
from .outcome import FLOOR_FRACTION
from .polish import errors_of

__all__ = ["SIGN_ERRORS", "TAIL_OFF", "restart_points"]

#: an invalid minimum's signal yield within this many of its errors of zero has its sign
#: restarted: at one error only gauss_exp_z0/9 of the set's 195 invalid fits qualifies,
#: at two 14 do (given_start/18 among them, 0.82 lower); without a finite error (a
#: covariance not positive definite: 63 fits, most of them Crystal Balls with a yield of
#: many errors) the sign is not restarted, which found nothing in the set but 1.8e-4
#: lower in powerlaw_1350/8 for +14,300 evaluations
SIGN_ERRORS = 2.0

#: a Crystal Ball tail whose alpha is at least this is switched off: it starts beyond 5
#: widths, where a Gaussian core has 3e-7 of its area left, so neither its alpha nor its n
#: changes the NLL and a minimiser does not come back from there (of the set's 46 invalid Crystal
#: Balls, 6 with a core wider than a bin have one; their restarts cost 359 evaluations)
TAIL_OFF = 5.0


def restart_points(model: Model, best_x: np.ndarray, cov: np.ndarray | None,
                   first: np.ndarray | None, base: np.ndarray, is_fixed: np.ndarray,
                   free_idx: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                   floors: dict[int, float]) -> list[np.ndarray]:
    """The restarts (full parameter vectors) of an invalid fit whose best minimum has the
    free values ``best_x`` and covariance ``cov`` (None or not positive definite: NaN
    errors); ``first`` the full vector of the fit's first start, ``base`` the starting
    values (tails: defaults or given), ``floors`` model index -> a width's floor (a binned
    fit's).  Empty when neither kind applies (module guide)."""
    full = base.copy()
    full[free_idx] = best_x
    where = {int(i): k for k, i in enumerate(free_idx.tolist())}
    err = errors_of(best_x, cov)
    out = []
    biy = model.blocks[-1][2]
    for _, _, iy in model.blocks[:-1]:
        k = where.get(iy)
        if k is None or not lower[iy] < 0.0:
            continue
        y, e = float(full[iy]), float(err[k])
        if y != 0.0 and math.isfinite(e) and abs(y) <= SIGN_ERRORS * e:
            s = full.copy()
            s[iy] = -y
            if biy in where:  # the total kept
                s[biy] = full[biy] + 2.0 * y
            out.append(np.minimum(np.maximum(s, lower), upper))
    shape, sl, _ = model.blocks[0]
    pn = shape.parameter_names
    widths = [sl.start + pn.index(p) for p in shape.width_parameters()]
    tails = [i for i in range(sl.start, sl.stop) if i in where and i not in widths
             and pn[i - sl.start] != "mass"]
    narrow = [i for i in widths if i in where and i in floors
              and full[i] < floors[i] / FLOOR_FRACTION]
    if tails and narrow and first is not None:
        s = full.copy()
        s[tails] = base[tails]
        s[narrow] = first[narrow]
        out.append(np.minimum(np.maximum(s, lower), upper))
    elif tails:
        names = {pn[i - sl.start]: i for i in tails}
        for side in ("low", "high"):
            off = [names[k] for k in (f"alpha_{side}", f"n_{side}") if k in names]
            if f"alpha_{side}" in names and full[names[f"alpha_{side}"]] >= TAIL_OFF:
                s = full.copy()
                s[off] = base[off]
                out.append(np.minimum(np.maximum(s, lower), upper))
    return out
