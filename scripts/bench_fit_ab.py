"""A/B of the free fit of new histograms between two source trees, back to back.

Each round runs, in a fresh process per tree (alternating which goes first), ``--fits``
free fits of a Gaussian on a power law (``bench_fit.py``'s spectrum) each on a new
Poisson-fluctuated copy of it, and prints per tree the 10th percentile and the median of
the CPU time of one fit, and their ratios B / A.  ``--cold`` runs one of ``bench_fit.py``'s
careful hand fits (untimed) before each fit, as that benchmark interleaves them: the
processor's caches then hold the hand fit's work, not the last fit's.

Run (from a tree whose ``scripts/`` holds this file; the trees' ``src`` are imported)::

    python scripts/bench_fit_ab.py /path/to/tree_a /path/to/tree_b [--rounds 3]
        [--fits 400] [--cold]
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import subprocess
import sys

import numpy as np

HERE = pathlib.Path(__file__).resolve().parent


def one_tree(fits: int, cold: bool, seed: int) -> dict:
    """The per-fit CPU times (us) of ``fits`` fits in this process (the tree on sys.path)."""
    import time

    sys.path.insert(0, str(HERE))
    import bench_fit as bf

    import peaksift
    from peaksift.histogram import MassHistogram

    h = MassHistogram(bins=bf.PL_BINS, range=(bf.PL_LO, bf.PL_HI)).fill(
        bf.power_law_masses(7))
    rng = np.random.default_rng(seed)
    pool = [MassHistogram.from_counts(rng.poisson(h.values()).astype(float), h.edges)
            for _ in range(fits + 5)]

    def fit(hh):
        return peaksift.fit(hh, "gaussian", "powerlaw", (bf.PL_LO, bf.PL_HI))

    for hh in pool[:5]:  # warm: imports, compiled kernels, kept work of the binning
        fit(hh)
        bf.by_hand_power_law(hh, True)
    times = []
    for hh in pool[5:]:
        if cold:
            bf.by_hand_power_law(h, True)
        t = time.process_time_ns()
        fit(hh)
        times.append((time.process_time_ns() - t) / 1e3)
    return {"p10": float(np.percentile(times, 10)), "median": float(np.median(times))}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("tree_a")
    ap.add_argument("tree_b")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--fits", type=int, default=400)
    ap.add_argument("--cold", action="store_true")
    ap.add_argument("--one", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--seed", type=int, default=1,
                    help="random numbers of the first round's histograms (then +1 a round)")
    args = ap.parse_args()
    if args.one:
        print(json.dumps(one_tree(args.fits, args.cold, args.seed)))
        return
    trees = {"A": args.tree_a, "B": args.tree_b}
    rows = []
    for r in range(args.rounds):
        got = {}
        for k in (["A", "B"] if r % 2 == 0 else ["B", "A"]):
            env = dict(os.environ, PYTHONPATH=str(pathlib.Path(trees[k]) / "src"),
                       OPENBLAS_NUM_THREADS="1")
            out = subprocess.run(
                [sys.executable, __file__, args.tree_a, args.tree_b, "--one",
                 "--fits", str(args.fits), "--seed", str(args.seed + r)]
                + (["--cold"] if args.cold else []),
                env=env, capture_output=True, text=True, check=True)
            got[k] = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(got)
        load = os.getloadavg()[0]
        print(f"round {r + 1}: A p10 {got['A']['p10']:.0f} us, median "
              f"{got['A']['median']:.0f} us; B p10 {got['B']['p10']:.0f} us, median "
              f"{got['B']['median']:.0f} us; B/A p10 {got['B']['p10'] / got['A']['p10']:.3f}, "
              f"median {got['B']['median'] / got['A']['median']:.3f} (load {load:.1f})",
              flush=True)
    for q in ("p10", "median"):
        ratios = sorted(g["B"][q] / g["A"][q] for g in rows)
        print(f"B/A {q}: best {ratios[0]:.3f}, median {ratios[len(ratios) // 2]:.3f}")


if __name__ == "__main__":
    main()
