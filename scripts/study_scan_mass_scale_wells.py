"""Study: the scan's q0 and the toy limits' q~mu with a mass scale wider than a narrow peak.

Seeded toys of 20,000 exponential background events in 100-200 GeV (200 bins), with and
without 40 signal events of a Gaussian of width 0.5 GeV at 150 GeV, resolution nuisance
20 % and a mass scale of 1-3 % (Gaussian constraints).  Two of peaksift's test statistics
at 150 GeV are compared with a reference written here from scratch:

* the scan's local q0 (:func:`peaksift.stats.scan.scan` with ``nuisances=``), CCGV eq. 12;
* the toy limits' q~mu (:class:`peaksift.stats.toy_limits_systematics._Ensemble`, the
  statistic of every toy and of the data), CCGV eq. 16, at mu = 20, 40, 60 events in
  turn (its warm starts as in the limits' grid), the constraints centred on global
  observables drawn per toy (c = 1 + delta z).

Reference: bin integrals from ``scipy.special.ndtr`` and the closed-form exponential's,
Gaussian constraints 1/2 ((k - c)/delta)^2, the mass-scale factor profiled on a grid of
steps of a quarter of the peak's width over +-5 standard deviations around its centre
(each point's other parameters minimised by iminuit, warm starts along the grid), the
three lowest wells polished by iminuit with the factor free (Cowan, Cranmer, Gross,
Vitells, EPJC 71 (2011) 1554, eqs. 7, 12, 16).  About 2 s of CPU per toy; the reference
values are kept in ``--cache`` (JSON), so a second tree is compared for the cost of its own
numbers.

    python scripts/study_scan_mass_scale_wells.py [--scales 0.01,0.03] [--toys 100]
        [--signals 0,40] [--cache scan_mass_scale_wells.json] [--out values.json]
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
from iminuit import Minuit

# the spectra and shapes of the limits' study (one definition for both)
from study_mass_scale_wells import (
    D_RES,
    EDGES,
    MASS,
    SIGMA,
    WINDOW,
    cached,
    exponential,
    gauss,
    load_cache,
)
from study_mass_scale_wells import Reference as LimitsReference

from peaksift.likelihood import SignalNuisances
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.scan import scan
from peaksift.stats.scan_inputs import _prepare_model, _signal_params
from peaksift.stats.toy_limits_systematics import _Ensemble, _SystematicToyTask

MUS = (20.0, 40.0, 60.0)


class Reference(LimitsReference):
    """The NLL of the model written out, the mass scale profiled by a grid (the limits
    study's reference, with constraint centres of its own and its own grid; its Minuit
    set-up and fixed-factor NLLs inherited)."""

    def __init__(self, d_scale: float, centers: tuple[float, float] = (1.0, 1.0),
                 mass: float = MASS) -> None:
        self.ds, self.mass = d_scale, mass
        self.cm, self.cr = centers
        step = 0.25 * SIGMA / (MASS * d_scale)      # a quarter width, in standard deviations
        lo = max(self.cm - 5 * d_scale, 1 - 6 * d_scale)
        hi = min(self.cm + 5 * d_scale, 1 + 6 * d_scale)
        self.kms = np.linspace(lo, hi, int(np.ceil((hi - lo) / d_scale / step)) + 1)

    def nll(self, counts, s, b, p, km, kr) -> float:
        nu = s * gauss(self.mass * km, SIGMA * kr) + b * exponential(p)
        if np.any(nu <= 0) or not np.all(np.isfinite(nu)):
            return 1e30
        return float(np.sum(nu - counts * np.log(nu))
                     + 0.5 * ((km - self.cm) / self.ds) ** 2
                     + 0.5 * ((kr - self.cr) / D_RES) ** 2)

    def profile(self, counts, s: float | None) -> tuple[float, float, float]:
        """(min NLL, s, k_m) over everything at the yield ``s`` (None: s free too)."""
        free = s is None
        vals = np.full(self.kms.size, np.inf)
        starts: list[dict] = [{}] * self.kms.size
        i0 = int(np.argmin(np.abs(self.kms - self.cm)))
        for order in (range(i0, self.kms.size), range(i0 - 1, -1, -1)):
            st = {"b": counts.sum() - (s or 0.0), "p": -1.0, "kr": self.cr}
            st |= {"s": 10.0} if free else {}
            for i in order:
                km = self.kms[i]
                m = self._minuit(self._at(counts, s, km), **st)
                m.strategy = 0
                m.migrad()
                st = dict(m.values.to_dict())
                vals[i], starts[i] = m.fval, {**st, "km": km}
        # the three lowest wells (grid points not above either neighbour), polished
        pad = np.concatenate([[np.inf], vals, [np.inf]])
        wells = np.flatnonzero((vals <= pad[:-2]) & (vals <= pad[2:]))
        best = (np.inf, s, np.nan)
        for i in wells[np.argsort(vals[wells])][:3]:
            if free:
                m = self._minuit(lambda s, b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                                 **starts[i])
            else:
                m = self._minuit(lambda b, p, kr, km: self.nll(counts, s, b, p, km, kr),
                                 **starts[i])
            m.migrad()
            cand = ((m.fval, m.values["s"] if free else s, m.values["km"])
                    if m.fval < vals[i] else (vals[i], starts[i].get("s", s), starts[i]["km"]))
            if cand[0] < best[0]:
                best = cand
        return best

    def background(self, counts) -> float:
        m = Minuit(lambda b, p: self.nll(counts, 0.0, b, p, self.cm, self.cr),
                   b=counts.sum(), p=-1.0)
        m.errordef = Minuit.LIKELIHOOD
        m.migrad()
        return m.fval


def toy(index: int, signal: int) -> np.ndarray:
    rng = np.random.default_rng(index)
    x = np.concatenate([100 + rng.exponential(40, 20000), rng.normal(MASS, SIGMA, signal)])
    return np.histogram(x, EDGES)[0].astype(float)


def centers_of(index: int, ds: float) -> tuple[float, float]:
    z = np.random.default_rng(10_000 + index).standard_normal(2)
    return 1.0 + ds * z[0], 1.0 + D_RES * z[1]


def reference(n: np.ndarray, ds: float, cen: tuple[float, float]) -> dict:
    """q0 (centres at 1) and q~mu at MUS (centres ``cen``) of the reference."""
    ref = Reference(ds)
    nll_hat, s_hat, km_hat = ref.profile(n, None)
    q0 = 2 * (ref.background(n) - nll_hat) if s_hat > 0 else 0.0
    rc = Reference(ds, cen)
    nll_hat_c, mu_hat, _ = rc.profile(n, None)
    nll_ref = nll_hat_c if mu_hat >= 0 else rc.background(n)
    q_mu = [0.0 if mu_hat > mu else max(2 * (rc.profile(n, mu)[0] - nll_ref), 0.0)
            for mu in MUS]
    return {"q0": max(q0, 0.0), "s_hat": s_hat, "km_hat": km_hat, "q_mu": q_mu}


def peaksift_q0(n: np.ndarray, nuis: SignalNuisances) -> float:
    r = scan((n, EDGES), "gaussian", candidate_shapes(["exppoly1"])["exppoly1"],
             np.array([MASS]), absolute_resolution=SIGMA, window=WINDOW, refit=False,
             nuisances=nuis)
    return float(r.q0[0])


def peaksift_q_mu(counts: np.ndarray, cens: np.ndarray, nuis: SignalNuisances) -> np.ndarray:
    """q~mu of every toy row at MUS in turn: one ensemble, the data model of toy 0 of the
    background-only set (the toy limits' ensembles: the data's model, the toys' counts)."""
    model, spec, info = _prepare_model(
        (toy(0, 0), EDGES), "gaussian", candidate_shapes(["exppoly1"])["exppoly1"],
        np.array([MASS]), absolute_resolution=SIGMA, window=WINDOW, natural_width=None,
        blind=None, signal_params=None, bins=None, what="study")
    base = _signal_params(info["signal"], spec.window, model.masses, info["sigma"], None,
                          info["signal_params"])
    task = _SystematicToyTask((model,), np.zeros(1), 0, 1.0, 0.0, "lognormal", info["signal"],
                              tuple(np.asarray(p)[0:1] if np.ndim(p) else p for p in base),
                              nuis, 0.95, counts.shape[0], 0, 50.0, np.full(5, 50.0))
    ens = _Ensemble(task, counts, np.zeros(counts.shape[0]), cens)
    return np.stack([ens.q(mu)[0] for mu in MUS], axis=1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scales", default="0.01,0.03")
    ap.add_argument("--toys", type=int, default=100)
    ap.add_argument("--signals", default="0,40")
    ap.add_argument("--cache", default="scan_mass_scale_wells.json")
    ap.add_argument("--out", default=None, help="peaksift's values per toy (JSON)")
    a = ap.parse_args()
    cache = load_cache(a.cache)
    out = {}
    for ds in map(float, a.scales.split(",")):
        nuis = SignalNuisances.make({"mass_scale": ds, "mass_resolution": D_RES})
        for signal in map(int, a.signals.split(",")):
            idx = range(1, a.toys + 1)
            counts = np.array([toy(i, signal) for i in idx])
            cens = np.array([centers_of(i, ds) for i in idx])
            t0 = time.process_time()
            q0 = np.array([peaksift_q0(n, nuis) for n in counts])
            t1 = time.process_time()
            q_mu = peaksift_q_mu(counts, cens, nuis)
            t2 = time.process_time()
            refs = []
            for i, n, c in zip(idx, counts, cens):
                key = f"{ds}/{signal}/{i}"
                refs.append(cached(cache, a.cache, key,
                                   lambda n=n, ds=ds, c=c: reference(n, ds, tuple(c))))
            r0 = np.array([r["q0"] for r in refs])
            rmu = np.array([r["q_mu"] for r in refs])
            out[f"{ds}/{signal}"] = {"q0": q0.tolist(), "q_mu": q_mu.tolist(),
                                     "ref_q0": r0.tolist(), "ref_q_mu": rmu.tolist()}
            d0 = q0 - r0
            dmu = q_mu - rmu
            print(f"scale {ds:.2f} signal {signal:2d}: q0  wrong (|dq| > 0.01) in "
                  f"{np.sum(np.abs(d0) > 0.01):3d}/{len(idx)}, below by up to "
                  f"{-min(d0.min(), 0):.3f} (median of those "
                  f"{np.median(-d0[d0 < -0.01]) if np.any(d0 < -0.01) else 0:.3f}), above by "
                  f"up to {max(d0.max(), 0):.3f}; ref q0 median {np.median(r0):.3f}; "
                  f"{t1 - t0:.1f} s CPU for {len(idx)} scans", flush=True)
            for j, mu in enumerate(MUS):
                d = dmu[:, j]
                print(f"                      q~mu at {mu:4.0f}: wrong in "
                      f"{np.sum(np.abs(d) > 0.01):3d}/{len(idx)}, above by up to "
                      f"{max(d.max(), 0):.3f} (median of those "
                      f"{np.median(d[d > 0.01]) if np.any(d > 0.01) else 0:.3f}), below by "
                      f"up to {-min(d.min(), 0):.3f}; ref median {np.median(rmu[:, j]):.3f}",
                      flush=True)
            print(f"                      {t2 - t1:.1f} s CPU for the ensemble's q~mu",
                  flush=True)
    if a.out:
        with open(a.out, "w") as fh:
            json.dump(out, fh)


if __name__ == "__main__":
    main()
