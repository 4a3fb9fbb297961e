"""The issue's table of a single background function against the background-family choice.

Background generated from the smoothly falling dijet-type family (x = m/sqrt(s), sqrt(s) =
13 TeV, 300-800 GeV, 5 GeV bins; p1, p2, p3 = 10, 5, 0.1), signal a Gaussian of width 3% of
m, masses 320-780 GeV every 5 GeV.  For each background function (or the envelope):

* the spurious signal: largest |fitted signal| / stat. error on the exact (Asimov) template
  scaled to the number of events;
* the fraction of background-only toys (drawn from the truth) whose largest local Z over the
  scan exceeds 3, with its binomial error;
* for the envelope of the orders kept by the order test (chosen on one pseudo-data set of
  the truth), P(q0 > 1) and P(q0 > 4) at one mass (545 GeV) against the half chi-square.

    python scripts/study_background_table.py [--toys 200] [--seed 1]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import stats as st

from peaksift import shapes
from peaksift.histogram import MassHistogram
from peaksift.stats import scan
from peaksift.stats.background_choice import choose_background, spurious_signal
from peaksift.stats.envelope import envelope_scan
from peaksift.stats.toys import run_toys

EDGES = np.arange(300.0, 805.0, 5.0)
WINDOW = (300.0, 800.0)
MASSES = np.arange(320.0, 781.0, 5.0)
SQRT_S = 13000.0
TRUTH = shapes.get("dijet", npar=4, sqrt_s=SQRT_S)
P = [10.0, 5.0, 0.1]


def _hist(n):
    h = MassHistogram(EDGES)
    h.weight_sum = np.asarray(n, float)
    h.weight_sq_sum = np.asarray(n, float)
    return h


def _frac(x, toys):
    k = int(np.sum(x))
    p = k / toys
    return f"{100 * p:.0f} +- {100 * np.sqrt(max(p * (1 - p), 1.0 / toys) / toys):.0f}%"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--toys", type=int, default=200)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args()
    frac = TRUTH.bin_fractions(EDGES, P, WINDOW)
    rows = [(2e4, "powerlaw", shapes.get("powersum", terms=1)),
            (2e5, "powerlaw", shapes.get("powersum", terms=1)),
            (2e5, "exponential", shapes.get("exppoly", order=1)),
            (2e5, "bernstein2", shapes.get("bernstein", degree=2)),
            (2e5, "dijet4 (true family)", shapes.get("dijet", npar=4, sqrt_s=SQRT_S))]
    print(f"| events | fit function | largest spurious signal / sigma_stat | toys with "
          f"max local Z > 3 ({a.toys} toys) | largest local Z in toys | seconds |")
    print("|---|---|---|---|---|---|")
    for events, label, shape in rows:
        t0 = time.time()
        sp = spurious_signal(lambda m: TRUTH.pdf(m, P, WINDOW), {label: shape}, "gaussian",
                             MASSES, events=events, edges=EDGES, relative_resolution=0.03)
        truth = events * frac
        obs = np.random.default_rng(a.seed).poisson(truth)
        r = scan(_hist(obs), "gaussian", shape, MASSES, relative_resolution=0.03, refit=False)
        q = run_toys(r.model, a.toys, seed=a.seed, expected=truth[r.model.used])
        mx = np.sqrt(np.nanmax(q, axis=1))
        print(f"| {events:.0e} | {label} | {sp[label]['max_ratio']:.2f} | "
              f"{_frac(mx > 3, a.toys)} | {np.nanmax(mx):.1f} | {time.time() - t0:.0f} |",
              flush=True)
    # the envelope of the orders the order test keeps on one pseudo-data set
    events = 2e5
    truth = events * frac
    obs = np.random.default_rng(a.seed).poisson(truth)
    t0 = time.time()
    choice = choose_background(_hist(obs), sqrt_s=SQRT_S)
    print("\norder test kept:", ", ".join(choice.labels), f"({time.time() - t0:.0f} s)")
    for c in choice.candidates:
        print(f"  {c.label}: NLL {c.nll:.2f}, k {c.n_parameters}, GOF p {c.gof_p_value:.3g}, "
              f"order-test p {c.order_p_value}")
    sp = spurious_signal(lambda m: TRUTH.pdf(m, P, WINDOW), choice, "gaussian", MASSES,
                         events=events, edges=EDGES, relative_resolution=0.03)
    print("spurious signal of every candidate:",
          {k: round(v["max_ratio"], 2) for k, v in sp.items()})
    t0 = time.time()
    env = envelope_scan(_hist(obs), choice, "gaussian", MASSES, relative_resolution=0.03,
                        sqrt_s=SQRT_S)
    q = env.toy_scans(a.toys, seed=a.seed, expected=truth[env.scans[0].model.used])
    mx = np.sqrt(np.nanmax(q, axis=1))
    print(f"\n| {events:.0e} | envelope ({', '.join(env.labels)}) | - | "
          f"{_frac(mx > 3, a.toys)} | {np.nanmax(mx):.1f} | {time.time() - t0:.0f} |")
    j = int(np.argmin(np.abs(MASSES - 545.0)))
    for level in (1.0, 4.0):
        got = float(np.mean(q[:, j] > level))
        exp = 0.5 * st.chi2.sf(level, 1)
        err = np.sqrt(exp * (1 - exp) / a.toys)
        print(f"envelope at 545 GeV: P(q0 > {level:g}) = {got:.3f}, half chi-square "
              f"{exp:.3f} +- {err:.3f} (binomial)")
    pooled = q.ravel()
    for level in (1.0, 4.0):
        print(f"envelope, all masses pooled: P(q0 > {level:g}) = {np.mean(pooled > level):.3f}"
              f" (half chi-square {0.5 * st.chi2.sf(level, 1):.3f})")


if __name__ == "__main__":
    main()
