"""Benchmark: batched background-only toy scans vs a per-toy iminuit loop.

10,000 background-only toys, each a 200-point mass scan of a 500-bin spectrum (gaussian
signal with 1% resolution on an exponential background), with peaksift's batched engine; the
baseline fits every toy and every mass hypothesis with iminuit (the background-only fit once
per toy, then signal yield and background parameters profiled at each mass), timed on
20 toys in the same run and scaled.  Prints the total time, the speed ratio and the agreement
of the largest q0 per toy (in Z) between the two.

    python scripts/bench_toys.py [--toys 10000] [--baseline 20] [--workers 1]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from iminuit import Minuit
from scipy import special

from peaksift import MassHistogram, shapes
from peaksift.stats.scan_inputs import _prepare_model
from peaksift.stats.toys import run_toys, scan_toys_linear, toy_counts


def _spectrum(seed: int = 11) -> MassHistogram:
    rng = np.random.default_rng(seed)
    x = 100.0 + rng.exponential(150.0, 60_000)
    return MassHistogram(bins=500, range=(100.0, 600.0)).fill(x)


def _iminuit_scan(n: np.ndarray, edges: np.ndarray, window: tuple[float, float],
                  sig_fracs: np.ndarray, bkg: shapes.Shape, theta0: float) -> np.ndarray:
    """What a user writes by hand: one Minuit fit per mass hypothesis."""

    def bfrac(b1: float) -> np.ndarray:
        return bkg.bin_fractions(edges, [b1], window)

    def nll_b(b, b1):
        nu = np.maximum(b * bfrac(b1), 1e-300)
        return float(np.sum(nu - special.xlogy(n, nu)))

    m0 = Minuit(nll_b, b=float(n.sum()), b1=theta0)
    m0.errordef = Minuit.LIKELIHOOD
    m0.limits["b1"] = (-60, 60)
    m0.migrad()
    nll0 = m0.fval
    b_hat, b1_hat = m0.values["b"], m0.values["b1"]
    q = np.zeros(sig_fracs.shape[0])
    def make_nll(f: np.ndarray):
        def nll(s, b, b1):
            nu = np.maximum(s * f + b * bfrac(b1), 1e-300)
            return float(np.sum(nu - special.xlogy(n, nu)))
        return nll

    for j, f in enumerate(sig_fracs):
        m = Minuit(make_nll(f), s=0.0, b=b_hat, b1=b1_hat)
        m.errordef = Minuit.LIKELIHOOD
        m.limits["s"] = (0.0, None)
        m.limits["b1"] = (-60, 60)
        m.migrad()
        q[j] = max(2.0 * (nll0 - m.fval), 0.0) if m.values["s"] > 0 else 0.0
    return q


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--toys", type=int, default=10_000)
    ap.add_argument("--baseline", type=int, default=20)
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--seed", type=int, default=2024)
    args = ap.parse_args()

    h = _spectrum()
    masses = np.linspace(110.0, 590.0, 200)
    model, _, _ = _prepare_model(h, "gaussian", "exponential", masses, relative_resolution=0.01,
                                 window=None, natural_width=None, blind=None,
                                 signal_params=None, bins=None)
    print(f"spectrum: {model.counts.size} bins, {model.counts.sum():.0f} events; "
          f"{masses.size} mass hypotheses")

    # baseline: per-toy iminuit scans on the first toys
    nb = args.baseline
    toys_b = toy_counts(model.expected_background, args.seed, 0, nb)
    bkg = model.background
    t0 = time.perf_counter()
    q_ref = np.array([_iminuit_scan(toys_b[i], model.edges, model.window, model.fractions,
                                    bkg, float(model.theta[0])) for i in range(nb)])
    t_loop = time.perf_counter() - t0
    per_toy_loop = t_loop / nb
    print(f"iminuit loop: {nb} toys in {t_loop:.1f} s ({per_toy_loop * 1e3:.0f} ms/toy) -> "
          f"{per_toy_loop * args.toys:.0f} s scaled to {args.toys} toys")

    # same toys through the batched engine: agreement of the largest q0
    q_fast = scan_toys_linear(model, toys_b)
    dz = np.sqrt(q_fast.max(axis=1)) - np.sqrt(q_ref.max(axis=1))
    dz_all = np.abs(np.sqrt(q_fast) - np.sqrt(q_ref)).max()
    print(f"max q0 per toy, batched vs iminuit: |dZ| <= {np.abs(dz).max():.4f} "
          f"(mean {dz.mean():+.4f}); any mass |dZ| <= {dz_all:.4f}")

    # the batched engine on all toys
    t0 = time.perf_counter()
    scans = run_toys(model, args.toys, seed=args.seed, workers=args.workers, progress=False)
    t_fast = time.perf_counter() - t0
    print(f"batched engine: {args.toys} toys x {masses.size} masses in {t_fast:.1f} s "
          f"(workers={args.workers}), {t_fast / args.toys * 1e3:.2f} ms/toy")
    ratio = per_toy_loop * args.toys / t_fast
    print(f"speed-up vs looped iminuit: {ratio:.0f}x")
    z = np.sqrt(scans.max(axis=1))
    print(f"largest local Z per toy: median {np.median(z):.2f}, 95% quantile "
          f"{np.quantile(z, 0.95):.2f}")
    print(f"targets: total <= 120 s -> {'met' if t_fast <= 120 else 'MISSED'}; "
          f">= 100x -> {'met' if ratio >= 100 else 'MISSED'}")


if __name__ == "__main__":
    main()
