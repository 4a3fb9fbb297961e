"""Study: a combination's q0 and limits with a mass scale per channel wider than the peak.

Two channels, each 20,000 exponential background events in 100-200 GeV (200 bins), with
and without 40 signal events of a 0.5 GeV Gaussian at 150 GeV, each with its own mass
scale (1 %) and resolution (20 %) nuisance; luminosity and efficiency 1 (sigma x B in
events per channel).  Peaksift's combined q0 (:func:`peaksift.stats.channels.combine`)
and, with ``--limits``, its asymptotic combined limits
(:func:`peaksift.stats.channel_limits.combined_limits`) against a reference written from
scratch: given mu the channels are independent, so the joint profile is the sum of each
channel's NLL at s = mu profiled by ``study_scan_mass_scale_wells.Reference`` (the
mass-scale factor on a grid, iminuit for the rest, the lowest wells polished), minimised
over mu on a grid of 10 events and by scipy's bounded Brent around its lowest point;
q0 of CCGV eq. 12, q~mu of eq. 16, CLs of eqs. 65-66 (Read 2002), the median expected
limit from q_mu,A = Phi^-1(0.975)^2.  About 30 s of CPU per toy (3 min with limits).

``--what`` picks what is compared (several may be given, comma-separated):

* ``q0``: the combined scan's q0 (:func:`~peaksift.stats.channels.combine`), above;
* ``envelope``: the same through the channels' envelope of background functions (each
  channel's one candidate, ``exppoly1``: the envelope's minimum over assignments is then
  the joint fit itself, and so is the reference);
* ``toys``: the global significance toys' q0 (:func:`peaksift.stats.channel_toys.toy_q0`,
  their refitted top points, constraint centres at 1) of background-only spectra on 41
  masses 140-160 GeV, each toy's highest against the reference's q0 at that mass;
* ``toylimits``: the combined toy limits' q~mu (its toy sets, ``channel_toy_limits._Set``) at
  20, 40, 60 events in turn (CCGV eq. 16), each channel's constraints centred on global
  observables drawn per toy (c = 1 + delta z, as the scan study's), against the reference
  with those centres.

The reference values are kept in ``--cache`` (JSON), so a second tree is compared for the
cost of its own numbers.

    python scripts/study_joint_mass_scale_wells.py [--first 0] [--last 17] [--limits]
        [--what q0,envelope,toys,toylimits] [--cache joint_mass_scale_wells.json]
"""

from __future__ import annotations

import argparse
import dataclasses
import inspect
import math
import os
import sys

import numpy as np
from iminuit import Minuit
from scipy import optimize, special

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import study_scan_mass_scale_wells as S  # the reference of one channel

from peaksift.resolution import resolution_from
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.channel_limits import combined_limits
from peaksift.stats.channels import Channel, combine

DS = 0.01


def channels(ns):
    b = candidate_shapes(["exppoly1"])["exppoly1"]
    return [Channel(f"c{c}", (n, S.EDGES), b, 1.0, signal="gaussian",
                    resolution=resolution_from(None, absolute=S.SIGMA), efficiency=1.0,
                    window=S.WINDOW,
                    shape_nuisances={"mass_scale": DS, "mass_resolution": S.D_RES})
            for c, n in enumerate(ns)]


class Joint:
    """The reference's joint profile of the channels' counts ``ns`` (``centers``: per
    channel its constraints' centres; ``mass``: the hypothesis)."""

    def __init__(self, ns, centers=None, mass: float = S.MASS) -> None:
        cens = centers or [(1.0, 1.0)] * len(ns)
        self.ns, self.cache = ns, {}
        self.refs = [S.Reference(DS, tuple(c), mass) for c in cens]

    def __call__(self, mu: float) -> float:
        mu = float(mu)
        if mu not in self.cache:
            self.cache[mu] = sum(r.profile(n, mu)[0] for r, n in zip(self.refs, self.ns))
        return self.cache[mu]

    def free(self) -> tuple[float, float]:
        grid = np.arange(-60.0, 101.0, 10.0)
        vals = [self(m) for m in grid]
        i = int(np.argmin(vals))
        res = optimize.minimize_scalar(self, bounds=(grid[max(i - 1, 0)],
                                                     grid[min(i + 1, grid.size - 1)]),
                                       method="bounded", options={"xatol": 1e-3})
        return (res.fun, res.x) if res.fun < vals[i] else (vals[i], grid[i])

    def null(self) -> float:
        return sum(r.background(n) for r, n in zip(self.refs, self.ns))


def asimov(n):
    ref = S.Reference(DS)
    m = Minuit(lambda b, p: ref.nll(n, 0.0, b, p, 1.0, 1.0), b=n.sum(), p=-1.0)
    m.errordef = Minuit.LIKELIHOOD
    m.migrad()
    return m.values["b"] * S.exponential(m.values["p"])


def cls(q, qa):
    q = max(q, 0.0)
    if q <= qa:
        sb, b = special.ndtr(-math.sqrt(q)), special.ndtr(math.sqrt(qa) - math.sqrt(q))
    else:
        r = 2 * math.sqrt(qa)
        sb, b = special.ndtr(-(q + qa) / r), special.ndtr(-(q - qa) / r)
    return sb / b


def reference_limits(ns, joint, nll_hat, mu_hat):
    ja = Joint([asimov(n) for n in ns])
    f_ref = nll_hat if mu_hat >= 0 else joint(0.0)
    fa0 = ja(0.0)

    def qa(mu):
        return 2 * (ja(mu) - fa0)

    def q(mu):
        return 0.0 if mu_hat > mu else max(2 * (joint(mu) - f_ref), 0.0)

    z2 = special.ndtri(0.975) ** 2
    expected = optimize.brentq(lambda mu: qa(mu) - z2, 1.0, 200.0, xtol=1e-3)
    observed = optimize.brentq(lambda mu: cls(q(mu), qa(mu)) - 0.05,
                               max(mu_hat, 0.0) + 1e-3, 300.0, xtol=1e-3)
    return observed, expected


MUS = (20.0, 40.0, 60.0)
TOY_MASSES = np.linspace(140.0, 160.0, 41)


def ref_q0(ns, mass: float = S.MASS) -> dict:
    joint = Joint(ns, mass=mass)
    nll_hat, mu_hat = joint.free()
    q0 = max(2 * (joint.null() - nll_hat), 0.0) if mu_hat > 0 else 0.0
    return {"q0": q0, "mu": float(mu_hat), "nll_hat": float(nll_hat)}


def ref_q_mu(ns, cens) -> list:
    """q~mu at MUS of the reference with the channels' constraint centres ``cens``."""
    joint = Joint(ns, cens)
    nll_hat, mu_hat = joint.free()
    ref = nll_hat if mu_hat >= 0 else joint.null()
    return [0.0 if mu_hat > mu else max(2 * (joint(mu) - ref), 0.0) for mu in MUS]


def toy_q0_scan(ns_list) -> np.ndarray:
    """The combined toys' q0 ``(toys, masses)`` of the spectra ``ns_list`` (per toy the
    channels' counts) on TOY_MASSES, fitted with the models of the first toy's
    combination (the toys' fits do not use the data's counts)."""
    from types import SimpleNamespace

    from peaksift.stats.channel_toys import toy_q0

    cmb = combine(channels(ns_list[0]), TOY_MASSES, refit=False)
    raw = [np.array([ns[c] for ns in ns_list]) for c in range(2)]
    task = SimpleNamespace(conv=list(cmb.conversion.values()), norms=cmb.norms,
                           shapes=cmb.shapes, ensembles=["fixed", "fixed"], seed=0, first=0)
    return toy_q0(list(cmb.prepared), raw, task)[0]


def toy_limit_q(ns_list, cens_list) -> np.ndarray:
    """q~mu ``(toys, len(MUS))`` of the combined toy limits' sets (one set of every toy,
    its channels' constraint centres ``cens_list``; before the shape factors entered
    them, the same sets without)."""
    from peaksift.stats.channels import _prepare_all

    try:   # the toy limit's own module since toylimit10
        from peaksift.stats import channel_toy_limits as T
    except ImportError:
        from peaksift.stats import channel_toys as T

    chans = channels(ns_list[0])
    _, prepared, _, bl, conv = _prepare_all(chans, np.array([S.MASS]), None)
    models = [p[0] for p in prepared]
    counts = [np.array([ns[c] for ns in ns_list]) for c in range(2)]
    t = len(ns_list)
    args = (models, counts, [float(k[0]) for k in conv], None, np.zeros((t, 0)))
    if "shapes" in inspect.signature(T._Set).parameters:
        shapes = [ch.shape_spec(p, bl) for ch, p in zip(chans, prepared)]
        cens = [np.array([c[ch] for c in cens_list]) for ch in range(2)]
        st = T._Set(*args, shapes, cens)
    else:
        st = T._Set(*args)
    return np.stack([st.q(mu)[0] for mu in MUS], axis=1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--first", type=int, default=0)
    ap.add_argument("--last", type=int, default=17)
    ap.add_argument("--limits", action="store_true")
    ap.add_argument("--what", default="q0")
    ap.add_argument("--cache", default="joint_mass_scale_wells.json")
    a = ap.parse_args()
    cache = S.load_cache(a.cache)
    what = a.what.split(",")
    idx = range(a.first, a.last)
    if "q0" in what or "envelope" in what:
        for mode in [w for w in ("q0", "envelope") if w in what]:
            wrong = total = 0
            worst = 0.0
            for i in idx:
                for sig in (0, 40):
                    ns = [S.toy(1000 + 2 * i, sig), S.toy(1001 + 2 * i, sig)]
                    chans = channels(ns)
                    if mode == "envelope":
                        b = candidate_shapes(["exppoly1"])
                        chans = [dataclasses.replace(ch, background_candidates=b)
                                 for ch in chans]
                    got = combine(chans, np.array([S.MASS]), refit=False)
                    ref = S.cached(cache, a.cache, f"q0/{i}/{sig}", lambda ns=ns: ref_q0(ns))
                    total += 1
                    d = got.q0[0] - ref["q0"]
                    wrong += abs(d) > 0.01
                    worst = max(worst, abs(d)) if abs(d) <= 0.01 else worst
                    line = (f"{mode} toy {i} signal {sig:2d}: q0 {got.q0[0]:8.4f} reference "
                            f"{ref['q0']:8.4f}; mu {got.cross_section[0]:7.2f} reference "
                            f"{ref['mu']:7.2f}")
                    if a.limits and mode == "q0":
                        joint = Joint(ns)
                        lim = combined_limits(channels(ns), np.array([S.MASS]),
                                              method="asymptotic")
                        ro, re_ = reference_limits(ns, joint, ref["nll_hat"], ref["mu"])
                        po, pe = (float(np.ravel(lim.observed)[0]),
                                  float(np.ravel(lim.expected)[0]))
                        line += (f"; observed {po:.3f} / {ro:.3f} = {po / ro:.4f}, expected "
                                 f"{pe:.3f} / {re_:.3f} = {pe / re_:.4f}")
                    print(line, flush=True)
            print(f"{mode}: q0 wrong (|dq| > 0.01) in {wrong} of {total} (largest |dq| of "
                  f"the others {worst:.2g})", flush=True)
    if "toys" in what:
        ns_list = [[S.toy(3000 + 2 * i, 0), S.toy(3001 + 2 * i, 0)] for i in idx]
        q = toy_q0_scan(ns_list)
        wrong, worst = 0, 0.0
        for t, i in enumerate(idx):
            j = int(np.nanargmax(q[t]))
            m = float(TOY_MASSES[j])
            ref = S.cached(cache, a.cache, f"toys/{i}/{m:g}",
                          lambda ns=ns_list[t], m=m: ref_q0(ns, m))
            d = q[t, j] - ref["q0"]
            wrong += abs(d) > 0.01
            worst = max(worst, abs(d)) if abs(d) <= 0.01 else worst
            print(f"toys toy {i}: highest q0 {q[t, j]:8.4f} at {m:g} GeV, reference "
                  f"{ref['q0']:8.4f}", flush=True)
        print(f"toys: highest q0 wrong (|dq| > 0.01) in {wrong} of {len(idx)} (largest |dq| "
              f"of the others {worst:.2g})", flush=True)
    if "toylimits" in what:
        for sig in (0, 40):
            ns_list = [[S.toy(1000 + 2 * i, sig), S.toy(1001 + 2 * i, sig)] for i in idx]
            cens_list = [[S.centers_of(5000 + 2 * i, DS), S.centers_of(5001 + 2 * i, DS)]
                         for i in idx]
            got = toy_limit_q(ns_list, cens_list)
            wrong, worst = np.zeros(len(MUS), int), 0.0
            for t, i in enumerate(idx):
                ref = S.cached(cache, a.cache, f"toylimits/{i}/{sig}",
                              lambda ns=ns_list[t], c=cens_list[t]: ref_q_mu(ns, c))
                d = got[t] - np.array(ref)
                wrong += np.abs(d) > 0.01
                ok = np.abs(d) <= 0.01
                worst = max([worst, *np.abs(d[ok])])
                print(f"toylimits toy {i} signal {sig:2d}: q~mu " + " ".join(
                    f"{g:7.3f}/{r:7.3f}" for g, r in zip(got[t], ref)), flush=True)
            print(f"toylimits signal {sig}: q~mu at {'/'.join(f'{m:g}' for m in MUS)} wrong "
                  f"(|dq| > 0.01) in {'/'.join(str(w) for w in wrong)} of {len(idx)} "
                  f"(largest |dq| of the others {worst:.2g})", flush=True)


if __name__ == "__main__":
    main()
