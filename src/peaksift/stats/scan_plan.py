"""A scan's per-window work: the hypotheses, sigma at each, the blinded bins and the signal's bin fractions, kept by what they are made of.

Why kept: a search scans one window several times (its background choice, the scan, the
limits), and a 100-bin scan spent ~0.3 ms of its ~2.5 ms here, none of it depending on
the counts (issue 11: the cost per mass and bin of a scan should not grow at few bins).
:func:`window_plan` checks and builds the pieces once per key (:func:`_plan_key`: the
signal shape and its options, the resolution, the natural width, the blinded range, the
shape parameters, the edges, the per-bin scale, the hypotheses, the compiled-or-numpy
switch) and gives copies afterwards, the same numbers (tests/test_scan.py).  Inputs that
are functions (a resolution or width given as a callable, a signal model's parameters) are
never kept: a function of the same name may compute something else next time.
"""

from __future__ import annotations

import hashlib
import pickle
import threading
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..blinding import blinded_bins
from ..errors import FitError
from ..likelihood.poisson import use_compiled
from ..resolution import check_resolved
from .bounds import check_fit_bins, check_plan, check_widths

__all__ = ["WindowPlan", "window_plan"]


@dataclass(frozen=True)
class WindowPlan:
    """What a scan of one window needs besides the counts."""

    masses: np.ndarray          # every hypothesis (GeV)
    sigma: np.ndarray           # the resolution at each
    blinded: np.ndarray         # per window bin: hidden
    used: np.ndarray            # indices of the bins in the likelihood
    blinded_mass: np.ndarray    # per hypothesis: inside the blinded range
    window_fractions: np.ndarray  # signal bin fractions (hypotheses x window bins), scaled
    open_masses: np.ndarray     # the hypotheses outside the blinded range
    open_fractions: np.ndarray  # their fractions in the used bins


#: plans by key, newest last; only plans of at most _CELLS_KEPT fractions are kept (the
#: cost kept matters at few bins; a 10,000-bin plan's copy would cost what it saves)
_PLANS: OrderedDict[bytes, WindowPlan] = OrderedDict()
_PLANS_KEPT = 8
_CELLS_KEPT = 200_000
_PLANS_LOCK = threading.Lock()

#: shape attributes that only cache work or memoise (not options of the shape)
_SHAPE_MEMOS = ("_cache", "_lx", "_edge_terms", "_names_of")


def _plan_key(sig: Any, n_background: int, spec: Any, masses: Any, m_arr: Any,
              resolution: Any, natural_width: Any, blind: Any,
              signal_params: Any) -> bytes | None:
    """A digest of everything :func:`_build` reads, or None (not kept: a function among
    the inputs, or something that does not pickle)."""
    if (callable(natural_width) or getattr(resolution, "kind", "function") == "function"
            or any(callable(v) for v in (signal_params or {}).values())):
        return None
    state = {k: v for k, v in vars(sig).items() if k not in _SHAPE_MEMOS}
    try:
        head = pickle.dumps((type(sig).__module__, type(sig).__qualname__, state,
                             n_background, spec.window, resolution, natural_width, blind,
                             sorted((signal_params or {}).items()),
                             None if m_arr is not None else int(masses), use_compiled()),
                            protocol=4)
    except Exception:  # noqa: BLE001 -- any pickling failure: just build the plan again
        return None
    return input_digest(head, (spec.edges, spec.bin_scale, m_arr))


def input_digest(head: bytes, arrays: Any) -> bytes:
    """SHA-256 of ``head`` (the pickled small inputs) and of each array's dtype, shape and
    raw bytes, a ``-`` for each None: the key of a result kept by its inputs."""
    digest = hashlib.sha256(head)
    for a in arrays:
        if a is None:
            digest.update(b"-")
            continue
        a = np.ascontiguousarray(a)
        digest.update(f"{a.dtype.str}{a.shape}".encode())
        digest.update(a.data)
    return digest.digest()


def window_plan(sig: Any, bkg: Any, spec: Any, masses: Any, m_arr: np.ndarray | None, *,
                resolution: Any, natural_width: Any, blind: Any,
                signal_params: Any) -> WindowPlan:
    """The plan of a scan of ``spec`` (a :class:`~peaksift.stats.scan_inputs._Spectrum`) at
    ``masses`` (``m_arr``: them as an array, or None for a number of evenly spaced points):
    checked (a FitError says what is wrong) and built, or copied from an earlier one."""
    key = _plan_key(sig, len(bkg.parameters), spec, masses, m_arr, resolution,
                    natural_width, blind, signal_params)
    with _PLANS_LOCK:
        hit = _PLANS.get(key) if key is not None else None
        if hit is not None:
            _PLANS.move_to_end(key)
    if hit is not None:
        return _handed_out(*hit)
    plan = _build(sig, bkg, spec, masses, m_arr, resolution, natural_width, blind,
                  signal_params)
    if key is not None and plan.window_fractions.size <= _CELLS_KEPT:
        kept = _kept(plan)
        with _PLANS_LOCK:
            _PLANS[key] = kept
            while len(_PLANS) > _PLANS_KEPT:
                _PLANS.popitem(last=False)
    return plan


def _kept(plan: WindowPlan) -> tuple[WindowPlan, frozenset[str]]:
    """The plan as kept: its read-only arrays themselves (a scan hands out the unweighted
    fractions read-only: the compiled kernels were specialised on that), read-only copies
    of the others, whose names are returned beside it; arrays that were one stay one."""
    copies: dict[int, np.ndarray] = {}
    fields = {}
    for name, a in vars(plan).items():
        if a.flags.writeable and id(a) not in copies:
            c = a.copy()
            c.flags.writeable = False
            copies[id(a)] = c
        fields[name] = copies.get(id(a), a)
    writable = frozenset(n for n, a in vars(plan).items() if a.flags.writeable)
    return WindowPlan(**fields), writable


def _handed_out(kept: WindowPlan, writable: frozenset[str]) -> WindowPlan:
    """A kept plan as :func:`_build` gave it: the arrays that were writable as fresh
    copies (arrays that were one stay one), the read-only ones shared."""
    copies: dict[int, np.ndarray] = {}
    fields = {}
    for name, a in vars(kept).items():
        if name in writable:
            if id(a) not in copies:
                copies[id(a)] = a.copy()
            a = copies[id(a)]
        fields[name] = a
    return WindowPlan(**fields)


def _build(sig: Any, bkg: Any, spec: Any, masses: Any, m_arr: np.ndarray | None,
           resolution: Any, natural_width: Any, blind: Any, signal_params: Any) -> WindowPlan:
    lo, hi = spec.window
    nbins = spec.edges.size - 1
    if m_arr is None:
        npts = int(masses)
        if npts < 2:
            raise FitError(f"scan needs at least 2 mass points, got {masses!r}")
        check_plan(npts, nbins)
        pad = 0.05 * (hi - lo)
        m_arr = np.linspace(lo + pad, hi - pad, npts)
    if m_arr.ndim != 1 or m_arr.size == 0 or not np.all(np.isfinite(m_arr)):
        raise FitError("scan masses must be a non-empty 1-d array of finite numbers")
    outside = (m_arr <= lo) | (m_arr >= hi)
    if outside.any():
        raise FitError(f"mass {m_arr[outside][0]:g} is outside the window "
                       f"({lo:g}, {hi:g}); give masses inside the window")
    check_plan(m_arr.size, nbins)
    sigma = check_resolved(resolution, m_arr, spec.edges)
    gamma = natural_width(m_arr) if callable(natural_width) else natural_width
    check_widths((lo, hi), float(np.max(sigma)),
                 None if gamma is None else float(np.max(gamma)))
    blinded = blinded_bins(spec.edges, blind)
    used = np.flatnonzero(~blinded)
    try:
        check_fit_bins(used.size, len(bkg.parameters), n_blinded=int(blinded.sum()))
    except FitError as exc:
        raise FitError(f"scan: {exc}") from None
    blinded_mass = np.zeros(m_arr.size, bool)
    if blind is not None:
        blinded_mass = (m_arr >= float(blind[0])) & (m_arr <= float(blind[1]))
    fr_all = _signal_fractions(sig, spec.edges, _signal_params(
        sig, spec.window, m_arr, sigma, natural_width, signal_params), spec.window, m_arr.size)
    fr_all = np.broadcast_to(fr_all, (m_arr.size, nbins))
    if spec.bin_scale is not None:
        fr_all = fr_all * spec.bin_scale   # expectations in effective counts, bin by bin
    fr_all = np.ascontiguousarray(fr_all)
    # (masses x bins) arrays are a 10,000-bin scan's largest: copied only where blinding
    # drops bins or masses (each copy cost ~2% of such a scan)
    fractions = fr_all if used.size == nbins else fr_all[:, used]
    open_masses, open_fractions = m_arr, fractions
    if blinded_mass.any():
        open_masses, open_fractions = m_arr[~blinded_mass], fractions[~blinded_mass]
    return WindowPlan(m_arr, sigma, blinded, used, blinded_mass, fr_all, open_masses,
                      open_fractions)


def _signal_params(shape: Any, window: tuple[float, float], masses: np.ndarray,
                   sigma: np.ndarray, natural_width: Any,
                   signal_params: Mapping[str, float] | None) -> list[Any]:
    names = shape.parameter_names
    given = dict(signal_params or {})
    unknown = set(given) - set(names)
    if unknown:
        raise FitError(f"signal_params: shape {shape.name!r} has no parameter "
                       f"{min(unknown)!r}; its parameters are {', '.join(names)}")
    width = None
    if natural_width is not None:
        if "width" not in names:
            raise FitError(f"natural_width given but signal shape {shape.name!r} has no natural "
                           "width; use 'voigt' (width with resolution) or 'breitwigner'")
        width = (np.asarray(natural_width(masses), float) if callable(natural_width)
                 else np.full(masses.shape, float(natural_width)))
    out: list[Any] = []
    for p in shape.parameters_for(window):
        if callable(given.get(p.name)):  # a function of the hypothesised mass (signal model)
            out.append(np.asarray(given[p.name](masses), float)[:, None])
        elif p.name == "mass":
            out.append(masses[:, None])
        elif p.name == "sigma":
            out.append(sigma[:, None])
        elif p.name == "width":
            if width is None and "sigma" in names:
                raise FitError(f"signal shape {shape.name!r} needs natural_width= (GeV, or a "
                               "callable of mass) for its Breit-Wigner part")
            out.append((sigma if width is None else width)[:, None])
        elif p.name in given:
            out.append(float(given[p.name]))
        else:
            out.append(float(p.start))
    return out


def _signal_fractions(shape: Any, edges: np.ndarray, params: list[Any],
                      window: tuple[float, float], count: int) -> np.ndarray:
    """The signal's bin fractions at every hypothesis: a Gaussian's from one compiled pass
    (:func:`peaksift.shapes.compiled.gaussian_scan_rows`; the edges in its far tails,
    most of a wide window's, cost no library call: ~10x less than the numpy path, the same
    fractions to rounding), another shape's from its ``bin_fractions``."""
    from ..shapes import Gaussian

    if type(shape) is Gaussian and use_compiled():
        from ..shapes.compiled import gaussian_scan_rows

        m, s = (np.ascontiguousarray(np.broadcast_to(np.ravel(p), (count,)), float)
                for p in params)
        out = np.empty((count, edges.size - 1))
        if gaussian_scan_rows(edges, m, s, float(window[0]), float(window[1]), out):
            return out
    return np.asarray(shape.bin_fractions(edges, params, window), float)

