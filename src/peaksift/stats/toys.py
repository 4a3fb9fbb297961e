"""Batched pseudo-experiments (toys) and the binned profile-likelihood engine behind the scan.

Which piece when
----------------
* :func:`run_toys`       -- background-only toys of a prepared scan model: returns the q0 scan of
  every toy (``(n_toys, n_masses)``), reproducible with ``seed``, optional progress bar and
  process pool.  :func:`peaksift.stats.scan.ScanResult.global_significance` uses it.
* :func:`run_toy_batch`  -- the pure, picklable unit of work (a :class:`ToyBatch` in, an array
  out) for any execution engine (process pool, Dask).
* :class:`ScanModel`     -- everything a toy needs: the used bins, the background shape and its
  background-only fit, the signal bin fractions at every mass hypothesis.

The likelihood is the extended binned Poisson likelihood with bin-integrated expectations,

.. math:: \\nu_i = s\\,f_i(m) + b\\,g_i(\\theta), \\qquad
          \\mathrm{NLL} = \\sum_i [\\nu_i - n_i \\ln \\nu_i],

with ``f`` the signal bin fractions at the hypothesis mass (its shape fixed by the resolution
model), ``g`` the background bin fractions, ``s`` and ``b`` the yields in the window and
``theta`` the background shape parameters.  Blinded bins are simply absent from the sum.

How the toy scan is made fast (and what it approximates)
--------------------------------------------------------
1. Each toy is Poisson-fluctuated from the background-only fit to the data and fitted once
   with the background-only model (Fisher-scoring Newton steps on all toys at once, the shape
   derivatives from ``Shape.grad_bin_fractions``).
2. At every mass hypothesis the background expectation is *linearised* around the toy's own
   background-only fit, :math:`B_i(\\eta) \\approx B^0_i + D_i\\,\\delta\\eta` with
   :math:`\\eta = (b, \\theta)`, so the model is linear in :math:`p = (s, \\delta\\eta)`.
3. The signal fractions are non-negligible only in a band of bins around the hypothesis
   (``f_i > 1e-3 max f``); inside the band the Poisson terms are kept exactly, outside it the
   NLL is replaced by its second-order Taylor expansion at ``p = 0`` (computed with matrix
   products over all bins, so the signal tails are not lost).
4. The resulting convex problem in ``1 + len(eta)`` parameters is solved by a few Newton steps
   for all toys and all masses of a band group at once, with ``s >= 0`` (q0 is one-sided).
5. The two highest points of every toy scan are refitted exactly (:func:`profile_signal`), so
   the maximum that the global p-value uses carries no linearisation error.

The approximations are second order in the (small) shift of the background parameters that a
local signal causes; the tests compare the scans with per-toy iminuit fits (max q0 within
0.05 in Z as required; measured < 0.005 away from the maximum at high counts, < 0.05 with a
few events per bin, and exact at the maximum after step 5).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._processes import process_pool, quiet_fork, stop_pool
from .._stall import StallWatch, drain, result_watched, tracked, watched, worker_tracking
from ..errors import ExecutionError, FitError
from .toy_model import (
    _SUB_BATCH,
    _TOYS_PER_BATCH,
    ScanModel,
    bkg_fractions,
    bkg_gradients,
    bkg_second,
    fit_background,
    profile_signal,
)
from .toy_scan import scan_toys_linear

# the model and the two scans live in toy_model / toy_scan; this module is the toy engine's
# one import place for its users
__all__ = ["ScanModel", "ToyBatch", "bkg_fractions", "bkg_gradients", "bkg_second",
           "fit_background", "profile_signal", "run_toy_batch", "run_toys", "scan_toy_counts",
           "scan_toys_linear",
           "toy_counts"]


# ----------------------------------------------------------------- toy generation
def toy_counts(expected: np.ndarray, seed: int | np.random.SeedSequence, first: int,
               count: int) -> np.ndarray:
    """Poisson counts of toys ``first .. first+count-1``.

    Toy ``i`` draws from its own stream, ``SeedSequence(seed, spawn_key=(i,))`` (the i-th
    child of ``SeedSequence(seed).spawn``), so a toy's counts do not depend on how the toys
    are split into batches, workers or processes.
    """
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    out = np.empty((count, expected.size))
    for j in range(count):
        child = np.random.SeedSequence(root.entropy, spawn_key=tuple(root.spawn_key)
                                       + (first + j,))
        out[j] = np.random.default_rng(child).poisson(expected)
    return out


@dataclass(frozen=True)
class ToyBatch:
    """One unit of toy work: toys ``first .. first+count-1`` of a run seeded with ``seed``.

    ``expected`` (per used bin) is what the toys fluctuate; default the model's background-only
    fit to the data.
    """

    model: ScanModel
    seed: int
    first: int
    count: int
    expected: np.ndarray | None = None


def run_toy_batch(spec: ToyBatch) -> np.ndarray:
    """Generate and scan the toys of ``spec``; returns their q0 scans ``(count, n_masses)``.

    A pure top-level function of a picklable argument, for any execution engine.
    """
    expected = spec.model.expected_background if spec.expected is None else spec.expected
    return scan_toy_counts(spec.model, toy_counts(expected, spec.seed, spec.first, spec.count))


def scan_toy_counts(model: ScanModel, n: np.ndarray, fits: tuple | None = None) -> np.ndarray:
    """The linearised q0 scans ``(T, n_masses)`` of toys with counts ``n (T, n_used)``, in
    sub-batches of ``_SUB_BATCH`` toys (memory); ``fits``: their background-only fits
    ``(theta, b, nll)`` when the caller has them (the envelope's toys need them too)."""
    out = np.empty((n.shape[0], model.masses.size))
    for start in range(0, n.shape[0], _SUB_BATCH):
        rows = slice(start, start + _SUB_BATCH)
        out[rows] = scan_toys_linear(model, n[rows], background=None if fits is None
                                     else tuple(a[rows] for a in fits))
    return out


def _progress_enabled(progress: bool | None) -> bool:
    from .._progress import progress_wanted

    return progress_wanted(progress)  # None: a terminal or a notebook is watching


def run_toys(model: ScanModel, n_toys: int, *, seed: int = 0, workers: int | None = None,
             progress: bool | None = None, expected: np.ndarray | None = None,
             batch: int = _TOYS_PER_BATCH,
             executor: Callable[[Callable[[Any], Any], list[Any]], Sequence[Any]] | None = None,
             batch_function: Callable[[ToyBatch], np.ndarray] | None = None,
             ) -> np.ndarray:
    """Background-only toys of ``model``: the q0 scan of each, ``(n_toys, n_masses)``.

    Parameters
    ----------
    n_toys : int
        Number of pseudo-experiments.
    seed : int
        Seed of the run; toy ``i`` always gets the same pseudo-data (see :func:`toy_counts`).
    workers : int, optional
        Run the batches in a process pool of this size (``None`` or 1: in this process).
    progress : bool, optional
        Show a tqdm progress bar (default: only when stderr is a terminal).
    expected : ndarray, optional
        Expectation per used bin to fluctuate (default: the background-only fit).
    batch : int
        Toys per :class:`ToyBatch` (the unit of work handed to ``workers`` or ``executor``).
    executor : callable, optional
        ``executor(run_toy_batch, specs) -> results in spec order``, e.g.
        ``functools.partial(peaksift.execution.map_tasks, engine="dask")``; takes precedence
        over ``workers``.  Each toy is seeded on its own (:func:`toy_counts`), so the toys do
        not depend on where the batches run.
    batch_function : callable, optional
        The unit of work (default :func:`run_toy_batch`); e.g.
        :func:`peaksift.stats.shape_profile.run_nuisance_toy_batch` to profile the signal's
        nuisance parameters in every toy.  Must be a picklable top-level function.
    """
    unit = run_toy_batch if batch_function is None else batch_function
    n_toys = int(n_toys)
    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    specs = [ToyBatch(model, int(seed), i, min(batch, n_toys - i), expected)
             for i in range(0, n_toys, batch)]
    show = _progress_enabled(progress)
    from .._progress import bar as progress_bar

    bar = progress_bar(n_toys, shown=show, desc="toys", unit="toy", leave=False)
    results: list[np.ndarray] = []
    try:
        if executor is not None:
            done = list(executor(unit, specs))
            if len(done) != len(specs):
                raise FitError(f"the toy executor returned {len(done)} results for "
                               f"{len(specs)} toy batches; it must return one per batch")
            results.extend(done)
            bar.update(n_toys)
        elif workers is not None and int(workers) > 1 and len(specs) > 1:
            for res, spec in zip(_run_pool(unit, specs, int(workers)), specs):
                results.append(res)
                bar.update(spec.count)
        else:
            for spec in specs:
                results.append(unit(spec))
                bar.update(spec.count)
    finally:
        bar.close()
    return np.concatenate(results, axis=0)


def _run_pool(unit: Callable[[ToyBatch], np.ndarray], specs: list[ToyBatch],
              workers: int) -> Any:
    """The batches' results in order, from a process pool of ``workers`` (forked on Linux,
    spawned elsewhere, like the execution engines' pools), its workers under the stuck-worker
    watch (:mod:`peaksift._stall`) when ``unit`` is peaksift's own."""
    import multiprocessing

    from .._processes import resolve_start_method

    size = min(workers, len(specs), os.cpu_count() or 1)
    track = multiprocessing.get_context(resolve_start_method()).SimpleQueue()
    pool = process_pool(size, initializer=worker_tracking, initargs=(track,))
    started: dict[int, int] = {}
    watch = StallWatch() if watched(unit) else None
    clean = False
    try:
        with quiet_fork():  # the workers start at the first submits
            futures = [pool.submit(tracked, unit, k, spec) for k, spec in enumerate(specs)]
        for k, fut in enumerate(futures):
            yield result_watched(
                fut, watch, track, started,
                lambda k=k: [k, *(j for j in range(k, len(futures)) if not futures[j].done())],
                lambda pid, seconds, j: _stuck_error(unit, specs, pid, seconds, j))
            drain(track, started)
        clean = True
    finally:
        if clean:
            pool.shutdown(wait=True)
        else:  # Ctrl-C, a failed or stuck batch: stop now, do not wait
            stop_pool(pool)
        track.close()


def _stuck_error(unit: Callable[[ToyBatch], np.ndarray], specs: list[ToyBatch], pid: int,
                 seconds: float, j: int) -> ExecutionError:
    spec = specs[j]
    return ExecutionError(
        f"toy worker process {pid} is stuck on toy batch {j + 1} of {len(specs)} (toys "
        f"{spec.first}-{spec.first + spec.count - 1}, {unit.__name__}): for {seconds:.0f} s "
        "every thread of it has waited on a lock or slept, using no CPU (a deadlock, not a "
        "slow batch); the toy workers were stopped and the stacks of its threads written to "
        "stderr. Run again with fewer workers (workers=1 runs the toys in this process), or "
        "raise PEAKSIFT_STALL_SECONDS if the batch only waited on something slow (0 never "
        "stops it); report a recurring one with those stacks")


def as_params(values: Sequence[Any]) -> list[Any]:
    """Column views of a ``(B, K)`` parameter array, in the shapes' broadcasting convention."""
    arr = np.asarray(values, float)
    return [arr[:, k : k + 1] for k in range(arr.shape[1])]
