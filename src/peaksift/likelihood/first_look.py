"""The start finder's first look and first start in two compiled calls, where they apply.

:func:`fused_starts` -- for a binned free fit of one Gaussian on a background with a
compiled edge kernel, nothing given, the mass, width and both yields free: a
:class:`FusedStarts` whose two methods make, with :mod:`.start_fused`'s kernels, what
:func:`.starts._first_look` and the first start's :func:`.starts._one_start` make through
~10 compiled calls and ~60 numpy operations -- the same numbers (the same kernels, steps
and summation order).  On a histogram new to the process (a toy, the next channel) those
calls cost far more than their arithmetic: every call path is cold.  Where a kernel
declines (a background fit not converged, no width from the profile) a method returns
None and the general path answers, exactly as without this module.
"""

from __future__ import annotations

import numpy as np

from .._jit import compiled_module
from ..errors import PeaksiftError
from ..shapes import Gaussian
from .coarse_scan import coarse_rows_kept
from .narrow import NARROW_MARGIN, STENCIL, narrow_from_rows
from .poisson import START_KERNELS_MODULE, use_compiled
from .start_background import FIT_SETTINGS, background_static, edge_row
from .start_widths import _BAND_SIGMAS, WIDTH_FACTORS

__all__ = ["FUSED_MODULE", "FusedStarts", "fused_starts"]

FUSED_MODULE = "peaksift.likelihood.start_fused"

#: numerical failures the numpy steps after the kernels may meet (as :mod:`.starts`')
_NUMERIC = (ArithmeticError, np.linalg.LinAlgError, ValueError, PeaksiftError)


def _plain(a) -> bool:
    """A float64 C-contiguous numpy array (what the kernels take as they are)."""
    return type(a) is np.ndarray and a.dtype == np.float64 and a.flags.c_contiguous


def fused_starts(model, edges, n, scale, is_fixed, given, fine) -> FusedStarts | None:
    """The fused first look of this fit, or None where it does not apply (see the
    module's guide).  What it found for a model, read-only start edges and fine edges and
    the parameters held is kept for the next fit of the same (a toy of a kept setup)."""
    if given or fine is None or not use_compiled():
        return None
    fe, fn, fsc = fine
    held = is_fixed.tobytes()
    seen = _LAST[0]
    if seen is not None and seen[0] is model and seen[1] is edges and seen[2] is fe and (
            seen[3] == held):
        plan = seen[4]
    else:
        plan = _plan(model, edges, is_fixed, fe)
        if not (edges.flags.writeable or fe.flags.writeable):
            _LAST[0] = (model, edges, fe, held, plan)
    if plan is None:
        return None
    nb = edges.size - 1
    if not (all(_plain(a) for a in (n, scale, fn, fsc)) and n.size == nb
            and scale.size == nb and fn.size == fe.size - 1 and fsc.size == fn.size):
        return None
    return FusedStarts(model, n, scale, fine, plan)


#: [(model, start edges, fine edges, parameters held, :func:`_plan`)] of the last fit
#: (holds its arrays, so the identities stay valid)
_LAST: list = [None]


def _plan(model, edges, is_fixed, fe):
    """What the fused calls need of the model and the binnings, or None where they do not
    apply: ``(edges, free background parameters, static arrays, fine edge kernel, indices
    of the mass, width, signal yield and background yield, the signal yields' indices,
    window)``."""
    if len(model.blocks) != 2 or not (_plain(edges) and _plain(fe)):
        return None
    shape, sl, iy = model.blocks[0]
    if type(shape) is not Gaussian:
        return None
    names = shape.parameter_names
    i_m, i_sig = sl.start + names.index("mass"), sl.start + names.index("sigma")
    _, bsl, biy = model.blocks[-1]
    if is_fixed[i_m] or is_fixed[i_sig] or is_fixed[iy] or is_fixed[biy]:
        return None
    free = np.array([i for i in range(bsl.start, bsl.stop) if not is_fixed[i]] + [biy],
                    np.int64)
    static = background_static(model, edges, free)
    if static is None:
        return None
    fine_row = edge_row(model, fe)
    if fine_row is None:
        return None
    window = (float(model.window[0]), float(model.window[1]))
    return (edges, free, static, fine_row, i_m, i_sig, iy, biy, np.array([iy], np.int64),
            window)


class FusedStarts:
    """The compiled first look of one free fit (made by :func:`fused_starts`)."""

    def __init__(self, model, n, scale, fine, plan) -> None:
        self.model, self.n, self.scale, self.fine = model, n, scale, fine
        (self.edges, self.free, self.static, self.fine_row, self.i_m, self.i_sig, self.iy,
         self.biy, self.iys, self.window) = plan
        self.kern = compiled_module(FUSED_MODULE)

    def first_look(self, base, lower, upper, grid, dips):
        """``(background-only start, its counts, (peaks, dips) of the coarse scan at the
        trial masses grid)`` as :func:`.starts._background_or_base_counts` and
        :func:`.coarse_scan.coarse_gains` give them; None: the general path answers."""
        sigma = float(base[self.i_sig])
        if not sigma > 0:
            return None
        lo, hi = self.window
        rows = coarse_rows_kept(compiled_module(START_KERNELS_MODULE), self.edges, lo, hi, grid,
                         sigma)
        if rows is None:
            return None
        vb, bexp = np.empty(base.size), np.empty(self.n.size)
        index, gain = np.empty(5, np.int64), np.empty(5)
        try:
            status, k1, k2 = self.kern.first_look(
                self.static, self.n, self.scale, base, self.free, lower, upper, self.iys,
                self.biy, FIT_SETTINGS, rows, bool(dips), vb, bexp, index, gain)
        except (ArithmeticError, ValueError):
            return None
        if status != 0:
            return None
        return vb, bexp, (list(zip(index[:k1].tolist(), gain[:k1].tolist())),
                          list(zip(index[3:3 + k2].tolist(), gain[3:3 + k2].tolist())))

    def first_start(self, base, vb, lower, upper, centres, mass, total, q_top, exclude):
        """``(narrow candidates, the start at mass)``: :func:`.narrow.narrow_candidates`
        at the background-only start ``vb`` against the best gain ``q_top`` away from the
        ``exclude`` intervals, and :func:`.starts._one_start`'s start at ``mass`` (factor
        1, the sidebands' background); either None where the general path must answer."""
        fe, fn, fsc = self.fine
        narrow, fcounts = np.empty(fn.size, np.int64), np.empty(fn.size)
        s = np.empty(base.size)
        try:
            narrow_ok, k, start_ok = self.kern.first_start(
                self.static, self.n, self.scale, self.edges, centres, vb, base, self.free,
                lower, upper, self.iys, self.biy, FIT_SETTINGS, self.i_m, self.i_sig,
                self.iy, float(mass), float(total), self.window, WIDTH_FACTORS, _BAND_SIGMAS,
                self.fine_row, fe, fn, fsc, STENCIL, q_top - NARROW_MARGIN,
                np.array(exclude, float).reshape(-1, 2), narrow, fcounts, s)
        except (ArithmeticError, ValueError):
            return None, None
        found = None
        if narrow_ok == 0:
            try:
                found = narrow_from_rows(fe, fn, fcounts, fsc, narrow[:k], q_top)
            except _NUMERIC:
                found = []
        return found, (s if start_ok == 0 else None)
