"""Cost of scanning the mass scale for its lowest well: the scan, its toys, the toy limits.

A Gaussian of width 0.5 GeV on 20,000 exponential background events in 100-200 GeV (200
bins), resolution nuisance 20 %; per case the CPU seconds of its second call in one process
(the first compiles and fills caches), best and median over ``--runs`` fresh processes:

* ``scan``: :func:`peaksift.stats.scan.scan` at 100 masses 110-190 GeV with the nuisances;
* ``toys``: 200 toys of its global significance (:func:`~peaksift.stats.shape_profile.
  run_nuisance_toy_batch`: the linearised scan, each toy's 3 highest points refitted);
* ``toylimit``: :func:`peaksift.stats.limits_systematics.systematic_limits` with
  ``method="toys"`` at one mass (150 GeV) with ``--toys`` toys;

and for a combination of two such channels (each with its own mass scale and spectrum):

* ``ccombine``: :func:`peaksift.stats.channels.combine` at 25 masses 120-180 GeV;
* ``climits``: :func:`peaksift.stats.channel_limits.combined_limits`, asymptotic, at
  those masses (each channel's own limits included);

* ``ctoys``: the combination's global significance toys
  (:func:`peaksift.stats.channel_toys.combined_toy_scans`) at 25 masses 120-180 GeV, the
  combined scan excluded;
* ``cenvelope``: :func:`peaksift.stats.channels.combine` at those masses with each
  channel's background functions ``exppoly1`` and ``powersum1`` profiled (the envelope);
* ``ctoylimit``: :func:`peaksift.stats.channel_limits.combined_limits` with
  ``method="toys"`` at one mass (150 GeV) with ``--toys`` toys;
* ``cenvtoylimit``: the same with each channel's background functions ``exppoly1`` and
  ``powersum1`` (the envelope: profiled in the toys since toylimit10, before generated
  and fitted with the function at mu = 0);

each with a mass scale of 3 % (scanned: 3 x 4.5 GeV beyond the width) and of 0.1 %
(3 x 0.15 GeV: not scanned, the cost of before).  ``--baseline SRC`` runs another source
tree in alternate rounds (the same load).

    python scripts/bench_mass_scale_scan.py [--runs 3] [--toys 200] [--baseline SRC]
        [--cases scan,toys,toylimit,ccombine,climits,ctoys,cenvelope,ctoylimit,cenvtoylimit]
        [--scales 0.03,0.001]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]

CHILD = r"""
import json, sys, time
import numpy as np
from peaksift.likelihood import SignalNuisances
from peaksift.resolution import resolution_from
from peaksift.stats.background_choice import candidate_shapes
from peaksift.stats.limits_systematics import systematic_limits
from peaksift.stats.scan import scan
from peaksift.stats.shape_profile import run_nuisance_toy_batch
from peaksift.stats.toys import ToyBatch

case, scale, ntoys = sys.argv[1], float(sys.argv[2]), int(sys.argv[3])
edges = np.linspace(100.0, 200.0, 201)
rng = np.random.default_rng(1)
n = np.histogram(100 + rng.exponential(40, 20000), edges)[0].astype(float)
nuis = SignalNuisances.make({"mass_scale": scale, "mass_resolution": 0.2})
bkg = candidate_shapes(["exppoly1"])


def channels(candidates=False):
    from peaksift.stats.channels import Channel

    out = []
    for c in range(2):
        r = np.random.default_rng(10 + c)
        nc = np.histogram(100 + r.exponential(40, 20000), edges)[0].astype(float)
        extra = ({"background_candidates": candidate_shapes(["exppoly1", "powersum1"])}
                 if candidates else {})
        out.append(Channel(f"c{c}", (nc, edges), bkg["exppoly1"], 1.0, signal="gaussian",
                           resolution=resolution_from(None, absolute=0.5), efficiency=1.0,
                           window=(100.0, 200.0), **extra,
                           shape_nuisances={"mass_scale": scale, "mass_resolution": 0.2}))
    return out


def run_combination():
    from peaksift.stats.channel_limits import combined_limits
    from peaksift.stats.channel_toys import combined_toy_scans
    from peaksift.stats.channels import combine

    masses = np.linspace(120.0, 180.0, 25)
    if case == "ctoys":
        cmb = combine(channels(), masses, refit=False)
        t = time.process_time()
        q = combined_toy_scans(list(cmb.prepared), list(cmb.conversion.values()), ntoys,
                               seed=7, norms=cmb.norms, shapes=cmb.shapes,
                               ensembles=cmb.toy_constraints)
        return float(np.nansum(q.max(axis=1))), time.process_time() - t
    if case == "ccombine":
        return float(np.nansum(combine(channels(), masses, refit=False).q0))
    if case == "climits":
        lim = combined_limits(channels(), masses, method="asymptotic")
        return float(np.nansum(lim.observed))
    if case == "cenvelope":
        return float(np.nansum(combine(channels(True), masses, refit=False).q0))
    lim = combined_limits(channels(case == "cenvtoylimit"), np.array([150.0]), method="toys",
                          toy_masses=[150.0], toys=ntoys, seed=3)
    return float(lim.observed[0])


def run():
    if case.startswith("c"):
        return run_combination()
    if case == "scan":
        r = scan((n, edges), "gaussian", bkg["exppoly1"], np.linspace(110, 190, 100),
                 absolute_resolution=0.5, window=(100.0, 200.0), refit=False, nuisances=nuis)
        return float(np.nansum(r.q0))
    if case == "toys":
        r = scan((n, edges), "gaussian", bkg["exppoly1"], np.linspace(110, 190, 100),
                 absolute_resolution=0.5, window=(100.0, 200.0), refit=False, nuisances=nuis)
        t = time.process_time()
        q = run_nuisance_toy_batch(ToyBatch(r.model, 7, 0, ntoys))
        return float(np.nansum(q.max(axis=1))), time.process_time() - t
    res = systematic_limits((n, edges), "gaussian", bkg, np.array([150.0]),
                            resolution=resolution_from(None, absolute=0.5),
                            window=(100.0, 200.0), nuisances=nuis, method="toys",
                            toy_masses=[150.0], toys=ntoys, seed=3)
    obs = res["observed"][0]
    return float("nan") if obs is None else float(obs)   # None: no limit (its notes say why)


run()
t = time.process_time()
out = run()
cpu = time.process_time() - t
if isinstance(out, tuple):   # the toys alone, not the scan before them
    out, cpu = out
print(json.dumps({"cpu": cpu, "value": out}))
"""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--toys", type=int, default=200)
    ap.add_argument("--baseline", default=None, help="another tree's src/ (alternate rounds)")
    ap.add_argument("--cases", default="scan,toys,toylimit")
    ap.add_argument("--scales", default="0.03,0.001")
    a = ap.parse_args()
    trees = {"this": str(REPO / "src")}
    if a.baseline:
        trees["baseline"] = a.baseline
    print(f"load average before: {os.getloadavg()}", flush=True)
    times: dict = {}
    values: dict = {}
    for _ in range(a.runs):
        for case in a.cases.split(","):
            for scale in map(float, a.scales.split(",")):
                for name, src in trees.items():
                    env = {**os.environ, "PYTHONPATH": src}
                    out = subprocess.run([sys.executable, "-c", CHILD, case, str(scale),
                                          str(a.toys)], env=env, check=True,
                                         capture_output=True, text=True).stdout
                    r = json.loads(out.strip().splitlines()[-1])
                    times.setdefault((case, scale, name), []).append(r["cpu"])
                    values[(case, scale, name)] = r["value"]
    for (case, scale, name), ts in times.items():
        print(f"{case:8s} mass scale {100 * scale:4.1f} % {name:8s}: best {min(ts):7.3f} s, "
              f"median {statistics.median(ts):7.3f} s CPU (value {values[case, scale, name]:.6g})")
    print(f"load average after: {os.getloadavg()}")


if __name__ == "__main__":
    main()
