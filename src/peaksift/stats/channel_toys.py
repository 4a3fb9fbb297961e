r"""The combination's global-significance toys: every channel generated, the joint
likelihood fitted.

* :func:`combined_toy_scans` -- q0 scans of background-only toys (the global significance),
  in batches of ``_TOY_CHUNK`` toys (:func:`run_toy_scans`, picklable);
* :func:`toy_q0`             -- the q0 of given toy counts (the envelope's toys use it per
  assignment of functions, :mod:`peaksift.stats.channel_envelope`).

The toy-based CLs limits of a combination are :mod:`peaksift.stats.channel_toy_limits`.
A channel's shape factors (mass scale, resolution) are profiled at each toy's highest
points (the single channel's method, :mod:`peaksift.stats.shape_profile`), each at the
lowest well of the mass scale (:func:`peaksift.stats.joint_wells.joint_global`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from .joint import profile_joint
from .joint_wells import joint_global
from .shape_profile import NUISANCE_REFINE, top_points
from .toys import fit_background, toy_counts

__all__ = ["combined_toy_scans", "run_toy_scans", "toy_q0"]

_TOY_CHUNK = 25   # toys per joint fit stack (toys x masses rows)
def combined_toy_scans(models: list, conv: list[np.ndarray], n_toys: int, *,
                       seed: int = 0, norms: Any = None, shapes: Any = None,
                       ensembles: Any = None, executor: Any = None) -> np.ndarray:
    """q0 scans ``(n_toys, n_masses)`` of background-only toys of every channel, each
    channel fluctuated from its background-only fit (toy ``i`` of channel ``c`` from
    ``SeedSequence(seed, spawn_key=(c, i))``), fitted with the joint likelihood (with the
    normalisation nuisances ``norms`` when given; their auxiliary measurements stay at 0:
    under the background-only hypothesis they do not change the toys).

    ``shapes``: per channel None or ``(signal, base_params, SignalNuisances)`` at every
    mass of the scan (:meth:`~peaksift.stats.channels.Channel.shape_spec`): the channels'
    mass-scale and resolution factors are then profiled, as in the observed scan, at each
    toy's ``NUISANCE_REFINE`` highest points (the single channel's method,
    :mod:`peaksift.stats.shape_profile`); ``ensembles`` per channel ``"fixed"`` (the
    constraints centred at 1) or ``"sampled"`` (each toy draws the centres, from
    ``SeedSequence(seed, spawn_key=(c, i, 1))``).  ``executor(func, tasks) -> results in
    task order`` runs the batches of ``_TOY_CHUNK`` toys (e.g. on worker processes; each
    toy has its own seed stream, so the engine does not change the result)."""
    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    tasks = [_ToyScans(tuple(models), tuple(conv), seed, norms,
                       None if shapes is None else tuple(shapes),
                       None if ensembles is None else tuple(ensembles), first,
                       min(_TOY_CHUNK, n_toys - first))
             for first in range(0, n_toys, _TOY_CHUNK)]
    done = list(executor(run_toy_scans, tasks)) if executor is not None and len(tasks) > 1 \
        else [run_toy_scans(t) for t in tasks]
    if len(done) != len(tasks):
        raise FitError(f"the toy executor returned {len(done)} results for {len(tasks)} "
                       "batches of combined toys")
    return np.concatenate(done, axis=0)


@dataclass(frozen=True)
class _ToyScans:
    """Toys ``first .. first+count-1`` of :func:`combined_toy_scans` (picklable: a unit of
    work for the toys' executor)."""

    models: tuple
    conv: tuple
    seed: int
    norms: Any
    shapes: Any
    ensembles: Any
    first: int
    count: int


def run_toy_scans(task: _ToyScans) -> np.ndarray:
    """The q0 scans ``(count, n_masses)`` of one batch of combined toys (pure)."""
    models = list(task.models)
    roots = [np.random.SeedSequence(task.seed, spawn_key=(c,)) for c in range(len(models))]
    raw = [toy_counts(m.expected_background, roots[c], task.first, task.count)
           for c, m in enumerate(models)]
    return toy_q0(models, raw, task)[0]


def toy_q0(models: list, raw: list[np.ndarray], task: Any) -> tuple[np.ndarray, np.ndarray]:
    """q0 ``(toys, masses)`` of toys with counts ``raw`` (per channel ``(toys, n_used)``)
    fitted with ``models`` (one per channel), and the toys' summed background-only NLL
    ``(toys,)``; ``task`` gives conv, norms, shapes, ensembles, seed and first."""
    conv, norms, shapes = list(task.conv), task.norms, task.shapes
    cnt = raw[0].shape[0]
    nm = models[0].masses.size
    counts, th0, b0, nll0 = [], [], [], 0.0
    with np.errstate(all="ignore"):
        for m, n in zip(models, raw):
            th, b, nll = fit_background(m, n)
            counts.append(np.repeat(n, nm, axis=0))
            th0.append(np.repeat(th, nm, axis=0))
            b0.append(np.repeat(b, nm))
            nll0 = nll0 + np.repeat(nll, nm)
    r = profile_joint(models, counts, [np.tile(m.fractions, (cnt, 1)) for m in models],
                      [np.tile(k, cnt) for k in conv], theta_start=th0, b_start=b0,
                      steps=40, tol=3e-2, norms=norms)
    q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
    q[~np.isfinite(r["nll"]) | ~np.isfinite(nll0)] = np.nan
    q = q.reshape(cnt, nm)
    if shapes is not None and any(sp is not None for sp in shapes):
        _refine_shapes(q, r, models, counts, conv, nll0, norms, list(shapes),
                       list(task.ensembles or ["fixed"] * len(models)), task.seed, task.first)
    return q, np.asarray(nll0).reshape(cnt, nm)[:, 0]


def _refine_shapes(q: np.ndarray, r: dict, models: list, counts: list, conv: list,
                   nll0: np.ndarray, norms: Any, shapes: Any, ensembles: Any, seed: int,
                   first: int) -> None:
    """Each toy's highest points refitted with the channels' shape factors free and
    constrained (centres at 1, or drawn per toy), written into ``q (toys, masses)``."""
    nm = q.shape[1]
    toys, cols = top_points(q, NUISANCE_REFINE)
    if toys.size == 0:
        return
    rows = toys * nm + cols       # rows of the stacked (toy, mass) fits
    specs, centers = [], []
    for c, sp in enumerate(shapes):
        if sp is None:
            specs.append(None)
            centers.append(None)
            continue
        sig, base, nuis = sp
        specs.append((sig, [np.asarray(p)[cols] if np.ndim(p) else p for p in base], nuis))
        if ensembles[c] == "sampled":
            names = nuis.shape_active
            cen = np.empty((rows.size, len(names)))
            for j, t in enumerate(toys):  # the toy's own stream, apart from its counts'
                ss = np.random.SeedSequence(seed, spawn_key=(c, first + int(t), 1))
                cen[j] = nuis.sample_centers(names, np.random.default_rng(ss), 1)[0]
            centers.append(cen)
        else:
            centers.append(None)
    n_top, k_top = [n[rows] for n in counts], [k[cols] for k in conv]
    first = {"mu_start": r["mu"][rows], "theta_start": [t[rows] for t in r["theta"]],
             "b_start": [b[rows] for b in r["b"]]}

    def one(**kw: Any) -> dict[str, Any]:
        return profile_joint(models, n_top, [m.fractions[cols] for m in models], k_top,
                             nu_start=r["nu"][rows], norms=norms, shapes=specs,
                             shape_centers=centers, steps=40, tol=3e-2, **{**first, **kw})

    # each channel's mass scale at its lowest well (joint_wells), as the observed scan
    rr = joint_global(one, models, n_top, k_top, specs, centers=centers)
    exact = np.where(rr["mu"] > 0, np.maximum(2.0 * (nll0[rows] - rr["nll"]), 0.0), 0.0)
    # started at the fit with the factors at 1: with centres at 1 never worse (to
    # rounding); with drawn centres the refit is the toy's q0 however it compares
    sampled = np.array([any(ensembles[c] == "sampled" for c, sp in enumerate(shapes)
                            if sp is not None)] * rows.size)
    keep = np.isfinite(exact) & (sampled | (rr["nll"] <= r["nll"][rows]))
    q[toys[keep], cols[keep]] = exact[keep]
