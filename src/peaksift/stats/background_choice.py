r"""Choosing the background function: candidate families, the order test, the spurious signal.

Which piece when
----------------
* :func:`candidate_shapes`  -- the shapes of a list of families and orders (names such as
  ``"exppoly2"``, ``"bernstein4"``; :data:`FAMILIES` lists what exists).
* :func:`choose_background` -> :class:`BackgroundChoice` -- every candidate fitted
  (background only) to the data, on the sidebands while blinded; per family the
  likelihood-ratio test between consecutive orders and the order it keeps; the goodness of
  fit of each candidate.
* :func:`spurious_signal`   -- signal-plus-background fits of each candidate to a
  high-statistics background template (a histogram from simulation, or a reference
  function) at every scanned mass: the largest fitted signal over its statistical error,
  flagged above a limit (common practice: 0.2).
* :mod:`.envelope`          -- discrete profiling over the kept candidates.

The order test
--------------
Orders of a family are nested (``exppoly`` n in n + 1 at ``b_{n+1} = 0``; ``bernstein`` n in
n + 1 by degree elevation; ``dijet`` n in n + 1 at ``p_n = 0``; ``powersum`` n in n + 1 at
``weight_{n+1} = 0``).  The test statistic between orders n and n + 1 is

.. math:: \lambda_n = 2\,[\mathrm{NLL}_n - \mathrm{NLL}_{n+1}] \ \ (\ge 0)

of the binned Poisson likelihood, and its p-value is taken from Wilks' theorem (Wilks, Ann.
Math. Stat. 9 (1938) 60): a chi-square with :math:`\Delta` ndf = the difference in free
parameters.  A family keeps the lowest order n whose next order does not improve the fit
significantly (p >= ``size``); the rate of choosing a higher order than the truth is then
the nominal ``size`` (checked with toys in the tests).  For ``powersum`` the added exponent
is not identified at ``weight = 0`` (a Davies-type problem): chi-square(2) is then only an
approximation, and said so in the candidate's note.

Goodness of fit: the Baker-Cousins likelihood-ratio chi-square (Baker and Cousins, NIM 221
(1984) 437) with ndf = used bins - free parameters, p from the chi-square distribution.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy import special

from ..blinding import blinded_bins
from ..errors import FitError
from ..likelihood import saturated_term
from .background_result import BackgroundCandidate, BackgroundChoice

__all__ = ["FAMILIES", "BackgroundCandidate", "BackgroundChoice", "candidate_shapes",
           "choose_background", "fit_candidate", "order_test", "spurious_signal",
           "template_histogram"]

#: family -> (shape name, the option that sets the order, default orders)
FAMILIES: dict[str, tuple[str, str, tuple[int, ...]]] = {
    "powersum": ("powersum", "terms", (1, 2, 3)),
    "exppoly": ("exppoly", "order", (1, 2, 3)),
    "bernstein": ("bernstein", "degree", (2, 3, 4, 5, 6)),
    "dijet": ("dijet", "npar", (2, 3, 4)),
}
#: the default threshold of the order test and limit of the spurious signal
ORDER_TEST_SIZE = 0.05
SPURIOUS_LIMIT = 0.2
#: iterations of a candidate's fit with the start's curvature (``fit_background``'s
#: ``curvature_after``); its own curvature after them
_CURVATURE_AFTER = 10


def _parse(label: str) -> tuple[str, int]:
    for fam in FAMILIES:
        if label.startswith(fam) and label[len(fam):].isdigit():
            return fam, int(label[len(fam):])
    raise FitError(f"unknown background candidate {label!r}; write a family and an order, "
                   f"e.g. 'exppoly2' (families: {', '.join(FAMILIES)})")


def candidate_shapes(families: Any = None, *, sqrt_s: float | None = None) -> dict[str, Any]:
    """Candidate label -> shape, for ``families``: None (every family, default orders), a
    list of family names (default orders) or labels (``"dijet3"``), or a mapping family ->
    orders.  ``sqrt_s`` is passed to the dijet family."""
    from .. import shapes

    if families is None:
        families = {f: v[2] for f, v in FAMILIES.items()}
    if isinstance(families, str):
        families = [families]
    if not isinstance(families, Mapping):
        spec: dict[str, list[int]] = {}
        for item in families:
            if item in FAMILIES:
                spec.setdefault(item, []).extend(FAMILIES[item][2])
            else:
                fam, order = _parse(str(item))
                spec.setdefault(fam, []).append(order)
        families = spec
    out: dict[str, Any] = {}
    for fam, orders in families.items():
        if fam not in FAMILIES:
            raise FitError(f"unknown background family {fam!r}; use one of "
                           f"{', '.join(FAMILIES)}")
        name, option, _ = FAMILIES[fam]
        for order in sorted({int(o) for o in orders}):
            opts: dict[str, Any] = {option: order}
            if fam == "dijet" and sqrt_s is not None:
                opts["sqrt_s"] = float(sqrt_s)
            out[f"{fam}{order}"] = shapes.get(name, **opts)
    if not out:
        raise FitError("no background candidates given")
    return out


def _embed(fam: str, theta: np.ndarray) -> np.ndarray:
    """Parameters of order n + 1 reproducing (or, for powersum, nearly) order n's fit."""
    if fam == "bernstein":  # degree elevation of beta = (1, c1^2, ..., cn^2)
        beta = np.concatenate([[1.0], theta**2])
        n = beta.size - 1
        i = np.arange(n + 2)
        up = np.concatenate([[0.0], beta])
        same = np.concatenate([beta, [0.0]])
        new = i / (n + 1) * up + (1 - i / (n + 1)) * same
        return np.sqrt(new[1:] / new[0])
    if fam == "powersum":
        return np.concatenate([theta, [theta[0] + 3.0, 0.05]])
    return np.concatenate([theta, [0.0]])


# --------------------------------------------------------------- fitting
def chi2_sf(x: Any, dof: int) -> Any:
    """The chi-square survival function, ``scipy.stats.chi2.sf(x, dof)`` to the bit (the
    same cephes ``chdtrc`` beneath; 1 for x < 0), without loading ``scipy.stats`` (~0.5 s
    of a search's start-up)."""
    return special.chdtrc(dof, np.maximum(x, 0.0))


def order_test(nll_low: Any, nll_high: Any, dof: int) -> tuple[Any, Any]:
    """The order test between nested fits: ``(lambda, p)`` with lambda = 2 (NLL_low -
    NLL_high) floored at 0 and p = chi-square(``dof``) survival function at lambda
    (Wilks 1938).  Works on arrays (toys)."""
    lam = np.maximum(2.0 * (np.asarray(nll_low, float) - np.asarray(nll_high, float)), 0.0)
    p = chi2_sf(lam, int(dof))
    if np.ndim(lam) == 0:
        return float(lam), float(p)
    return lam, p


def _spectrum_of(data: Any, window: Any, bins: Any):
    from .scan_inputs import _spectrum

    if bins is None and not hasattr(data, "edges"):
        bins = 100
    return _spectrum(data, window, bins, lambda: 1.0)


def _background_model(spec: Any, used: np.ndarray, shape: Any):
    """An empty-mass :class:`ScanModel` of ``shape`` on the used bins (for fitting)."""
    from .scan_inputs import _background_start
    from .toys import ScanModel

    start, lower, upper = _background_start(shape, spec.window)
    counts = spec.counts[used]
    model = ScanModel(edges=spec.edges, used=used, window=spec.window, counts=counts,
                      background=shape, theta=start, bkg_yield=float(counts.sum()),
                      lower=lower, upper=upper, masses=np.empty(0),
                      fractions=np.empty((0, used.size)), bin_scale=spec.bin_scale)
    return model, start


def _expected_counts(spec: Any, shape: Any, theta: np.ndarray, b: float) -> np.ndarray:
    """A candidate's fitted counts in every bin of the window (the shape is normalised on
    the whole window, ``b`` its yield there; in effective counts for a weighted spectrum,
    as the likelihood compares them: :func:`.toy_model.bkg_fractions` on every bin)."""
    nb = spec.edges.size - 1
    g = shape.bin_fractions(spec.edges, [np.array([[t]]) for t in theta], spec.window)
    g = np.broadcast_to(g, (1, nb))[0]
    if spec.bin_scale is not None:
        g = g * spec.bin_scale
    return float(b) * g


def fit_candidate(spec: Any, used: np.ndarray, shape: Any,
                  extra_start: np.ndarray | None = None) -> tuple[np.ndarray, float, float]:
    """Background-only fit of one candidate: ``(theta, yield, NLL)`` (NLL without the
    saturated constant).

    Without ``extra_start``: the scan's robust multi-start fit.  With it (the next order of
    a family, started from the lower order's minimum embedded, :func:`_embed`): the stacked
    damped Newton fit from that start and the default one, which never rises above the
    start's NLL, so a higher order is never fitted worse than the lower one it contains."""
    from .scan_inputs import _fit_data_background

    model, start = _background_model(spec, used, shape)
    counts = model.counts
    if extra_start is None:
        with np.errstate(all="ignore"):
            th, b, nll = _fit_data_background(model, counts, start)
    else:
        th, b, nll = _nested_fit(model, counts, start, extra_start)
    return th[0], float(b[0]), float(nll[0])


def _nested_fit(model: Any, counts: np.ndarray, start: np.ndarray, extra_start: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`fit_candidate`'s fit from ``extra_start`` (the lower order's minimum embedded)
    and the default ``start`` together; ``(theta (1, K), b (1,), nll (1,))`` of the better.

    The curvature is recomputed after 10 iterations: a coefficient going to 0 (the embedded
    row) or a start far off (the default row) otherwise crept to the cap of 100 steps
    (0.23 s of the demo's order test; 0.11 s so, the NLLs up to 1.4e-7 lower)."""
    from .toys import fit_background

    starts = np.clip(np.vstack([extra_start, start]), model.lower, model.upper)
    with np.errstate(all="ignore"):
        th, b, nll = fit_background(model, np.broadcast_to(counts, (2, counts.size)), starts,
                                    steps=100, curvature_after=_CURVATURE_AFTER)
    nll = np.where(np.isfinite(nll), nll, np.inf)
    # the embedded row unless the default one is lower by more than the fits' tolerance:
    # both often end in one minimum (a Bernstein fit with its coefficients' signs flipped,
    # the same function), and the reported parameters then continue the lower order's
    i = 1 if nll[1] < nll[0] - 1e-9 else 0
    return th[i:i + 1], b[i:i + 1], nll[i:i + 1]


def choose_background(data: Any, families: Any = None, *, window: Any = None,
                      bins: int | None = None, blind: Any = None,
                      size: float = ORDER_TEST_SIZE, sqrt_s: float | None = None
                      ) -> BackgroundChoice:
    """Fit every candidate background function and choose the order of each family.

    Parameters
    ----------
    data : MassHistogram, masses, or (masses, weights)
        The spectrum (masses are histogrammed in ``bins``, default 100, on ``window``).
    families : see :func:`candidate_shapes`
    blind : (lo, hi), optional
        Blinded range: the fits and tests use the sidebands only.
    size : float
        Threshold of the order test (its nominal size): the next order is taken when its
        p-value is below ``size``.
    sqrt_s : float, optional
        Centre-of-mass energy for the dijet family (default: twice the window's top).

    Returns
    -------
    BackgroundChoice
        The candidates kept (one per family) are ``chosen``.
    """
    if not 0 < size < 1:
        raise FitError(f"the order test's size must lie in (0, 1), got {size!r}")
    spec = _spectrum_of(data, window, bins)
    blinded = blinded_bins(spec.edges, blind)
    used = np.flatnonzero(~blinded)
    shapes_ = candidate_shapes(families, sqrt_s=sqrt_s)
    n = spec.counts[used]
    sat = float(saturated_term(n))  # sum(n ln n - n): the saturated model's -NLL
    by_family: dict[str, list[tuple[int, str, Any]]] = {}
    for label, shape in shapes_.items():
        fam, order = _parse(label)
        by_family.setdefault(fam, []).append((order, label, shape))
    out: list[BackgroundCandidate] = []
    # what each candidate keeps for its figure: the blinded bins' counts are never kept
    observed = np.where(blinded, np.nan, spec.counts)
    for fam, items in by_family.items():
        items.sort()
        fits = []
        prev: tuple[int, np.ndarray] | None = None
        for order, label, shape in items:
            k = len(shape.parameters)
            if used.size <= k + 1:
                raise FitError(f"background candidate {label}: {k + 1} parameters but only "
                               f"{used.size} bins to fit; use fewer orders or more bins")
            start = None
            if prev is not None and order == prev[0] + 1:
                start = _embed(fam, prev[1])
            th, b, nll = fit_candidate(spec, used, shape, start)
            prev = (order, th)
            chi2 = max(2.0 * (nll + sat), 0.0)
            ndf = int(used.size - (k + 1))
            fits.append({"label": label, "order": order, "shape": shape, "theta": th,
                         "b": b, "nll": nll, "chi2": chi2, "ndf": ndf, "k": k + 1})
        # the order test between consecutive orders (nested: the larger can only be better)
        for a, c in itertools.pairwise(fits):
            a["lam"], a["p"] = order_test(a["nll"], c["nll"], c["k"] - a["k"])
        keep = fits[-1]
        for f in fits:
            if f.get("p") is not None and f["p"] >= size:
                keep = f
                break
            if f.get("p") is None:
                keep = f
        for f in fits:
            note = ""
            if f is keep and f is fits[-1] and len(fits) > 1 and fits[-2]["p"] < size:
                note = "the highest order tried still improved the fit significantly"
            if fam == "powersum" and "p" in f:
                note = (note + "; " if note else "") + ("order test approximate: the added "
                                                         "exponent is not identified at "
                                                         "weight 0")
            shape = f["shape"]
            out.append(BackgroundCandidate(
                label=f["label"], family=fam, order=f["order"], n_parameters=f["k"],
                nll=f["nll"], chi2=f["chi2"], ndf=f["ndf"],
                gof_p_value=float(chi2_sf(f["chi2"], max(f["ndf"], 1))),
                parameters=dict(zip(shape.parameter_names, map(float, f["theta"]))),
                background_yield=f["b"], order_statistic=f.get("lam"),
                order_p_value=f.get("p"), chosen=f is keep, note=note,
                edges=np.asarray(spec.edges, float), observed=observed,
                expected=_expected_counts(spec, shape, f["theta"], f["b"]), blinded=blinded,
                weighted=spec.bin_scale is not None))
    return BackgroundChoice(tuple(out), float(size), spec.window,
                            None if blind is None else (float(blind[0]), float(blind[1])),
                            int(used.size))


# --------------------------------------------------------- spurious signal
#: families whose template fits start from the lower order's template fit, as the order
#: test fits the data (:func:`_nested_fit`), instead of the scan's multi-start fit: their
#: embedding is exact and identified (a coefficient at 0, where the NLL's gradient in it is
#: not 0).  On the demo's template the spurious signals are the multi-start fits' to 6
#: digits.  Not the power sum: its added exponent is not identified at weight 0, and started
#: from the lower order its profile fits stay in the lower order's minimum (powersum2's
#: largest spurious signal on the demo fell from 1.98 to powersum1's 1.69).  Not Bernstein:
#: a coefficient is c^2, whose gradient in c vanishes at 0, and degree elevation keeps a
#: lower degree's zero coefficients near 0, a saddle the fit stays on (bernstein6 after
#: bernstein5 on a wide falling template: 0.57 above the multi-start minimum, s / sigma_stat
#: off by 0.13; tests/test_spurious_signal_review.py)
_NEST = ("exppoly", "dijet")


def _family_order(label: str) -> tuple[str | None, int]:
    """``(family, order)`` of a candidate label, ``(None, 0)`` for another name."""
    try:
        return _parse(label)
    except FitError:
        return None, 0


def template_histogram(template: Any, edges: np.ndarray, events: float) -> Any:
    """A high-statistics background template as an Asimov-like spectrum of ``events`` in
    the window: a :class:`MassHistogram` (rebinned to ``edges`` by bin, scaled) or a
    callable density m -> events per GeV (integrated over every bin by 8-point
    Gauss-Legendre).  Its bins are unweighted (sum of weights = sum of squares), so fits
    to it carry the statistical errors of ``events`` events."""
    from ..histogram import MassHistogram

    edges = np.asarray(edges, float)
    if isinstance(template, MassHistogram):
        t = template.restrict((edges[0], edges[-1]))
        if t.edges.size != edges.size or not np.allclose(t.edges, edges):
            raise FitError("spurious signal: the template histogram's bins in the window "
                           "must match the data's bins (rebin it first)")
        vals = np.asarray(t.weight_sum, float)
    elif callable(template):
        x, w = np.polynomial.legendre.leggauss(8)
        a, b = edges[:-1], edges[1:]
        pts = 0.5 * (a + b)[:, None] + 0.5 * (b - a)[:, None] * x[None, :]
        vals = 0.5 * (b - a) * (np.asarray(template(pts), float) @ w)
    else:
        raise FitError("the background template must be a MassHistogram or a callable "
                       "density of mass")
    if not (np.all(np.isfinite(vals)) and np.all(vals >= 0) and vals.sum() > 0):
        raise FitError("the background template must be finite, non-negative and non-empty "
                       "in the window")
    vals = vals * (float(events) / vals.sum())
    h = MassHistogram(edges)
    h.weight_sum = vals.copy()
    h.weight_sq_sum = vals.copy()
    return h


def spurious_signal(template: Any, candidates: Any, signal: Any, masses: Any, *,
                    events: float, edges: Any, limit: float = SPURIOUS_LIMIT,
                    resolution: Any = None, relative_resolution: float | None = None,
                    absolute_resolution: float | None = None,
                    signal_params: Mapping[str, float] | None = None,
                    natural_width: Any = None) -> dict[str, dict[str, Any]]:
    """The spurious signal of each candidate on a background template.

    Parameters
    ----------
    template : MassHistogram or callable
        High-statistics background (simulation through the same selection, or a reference
        function of mass); scaled to ``events`` events in the window (the data's), so the
        statistical error of the fitted signal is the data's.
    candidates : BackgroundChoice, mapping label -> shape, or families
        The functions to test (a BackgroundChoice: every candidate it fitted).
    edges : array
        The data's bin edges in the window.
    limit : float
        Flag a candidate whose largest |s| / sigma_stat exceeds it (common practice 0.2).

    Each candidate is the scan of the template (:func:`.scan.scan_prepared`); its
    background-only fit is the scan's multi-start one, or, for the next order of a family
    in ``_NEST``, the order test's fit from the lower order's minimum (:func:`_nested_fit`).

    Returns
    -------
    dict label -> {``max_ratio`` (largest |s|/sigma_stat), ``mass`` (where), ``signal`` (s
    there, events), ``signal_error``, ``flagged``, ``ratio`` (at every mass)}.
    """
    from .scan import scan_prepared
    from .scan_inputs import _prepare_model

    if not limit > 0:
        raise FitError(f"the spurious-signal limit must be > 0, got {limit!r}")
    edges = np.asarray(edges, float)
    hist = template_histogram(template, edges, events)
    if isinstance(candidates, BackgroundChoice):
        shapes_ = candidate_shapes([c.label for c in candidates.candidates])
    elif isinstance(candidates, Mapping):
        shapes_ = dict(candidates)
    else:
        shapes_ = candidate_shapes(candidates)
    out: dict[str, dict[str, Any]] = {}
    fitted: dict[tuple[str, int], np.ndarray] = {}  # (family, order) -> template fit
    for label, shape in shapes_.items():
        fam, order = _family_order(label)
        lower = fitted.get((fam, order - 1)) if fam in _NEST else None
        nested = None
        if lower is not None:  # as the order test fits it: from the lower order's minimum
            emb = _embed(fam, lower)

            def nested(proto, counts, start, emb=emb):
                return _nested_fit(proto, counts, start, emb)
        model, spec, info = _prepare_model(
            hist, signal, shape, masses, resolution=resolution,
            relative_resolution=relative_resolution, absolute_resolution=absolute_resolution,
            window=None, natural_width=natural_width, blind=None,
            signal_params=signal_params, bins=None, background_fit=nested)
        if fam is not None:
            fitted[fam, order] = model.theta
        r = scan_prepared(hist, model, spec, info, blind=None, expected_signal=None,
                          natural_width=natural_width, refit=False)
        ratio = np.asarray(r.signal_yield) / np.asarray(r.signal_yield_error)
        j = int(np.nanargmax(np.abs(ratio)))
        big = float(abs(ratio[j]))
        out[label] = {"max_ratio": big, "mass": float(r.masses[j]),
                      "signal": float(r.signal_yield[j]),
                      "signal_error": float(r.signal_yield_error[j]),
                      "flagged": bool(big > limit), "limit": float(limit),
                      "ratio": ratio}
    return out
