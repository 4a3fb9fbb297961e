"""Event blocks: one block of events drawn from its own random stream (hard process,
detector, fakes, pile-up tracks), the sequence of blocks, and :func:`generate`."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np
import pyarrow as pa

from .. import kinematics as kin
from ..errors import InputError
from .detector import _add_fakes, _detect_pair
from .layout import _lepton_column, _Objects, _track_columns
from .processes import _continuum_inverse_cdf, _decay, _sample_breit_wigner, _sample_continuum
from .scenario import (
    _M_E,
    _M_MU,
    DEMO,
    DEMO_SEED,
    INTENDED_SELECTION,
    PROCESSES,
    Scenario,
    _intended_pass,
)


def _block(rng: np.random.Generator, n: int, first_event: int, sc: Scenario, weighted: bool,
           truth: bool, cont: tuple[np.ndarray, np.ndarray]) -> tuple[pa.Table, dict[str, Any]]:
    fr = sc.weighted_fractions if weighted else sc.fractions
    probs = np.array([fr[p] for p in PROCESSES], dtype=float)
    probs /= probs.sum()
    proc = rng.choice(len(PROCESSES), size=n, p=probs).astype(np.int8)
    true_mass = np.full(n, np.nan)
    muons, electrons = _Objects(), _Objects()
    stats: dict[str, Any] = {p: {"generated": int(np.count_nonzero(proc == i)),
                                 "both_leptons_selected": 0, "selected_in_search_window": 0}
                             for i, p in enumerate(PROCESSES)}
    lo_w, hi_w = INTENDED_SELECTION["search_window_gev"]
    for code, name in enumerate(PROCESSES):
        if name == "soft":
            continue
        idx = np.flatnonzero(proc == code)
        if idx.size == 0:
            continue
        if name.startswith("dy"):
            mass = _sample_continuum(rng, idx.size, cont)
        else:
            mass = _sample_breit_wigner(rng, idx.size, sc.z if name.startswith("z") else sc.x)
        true_mass[idx] = mass
        lepton = "muon" if name.endswith("mumu") else "electron"
        m_l = _M_MU if lepton == "muon" else _M_E
        reco = _detect_pair(rng, _decay(rng, mass, sc, m_l), lepton, sc, idx,
                            muons if lepton == "muon" else electrons)
        (p1, e1, f1, c1, i1, k1), (p2, e2, f2, c2, i2, k2) = reco
        both = k1 & k2 & _intended_pass(p1, e1, i1) & _intended_pass(p2, e2, i2) & (c1 != c2)
        if lepton == "muon":
            mreco = kin.pair_mass(p1, e1, f1, m_l, p2, e2, f2, m_l)
            stats[name]["both_leptons_selected"] = int(both.sum())
            stats[name]["selected_in_search_window"] = int(
                (both & (mreco >= lo_w) & (mreco <= hi_w)).sum())
    _add_fakes(rng, n, muons, electrons, sc)
    nvtx = rng.poisson(sc.vertices_mean, n).astype(np.int16)
    kt = rng.poisson(sc.tracks_per_vertex * nvtx)
    ev = np.repeat(np.arange(n), kt)
    nt = ev.size
    tracks = _Objects()
    tracks.add(ev, pt=sc.track_pt_min + rng.exponential(sc.track_pt_mean_above_min, nt),
               eta=rng.uniform(-sc.track_eta_max, sc.track_eta_max, nt),
               phi=rng.uniform(-np.pi, np.pi, nt),
               charge=rng.choice(np.array([-1, 1], np.int8), nt))
    cols: dict[str, pa.Array] = {}
    gidx = first_event + np.arange(n, dtype=np.int64)
    cols["run"] = pa.array((1000 + gidx // 1_000_000).astype(np.int32))
    cols["event"] = pa.array(gidx)
    cols["n_vertices"] = pa.array(nvtx)
    cols["muon"] = _lepton_column(muons, n)
    cols["electron"] = _lepton_column(electrons, n)
    cols.update(_track_columns(tracks, n))
    if weighted:
        tf = np.array([sc.fractions[p] for p in PROCESSES], dtype=float)
        tf /= tf.sum()
        corr = np.clip(rng.normal(1.0, sc.weight_correction_sigma, n), 0.5, 1.5)
        cols["weight"] = pa.array((tf / probs)[proc] * corr)
    if truth or weighted:
        cols["process"] = pa.array(proc)
        cols["true_mass"] = pa.array(true_mass.astype(np.float32))
    return pa.table(cols), stats


def _blocks(n_events: int, seed: int, sc: Scenario, weighted: bool, truth: bool
            ) -> Iterator[tuple[pa.Table, dict[str, Any]]]:
    # the package attribute, read at each call, so that setting peaksift.simulate.BLOCK_EVENTS
    # (as tests do) takes effect
    from . import BLOCK_EVENTS

    cont = _continuum_inverse_cdf(sc)
    for k, start in enumerate(range(0, n_events, BLOCK_EVENTS)):
        n = min(BLOCK_EVENTS, n_events - start)
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), k]))
        yield _block(rng, n, start, sc, weighted, truth, cont)


def _check_size(n_events: Any, seed: Any) -> tuple[int, int]:
    try:
        n = int(n_events)
    except (TypeError, ValueError):
        raise InputError(f"number of events must be a whole number, got {n_events!r}") from None
    if n < 1 or n != n_events:
        raise InputError(f"number of events must be a positive whole number, got {n_events!r}")
    try:
        s = int(seed)
    except (TypeError, ValueError):
        raise InputError(f"seed must be a whole number, got {seed!r}") from None
    if s < 0:
        raise InputError(f"seed must be zero or positive, got {seed!r}")
    return n, s


def generate(n_events: int, *, seed: int = DEMO_SEED, weighted: bool = False, truth: bool = False,
             scenario: Scenario = DEMO) -> pa.Table:
    """Generate ``n_events`` demo events in memory as a ``pyarrow.Table``.

    Parameters
    ----------
    n_events : int
    seed : int
        Same seed and ``n_events`` give identical arrays.
    weighted : bool
        The simulated-sample variant (flatter process mix, ``weight``, truth columns).
    truth : bool
        Also add the generator truth columns ``process`` (index into :data:`PROCESSES`) and
        ``true_mass`` (NaN for ``soft`` events) to an unweighted sample.
    scenario : Scenario
    """
    n, s = _check_size(n_events, seed)
    return pa.concat_tables([t for t, _ in _blocks(n, s, scenario, weighted, truth)])
