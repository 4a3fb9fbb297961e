"""The demo's expected background spectrum: what the search window would hold without
Poisson noise, for a background template (the spurious-signal test of ``[systematics]``).

The data set is one Poisson draw; a background template must be far smoother than it, or
the template's own fluctuations read as spurious signal.  This module runs the generator's
own kinematics and detector (:mod:`.processes`, :mod:`.detector`) on many more Z and
continuum decays to muon pairs than the data holds, drawn only where they can reach the
window, and weights them back to the run's expected numbers.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from .. import kinematics as kin
from ..errors import InputError
from .detector import _detect_pair
from .layout import _Objects
from .processes import _decay, _sample_breit_wigner, breit_wigner_pdf, continuum_pdf
from .scenario import _M_MU, DEMO, DEMO_EVENTS, DEMO_SEED, Scenario, _intended_pass

#: true masses below this fraction of the window's low edge are not drawn: radiation only
#: lowers a pair's mass and the smearing (1-3%) cannot lift one by 10%
_REACH = 0.9


def _selected_masses(rng: np.random.Generator, mass: np.ndarray, sc: Scenario) -> np.ndarray:
    """Reconstructed masses of the decays to muon pairs whose two muons pass the intended
    selection with opposite charges (the leading pair: fakes almost never pass it)."""
    n = mass.size
    (p1, e1, f1, c1, i1, k1), (p2, e2, f2, c2, i2, k2) = _detect_pair(
        rng, _decay(rng, mass, sc, _M_MU), "muon", sc, np.arange(n), _Objects())
    both = k1 & k2 & _intended_pass(p1, e1, i1) & _intended_pass(p2, e2, i2) & (c1 != c2)
    return kin.pair_mass(p1, e1, f1, _M_MU, p2, e2, f2, _M_MU)[both]


def _continuum_from(rng: np.random.Generator, n: int, sc: Scenario, lo: float) -> np.ndarray:
    hi = sc.continuum_range[1]
    m = np.geomspace(lo, hi, 8193)
    pdf = continuum_pdf(m, sc)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(m))])
    return np.interp(rng.uniform(0.0, 1.0, n), cdf / cdf[-1], m)


def _share_above(density: Any, lo: float, rng_: tuple[float, float]) -> float:
    """The fraction of a density on ``rng_`` that lies above ``lo`` (trapezoid, dense grid)."""
    m = np.geomspace(rng_[0], rng_[1], 200_001)
    p = density(m)
    c = np.concatenate([[0.0], np.cumsum(0.5 * (p[1:] + p[:-1]) * np.diff(m))])
    return float(1.0 - np.interp(lo, m, c) / c[-1])


def expected_background(edges: Any, *, n_events: int = DEMO_EVENTS, scenario: Scenario = DEMO,
                        decays: int = 1_000_000, seed: int = DEMO_SEED) -> Any:
    """The expected dimuon background of the demo run in the bins ``edges`` (GeV).

    The two background processes with muon pairs (``z_mumu``, ``dy_mumu``) of ``n_events``
    events, through the intended selection: ``decays`` simulated decays of each, with true
    masses drawn above 90% of the lowest edge only and weighted by the share of the process
    there.  Deterministic for a given ``seed``.

    Returns
    -------
    MassHistogram
        Weighted: the expected number of selected pairs per bin, with the squared weights
        of the simulated decays as variances (their statistical precision).
    """
    from ..histogram import MassHistogram

    edges = np.asarray(edges, float)
    if edges.ndim != 1 or edges.size < 2 or edges[0] <= 0:
        raise InputError("expected_background needs increasing bin edges above 0 GeV")
    if int(decays) < 1000:
        raise InputError(f"decays must be at least 1000, got {decays!r}")
    sc = scenario
    lo = _REACH * float(edges[0])
    total = sum(sc.fractions.values())
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 52361]))
    hist = MassHistogram(edges)
    z_range = sc.z.mass_range
    share_z = _share_above(lambda m: breit_wigner_pdf(m, sc.z.mass, sc.z.width), lo, z_range)
    share_c = _share_above(lambda m: continuum_pdf(m, sc), lo, sc.continuum_range)
    z_tail = dataclasses.replace(sc.z, mass_range=(max(lo, z_range[0]), z_range[1]))
    for process, draw, share in (
            ("z_mumu", lambda n: _sample_breit_wigner(rng, n, z_tail), share_z),
            ("dy_mumu", lambda n: _continuum_from(rng, n, sc, lo), share_c)):
        n = int(decays)
        m = _selected_masses(rng, draw(n), sc)
        weight = n_events * sc.fractions[process] / total * share / n
        hist.fill(m, np.full(m.size, weight))
    return hist
