"""Where the asymptotic CLs expected bands go wrong at low counts, and whether toys fix it.

A Gaussian peak (1% resolution) at 340 GeV on a steeply falling exponential in 100-400 GeV
(100 bins of 3 GeV), the background normalised so that b_eff, the background expected
under the signal (see ``peaksift.upper_limits``), takes each value asked for.  For each
b_eff, background-only pseudo data sets (Poisson draws of the background) are analysed as
a user would: one ``upper_limits`` call each, giving the observed limit and the expected
band of that same run.  Under the background-only hypothesis the observed limit should
fall below the -2, -1 sigma band edges and the median in 2.3%, 15.9% and 50% of the data
sets, and above the +1, +2 sigma edges in 15.9% and 2.3% (Read 2002, sec. 4; Cowan et
al. 2011, sec. 4.3).

With discrete limits (low counts) a fraction of the data sets sits exactly on an edge; the
table shows the fraction strictly beyond the edge and the fraction beyond or on it
("on" = within 1%), and a well placed edge has the nominal fraction between the two.
The last column is the fraction of data sets whose expected median lies below the
counting floor of 2.996 signal events (Read 2002: CLs >= exp(-s)), a place where no
limit can be.

    PYTHONPATH=src python scripts/study_low_count_limits.py              # ~20 min on one free core
    PYTHONPATH=src python scripts/study_low_count_limits.py --quick      # a few minutes

Measured 2026-12-02 (default settings, 100 toys per toy limit; rows for b_eff 5 and 20,
and a second b_eff 10 row, from ``--b 5 10 20 --pseudo 400 --methods asymptotic
--seed 12``); % strictly beyond / beyond or on:

    b_eff  method      n        <-2sig        <-1sig       <median        >+1sig       >+2sig  median<floor
    nominal                        2.3          15.9          50.0          15.9          2.3
      0.1  asymptotic 200    0.0 /  0.0    0.0 /  0.0   86.0 / 86.0    1.0 /  1.0   0.0 / 0.0     100.0
      0.1  toys        40    0.0 / 87.5    0.0 / 87.5    0.0 / 87.5   10.0 / 75.0   2.5 / 2.5       0.0
      0.5  asymptotic 200    0.0 /  0.0    0.0 /  0.0   61.5 / 62.5    5.0 /  6.0   0.0 / 0.0      24.0
      0.5  toys        40    0.0 / 42.5    0.0 / 42.5   27.5 / 47.5   12.5 / 15.0   2.5 / 2.5       0.0
      2.0  asymptotic 200    0.0 /  0.0   14.5 / 15.0   58.0 / 59.0    6.0 /  6.0   0.0 / 0.0       0.0
      2.0  toys        40    0.0 /  2.5   12.5 / 12.5   55.0 / 57.5   17.5 / 20.0   0.0 / 0.0       0.0
      5.0  asymptotic 400    0.0 /  0.0   13.0 / 15.0   52.2 / 54.5    8.5 /  9.5   0.2 / 0.2       0.0
     10.0  asymptotic 200    0.5 /  1.0   10.0 / 10.5   46.5 / 48.5   14.5 / 15.0   2.0 / 2.0       0.0
     10.0  asymptotic 400    1.0 /  1.0   10.8 / 12.2   51.0 / 52.8   13.0 / 14.0   0.2 / 0.2       0.0
     10.0  toys        40    0.0 /  0.0   17.5 / 17.5   35.0 / 37.5   15.0 / 17.5   0.0 / 0.0       0.0
     20.0  asymptotic 400    0.8 /  1.0   13.2 / 14.8   49.0 / 51.0   11.5 / 13.2   1.0 / 1.5       0.0
     50.0  asymptotic 200    1.5 /  2.0   12.5 / 16.5   51.0 / 54.0   14.0 / 16.0   1.5 / 1.5       0.0
     50.0  toys        40    0.0 /  0.0   15.0 / 17.5   50.0 / 52.5   10.0 / 10.0   2.5 / 2.5       0.0

Binomial errors: 2.6 (200) and 1.8 (400) points at 15.9%, 5.8 points for the toy rows (40).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from peaksift import MassHistogram, shapes
from peaksift.stats import upper_limits

WINDOW = (100.0, 400.0)
BINS = 100
MASS = 340.0
RESOLUTION = 0.01
SLOPE = -6.0          # exponential shape parameter: falls by e^-12 across the window
NOMINAL = (2.28, 15.87, 50.0, 15.87, 2.28)
EDGES = ("expected_minus2", "expected_minus1", "expected", "expected_plus1", "expected_plus2")
ON = 0.01             # relative distance that counts as "on the edge"
FLOOR = -np.log(0.05)


def histogram(counts: np.ndarray) -> MassHistogram:
    h = MassHistogram(bins=BINS, range=WINDOW)
    h.weight_sum = np.asarray(counts, float)
    h.weight_sq_sum = h.weight_sum.copy()
    return h


def background_shape() -> np.ndarray:
    edges = np.linspace(*WINDOW, BINS + 1)
    return np.asarray(shapes.get("exponential").bin_fractions(edges, [SLOPE], WINDOW), float)


def limits(h: MassHistogram, method: str, toys: int, seed: int) -> tuple[float, np.ndarray]:
    kw = {"toy_masses": [MASS], "toys": toys, "seed": seed} if method == "toys" else {}
    r = upper_limits(h, "gaussian", "exponential", [MASS], relative_resolution=RESOLUTION,
                     method=method, **kw)
    return float(r.observed[0]), np.array([getattr(r, e)[0] for e in EDGES])


def fractions(obs: np.ndarray, bands: np.ndarray) -> list[tuple[float, float]]:
    """Per edge: (% strictly beyond, % beyond or on) -- below for the lower edges and the
    median, above for the upper edges."""
    out = []
    for k in range(5):
        e = bands[:, k]
        if k <= 2:
            strict, loose = obs < e * (1 - ON), obs <= e * (1 + ON)
        else:
            strict, loose = obs > e * (1 + ON), obs >= e * (1 - ON)
        out.append((100 * strict.mean(), 100 * loose.mean()))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--b", type=float, nargs="+", default=[0.1, 0.5, 2.0, 10.0, 50.0],
                    help="background events under the signal (b_eff)")
    ap.add_argument("--pseudo", type=int, default=200,
                    help="pseudo data sets for the asymptotic rows")
    ap.add_argument("--pseudo-toys", type=int, default=40,
                    help="pseudo data sets for the toy rows (each a full toy limit)")
    ap.add_argument("--toys", type=int, default=100, help="toys per toy limit")
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--quick", action="store_true", help="50 / 10 pseudo data sets")
    ap.add_argument("--methods", nargs="+", default=["asymptotic", "toys"],
                    choices=["asymptotic", "toys"])
    a = ap.parse_args()
    if a.quick:
        a.pseudo, a.pseudo_toys = 50, 10
    g = background_shape()
    # b_eff of one background event in the window (b_eff scales with the background)
    unit_b = float(upper_limits(histogram(g), "gaussian", "exponential", [MASS],
                                relative_resolution=RESOLUTION, method="asymptotic"
                                ).background_under_signal[0])
    rng = np.random.default_rng(a.seed)
    head = ("b_eff  method      n   " + "  ".join(f"{s:>13s}" for s in (
        "<-2sig", "<-1sig", "<median", ">+1sig", ">+2sig")) + "  median<floor")
    rows = [head, " " * 20 + "  ".join(f"{'nominal ' + format(v, '.1f'):>13s}"
                                       for v in NOMINAL)]
    for b in a.b:
        nu = g * (b / unit_b)
        e = np.linspace(*WINDOW, BINS + 1)
        within = nu[np.abs(0.5 * (e[:-1] + e[1:]) - MASS) < 2 * RESOLUTION * MASS].sum()
        for method, n in (("asymptotic", a.pseudo), ("toys", a.pseudo_toys)):
            if method not in a.methods:
                continue
            t0 = time.time()
            res = [limits(histogram(rng.poisson(nu)), method, a.toys, a.seed + i)
                   for i in range(n)]
            obs = np.array([r[0] for r in res])
            bands = np.array([r[1] for r in res])
            fr = fractions(obs, bands)
            cells = "  ".join(f"{s:5.1f} / {lo:5.1f}" for s, lo in fr)
            below_floor = 100 * np.mean(bands[:, 2] < FLOOR * (1 - ON))
            rows.append(f"{b:5.1f}  {method:10s} {n:4d}   {cells}  {below_floor:8.1f}")
            print(rows[-1], f"   ({time.time() - t0:.0f} s; {within:.2f} events within "
                  "+-2 sigma)", flush=True)
    print()
    print("% of background-only data sets with the observed limit beyond each band edge of")
    print("the same run: strictly beyond / beyond or on (within 1%); nominal in between")
    print("\n".join(rows))


if __name__ == "__main__":
    main()
