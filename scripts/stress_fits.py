"""Stress matrix: every signal shape x every background shape x awkward data, binned and unbinned.

For each cell (signal, background, data case, binned/unbinned) the script fits seeded toys
with :func:`peaksift.fit` exactly as a user would (no starting values, no hints) and counts

* raw exceptions (anything that is not a :class:`peaksift.errors.PeaksiftError`; must be 0),
* PeaksiftErrors (a fit that could not be set up; listed with their message),
* the invalid-fit rate and a histogram of the reasons (``FitResult.problems``),
* the median fit time (CPU time of this process; run it with OPENBLAS_NUM_THREADS=1),

and on the background-only and strong-peak cases also runs :func:`peaksift.scan` and
:func:`peaksift.upper_limits` on the first toy (``--scan-toys``), to catch crashes there.
It prints a markdown table per cell and a compact table of invalid rates.

Data are drawn with numpy from the shapes' own densities: unbinned masses by inverse-CDF
sampling (the CDF tabulated on a fine grid, once per cell), binned spectra as a multinomial
draw of the bin fractions (the histogram of such masses, without drawing 10^7 of them).
Signal yields are set from the Asimov significance of the truth (Cowan, Cranmer, Gross,
Vitells, EPJC 71 (2011) 1554, eq. 97 summed over bins), so "weak" is ~2 sigma and "strong"
25 sigma whatever the shapes.

    python scripts/stress_fits.py                       # 100 toys per cell (hours)
    python scripts/stress_fits.py --toys 5 --cells 'gaussian/*/strong/*,*/dijet*/*/binned'
    python scripts/stress_fits.py --toys 20 --json out.json
    python scripts/stress_fits.py --log cells.jsonl --deadline 20:50   # resumable, timed
    python scripts/stress_fits.py --tables cells.jsonl                 # tables of a log

``--log`` appends one JSON line per finished chunk of a cell's toys (flushed, so a stopped
run loses at most the chunk in progress) and resumes from the toys already in the file. The
cells are brought up level by level: every cell to 1 toy (the scan/limit checks run on it),
then 2, 5, ``--min-toys``, 20, 50 and ``--toys``, the later levels cheapest cells first (CPU
per toy so far). ``--deadline HH:MM`` (UTC) starts no toy after that time,
so a time-limited run leaves every cell with at least the last level all cells reached, and
the tables say how many toys each cell ran. Toy k of a cell depends only on the seed, the
cell and k, so chunks add up to the same toys as one run. ``--part I/N`` (I = 1..N) runs one of N
hash-split shares of the cells (one process per share, each with its own log; ``--tables
a.jsonl,b.jsonl`` joins them).

A cell label is ``signal/background/case/mode``; ``--cells`` takes comma-separated
fnmatch patterns.
"""

from __future__ import annotations

import argparse
import collections
import fnmatch
import json
import math
import re
import statistics
import sys
import time
import traceback
import warnings
import zlib
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import optimize

import peaksift
from peaksift import shapes
from peaksift.errors import PeaksiftError
from peaksift.histogram import MassHistogram

WINDOW = (100.0, 300.0)
PEAK = 170.0
BINS = 200

#: signal truth (the peak sits in the lower half, which the "half empty" case keeps)
SIGNALS: dict[str, dict[str, float]] = {
    "gaussian": {"mass": PEAK, "sigma": 3.0},
    "crystalball": {"mass": PEAK, "sigma": 3.0, "alpha_low": 1.5, "n_low": 5.0,
                    "alpha_high": 2.0, "n_high": 8.0},
    "breitwigner": {"mass": PEAK, "width": 6.0},
    "voigt": {"mass": PEAK, "sigma": 3.0, "width": 4.0},
}

#: background label -> (shape name, options, truth)
BACKGROUNDS: dict[str, tuple[str, dict[str, Any], dict[str, float]]] = {
    "exponential": ("exponential", {}, {"b1": -2.0}),
    "exppoly2": ("exppoly", {"order": 2}, {"b1": -2.0, "b2": 0.4}),
    "exppoly3": ("exppoly", {"order": 3}, {"b1": -2.0, "b2": 0.4, "b3": -0.3}),
    "bernstein2": ("bernstein", {"degree": 2}, {"c1": 0.7, "c2": 0.3}),
    "bernstein5": ("bernstein", {"degree": 5},
                   {"c1": 0.8, "c2": 0.6, "c3": 0.5, "c4": 0.4, "c5": 0.3}),
    "powerlaw": ("powerlaw", {}, {"power": 4.0}),
    "dijet2": ("dijet", {"npar": 2, "sqrt_s": 1000.0}, {"p1": 15.0}),
    "dijet3": ("dijet", {"npar": 3, "sqrt_s": 1000.0}, {"p1": 10.0, "p2": 4.0}),
    "dijet4": ("dijet", {"npar": 4, "sqrt_s": 1000.0}, {"p1": 10.0, "p2": 4.0, "p3": 0.3}),
    "turnon": ("turnon", {}, {"threshold": 130.0, "resolution": 10.0, "slope": 0.02}),
}


@dataclass(frozen=True)
class Case:
    """A data case: background events, signal (target Asimov Z or a count), modes."""

    background: float
    z_target: float | None = None      # signal from the Asimov significance
    signal_events: float | None = None  # or a fixed signal count
    bins: int = BINS
    drop_upper_half: bool = False
    modes: tuple[str, ...] = ("binned", "unbinned")
    exact_total: bool = False           # multinomial on the total (else Poisson)


CASES: dict[str, Case] = {
    "bkg_only": Case(5000.0),
    "weak": Case(5000.0, z_target=2.0),
    "strong": Case(5000.0, z_target=25.0),
    "n50": Case(40.0, signal_events=10.0, exact_total=True),
    "n1e7": Case(1e7, z_target=30.0, modes=("binned",), exact_total=True),
    "half_empty": Case(5000.0, z_target=10.0, drop_upper_half=True),
    "three_bins": Case(5000.0, z_target=25.0, bins=3, modes=("binned",)),
}

#: cases on which scan and upper_limits are also run (first ``--scan-toys`` toys)
SCAN_CASES = ("bkg_only", "strong")


def background_shape(label: str) -> shapes.Shape:
    name, options, _ = BACKGROUNDS[label]
    return shapes.get(name, **options)


def _params(shape: shapes.Shape, truth: dict[str, float]) -> list[float]:
    return [truth[n] for n in shape.parameter_names]


def fractions(shape: shapes.Shape, truth: dict[str, float], edges: np.ndarray) -> np.ndarray:
    return np.asarray(shape.bin_fractions(edges, _params(shape, truth), WINDOW), float)


def asimov_z(s: float, f: np.ndarray, b: np.ndarray) -> float:
    """Z_A = sqrt(2 sum[(s_i + b_i) ln(1 + s_i/b_i) - s_i]) (Cowan et al. 2011, eq. 97, per
    bin), the median discovery significance of a signal ``s f`` over background ``b``."""
    si = s * f
    bi = np.maximum(b, 1e-300)
    return math.sqrt(max(2.0 * float(np.sum((si + bi) * np.log1p(si / bi) - si)), 0.0))


def signal_yield(case: Case, sig: shapes.Shape, bkg: shapes.Shape, bkg_truth: dict) -> float:
    if case.signal_events is not None:
        return case.signal_events
    if case.z_target is None:
        return 0.0
    edges = np.linspace(*WINDOW, BINS + 1)
    f = fractions(sig, SIGNALS[sig.name], edges)
    b = case.background * fractions(bkg, bkg_truth, edges)
    return float(optimize.brentq(lambda s: asimov_z(s, f, b) - case.z_target, 1e-9,
                                 case.background))


def _shape_key(shape: shapes.Shape, truth: dict) -> tuple:
    return (shape.name, tuple(shape.parameter_names), tuple(_params(shape, truth)))


_TABLES: dict[tuple, np.ndarray] = {}


def _cached(key: tuple, make) -> np.ndarray:
    """A per-process table (bin probabilities, tabulated CDFs): computed once per cell, not
    once per toy (the numerically integrated shapes spend ~0.1-0.7 s on each)."""
    if key not in _TABLES:
        if len(_TABLES) > 64:
            _TABLES.clear()
        _TABLES[key] = make()
    return _TABLES[key]


def inverse_cdf_sample(shape: shapes.Shape, truth: dict, n: int, rng: np.random.Generator,
                       grid: int = 40001) -> np.ndarray:
    """``n`` masses from ``shape`` on the window by inverse-CDF sampling (CDF tabulated on a
    grid of ``grid`` points, linear inside each cell)."""
    x = np.linspace(*WINDOW, grid)

    def table() -> np.ndarray:
        c = np.maximum.accumulate(np.asarray(shape.cdf(x, _params(shape, truth), WINDOW),
                                             float))
        return (c - c[0]) / (c[-1] - c[0])
    c = _cached(("cdf", grid, *_shape_key(shape, truth)), table)
    return np.interp(rng.random(n), c, x)


def make_data(case: Case, mode: str, sig: shapes.Shape, bkg: shapes.Shape, bkg_truth: dict,
              s_yield: float, rng: np.random.Generator) -> Any:
    """A toy: a MassHistogram (binned) or an array of masses (unbinned)."""
    if mode == "binned":
        edges = np.linspace(*WINDOW, case.bins + 1)
        tot = case.background + s_yield

        def probabilities() -> np.ndarray:
            p = (case.background * fractions(bkg, bkg_truth, edges)
                 + s_yield * fractions(sig, SIGNALS[sig.name], edges)) / tot
            p = np.clip(p, 0.0, None)
            return p / p.sum()
        p = _cached(("bins", case.bins, case.background, s_yield,
                     *_shape_key(bkg, bkg_truth), *_shape_key(sig, SIGNALS[sig.name])),
                    probabilities)
        n_total = round(tot) if case.exact_total else int(rng.poisson(tot))
        counts = rng.multinomial(n_total, p).astype(float)
        if case.drop_upper_half:
            counts[0.5 * (edges[1:] + edges[:-1]) > 0.5 * sum(WINDOW)] = 0.0
        h = MassHistogram(edges)
        h.weight_sum, h.weight_sq_sum = counts, counts.copy()
        return h
    if case.exact_total:
        nb = int(rng.binomial(round(case.background + s_yield),
                              case.background / (case.background + s_yield)))
        ns = round(case.background + s_yield) - nb
    else:
        nb, ns = int(rng.poisson(case.background)), int(rng.poisson(s_yield))
    x = np.concatenate([inverse_cdf_sample(bkg, bkg_truth, nb, rng),
                        inverse_cdf_sample(sig, SIGNALS[sig.name], ns, rng)])
    if case.drop_upper_half:
        x = x[x <= 0.5 * sum(WINDOW)]
    return rng.permutation(x)


def resolution_arg(relative: float) -> Any:
    """The ``resolution=`` of scan/upper_limits: sigma/m as an explicit Resolution."""
    return peaksift.Resolution.relative(relative)


def scan_and_limits(data: Any, sig: shapes.Shape, bkg: shapes.Shape) -> list[str]:
    """Run scan and upper_limits as a user would; return raw exception texts (if any)."""
    truth = SIGNALS[sig.name]
    res = resolution_arg(truth.get("sigma", truth.get("width", 3.0)) / PEAK)
    kw: dict[str, Any] = {"resolution": res, "window": WINDOW}
    if "width" in sig.parameter_names:
        kw["natural_width"] = truth["width"]
    extra = {k: v for k, v in truth.items() if k not in ("mass", "sigma", "width")}
    if extra:
        kw["signal_params"] = extra
    raw = []
    for label, call in (
        ("scan", lambda: peaksift.scan(data, sig, bkg, np.linspace(115.0, 285.0, 35), **kw)),
        ("upper_limits", lambda: peaksift.upper_limits(data, sig, bkg,
                                                       [140.0, PEAK, 250.0], **kw)),
    ):
        try:
            call()
        except PeaksiftError:
            pass
        except Exception:  # noqa: BLE001 - the point is to catch everything else
            raw.append(f"{label}: " + _short_traceback())
    return raw


def _short_traceback() -> str:
    etype, exc, tb = sys.exc_info()
    frames = traceback.extract_tb(tb)
    where = " <- ".join(f"{f.filename.split('/src/')[-1]}:{f.lineno} {f.name}"
                        for f in reversed(frames[-4:]))
    return f"{etype.__name__}: {str(exc)[:120]} [{where}]"


_NUMBER = re.compile(r"\s*\([-+0-9.eE]+\)")


def reason(problem: str) -> str:
    """A problem text without its numbers, so equal reasons count together."""
    return _NUMBER.sub("", problem)


@dataclass
class CellStats:
    label: str
    toys: int = 0
    raw: list[str] = field(default_factory=list)
    user_errors: list[str] = field(default_factory=list)
    invalid: int = 0
    reasons: collections.Counter = field(default_factory=collections.Counter)
    times: list[float] = field(default_factory=list)
    scan_raw: list[str] = field(default_factory=list)
    scans: int = 0
    first: int = 0      # index of this record's first toy (a cell may run in chunks)
    cpu: float = 0.0    # CPU seconds of the whole chunk: data, fits, scans

    @property
    def fits(self) -> int:
        return len(self.times)

    @property
    def invalid_rate(self) -> float:
        return self.invalid / self.fits if self.fits else math.nan

    @property
    def median_ms(self) -> float:
        return 1e3 * statistics.median(self.times) if self.times else math.nan

    def extend(self, more: CellStats) -> None:
        """Append a later chunk of the same cell (toys ``more.first`` on)."""
        if more.first != self.first + self.toys:
            raise ValueError(f"{self.label}: chunk at toy {more.first} does not follow "
                             f"toys {self.first}..{self.first + self.toys - 1}")
        self.toys += more.toys
        self.raw += more.raw
        self.user_errors += more.user_errors
        self.invalid += more.invalid
        self.reasons.update(more.reasons)
        self.times += more.times
        self.scan_raw += more.scan_raw
        self.scans += more.scans
        self.cpu += more.cpu


def cells(patterns: list[str]):
    for sname in SIGNALS:
        for blabel in BACKGROUNDS:
            for cname, case in CASES.items():
                for mode in case.modes:
                    label = f"{sname}/{blabel}/{cname}/{mode}"
                    if any(fnmatch.fnmatchcase(label, p) for p in patterns):
                        yield label, sname, blabel, cname, case, mode


def run_cell(label: str, sname: str, blabel: str, cname: str, case: Case, mode: str,
             toys: int, seed: int, scan_toys: int, first: int = 0,
             stop_at: float = math.inf) -> CellStats:
    """Toys ``first .. toys-1`` of a cell (toy k's data depend only on seed, cell and k, so
    a cell run in chunks gives the same toys as one run); no new toy starts after the
    ``time.monotonic()`` instant ``stop_at``."""
    cpu0 = time.process_time()
    st = CellStats(label, first=first)
    sig = shapes.get(sname)
    bkg = background_shape(blabel)
    bkg_truth = BACKGROUNDS[blabel][2]
    s_yield = signal_yield(case, sig, bkg, bkg_truth)
    for k in range(first, toys):
        if time.monotonic() > stop_at:
            break
        rng = np.random.default_rng([seed, zlib.crc32(label.encode()), k])
        data = make_data(case, mode, sig, bkg, bkg_truth, s_yield, rng)
        st.toys += 1
        t0 = time.process_time()  # CPU time: the machine may be shared
        try:
            r = peaksift.fit(data, sig, bkg, WINDOW, binned=(mode == "binned"))
        except PeaksiftError as exc:
            st.user_errors.append(f"{type(exc).__name__}: {str(exc)[:100]}")
            continue
        except Exception:  # noqa: BLE001
            st.raw.append(f"toy {k}: " + _short_traceback())
            continue
        st.times.append(time.process_time() - t0)
        if not r.valid:
            st.invalid += 1
            st.reasons.update({reason(p) for p in r.problems})
        if cname in SCAN_CASES and k < scan_toys:
            st.scans += 1
            st.scan_raw.extend(f"toy {k}: {t}" for t in scan_and_limits(data, sig, bkg))
    st.cpu = time.process_time() - cpu0
    return st


def to_record(st: CellStats) -> dict[str, Any]:
    return {"cell": st.label, "first": st.first, "toys": st.toys, "fits": st.fits,
            "raw": st.raw, "scan_raw": st.scan_raw, "user_errors": st.user_errors,
            "invalid": st.invalid, "reasons": dict(st.reasons), "times": st.times,
            "median_ms": st.median_ms, "scans": st.scans, "cpu": st.cpu}


def from_record(rec: dict[str, Any]) -> CellStats:
    return CellStats(rec["cell"], rec["toys"], list(rec["raw"]), list(rec["user_errors"]),
                     rec["invalid"], collections.Counter(rec["reasons"]), list(rec["times"]),
                     list(rec["scan_raw"]), rec["scans"], rec.get("first", 0),
                     rec.get("cpu", math.fsum(rec["times"])))


def read_log(path: str) -> list[CellStats]:
    """The cells of a ``--log`` file, their chunks joined in toy order (a torn last line,
    from a stop, is skipped)."""
    by: dict[str, CellStats] = {}
    try:
        with open(path) as fh:
            for line in fh:
                try:
                    st = from_record(json.loads(line))
                except (json.JSONDecodeError, KeyError):
                    continue
                if st.label in by:
                    by[st.label].extend(st)
                else:
                    by[st.label] = st
    except FileNotFoundError:
        pass
    return list(by.values())


def seconds_until(hhmm: str) -> float:
    """Seconds from now to the next HH:MM UTC."""
    now = time.time()
    h, m = (int(v) for v in hhmm.split(":"))
    day = now - now % 86400
    t = day + 3600 * h + 60 * m
    return t - now if t > now else t + 86400 - now


def _top_reasons(st: CellStats, most: int = 3) -> str:
    return "; ".join(f"{r} x{n}" for r, n in st.reasons.most_common(most))


def _brief(r: str) -> str:
    """A reason shortened for the tables."""
    r = r.replace("covariance not positive definite (Hessian of the NLL not invertible)",
                  "Hessian not pos.-def.")
    return r.split(":")[0].replace(" or within one error of its floor (a bound)",
                                   " its floor")


def print_tables(results: list[CellStats]) -> None:
    print("\n| cell | toys | fits | raw exc | PeaksiftError | invalid | median CPU ms "
          "| top reasons |")
    print("|---|---:|---:|---:|---:|---:|---:|---|")
    for st in results:
        print(f"| {st.label} | {st.toys} | {st.fits} | {len(st.raw) + len(st.scan_raw)} | "
              f"{len(st.user_errors)} | {100 * st.invalid_rate:.0f}% | {st.median_ms:.0f} | "
              f"{_top_reasons(st)} |")
    # compact: rows signal/background, columns case/mode -> invalid % (median ms)
    cols = sorted({st.label.split("/", 2)[2] for st in results},
                  key=lambda c: (list(CASES).index(c.split("/")[0]), c))
    rows = sorted({"/".join(st.label.split("/")[:2]) for st in results},
                  key=lambda r: (list(SIGNALS).index(r.split("/")[0]),
                                 list(BACKGROUNDS).index(r.split("/")[1])))
    by = {st.label: st for st in results}
    print("\ninvalid-fit rate % / median fit CPU ms / toys\n")
    print("| signal/background | " + " | ".join(cols) + " |")
    print("|---|" + "---:|" * len(cols))
    for r in rows:
        cells_ = []
        for c in cols:
            st = by.get(f"{r}/{c}")
            cells_.append("" if st is None else
                          f"{100 * st.invalid_rate:.0f} / {st.median_ms:.0f} / {st.toys}")
        print(f"| {r} | " + " | ".join(cells_) + " |")
    ntoys = sorted(st.toys for st in results)
    print(f"\ntoys per cell: min {ntoys[0]}, median {ntoys[len(ntoys) // 2]}, max {ntoys[-1]}; "
          + ", ".join(f"{n} cells with {k}" for k, n in sorted(collections.Counter(ntoys).items())))
    print(f"scan + upper_limits runs: {sum(st.scans for st in results)}")
    raw = [(st.label, t) for st in results for t in st.raw + st.scan_raw]
    print(f"\nraw exceptions: {len(raw)}")
    for label, t in raw:
        print(f"  {label}: {t}")
    user = [(st.label, t) for st in results for t in st.user_errors]
    print(f"PeaksiftErrors (fit not set up): {len(user)}")
    for (label, t), n in collections.Counter(user).most_common(20):
        print(f"  {label}: {t} (x{n})")
    total = collections.Counter()
    for st in results:
        total.update(st.reasons)
    nfit = sum(st.fits for st in results)
    ninv = sum(st.invalid for st in results)
    print("\nmain reasons by signal and case (fits carrying each, of all fits there)\n")
    groups: dict[str, list[CellStats]] = collections.defaultdict(list)
    for st in results:
        sname, _, cname, mode = st.label.split("/")
        groups[f"{sname} / {cname} / {mode}"].append(st)
    print("| signal / case / mode | fits | invalid | main reasons |")
    print("|---|---:|---:|---|")
    def order(g: str) -> tuple:
        sname, cname, mode = g.split(" / ")
        return list(SIGNALS).index(sname), list(CASES).index(cname), mode

    for g, sts in sorted(groups.items(), key=lambda kv: order(kv[0])):
        rc: collections.Counter = collections.Counter()
        for st in sts:
            rc.update(st.reasons)
        nf = sum(st.fits for st in sts)
        ni = sum(st.invalid for st in sts)
        top = "; ".join(f"{_brief(r)} {n}" for r, n in rc.most_common(3))
        print(f"| {g} | {nf} | {ni} | {top} |")
    print(f"\nall cells: {nfit} fits, {ninv} invalid ({100 * ninv / max(nfit, 1):.1f}%); "
          f"reasons (fits carrying each):")
    for r, n in total.most_common():
        print(f"  {n:6d}  {r}")


def warm_up() -> None:
    """One untimed fit per signal and per background shape, binned and unbinned, on toys
    made as the cells make them (a MassHistogram or an array): the first call of each
    compiled kernel loads or compiles it (~1-14 s; numba compiles again for other array
    types), which would otherwise land in the first toy's time of whichever cell comes
    first."""
    case = CASES["strong"]
    pairs = [(s, "exponential") for s in SIGNALS] + [("gaussian", b) for b in BACKGROUNDS]
    for sname, blabel in pairs:
        sig, bkg = shapes.get(sname), background_shape(blabel)
        truth = BACKGROUNDS[blabel][2]
        s_yield = signal_yield(case, sig, bkg, truth)
        for mode in case.modes:
            data = make_data(case, mode, sig, bkg, truth, s_yield, np.random.default_rng(0))
            try:
                peaksift.fit(data, sig, bkg, WINDOW, binned=(mode == "binned"))
            except Exception:  # noqa: BLE001, S110 - the matrix itself reports failures
                pass


def _part(text: str) -> tuple[int, int]:
    """``--part I/N`` as (I, N), I counted from 1 (part I takes the cells whose label hash
    is I - 1 modulo N); exits with a message for anything else."""
    try:
        i, n = (int(v) for v in text.split("/"))
    except ValueError:
        sys.exit(f"--part {text!r}: expected I/N with whole numbers, e.g. --part 1/2")
    if n < 1 or not 1 <= i <= n:
        sys.exit(f"--part {text!r}: I must be between 1 and N (N >= 1), e.g. --part 1/{max(n, 1)} "
                 f"... --part {max(n, 1)}/{max(n, 1)}")
    return i, n


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--toys", type=int, default=100, help="toys per cell (default 100)")
    ap.add_argument("--cells", default="*", help="comma-separated fnmatch patterns on "
                    "'signal/background/case/mode' (default: all)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--scan-toys", type=int, default=1,
                    help="toys per bkg_only/strong cell also scanned and limited (default 1)")
    ap.add_argument("--json", help="write the per-cell statistics to this file")
    ap.add_argument("--log", help="append each finished cell as a JSON line here and skip "
                    "the cells already in it (resume)")
    ap.add_argument("--deadline", help="HH:MM UTC: start no toy after it (the cells are "
                    "brought up level by level, see --min-toys, so every cell gets its first "
                    "toys before any gets its last)")
    ap.add_argument("--min-toys", type=int, default=10,
                    help="an extra level: every cell reaches 1, 2, 5, this many, 20, 50, then "
                    "--toys, cheapest cells first within a level (default 10)")
    ap.add_argument("--part", metavar="I/N", help="run only part I of N, I = 1..N (cells split "
                    "by a hash of their label; one process per part, each with its own --log)")
    ap.add_argument("--tables", metavar="LOG", help="only print the tables of --log files "
                    "(comma-separated)")
    ap.add_argument("--shuffle", type=int, metavar="SEED", help="run the cells in an order "
                    "shuffled with this seed (spreads a time-limited run over every shape)")
    args = ap.parse_args(argv)
    if args.tables:
        results = []
        for path in args.tables.split(","):
            results += read_log(path)
        print_tables(results)
        return 1 if any(st.raw or st.scan_raw for st in results) else 0
    warnings.simplefilter("ignore")  # data warnings of awkward toys are expected here
    patterns = [p.strip() for p in args.cells.split(",") if p.strip()]
    specs = list(cells(patterns))
    if args.part:
        i, n = _part(args.part)
        specs = [sp for sp in specs if zlib.crc32(sp[0].encode()) % n == i - 1]
    if args.shuffle is not None:
        order = np.random.default_rng(args.shuffle).permutation(len(specs))
        specs = [specs[i] for i in order]
    state = {st.label: st for st in (read_log(args.log) if args.log else [])}
    stop_at = (time.monotonic() + seconds_until(args.deadline) if args.deadline
               else math.inf)
    # rounds that double, so a deadline leaves every cell within a factor ~2 of the others
    levels = sorted({n for n in (1, 2, 5, args.min_toys, 20, 50, args.toys)
                     if n <= args.toys})
    warm_up()
    t_start = time.perf_counter()
    for lev, level in enumerate(levels):
        todo = list(specs)
        if lev:  # cheapest first: a deadline then cuts the fewest cells short
            todo.sort(key=lambda sp: (state[sp[0]].cpu / max(state[sp[0]].toys, 1)
                                      if sp[0] in state else math.inf))
        for spec in todo:
            have = state[spec[0]].toys if spec[0] in state else 0
            if have >= level:
                continue
            if time.monotonic() > stop_at:
                break
            st = run_cell(*spec, toys=level, seed=args.seed, scan_toys=args.scan_toys,
                          first=have, stop_at=stop_at)
            if not st.toys:
                continue
            if args.log:
                with open(args.log, "a") as fh:
                    fh.write(json.dumps(to_record(st)) + "\n")
            if spec[0] in state:
                state[spec[0]].extend(st)
            else:
                state[spec[0]] = st
            tot = state[spec[0]]
            print(f"{st.label:45s} toys {st.first:3d}-{st.first + st.toys - 1:3d} "
                  f"(all {tot.toys:3d})  raw {len(tot.raw) + len(tot.scan_raw)}  "
                  f"invalid {100 * tot.invalid_rate:5.1f}%  median {tot.median_ms:7.1f} ms  "
                  f"[{time.perf_counter() - t_start:.0f} s]", flush=True)
    results = [state[sp[0]] for sp in cells(patterns) if sp[0] in state]
    if not results:
        print("no cell matches --cells", file=sys.stderr)
        return 2
    print_tables(results)
    if args.json:
        with open(args.json, "w") as fh:
            json.dump([to_record(st) for st in results], fh, indent=1)
    return 1 if any(st.raw or st.scan_raw for st in results) else 0


if __name__ == "__main__":
    sys.exit(main())
