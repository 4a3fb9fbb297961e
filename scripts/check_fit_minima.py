"""Check the free fit's minima against an independent tight reference minimum.

The rule of ``docs/decisions/tight-minimum.md``: a change to the free fit, its start finding
or its minimiser is judged by where its fits end against a reference minimum found here,
independently of peaksift's minimiser and compiled cost.

Three steps (each writes or reads JSON, so a tree before a change and one after can be run
in their own processes, ``PYTHONPATH`` choosing the tree)::

    python scripts/check_fit_minima.py run OUT.json [--perturb]   # peaksift.fit on the set
    python scripts/check_fit_minima.py reference FITS.json REF.json  # iminuit reference
    python scripts/check_fit_minima.py compare OLD.json NEW.json REF.json

The comparison set (~1,030 fits, fixed random numbers): a Gaussian on an exponential at
0/2/5/10 sigma (100 bins), the same in 400 bins, a Gaussian on a power law in 1,350 bins
(as ``bench_fit.py``'s spectrum, 0-10 sigma), with the width fixed, the mass fixed, given
starts, a constrained width, a Crystal Ball signal, unbinned and weighted unbinned masses,
weighted bins.  ``--perturb`` refits each case started (every free parameter given) at the
fit's own minimum moved by 0.3 of its errors in random directions: the start independence.

The reference (``reference``), for every valid fit: the NLL written here -- binned:
``sum s mu - n~ ln(s mu)`` (scaled Poisson, ``n~ = n s``, ``s = sum w / sum w^2``, in empty
bins the ratio of the totals; 1 for unweighted bins), unbinned: ``sum nu - sum w ln(density)``, plus ``(x - c)^2 / (2 w^2)`` for a
Gaussian constraint -- with the model's expectation from its numpy shape functions
(``Model.expected`` / ``Model.density``: the shapes are tested against scipy in their own
tests), minimised by iminuit's MIGRAD (strategy 2, tolerance 1e-6, numerical derivatives)
from the fit's values, HESSE, then Newton steps with HESSE's covariance and central
differences of this NLL (step 1e-3 of each error; binned in its saturated form, whose terms
are of order 1) until the step is below 1e-7 of every error (a step raising the NLL by more
than 1e-9 ends them).  ``compare`` prints per group the largest ``|value - reference| /
reference error`` of both trees, NLL differences (new - old), verdict changes, error
differences, and how many new values lie more than 1e-5 of an error off the reference (in
brackets: of those, where the reference's own NLL is lower at the new values than at its
own).  ``spread A.json B.json`` prints per group the largest ``|a - b| / error`` between two
runs (a run and its ``--perturb`` refits: the start independence).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import warnings

import numpy as np

import peaksift
from peaksift.histogram import MassHistogram
from peaksift.likelihood import Model

EXP_WIN = (100.0, 200.0)
#: at most this many cases of a group (``--limit``)
LIMIT = 10**9
PL_WIN, PL_BINS = (100.0, 1450.0), 1350


def _poisson(rng, model, edges, truth):
    return rng.poisson(np.maximum(model.expected(edges, truth), 0.0)).astype(float)


def _sample(rng, model, truth, n_events):
    """Masses drawn from the model's density (fine bins, uniform inside each)."""
    e = np.linspace(*model.window, 20001)
    p = np.maximum(model.expected(e, truth), 0.0)
    k = rng.choice(p.size, size=rng.poisson(n_events), p=p / p.sum())
    return e[k] + rng.uniform(0.0, 1.0, k.size) * (e[1] - e[0])


def _gauss_exp(rng, z, nbins=100, total=5000.0, signal="gaussian"):
    model = Model("gaussian", "exponential", EXP_WIN)
    mass = rng.uniform(125.0, 175.0)
    sigma = rng.uniform(2.0, 5.0)
    b1 = rng.uniform(-2.0, -0.5)
    edges = np.linspace(*EXP_WIN, nbins + 1)
    b = model.expected(edges, [mass, sigma, 0.0, b1, total])
    under = b[np.abs(0.5 * (edges[1:] + edges[:-1]) - mass) < 2 * sigma].sum()
    ys = z * math.sqrt(max(under, 1.0)) / 0.95
    truth = [mass, sigma, ys, b1, total]
    h = MassHistogram.from_counts(_poisson(rng, model, edges, truth), edges)
    return h, truth, {"signal": signal, "background": "exponential", "window": EXP_WIN}


def _power_law(rng):
    model = Model("gaussian", "powerlaw", PL_WIN)
    mass = rng.uniform(250.0, 1200.0)
    sigma = 0.02 * mass
    total = rng.uniform(2e4, 5e5)
    edges = np.linspace(*PL_WIN, PL_BINS + 1)
    b = model.expected(edges, [mass, sigma, 0.0, 4.0, total])
    under = b[np.abs(0.5 * (edges[1:] + edges[:-1]) - mass) < 2 * sigma].sum()
    ys = rng.uniform(0.0, 10.0) * math.sqrt(max(under, 1.0)) / 0.95
    truth = [mass, sigma, ys, 4.0, total]
    h = MassHistogram.from_counts(_poisson(rng, model, edges, truth), edges)
    return h, truth, {"signal": "gaussian", "background": "powerlaw", "window": PL_WIN}


def make_case(group: str, i: int):
    """``(data, fit keyword arguments)`` of case ``i`` of ``group``."""
    rng = np.random.default_rng([hash_group(group), i])
    if group.startswith("gauss_exp_z"):
        h, _, kw = _gauss_exp(rng, float(group[len("gauss_exp_z"):]))
        return h, kw
    if group == "gauss_exp_400":
        h, _, kw = _gauss_exp(rng, rng.uniform(0, 8), nbins=400, total=20000.0)
        return h, kw
    if group == "powerlaw_1350":
        h, _, kw = _power_law(rng)
        return h, kw
    if group in ("fixed_sigma", "fixed_mass", "given_start", "constrained_sigma"):
        h, truth, kw = _gauss_exp(rng, rng.uniform(2, 8))
        if group == "fixed_sigma":
            kw["fixed"] = {"sigma": truth[1]}
        elif group == "fixed_mass":
            kw["fixed"] = {"mass": truth[0]}
        elif group == "given_start":
            kw["start"] = {"mass": truth[0] + rng.normal(0, 1.0), "sigma": truth[1] * 1.3}
        else:
            kw["constraints"] = {"sigma": (truth[1] * rng.uniform(0.9, 1.1), 0.1 * truth[1])}
        return h, kw
    if group == "crystalball":
        h, _, kw = _gauss_exp(rng, rng.uniform(5, 10), total=20000.0, signal="crystalball")
        return h, kw
    if group in ("unbinned", "weighted_unbinned", "weighted_binned"):
        model = Model("gaussian", "exponential", EXP_WIN)
        truth = [rng.uniform(130, 170), rng.uniform(2, 5), rng.uniform(100, 300),
                 rng.uniform(-2, -0.5), 3000.0]
        x = _sample(rng, model, truth, 3300.0)
        kw = {"signal": "gaussian", "background": "exponential", "window": EXP_WIN}
        if group == "unbinned":
            return x, kw
        w = rng.uniform(0.5, 1.5, x.size)
        if group == "weighted_unbinned":
            return (x, w), kw
        h = MassHistogram(bins=100, range=EXP_WIN)
        h.fill(x, w)
        return h, kw
    raise SystemExit(f"unknown group {group!r}")


GROUPS = {"gauss_exp_z0": 100, "gauss_exp_z2": 100, "gauss_exp_z5": 100, "gauss_exp_z10": 100,
          "gauss_exp_400": 100, "powerlaw_1350": 150, "fixed_sigma": 50, "fixed_mass": 50,
          "given_start": 50, "constrained_sigma": 50, "crystalball": 50, "unbinned": 50,
          "weighted_unbinned": 40, "weighted_binned": 40}


def _load(path: str) -> dict:
    with open(path) as f:
        return json.load(f)


def _save(obj: dict, path: str) -> None:
    with open(path, "w") as f:
        json.dump(obj, f)


def hash_group(group: str) -> int:
    return sum((k + 1) * ord(c) for k, c in enumerate(group))


def _record(r) -> dict:
    return {"values": dict(r.values), "errors": dict(r.errors), "nll": r.nll, "valid": r.valid,
            "problems": list(r.problems), "fixed": list(r.fixed),
            "calls": getattr(r, "n_calls", None)}


def run(out: str, perturb: str | None, only: list[str] | None) -> None:
    base = _load(perturb) if perturb else None
    recs = {}
    for group, count in GROUPS.items():
        if only and group not in only:
            continue
        for i in range(min(count, LIMIT)):
            key = f"{group}/{i}"
            data, kw = make_case(group, i)
            if base is not None:
                b = base.get(key)
                if b is None or not b["valid"]:
                    continue
                rng = np.random.default_rng([hash_group(group), i, 7])
                free = [k for k in b["values"] if k not in b["fixed"]]
                model = Model(kw["signal"], kw["background"], kw["window"])
                bounds = {p.name: (p.lower, p.upper) for p in model.parameters}
                # (inside the parameter's bounds: a Crystal Ball tail's error can exceed them)
                kw["start"] = {k: float(np.clip(b["values"][k] + 0.3 * b["errors"][k]
                                                * rng.standard_normal(), *bounds[k]))
                               for k in free}
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                recs[key] = _record(peaksift.fit(data, **kw))
    _save(recs, out)
    print(f"{len(recs)} fits -> {out}")


def _reference_nll(data, kw, free, fixed_vals):
    model = Model(kw["signal"], kw["background"], kw["window"])
    names = list(model.parameter_names)
    cons = [(names.index(k), c, w) for k, (c, w) in kw.get("constraints", {}).items()]
    idx = [names.index(k) for k in free]
    full = np.array([fixed_vals.get(k, 0.0) for k in names], float)
    if isinstance(data, MassHistogram):
        edges = np.asarray(data.edges, float)
        n = np.asarray(data.weight_sum, float)
        n2 = np.asarray(data.weight_sq_sum, float)
        # empty bins take the ratio of the totals (the convention MassHistogram documents)
        overall = n.sum() / n2.sum() if n2.sum() > 0 else 1.0
        s = np.where(n2 > 0, n / np.where(n2 > 0, n2, 1.0), overall)
        s = np.where(s > 0, s, overall)
        eff = n * s

        # the saturated form (its constant taken out): terms of order 1, so central
        # differences of it are exact to ~1e-12 (of the raw form's ~1e6 they were not)
        sat = np.where(eff > 0, eff * np.log(np.where(eff > 0, eff, 1.0)), 0.0) - eff

        def core(v):
            mu = model.expected(edges, v)
            if not np.all(mu > 0):
                return 1e300
            return float(np.sum(s * mu - eff * np.log(s * mu) + sat))
    else:
        x, w = (data if isinstance(data, tuple) else (data, np.ones(len(data))))
        iy = [b[2] for b in model.blocks]

        def core(v):
            d = model.density(x, v)
            if not np.all(d > 0):
                return 1e300
            return float(sum(v[i] for i in iy) - w @ np.log(d))

    def nll(*p):
        v = full.copy()
        v[idx] = p
        val = core(v)
        for i, c, wd in cons:
            val += 0.5 * ((v[i] - c) / wd) ** 2
        return val
    return model, nll


def reference(fits: str, out: str) -> None:
    from iminuit import Minuit

    base = _load(fits)
    refs = {}
    for key, b in base.items():
        if not b["valid"]:
            continue
        group, i = key.split("/")
        data, kw = make_case(group, int(i))
        free = [k for k in b["values"] if k not in b["fixed"]]
        fixed_vals = {k: b["values"][k] for k in b["fixed"]}
        model, nll = _reference_nll(data, kw, free, fixed_vals)
        lo = {p.name: p.lower for p in model.parameters}
        hi = {p.name: p.upper for p in model.parameters}
        m = Minuit(nll, *[b["values"][k] for k in free], name=free)
        m.errordef = 0.5
        m.strategy = 2
        m.tol = 1e-6
        for k in free:
            if k == "sigma" and isinstance(data, MassHistogram):
                lo[k] = 0.1 * float(np.diff(data.edges).min())
            if k.endswith("yield"):
                continue
            m.limits[k] = (lo[k], hi[k])
            m.errors[k] = max(b["errors"][k], 1e-6) if math.isfinite(b["errors"][k]) else 0.1
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m.migrad()
            m.hesse()
        if m.covariance is None:  # no reference where HESSE fails (listed by compare)
            refs[key] = None
            continue
        x = np.array(m.values, float)
        cov = np.array(m.covariance, float)
        err = np.sqrt(np.diag(cov))
        f = nll(*x)
        for _ in range(10):  # Newton steps: central differences of the NLL above
            g = np.empty(x.size)
            for j in range(x.size):
                h = 1e-3 * err[j]
                xp, xm = x.copy(), x.copy()
                xp[j] += h
                xm[j] -= h
                g[j] = (nll(*xp) - nll(*xm)) / (2 * h)
            step = -cov @ g
            if np.all(np.abs(step) < 1e-7 * err):
                break
            f1 = nll(*(x + step))
            if not f1 <= f + 1e-9:  # (a smaller rise is the NLL's rounding)
                break
            x, f = x + step, f1
        refs[key] = {"values": dict(zip(free, x.tolist())), "errors": dict(zip(free, err.tolist())),
                     "nll": f, "valid": bool(m.valid)}
        print(key, end=" ", flush=True) if len(refs) % 100 == 0 else None
    _save(refs, out)
    print(f"\n{len(refs)} references -> {out}")


def _dev(rec, ref):
    return max(abs(rec["values"][k] - ref["values"][k]) / ref["errors"][k]
               for k in ref["values"])


def _ref_nll_at(rec: dict, ref: dict) -> float:
    """The reference's own NLL at the values of ``rec`` (a fit record)."""
    group, i = ref["key"].split("/")
    data, kw = make_case(group, int(i))
    free = list(ref["values"])
    _, nll = _reference_nll(data, kw, free, {k: rec["values"][k] for k in rec["fixed"]})
    return nll(*[rec["values"][k] for k in free])


def compare(old: str, new: str, ref: str) -> None:
    a, b, r = (_load(p) for p in (old, new, ref))
    for k, v in r.items():
        if v:
            v["key"] = k
    print(f"{'group':18s} {'fits':>5s} {'valid':>5s} {'max dev old':>12s} {'max dev new':>12s} "
          f"{'new<=old':>8s} {'dNLL min':>10s} {'dNLL max':>10s} {'err rel':>9s} verdicts "
          f"new>1e-5 (ref NLL higher)")
    allkeys = [k for k in a if k in b]
    for group in GROUPS:
        keys = [k for k in allkeys if k.startswith(group + "/")]
        if not keys:
            continue
        valid = [k for k in keys if r.get(k) and b[k]["valid"] and a[k]["valid"]]
        noref = [k for k in keys if k in r and r[k] is None]
        do = [_dev(a[k], r[k]) for k in valid]
        dn = [_dev(b[k], r[k]) for k in valid]
        dnll = [b[k]["nll"] - a[k]["nll"] for k in keys
                if math.isfinite(a[k]["nll"]) and math.isfinite(b[k]["nll"])]
        erel = [abs(b[k]["errors"][p] / a[k]["errors"][p] - 1) for k in valid
                for p in r[k]["values"] if a[k]["errors"][p] > 0]
        flips = [k for k in keys if a[k]["valid"] != b[k]["valid"]]
        # where the new values are more than 1e-5 of an error off the reference: is the
        # reference the less exact one (its own NLL lower at the new values)?
        far = [k for k, y in zip(valid, dn) if y > 1e-5]
        lower_there = sum(1 for k in far if _ref_nll_at(b[k], r[k]) <= r[k]["nll"] + 1e-12)
        closer = sum(1 for x, y in zip(do, dn) if y <= x + 1e-9)
        print(f"{group:18s} {len(keys):5d} {len(valid):5d} {max(do, default=0):12.2e} "
              f"{max(dn, default=0):12.2e} {closer:5d}/{len(valid):<3d}"
              f"{min(dnll, default=0):10.1e} {max(dnll, default=0):10.1e} "
              f"{max(erel, default=0):9.1e} {len(flips):4d}   {len(far)} ({lower_there})")
        if noref:
            print(f"   no reference (HESSE failed): {', '.join(noref)}")
        for k in flips:
            print(f"   verdict {k}: {a[k]['valid']} -> {b[k]['valid']}: {a[k]['problems']} -> "
                  f"{b[k]['problems']}")
    worst = sorted(((_dev(b[k], r[k]), k) for k in allkeys if r.get(k) and b[k]["valid"]),
                   reverse=True)[:5]
    print("largest new deviations:", ", ".join(f"{k} {d:.2e}" for d, k in worst))
    moved = [(b[k]["nll"] - a[k]["nll"], k) for k in allkeys
             if math.isfinite(a[k]["nll"]) and b[k]["nll"] - a[k]["nll"] > 1e-6]
    print("NLL higher by > 1e-6:", moved or "none")


def spread(first: str, second: str) -> None:
    a, b = _load(first), _load(second)
    print(f"{'group':18s} {'fits':>5s} {'max |a-b|/err':>14s} {'max |dNLL|':>11s} verdicts")
    for group in GROUPS:
        keys = [k for k in a if k.startswith(group + "/") and k in b and a[k]["valid"]]
        if not keys:
            continue
        dev = [max(abs(a[k]["values"][p] - b[k]["values"][p]) / a[k]["errors"][p]
                   for p in a[k]["values"] if p not in a[k]["fixed"]) for k in keys]
        dnll = [abs(a[k]["nll"] - b[k]["nll"]) for k in keys]
        flips = sum(1 for k in keys if not b[k]["valid"])
        worst = keys[int(np.argmax(dev))]
        print(f"{group:18s} {len(keys):5d} {max(dev):14.2e} {max(dnll):11.1e} {flips:4d}  "
              f"(worst {worst})")


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    p = sub.add_parser("run")
    p.add_argument("out")
    p.add_argument("--perturb", help="the fits (JSON) whose minima start the refits")
    p.add_argument("--only", nargs="*")
    p.add_argument("--limit", type=int, default=10**9)
    p = sub.add_parser("reference")
    p.add_argument("fits")
    p.add_argument("out")
    p = sub.add_parser("compare")
    p.add_argument("old")
    p.add_argument("new")
    p.add_argument("ref")
    p = sub.add_parser("spread")
    p.add_argument("first")
    p.add_argument("second")
    args = ap.parse_args(argv)
    if args.cmd == "run":
        global LIMIT
        LIMIT = args.limit
        run(args.out, args.perturb, args.only)
    elif args.cmd == "reference":
        reference(args.fits, args.out)
    elif args.cmd == "spread":
        spread(args.first, args.second)
    else:
        compare(args.old, args.new, args.ref)
    return 0


if __name__ == "__main__":
    sys.exit(main())
