"""Study: how much the toys lose by profiling the signal nuisances only at their top points.

The toys of an envelope with signal nuisances (:func:`peaksift.stats.envelope.
run_envelope_toy_batch`) take every candidate's linearised toy scan with the mass-scale and
resolution factors at their centres and refit, for every candidate, only the envelope's
``NUISANCE_REFINE`` highest points of each toy with the factors free.  The global p-value uses each toy's maximum over the scan, so the question is
how often, and by how much, a lower point would have overtaken the maximum once profiled.
This script runs the same toys twice -- with the engine, and exhaustively (every candidate
refitted exactly at every mass) -- over the demo search's envelope and prints the
differences of the toys' maxima (in q0 and in Z = sqrt(q0)).

    python scripts/study_nuisance_refine.py [--toys 60] [--config demo_data/search.toml]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from peaksift.config import load_config
from peaksift.search.common import _collect, _fill, _scan_masses
from peaksift.search.systematics import _nuisances
from peaksift.stats import envelope
from peaksift.stats.background_choice import choose_background
from peaksift.stats.shape_profile import refine_toy_points, toy_data


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--toys", type=int, default=60)
    ap.add_argument("--config", default="demo_data/search.toml")
    a = ap.parse_args()
    cfg = load_config(a.config)
    col, _, _ = _collect(cfg, progress=False)
    lo, hi = cfg.spectrum.window
    hist = _fill(col, cfg, lo, hi, cfg.spectrum.bins)
    masses = _scan_masses(cfg)
    S = cfg.systematics
    choice = choose_background(hist, list(S.background_families), size=S.order_test_size)
    env = envelope.envelope_scan(hist, choice, "gaussian", masses, penalty=S.penalty,
                        resolution=cfg.model.resolution.resolution, window=(lo, hi),
                        nuisances=_nuisances(cfg))
    t = time.process_time()
    top = env.toy_scans(a.toys, seed=5, workers=1)
    print(f"the engine (refits at the top points): {time.process_time() - t:.1f} s CPU")
    # exhaustive: every candidate refitted exactly at every mass of every toy
    t = time.process_time()
    models = [s.model for s in env.scans]
    spec = envelope.EnvelopeToyBatch(tuple(models), env.n_parameters, env.penalty, 5, 0,
                                     a.toys, models[env.null_choice].expected_background)
    m = masses.size
    q = np.empty((a.toys, len(models), m))
    nll0 = np.empty((a.toys, len(models)))
    rows = np.repeat(np.arange(a.toys), m)
    cols = np.tile(np.arange(m), a.toys)
    for c, model in enumerate(models):
        unit = envelope.ToyBatch(model, 5, 0, a.toys, spec.expected)
        n, fits = toy_data(unit)
        qc = np.zeros((a.toys, m))
        refine_toy_points(unit, qc, rows, cols, n, fits)
        q[:, c], nll0[:, c] = qc, fits[2]
    every = envelope._envelope_q0(nll0, q, np.asarray(env.n_parameters, float),
                                  env.penalty)[0]
    print(f"exhaustive: {time.process_time() - t:.1f} s CPU")
    top, every = top.max(axis=1), every.max(axis=1)
    dq = every - top
    dz = np.sqrt(np.maximum(every, 0)) - np.sqrt(np.maximum(top, 0))
    print(f"{a.toys} toys, {masses.size} masses, envelope of {', '.join(env.labels)}")
    print(f"max q0 (every) - max q0 (top): mean {dq.mean():.4f}, range [{dq.min():.4f}, "
          f"{dq.max():.4f}]; "
          f"toys with a difference > 0.01: {int(np.sum(dq > 0.01))}")
    print(f"in Z: largest {dz.max():.4f}; toys' max Z above 2 (top / every): "
          f"{int(np.sum(top > 4))} / {int(np.sum(every > 4))}")


if __name__ == "__main__":
    main()
