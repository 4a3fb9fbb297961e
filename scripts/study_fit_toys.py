"""Free-fit toy study of peaksift.fit at a larger scale: pulls, minima, interval coverage.

Runs the study of ``tests/test_fit_toys.py`` (same configurations, same independent binned
likelihood fit written there: numpy + scipy CDFs, iminuit MIGRAD/HESSE/MINOS from the truth)
with more toys and prints one table: pull widths of mass and signal yield (standard
deviation over all toys, over the toys where both fits reach the same minimum, and the
quantile width), the coverage of the profile-likelihood and of the symmetric (HESSE)
intervals with their binomial errors, the worst Delta(-2 ln L) of peaksift against the
independent fit, and CPU time per fit.

Run: ``python scripts/study_fit_toys.py [--toys 1000] [--cases gauss_exp,cb_bern]
[--workers 2] [--save study.npz]``
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import test_fit_toys as study  # the study lives beside its checks


def _cov(s: dict[str, float], key: str) -> str:
    n = s["toys"] * s[key.replace("profile_cov", "with_interval")] if "profile" in key else (
        s["toys"])
    p = s[key]
    return f"{100 * p:5.1f} ± {100 * math.sqrt(p * (1 - p) / n):3.1f}"


def table(rows: dict[str, dict[str, float]]) -> str:
    lines = []
    head = (f"{'configuration':40s} {'toys':>5s} {'par':>6s} {'sd ps/ind':>12s} "
            f"{'sd same ps/ind':>15s} {'qw ps/ind':>12s} {'profile cov %':>14s} "
            f"{'HESSE cov %':>12s} {'ivl dev':>8s}")
    lines.append(head)
    lines.append("-" * len(head))
    for key, s in rows.items():
        for k in study.STUDIED:
            short = "mass" if k == "mass" else "yield"
            lines.append(
                f"{study.CASES[key].label:40s} {int(s['toys']):5d} {short:>6s} "
                f"{s[f'{k}_ps_sd']:5.2f}/{s[f'{k}_ind_sd']:<5.2f} "
                f"{s[f'{k}_ps_sd_same']:7.2f}/{s[f'{k}_ind_sd_same']:<6.2f} "
                f"{s[f'{k}_ps_qw']:5.2f}/{s[f'{k}_ind_qw']:<5.2f} "
                f"{_cov(s, f'{k}_profile_cov'):>14s} {_cov(s, f'{k}_hesse_cov'):>12s} "
                f"{s[f'{k}_interval_dev']:8.1e}")
    lines.append("")
    lines.append(f"{'configuration':40s} {'valid ps/ind':>13s} {'worst d(-2lnL)':>15s} "
                 f"{'ps deeper':>10s} {'same min':>9s} {'ms ps/ind (CPU)':>16s}")
    for key, s in rows.items():
        lines.append(f"{study.CASES[key].label:40s} {s['ps_valid']:6.3f}/{s['ind_valid']:<6.3f} "
                     f"{s['worst_d2nll']:15.2e} {int(s['ps_deeper']):10d} "
                     f"{int(s['same_minimum']):9d} {s['ps_ms']:8.0f}/{s['ind_ms']:<7.0f}")
    lines.append("")
    lines.append(f"68.27 % = 2 Phi(1) - 1; 'same min': |Delta(-2 ln L)| <= {study.DELTA_CHI2}; "
                 "'ps deeper': peaksift lower by more than that; 'ivl dev': largest difference "
                 "of interval ends (peaksift vs independent MINOS) in HESSE errors.")
    return "\n".join(lines)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--toys", type=int, default=1000, help="toys per configuration")
    ap.add_argument("--cases", default=",".join(study.CASES), help="comma-separated keys")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--seed", type=int, default=20261221)
    ap.add_argument("--save", default="", help="write every toy's numbers to this .npz")
    args = ap.parse_args()
    rows, raw = {}, {}
    for j, key in enumerate(args.cases.split(",")):
        t0 = time.time()
        t = study.run_study(key, args.toys, args.seed + j, args.workers)
        rows[key] = study.summarize(study.CASES[key], t)
        raw.update({f"{key}.{k}": v for k, v in t.items()})
        print(f"{key}: {args.toys} toys in {time.time() - t0:.0f} s", file=sys.stderr)
    if args.save:
        np.savez(args.save, **raw)
    print(table(rows))


if __name__ == "__main__":
    main()
