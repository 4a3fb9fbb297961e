"""Regenerate the committed demo data set (demo_data/) and check what a search would see.

    python scripts/make_demo_data.py             # rewrite demo_data/ (same seed -> same arrays),
                                                 # the signal samples in demo_data/signal/ and
                                                 # the background template search.toml names
    python scripts/make_demo_data.py --check     # also fit the intended selection's spectrum
    python scripts/make_demo_data.py --outdir /tmp/d --events 100000 --seed 7 --check

It also rewrites the hadron demo set in ``<outdir>/tracks/`` (:mod:`peaksift.simulate_tracks`,
its own seed and random stream; ``--no-tracks`` skips it), which
``demo_data/hadron_search.toml`` searches for the phi(1020) in K+K- pairs.

The check applies the selection recorded in truth.json (isolated opposite-charge muon pairs,
the leading pair per event) and fits the search window with an extended unbinned likelihood:
a Gaussian peak (mean and width free) on an exponential-of-quadratic background, against the
background alone; local Z = sqrt(2 * (NLL_b - NLL_s+b)) (Wilks' theorem; Cowan, Cranmer,
Gross, Vitells, Eur. Phys. J. C 71 (2011) 1554).  It is an independent rough check written
only with awkward and iminuit, not the peaksift search.  A local significance is not a
discovery.
"""

from __future__ import annotations

import argparse
import hashlib
import sys
from pathlib import Path

import awkward as ak
import numpy as np

REPO_DIR = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO_DIR / "src"))

from peaksift import events, search, simulate, simulate_tracks


def _content_digest(paths: list[str]) -> str:
    """Hash of the arrays (not the file bytes, which also record the writer's version)."""
    import pyarrow.parquet as pq

    h = hashlib.sha256()
    for p in paths:
        t = pq.read_table(p)
        for name in t.column_names:
            h.update(name.encode())
            for chunk in t.column(name).chunks:
                for buf in chunk.buffers():
                    if buf is not None:
                        h.update(buf)
    return h.hexdigest()[:16]


def selected_masses(outdir: str | Path, truth: dict) -> np.ndarray:
    sel = truth["intended_selection"]
    # the event files only: the folder also holds the signal samples (other columns)
    ev = events.read_events([str(Path(outdir) / f) for f in truth["files"]], sel["collection"])
    mu = ev[sel["collection"]]
    good = mu[(mu.pt > 20) & (abs(mu.eta) < 2.4) & (mu.isolation < 0.15)]
    pairs = ak.combinations(good, 2)
    a, b = ak.unzip(pairs)
    pairs = pairs[a.charge * b.charge < 0]
    first = ak.firsts(pairs)  # objects are sorted by pT: the first pair is the leading one
    first = first[~ak.is_none(first)]
    a, b = first["0"], first["1"]
    return ak.to_numpy((a + b).mass)


def local_significance(m: np.ndarray, lo: float, hi: float) -> dict:
    from iminuit import Minuit
    from scipy.integrate import quad
    from scipy.stats import norm

    x = m[(m >= lo) & (m < hi)]
    n = x.size
    u = (x - lo) / (hi - lo)

    def bkg_pdf(uu, a, b):
        f = lambda t: np.exp(a * t + b * t * t)
        return f(uu) / quad(f, 0.0, 1.0)[0]

    def sig_pdf(xx, mu, s):
        z = norm.cdf(hi, mu, s) - norm.cdf(lo, mu, s)
        return norm.pdf(xx, mu, s) / z

    def nll_sb(ns, nb, a, b, mu, s):
        dens = ns * sig_pdf(x, mu, s) + nb * bkg_pdf(u, a, b) / (hi - lo)
        return (ns + nb) - np.sum(np.log(np.maximum(dens, 1e-300)))

    def nll_b(nb, a, b):
        return nb - np.sum(np.log(np.maximum(nb * bkg_pdf(u, a, b) / (hi - lo), 1e-300)))

    mb = Minuit(nll_b, nb=n, a=-2.0, b=0.0)
    mb.errordef = Minuit.LIKELIHOOD
    mb.limits["a"] = mb.limits["b"] = (-30, 30)
    mb.migrad()
    best = None
    for mu0 in np.arange(lo + 8, hi - 8, 4.0):
        ms = Minuit(nll_sb, ns=10.0, nb=n, a=mb.values["a"], b=mb.values["b"], mu=mu0, s=2.0)
        ms.errordef = Minuit.LIKELIHOOD
        ms.limits["ns"] = (0, n)
        ms.limits["a"] = ms.limits["b"] = (-30, 30)
        ms.limits["mu"] = (lo + 5, hi - 5)
        ms.limits["s"] = (1.5, 3.0)  # near the detector resolution at 110-200 GeV
        ms.migrad()
        if best is None or ms.fval < best.fval:
            best = ms
    q0 = max(2.0 * (mb.fval - best.fval), 0.0)
    return {"n_in_window": int(n), "signal_yield": best.values["ns"],
            "mass": best.values["mu"], "sigma": best.values["s"], "z_local": float(np.sqrt(q0))}


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--outdir", default=str(REPO_DIR / "demo_data"))
    p.add_argument("--events", type=int, default=None)
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--weighted", action="store_true")
    p.add_argument("--check", action="store_true", help="fit the intended selection's spectrum")
    p.add_argument("--no-tracks", action="store_true", help="do not rewrite the hadron demo set")
    args = p.parse_args(argv)
    # demo_data/ also holds hand-written configs and the tracks/ set: shared, and only the
    # files its peaksift-manifest.json lists are replaced
    info = simulate.write_demo(args.outdir, n_events=args.events, seed=args.seed,
                               weighted=args.weighted, share_folder=True)
    print(info["summary"])
    print("content digest (arrays):", _content_digest(info["files"]))
    config = Path(args.outdir) / "search.toml"
    if not args.weighted and config.exists():  # the spurious-signal test's template
        print("background template:", search.write_demo_template(config))
    if not args.weighted:  # the simulated signal samples of the combined demo search
        sig = simulate.write_signal_samples(Path(args.outdir) / "signal", seed=info["truth"]["seed"])
        for s in sig["samples"]:
            print(f"signal sample {s['file']}: efficiency {s['efficiency']:.3f}, "
                  f"resolution (68%) {s['resolution_68_gev']:.2f} GeV")
    if not args.no_tracks and not args.weighted:
        tinfo = simulate_tracks.write_track_demo(Path(args.outdir) / "tracks")
        print(tinfo["summary"])
        print("content digest (arrays):", _content_digest(tinfo["files"]))
    if args.check:
        truth = info["truth"]
        m = selected_masses(args.outdir, truth)
        lo, hi = truth["intended_selection"]["search_window_gev"]
        res = local_significance(m, lo, hi)
        print(f"selected pairs: {m.size}; in {lo:g}-{hi:g} GeV: {res['n_in_window']}")
        print(f"best peak: mass {res['mass']:.2f} GeV, sigma {res['sigma']:.2f} GeV, "
              f"yield {res['signal_yield']:.1f}; local Z = {res['z_local']:.2f} "
              "(a local significance is not a discovery)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
