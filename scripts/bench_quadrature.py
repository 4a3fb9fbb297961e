"""Benchmark: the compiled Gauss-Legendre bin integrals of exppoly (order 2-3) and dijet
against the generic numerical path they replace (a cumulative panel table per parameter
set, finite-difference derivatives), in one process, interleaved, best of ``--rounds``.

1. ``fractions_and_grad`` on 200 stacked parameter sets x 500 bins (what a stacked fit
   step of a scan or of toys asks for), each round on new parameter values so that the
   generic path's per-set cache does not answer;
2. an end-to-end ``systematic_limits`` (mass scale 1%, resolution 10%, luminosity and
   efficiency) at 5 masses with an exppoly2 + dijet3 envelope, 100 bins.

The generic path is forced by making :func:`peaksift.shapes.quadrature.shape_fractions`
decline (it then returns None, as for calls it does not cover).

    python scripts/bench_quadrature.py [--rounds 3]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from peaksift import shapes
from peaksift.shapes import quadrature as bg

WINDOW = (300.0, 800.0)


def _fractions(shape, pars, rnd):
    edges = np.linspace(*WINDOW, 501)
    scale = 1.0 + 1e-6 * rnd + 1e-3 * np.arange(200)[:, None] / 200
    stacked = [p * scale for p in pars]
    return lambda: shape.fractions_and_grad(edges, stacked, WINDOW)


def _limits():
    from peaksift.likelihood import SignalNuisances
    from peaksift.resolution import resolution_from
    from peaksift.stats.limits_systematics import systematic_limits

    rng = np.random.default_rng(3)
    x = 300.0 + rng.exponential(120.0, 40_000)
    x = x[x < 800.0]
    cands = {"exppoly2": shapes.get("exppoly", order=2),
             "dijet3": shapes.get("dijet", npar=3, sqrt_s=13000.0)}

    def run():
        return systematic_limits(
            (x, np.ones_like(x)), "gaussian", cands, np.linspace(400, 700, 5),
            resolution=resolution_from(None, relative=0.02), window=WINDOW, bins=100,
            nuisances=SignalNuisances.make({"mass_scale": 0.01, "mass_resolution": 0.1}),
            luminosity=10.0, luminosity_uncertainty=0.02, efficiency=0.5,
            efficiency_uncertainty=0.05)
    return run


def _time(func) -> float:
    t = time.process_time()
    func()
    return time.process_time() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    a = ap.parse_args()
    fast = bg.shape_fractions
    cases = {"exppoly2": (shapes.get("exppoly", order=2), [-3.0, 0.5]),
             "exppoly3": (shapes.get("exppoly", order=3), [-5.0, 1.0, -0.7]),
             "dijet4": (shapes.get("dijet", npar=4, sqrt_s=13000.0), [10.0, 5.0, 0.1])}
    print(f"load: {os.getloadavg()}")
    for name, (shape, pars) in cases.items():
        _fractions(shape, pars, -1)()   # compile once
        new, old = [], []
        for rnd in range(a.rounds):
            new.append(_time(_fractions(shape, pars, 2 * rnd)))
            bg.shape_fractions = lambda *args: None
            try:
                old.append(_time(_fractions(shape, pars, 2 * rnd + 1)))
            finally:
                bg.shape_fractions = fast
        print(f"{name:9s} fractions+grad 200x500: compiled {min(new) * 1e3:8.1f} ms, "
              f"generic {min(old) * 1e3:8.1f} ms, ratio {min(old) / min(new):6.1f}")
    run = _limits()
    new, old = [], []
    for _ in range(a.rounds):
        new.append(_time(run))
        bg.shape_fractions = lambda *args: None
        try:
            old.append(_time(run))
        finally:
            bg.shape_fractions = fast
    print(f"systematic_limits exppoly2+dijet3, 5 masses: compiled {min(new):.2f} s, "
          f"generic {min(old):.2f} s, ratio {min(old) / min(new):.1f} "
          f"(medians {np.median(new):.2f} / {np.median(old):.2f} s)")
    print(f"load: {os.getloadavg()}")


if __name__ == "__main__":
    main()
