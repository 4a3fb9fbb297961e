"""Benchmark: envelope toys with signal nuisances, batched engine vs a looped iminuit profile.

Background-only toys of a 500-bin spectrum (100-600 GeV), each a 200-point mass scan
(Gaussian signal, 1% resolution) profiled with two signal nuisance parameters (mass scale
1%, resolution 10%, Gaussian constraints) and a 4-function envelope (exppoly1, powersum1,
powersum2, bernstein3; penalty 1 per parameter).  peaksift's engine
(:meth:`EnvelopeResult.toy_scans`) is timed on ``--toys`` toys and scaled to 10,000; the
baseline does the same profiling with iminuit in a loop (per toy and function: the
background-only fit, then at every mass the signal yield, both factors and the background
parameters), timed on ``--baseline-masses`` masses of one toy and scaled.  The issue's target:
10,000 toys in <= 3 minutes on 2 cores, ratio >= 100.

    python scripts/bench_envelope.py [--toys 400] [--workers 2] [--baseline-masses 10]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from iminuit import Minuit

from peaksift import shapes
from peaksift.histogram import MassHistogram
from peaksift.stats.envelope import envelope_scan
from peaksift.stats.toys import toy_counts

EDGES = np.linspace(100.0, 600.0, 501)
MASSES = np.linspace(120.0, 580.0, 200)
CANDS = {"exppoly1": shapes.get("exppoly", order=1), "powersum1": shapes.get("powersum", terms=1),
         "powersum2": shapes.get("powersum", terms=2), "bernstein3": shapes.get("bernstein", degree=3)}
NUIS = {"mass_scale": 0.01, "mass_resolution": 0.1}


def _spectrum(seed: int = 11) -> MassHistogram:
    rng = np.random.default_rng(seed)
    x = 100.0 + rng.exponential(150.0, 60_000)
    return MassHistogram(edges=EDGES).fill(x[x < 600.0])


def _iminuit_toy(n, models, labels, k, masses, sigma):
    """The same envelope profile by iminuit, looped: returns q0 of the envelope at masses."""
    sig = shapes.get("gaussian")
    out = []
    base0, with1 = [], []
    for c, lab in enumerate(labels):
        model = models[c]
        shape = CANDS[lab]
        edges, win, used = model.edges, model.window, model.used

        def bkg(th, shape=shape, edges=edges, win=win, used=used):
            return shape.bin_fractions(edges, list(th), win)[used]

        npar = model.theta.size

        def nll0(*x, bkg=bkg, npar=npar):
            nu = x[0] * bkg(x[1:])
            return 1e30 if np.any(nu <= 0) else float(np.sum(nu - n * np.log(nu)))

        names0 = ["b"] + [f"t{i}" for i in range(npar)]
        m0 = Minuit(nll0, n.sum(), *model.theta, name=names0)
        m0.errordef = 0.5
        m0.migrad()
        base0.append(2 * m0.fval + k[c])
        row = []
        for j, m in enumerate(masses):
            def nll1(s, km, kr, *x, m=m, j=j, bkg=bkg, edges=edges, win=win, used=used):
                f = sig.bin_fractions(edges, [m * km, sigma[j] * kr], win)[used]
                nu = s * f + x[0] * bkg(x[1:])
                if np.any(nu <= 0):
                    return 1e30
                return (float(np.sum(nu - n * np.log(nu))) + 0.5 * ((km - 1) / 0.01) ** 2
                        + 0.5 * ((kr - 1) / 0.1) ** 2)

            m1 = Minuit(nll1, 1.0, 1.0, 1.0, *m0.values, name=["s", "km", "kr", *names0])
            m1.errordef = 0.5
            m1.limits[0] = (0, None)
            m1.limits[1] = (0.94, 1.06)
            m1.limits[2] = (0.4, 1.6)
            m1.migrad()
            row.append(2 * m1.fval + k[c])
        with1.append(row)
    base0, with1 = np.array(base0), np.array(with1)
    out = base0.min() - with1.min(axis=0)
    return out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--toys", type=int, default=400)
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--baseline-masses", type=int, default=10)
    a = ap.parse_args()
    h = _spectrum()
    t0 = time.time()
    env = envelope_scan(h, CANDS, "gaussian", MASSES, relative_resolution=0.01, nuisances=NUIS)
    print(f"data envelope scan: {time.time() - t0:.1f} s; {env}")
    t0 = time.process_time()
    w0 = time.time()
    q = env.toy_scans(a.toys, seed=3, workers=a.workers, batch=100)
    cpu, wall = time.process_time() - t0, time.time() - w0
    per_toy = wall / a.toys
    print(f"engine: {a.toys} toys in {wall:.1f} s wall ({cpu:.1f} s CPU in this process, "
          f"workers={a.workers}) -> 10,000 toys: {per_toy * 1e4 / 60:.1f} min")
    models = [s.model for s in env.scans]
    n = toy_counts(models[env.null_choice].expected_background, 3, 0, 1)[0]
    pick = np.linspace(0, MASSES.size - 1, a.baseline_masses).astype(int)
    t0 = time.process_time()
    ref = _iminuit_toy(n, models, env.labels, env.n_parameters, MASSES[pick],
                       env.scans[0].sigma[pick])
    base = (time.process_time() - t0) / a.baseline_masses * MASSES.size
    print(f"iminuit loop: {base:.1f} s CPU per toy (scaled from {a.baseline_masses} masses) "
          f"-> 10,000 toys: {base * 1e4 / 3600:.1f} h on one core")
    print(f"ratio (CPU per toy, one core each): {base / (cpu / a.toys if a.workers <= 1 else per_toy * a.workers):.0f}")
    dz = np.sqrt(np.maximum(q[0, pick], 0)) - np.sqrt(np.maximum(ref, 0))
    print(f"agreement on toy 0 at the {pick.size} masses: max |dZ| = {np.max(np.abs(dz)):.3f}")


if __name__ == "__main__":
    main()
