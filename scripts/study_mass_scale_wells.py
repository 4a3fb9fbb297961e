"""Study: limits with a mass scale wider than a narrow peak against a grid-profiled reference.

A Gaussian peak of width 0.5 GeV at 150 GeV on 20,000 exponential background events in
100-200 GeV (200 bins), with and without 40 injected signal events, resolution nuisance
20 %: :func:`peaksift.stats.limits_systematics.systematic_limits` (limits in events)
against a reference written here from scratch -- bin integrals from
``scipy.special.ndtr`` and the closed-form exponential's, Gaussian constraints
1/2 ((k-1)/delta)^2, the mass-scale factor profiled on a grid of 1001 values over +-5
standard deviations (each point's other parameters minimised by iminuit, warm starts along
the grid, the lowest polished with the factor free); q~mu of Cowan, Cranmer, Gross,
Vitells, EPJC 71 (2011) 1554, eq. 16, the asymptotic CLs of eqs. 65-66 (Read 2002), the
median expected limit from q_mu,A = Phi^-1(0.975)^2.  A reference run costs about 30 s
of CPU per spectrum and mass scale; results are kept in ``--cache`` (JSON).

    python scripts/study_mass_scale_wells.py [--scales 0.01,0.03,0.05,0.10]
        [--spectra 1,2,3] [--signals 0,40] [--cache mass_scale_wells.json]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import time

import numpy as np
from iminuit import Minuit
from scipy import optimize, special

from peaksift.likelihood import SignalNuisances
from peaksift.resolution import resolution_from
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.limits_systematics import systematic_limits

WINDOW = (100.0, 200.0)
BINS = 200
EDGES = np.linspace(*WINDOW, BINS + 1)
SIGMA, MASS, D_RES = 0.5, 150.0, 0.2


def exponential(slope: float) -> np.ndarray:
    lo, hi = WINDOW
    c, h = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if abs(slope) < 1e-9:
        return np.diff(EDGES) / (hi - lo)
    with np.errstate(all="ignore"):
        prim = np.exp(slope * (EDGES - c) / h)
        return np.diff(prim) / (prim[-1] - prim[0])


def gauss(m: float, s: float) -> np.ndarray:
    """Gaussian bin fractions normalised in the window, from the tail the window lies in."""
    z = (EDGES - m) / s
    prim = special.ndtr(z) if m > 0.5 * sum(WINDOW) else -special.ndtr(-z)
    norm = prim[-1] - prim[0]
    return np.diff(prim) / norm if norm > 0 else np.zeros(BINS)


class Reference:
    def __init__(self, d_scale: float) -> None:
        self.ds = d_scale
        self.thetas = np.arange(-5.0, 5.0 + 1e-9, 0.01)

    def nll(self, counts, s, b, p, km, kr) -> float:
        nu = s * gauss(MASS * km, SIGMA * kr) + b * exponential(p)
        if np.any(nu <= 0) or not np.all(np.isfinite(nu)):
            return 1e30
        return float(np.sum(nu - counts * np.log(nu)) + 0.5 * ((km - 1) / self.ds) ** 2
                     + 0.5 * ((kr - 1) / D_RES) ** 2)

    def _minuit(self, f, **start) -> Minuit:
        m = Minuit(f, **start)
        m.limits["kr"] = (max(1 - 6 * D_RES, 1e-3), 1 + 6 * D_RES)
        if "km" in start:
            m.limits["km"] = (1 - 6 * self.ds, 1 + 6 * self.ds)
        m.errordef = Minuit.LIKELIHOOD
        return m

    def _at(self, counts, s, km):
        if s is None:
            return lambda s, b, p, kr: self.nll(counts, s, b, p, km, kr)
        return lambda b, p, kr: self.nll(counts, s, b, p, km, kr)

    def profile(self, counts, s: float | None) -> tuple[float, float, float]:
        """(min NLL, s, k_m) over everything at the yield ``s`` (None: s free too)."""
        free = s is None
        best = (np.inf, {})
        i0 = int(np.argmin(np.abs(self.thetas)))
        for order in (range(i0, self.thetas.size), range(i0 - 1, -1, -1)):
            st = {"b": counts.sum() - (s or 0.0), "p": -1.0, "kr": 1.0}
            st |= {"s": 10.0} if free else {}
            for i in order:
                km = 1 + self.ds * self.thetas[i]
                m = self._minuit(self._at(counts, s, km), **st)
                m.strategy = 0
                m.migrad()
                st = dict(m.values.to_dict())
                if m.fval < best[0]:
                    best = (m.fval, {**st, "km": km})
        if free:
            m = self._minuit(lambda s, b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                             **best[1])
        else:
            m = self._minuit(lambda b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                             **best[1])
        m.migrad()
        if m.fval < best[0]:
            return m.fval, (m.values["s"] if free else s), m.values["km"]
        return best[0], best[1].get("s", s), best[1]["km"]

    def background(self, counts) -> tuple[float, np.ndarray]:
        m = Minuit(lambda b, p: self.nll(counts, 0.0, b, p, 1.0, 1.0), b=counts.sum(), p=-1.0)
        m.errordef = Minuit.LIKELIHOOD
        m.migrad()
        return m.fval, m.values["b"] * exponential(m.values["p"])


def cls(q: float, q_a: float) -> float:
    q = max(q, 0.0)
    if q <= q_a:
        sb = special.ndtr(-math.sqrt(q))
        b = special.ndtr(math.sqrt(q_a) - math.sqrt(q))
    else:
        r = 2 * math.sqrt(q_a)
        sb, b = special.ndtr(-(q + q_a) / r), special.ndtr(-(q - q_a) / r)
    return sb / b


def reference_limits(n: np.ndarray, d_scale: float) -> tuple[float, float, float, float]:
    """(observed, expected, s_hat, k_m at s_hat) of the reference."""
    ref = Reference(d_scale)
    _, asimov = ref.background(n)
    nll_a0 = ref.background(asimov)[0]
    nll_hat, mu_hat, km_hat = ref.profile(n, None)
    nll_ref = nll_hat if mu_hat >= 0 else ref.background(n)[0]

    def q_a(mu):
        return 2 * (ref.profile(asimov, mu)[0] - nll_a0)

    def q(mu):
        return 0.0 if mu_hat > mu else 2 * (ref.profile(n, mu)[0] - nll_ref)

    z = special.ndtri(0.975)
    expected = optimize.brentq(lambda mu: q_a(mu) - z * z, 1.0, 300.0, xtol=1e-3)
    observed = optimize.brentq(lambda mu: cls(q(mu), q_a(mu)) - 0.05, 1.0, 300.0, xtol=1e-3)
    return observed, expected, mu_hat, km_hat


def spectrum(index: int, signal: int) -> np.ndarray:
    rng = np.random.default_rng(index)
    x = np.concatenate([100 + rng.exponential(40, 20000), rng.normal(MASS, SIGMA, signal)])
    return x[(x > WINDOW[0]) & (x < WINDOW[1])]



def load_cache(path: str) -> dict:
    """The reference values kept by an earlier run in ``path`` (JSON), or none."""
    if not os.path.exists(path):
        return {}
    with open(path) as fh:
        return json.load(fh)


def cached(cache: dict, path: str, key: str, compute):
    """``cache[key]``, computed and the whole cache written to ``path`` when missing."""
    if key not in cache:
        cache[key] = compute()
        with open(path, "w") as fh:
            json.dump(cache, fh)
    return cache[key]

def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scales", default="0.01,0.03,0.05,0.10")
    ap.add_argument("--spectra", default="1,2,3")
    ap.add_argument("--signals", default="0,40")
    ap.add_argument("--cache", default="mass_scale_wells.json")
    a = ap.parse_args()
    cache = load_cache(a.cache)
    worst = 0.0
    for index in map(int, a.spectra.split(",")):
        for signal in map(int, a.signals.split(",")):
            x = spectrum(index, signal)
            n = np.histogram(x, EDGES)[0].astype(float)
            for ds in map(float, a.scales.split(",")):
                t0 = time.process_time()
                res = systematic_limits(
                    (x, np.ones_like(x)), "gaussian", candidate_shapes(["exppoly1"]),
                    np.array([MASS]), resolution=resolution_from(None, absolute=SIGMA),
                    window=WINDOW, bins=BINS, method="asymptotic",
                    nuisances=SignalNuisances.make({"mass_scale": ds,
                                                    "mass_resolution": D_RES}))
                cpu = time.process_time() - t0
                key = f"{index}/{signal}/{ds}"
                ro, re_, s_hat, km = cached(cache, a.cache, key,
                                            lambda n=n, ds=ds: reference_limits(n, ds))
                po, pe = res["observed"][0], res["expected"][0]
                worst = max(worst, abs(po / ro - 1), abs(pe / re_ - 1))
                print(f"spectrum {index} signal {signal:3d} scale {ds:.2f}: observed "
                      f"{po:8.3f} / reference {ro:8.3f} = {po / ro:.5f}; expected {pe:7.3f} "
                      f"/ {re_:7.3f} = {pe / re_:.5f} (reference s_hat {s_hat:.2f} at k_m "
                      f"{km:.4f}; {cpu:.1f} s CPU){' [several minima]' if res['notes'] else ''}",
                      flush=True)
    print(f"largest relative difference: {worst:.2e}")


if __name__ == "__main__":
    main()
