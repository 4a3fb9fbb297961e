"""The order test's size and p-value distribution, with many toys.

Toys from a Bernstein polynomial of degree n (60 bins on 100-200 GeV, 4000 events), each
fitted with degrees n and n + 1 (the higher order started from the lower's minimum by degree
elevation), the order test's statistic lambda = 2 (NLL_n - NLL_n+1) and its Wilks p-value
(chi-square, 1 degree of freedom).  Reported: the rate of p < size (nominal: size) with its
binomial error, the Kolmogorov-Smirnov p-value of the p-values against
``scipy.stats.uniform``, and the mean of lambda (chi-square(1): 1).

    python scripts/study_order_test.py [--toys 5000] [--size 0.05]
"""

from __future__ import annotations

import argparse

import numpy as np
from scipy import stats as sst

from peaksift import shapes
from peaksift.stats.background_choice import _embed, order_test
from peaksift.stats.toys import ScanModel, fit_background

WINDOW = (100.0, 200.0)
EDGES = np.linspace(*WINDOW, 61)
TRUTHS = {2: [0.8, 0.5], 3: [0.8, 0.6, 0.3], 4: [1.0, 0.7, 0.5, 0.3]}


def _model(degree: int) -> ScanModel:
    k = degree
    return ScanModel(edges=EDGES, used=np.arange(EDGES.size - 1), window=WINDOW,
                     counts=np.zeros(EDGES.size - 1),
                     background=shapes.get("bernstein", degree=degree), theta=np.ones(k),
                     bkg_yield=1.0, lower=np.full(k, -np.inf), upper=np.full(k, np.inf),
                     masses=np.empty(0), fractions=np.empty((0, EDGES.size - 1)))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--toys", type=int, default=5000)
    ap.add_argument("--size", type=float, default=0.05)
    ap.add_argument("--events", type=float, default=4000.0)
    a = ap.parse_args()
    print("| truth degree | toys | rate of p < size (nominal) | KS p-value vs uniform | "
          "mean lambda (chi2(1): 1) |")
    print("|---|---|---|---|---|")
    for n, truth in TRUTHS.items():
        frac = shapes.get("bernstein", degree=n).bin_fractions(EDGES, truth, WINDOW)
        counts = np.random.default_rng(n).poisson(a.events * frac,
                                                  size=(a.toys, frac.size)).astype(float)
        start = np.repeat(np.array(truth)[None, :], a.toys, axis=0)
        th, _, nll_n = fit_background(_model(n), counts, start, steps=100)
        start_up = np.array([_embed("bernstein", t) for t in th])
        _, _, nll_up = fit_background(_model(n + 1), counts, start_up, steps=100)
        lam, p = order_test(nll_n, nll_up, 1)
        ok = np.isfinite(p)
        rate = float(np.mean(p[ok] < a.size))
        err = np.sqrt(a.size * (1 - a.size) / ok.sum())
        ks = sst.kstest(p[ok], sst.uniform.cdf).pvalue
        print(f"| {n} | {int(ok.sum())} | {rate:.4f} +- {err:.4f} ({a.size:g}) | {ks:.3f} | "
              f"{lam[ok].mean():.3f} +- {np.sqrt(2 / ok.sum()):.3f} |", flush=True)


if __name__ == "__main__":
    main()
