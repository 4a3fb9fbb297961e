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

    python scripts/study_joint_mass_scale_wells.py [--first 0] [--last 17] [--limits]
"""

from __future__ import annotations

import argparse
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
    """The reference's joint profile of the channels' counts ``ns``."""

    def __init__(self, ns) -> None:
        self.ns, self.refs, self.cache = ns, [S.Reference(DS) for _ in ns], {}

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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--first", type=int, default=0)
    ap.add_argument("--last", type=int, default=17)
    ap.add_argument("--limits", action="store_true")
    a = ap.parse_args()
    wrong = total = 0
    for i in range(a.first, a.last):
        for sig in (0, 40):
            ns = [S.toy(1000 + 2 * i, sig), S.toy(1001 + 2 * i, sig)]
            got = combine(channels(ns), np.array([S.MASS]), refit=False)
            joint = Joint(ns)
            nll_hat, mu_hat = joint.free()
            q0 = max(2 * (joint.null() - nll_hat), 0.0) if mu_hat > 0 else 0.0
            total += 1
            wrong += abs(got.q0[0] - q0) > 0.01
            line = (f"toy {i} signal {sig:2d}: q0 {got.q0[0]:8.4f} reference {q0:8.4f}; mu "
                    f"{got.cross_section[0]:7.2f} reference {mu_hat:7.2f}")
            if a.limits:
                lim = combined_limits(channels(ns), np.array([S.MASS]), method="asymptotic")
                ro, re_ = reference_limits(ns, joint, nll_hat, mu_hat)
                po, pe = float(np.ravel(lim.observed)[0]), float(np.ravel(lim.expected)[0])
                line += (f"; observed {po:.3f} / {ro:.3f} = {po / ro:.4f}, expected "
                         f"{pe:.3f} / {re_:.3f} = {pe / re_:.4f}")
            print(line, flush=True)
    print(f"q0 wrong (|dq| > 0.01) in {wrong} of {total}")


if __name__ == "__main__":
    main()
