"""The free fit's setup kept for the next fit of the same data or the same bins.

The common call of :func:`peaksift.fit` -- a MassHistogram, the shapes by name, nothing
held, started, bounded, constrained or tied -- has a :class:`~.setup.Setup` that depends
only on the histogram's content (every bin's sums, the edges, the flows, the unit), the
shapes' names and the window.  :func:`kept_setup` keeps the last few per binning, found
again by that content: a refit of the same histogram (a search's stages) skips the setup,
with the first start's cost made once.  A histogram new to it in the bins of a kept setup
(a toy, a Poisson-fluctuated copy) has its data checked and its yields' bounds and starts
made anew, the rest -- model, the shapes' bounds and starts, width floors, free
parameters, the first cost's kernels and compiled arrays -- taken from the kept setup
(:func:`_in_same_bins`; the same values :func:`~.setup.setup_of` makes).  A histogram
changed in place has other contents: it is never given a stale setup.  Kept setups hold
private read-only arrays and no reference to the caller's histogram; each fit gets its own
Setup object on them (:meth:`~.setup.Setup.for_fit`: a fit only reads them, and a write
would raise).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .._jit import compiled_module
from .._kept import Kept
from ..likelihood.poisson import use_compiled
from .checks import as_retries
from .data import FitData, _log, prepare, start_bins
from .setup import Setup, entries, read_only, setup_of, yield_bounds, yield_starts

__all__ = ["kept_setup"]

#: setups by (signal, background, window, binned, unit, flows, number of bins): each a
#: list of the last two, found by the bins' contents (a toy study's each new); an entry
#: holds ~10 arrays of the bins (~0.2 MB for 1,350 bins), so few are kept
_SETUPS = Kept(4)
_PER_KEY = 2


def kept_setup(data: Any, signal: Any, background: Any, window: Any, binned: Any,
               bins: Any, retries: Any) -> Setup | None:
    """The setup of the common call (a MassHistogram, shapes by name; the caller checks
    that nothing is held, started, bounded, constrained or tied), kept by the histogram's
    content, as this fit's own (:meth:`~.setup.Setup.for_fit`); None for any other call
    (its setup is made by :func:`setup_of`)."""
    if (type(data) is not _mass_histogram() or type(signal) is not str
            or type(background) is not str or binned is False):
        return None
    try:
        win = None if window is None else (float(window[0]), float(window[1]))
    except (TypeError, ValueError, IndexError, KeyError):
        return None  # setup_of says what is wrong with it
    if win is not None and len(window) != 2:
        return None
    key = (signal, background, win, binned, data.unit, data.underflow, data.overflow,
           data.underflow_variance, data.overflow_variance, data.edges.size)
    content = (data.edges.tobytes(), data.values().tobytes(), data.variances().tobytes())
    kept = _SETUPS.get(key)
    same_bins = None  # a kept setup of other contents in the same bins
    if kept is not None:
        for have, su in kept:
            if have[0] is not content[0]:
                if have[0] != content[0]:
                    continue
                # the kept bytes of these edges from now on: compared by identity with the
                # other entries of these bins (and kept once for all of them)
                content = (have[0], content[1], content[2])
            if have[1] == content[1] and have[2] == content[2]:
                as_retries(retries)
                if su.d.note:  # as prepare says it
                    _log.info(su.d.note)
                return su.for_fit()
            if same_bins is None:
                same_bins = su
    # (a toy's path first: the new counts in the bins of a kept setup, made kept)
    su = None if same_bins is None else _new_counts(data, retries, same_bins)
    if su is None:
        su = None if same_bins is None else _in_same_bins(data, window, binned, bins,
                                                          retries, same_bins)
        if su is None:
            su = setup_of(data, signal, background, window, None, binned, bins, None, None,
                          None, None, None, retries)
        _make_kept(su)
    _SETUPS.put(key, [(content, su), *(kept or ())][:_PER_KEY])  # (none had this content)
    return su.for_fit(first_unused=bool(su.first_cost))


def _make_kept(su: Setup) -> None:
    """``su`` as a kept setup holds it: the data as private read-only arrays (the caller's
    histogram may change), no reference to the caller's histogram (the arrays a fit reads
    are read-only in every setup: every fit of it shares them, :meth:`~.setup.Setup.for_fit`)."""
    d = object.__new__(type(su.d))  # copy.copy's, without its ~5 us of dispatch
    d.__dict__.update(su.d.__dict__)
    d.edges, d.n = su.binned_arrays[0], su.binned_arrays[1]
    d.n2 = d.n if not d.weighted else read_only(d.n2)  # unweighted: the same numbers
    d.hist = None
    su.d = d


def _in_same_bins(data: Any, window: Any, binned: Any, bins: Any, retries: Any,
                  other: Setup) -> Setup | None:
    """The setup of ``data`` from ``other``, kept for other contents in the same bins with
    the same shapes and window: the data checked (:func:`~.data.prepare`), the yields'
    bounds and starts made for its total as :func:`~.setup.setup_of` makes them, the rest
    as ``other`` has it (the shapes' bounds and starts, the width floors, which parameters
    float: none of them depends on the contents; the shapes' starts were found to put
    probability into the window).  None when ``other`` has no first cost yet or the data
    would be refused (:func:`~.setup.setup_of` then makes the setup, or says why not)."""
    if not other.first_cost:
        return None
    d = prepare(data, None, window, binned, bins)
    if d.total <= 0 or not d.binned:
        return None
    as_retries(retries)
    model = other.model
    lower, upper = other.lower.copy(), other.upper.copy()
    yield_bounds(model, d.total, lower, upper)
    if not (lower < upper).all():
        return None
    base = other.base.copy()
    for _, _, iy in model.blocks:
        base[iy] = np.nan  # as a yield's start before setup_of's yield_starts
    yield_starts(model, d.total, base)
    counts = read_only(d.n)
    # unweighted (sums equal to squared sums, flows too): the factors are all 1, as the
    # histogram gives them; else its own new array (no copy)
    scale = np.ones(counts.size) if not d.weighted else d.hist.scaled_poisson_factors()
    scale.flags.writeable = False
    edges = other.binned_arrays[0]  # the same array: its per-edges work is kept by it
    lower.flags.writeable = upper.flags.writeable = base.flags.writeable = False  # (setup_of's)
    su = Setup(d, model, other.names, lower, upper, base, other.is_fixed,
               dict(other.floors), {}, [], [], {}, other.free_idx, other.inner_free,
               entries(d), (edges, counts, scale),
               tuple(read_only(a) for a in start_bins(d)))
    su.first_cost.append(other.first_cost[0].with_counts(counts, scale, base))
    return su


def _new_counts(data: Any, retries: Any, other: Setup) -> Setup | None:
    """:func:`_in_same_bins` for unweighted contents in the bins of an unweighted kept setup
    fitted whole (no bins cut by the window), made as a kept setup holds it
    (:func:`_make_kept`): :func:`.count_pass.check_and_merge` checks the contents, copies
    them and sums them, total and merged start bins, in one compiled pass (the numbers
    :func:`~.data.prepare` and :func:`~.data.start_bins` give), and the new setup shares
    ``other``'s edges, factors of 1, start edges and which parameters float (the same
    values: the kernels and work kept by those arrays are found again).  None for
    anything else (weighted, cut by the window, refused, no first cost yet:
    :func:`_in_same_bins`' general path decides)."""
    od = other.d
    edges, _, scale = other.binned_arrays
    n, n2 = data.values(), data.variances()
    if (od.weighted or not other.first_cost or edges.size != data.edges.size
            or not use_compiled()
            or not (type(n) is np.ndarray and n.dtype == np.float64 and n.flags.c_contiguous
                    and type(n2) is np.ndarray and n2.dtype == np.float64
                    and n2.flags.c_contiguous and n2.size == n.size)):
        return None
    se, _, ssc = other.start_arrays
    nbins = n.size
    k = -(-nbins // _START_MOST)
    counts, safe = np.empty(nbins), np.empty(nbins)
    merged = np.empty(se.size - 1) if k > 1 else counts  # (k = 1: the fit's own bins)
    kern = compiled_module(_COUNT_PASS)
    verdict, total = kern.check_and_merge(n, n2, k, merged, safe, counts)
    if verdict != 0 or not total > 0:
        return None
    as_retries(retries)
    if od.note:  # as prepare says it (the same window on the same edges)
        _log.info(od.note)
    counts.flags.writeable = merged.flags.writeable = False
    # the data and the setup as FitData(...) and Setup(...) make them, as copies of
    # ``other``'s with the counts' fields replaced (a dict copied in C: the constructors'
    # ~17 stores each cost ~25 us in a fit after other work)
    d = object.__new__(FitData)
    d.__dict__.update(od.__dict__)  # (a histogram's, unweighted, in the same window)
    d.n = d.n2 = counts
    d.total = total
    model = other.model
    lower, upper, base = other.lower.copy(), other.upper.copy(), other.base.copy()
    # (only the yields' bounds change: lower < upper, as other's, for any total > 0)
    yield_bounds(model, total, lower, upper)
    yield_starts(model, total, base, anew=True)
    lower.flags.writeable = upper.flags.writeable = base.flags.writeable = False
    su = object.__new__(Setup)
    su.__dict__.update(other.__dict__)  # (no constraints, ties or given values: setup_of's)
    su.d, su.lower, su.upper, su.base, su.n_entries = d, lower, upper, base, total
    su.binned_arrays, su.start_arrays = (edges, counts, scale), (se, merged, ssc)
    su.first_cost, su.first_unused = [], False
    np.log(safe, out=safe)  # numpy's logarithm, as saturated_term takes it
    su.first_cost.append(other.first_cost[0].with_counts(
        counts, scale, base, saturated=kern.saturated_sum(counts, safe)))
    return su


#: :func:`~.data.start_bins`' most bins
_START_MOST = 100
#: the compiled pass, imported at its first use (importing the fitting loads no numba)
_COUNT_PASS = "peaksift.fitting.count_pass"


def _mass_histogram() -> type:
    """The MassHistogram class, imported at the first fit (importing the fitting package
    loads no histogram code)."""
    global _MASS_HISTOGRAM
    if _MASS_HISTOGRAM is None:
        from ..histogram import MassHistogram

        _MASS_HISTOGRAM = MassHistogram
    return _MASS_HISTOGRAM


_MASS_HISTOGRAM: type | None = None


