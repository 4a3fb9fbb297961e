"""The compiled pass over a new histogram's bins (``peaksift.fitting.count_pass``) and the
fits that take it (a new histogram in the bins of a kept setup).

References: numpy's own ``add.reduce`` and ``add.reduceat`` (the pass promises their sums
bit for bit: tolerance 0); the saturated term ``sum(n ln n - n)`` written here with
numpy's logarithm (tolerance 0: the same operations); the extended binned Poisson
likelihood in its saturated form (Baker and Cousins, Nucl. Instrum. Meth. 221 (1984) 437,
eq. 11) of a truncated Gaussian on a truncated power law written here with
``scipy.special.ndtr`` and minimised by iminuit's MIGRAD (tol 1e-6): the fits of new
histograms in kept bins must reach its minimum (NLL within 1e-5, values within 1e-3 of
their errors).
"""

from __future__ import annotations

import numpy as np
import pytest
from iminuit import Minuit
from scipy import special

from peaksift.errors import FitError
from peaksift.fitting import fit
from peaksift.fitting.count_pass import (
    OK,
    REFUSED,
    WEIGHTED,
    check_and_merge,
    pairwise_sum,
    saturated_sum,
)
from peaksift.histogram import MassHistogram


def _numpy_merge(n: np.ndarray, k: int) -> np.ndarray:
    """``start_bins``' merged sums written with numpy: reduceat at every k-th bin, the last
    group summed anew."""
    keep = list(range(0, n.size + 1, k))
    if keep[-1] != n.size:
        keep.append(n.size)
    keep = np.array(keep)
    v = np.add.reduceat(n, keep[:-1])
    v[-1] = n[keep[-2]:keep[-1]].sum()
    return v


@pytest.mark.parametrize("size", [1, 5, 8, 9, 127, 128, 129, 300, 1350, 4099])
def test_sums_are_numpys_bit_for_bit(size):
    rng = np.random.default_rng(size)
    for _ in range(20):
        a = rng.normal(0.0, 1.0, size) * 10.0 ** rng.uniform(-6, 6, size)
        assert 0.0 + pairwise_sum(a, 0, size) == np.add.reduce(a)
        lo = int(rng.integers(0, size))
        m = int(rng.integers(0, size - lo + 1))
        assert 0.0 + pairwise_sum(a, lo, m) == a[lo:lo + m].sum()


@pytest.mark.parametrize("nb,k", [(1350, 14), (120, 2), (97, 1), (1000, 10), (4000, 40)])
def test_checked_merged_and_saturated_as_numpy(nb, k):
    rng = np.random.default_rng(nb + k)
    for kind in range(3):
        if kind == 0:  # Poisson counts with empty bins
            n = rng.poisson(rng.uniform(0.2, 500.0), nb).astype(float)
        elif kind == 1:  # non-integer contents (an unweighted histogram of scaled counts)
            n = rng.poisson(3.0, nb) * rng.uniform(0.1, 3.0, nb)
        else:  # a large dynamic range
            n = rng.exponential(1.0, nb) * 10.0 ** rng.uniform(-200, 200, nb)
        merged, safe, counts = np.empty(-(-nb // k)), np.empty(nb), np.empty(nb)
        verdict, total = check_and_merge(n, n.copy(), k, merged, safe, counts)
        assert verdict == OK
        assert total == n.sum()
        np.testing.assert_array_equal(counts, n)  # the copy: the same numbers
        if k > 1:
            np.testing.assert_array_equal(merged, _numpy_merge(n, k))
        np.log(safe, out=safe)
        # the saturated term, written with numpy: n ln n - n (0 ln 0 = 0), summed by numpy
        t = np.zeros(nb)
        np.log(n, out=t, where=n > 0)
        expected = np.add.reduce(n * t - n)
        assert saturated_sum(n, safe) == expected


def test_verdicts():
    n = np.array([3.0, 0.0, 5.0, 2.0])
    buf = (np.empty(2), np.empty(4), np.empty(4))
    assert check_and_merge(n, n.copy(), 2, *buf)[0] == OK
    for bad in (np.nan, np.inf, -1.0):
        m = n.copy()
        m[2] = bad
        assert check_and_merge(m, m.copy(), 2, *buf)[0] == REFUSED
    v = n.copy()
    v[1] = 0.5  # a sum of squared weights that differs: weighted bins
    assert check_and_merge(n, v, 2, *buf)[0] == WEIGHTED
    w = n.copy()
    w[3] = np.nan
    assert check_and_merge(n, w, 2, *buf)[0] == REFUSED


LO, HI = 100.0, 1450.0


def _power_law(rng, nb: int, ns: int) -> np.ndarray:
    a = 1.0 - 4.0
    u = rng.random(nb)
    x = LO * (1.0 - u * (1.0 - (HI / LO) ** a)) ** (1.0 / a)
    return np.concatenate([x, rng.normal(400.0, 8.0, ns)])


def _reference(counts: np.ndarray, edges: np.ndarray, start: dict) -> tuple[dict, float]:
    """iminuit's minimum of the saturated binned NLL of a Gaussian on a power law x^-k."""
    lr, lr_hi = np.log(edges / LO), np.log(HI / LO)

    def nll(s, b, m, sg, k):
        zl, zh = (LO - m) / sg, (HI - m) / sg
        sig = np.diff(special.ndtr((edges - m) / sg)) / (special.ndtr(zh) - special.ndtr(zl))
        a = 1.0 - k
        bkg = np.diff(-np.expm1(a * lr)) / (-np.expm1(a * lr_hi))
        mu = s * sig + b * bkg
        return float(np.sum(mu - counts + special.xlogy(counts, counts / mu)))

    m = Minuit(nll, **start)
    m.errordef = 0.5
    m.tol = 1e-6
    m.strategy = 2
    m.limits["sg"] = (0.1, 100.0)
    m.limits["k"] = (1.01, 20.0)
    m.limits["m"] = (LO, HI)
    m.migrad()
    assert m.valid
    return dict(m.values.to_dict()), float(m.fval)


def test_new_histograms_in_kept_bins_reach_the_reference_minimum():
    rng = np.random.default_rng(7)
    base = MassHistogram(bins=1350, range=(LO, HI)).fill(_power_law(rng, 200_000, 900))
    fit(base, "gaussian", "powerlaw", (LO, HI))  # the setup of these bins, kept
    for _ in range(3):
        counts = rng.poisson(base.values()).astype(float)
        res = fit(MassHistogram.from_counts(counts, base.edges), "gaussian", "powerlaw",
                  (LO, HI))
        assert res.valid
        v = res.values
        ref, ref_nll = _reference(counts, base.edges, {
            "s": v["signal_yield"], "b": v["background_yield"], "m": v["mass"],
            "sg": v["sigma"], "k": 4.0})
        assert abs(res.nll - ref_nll) < 1e-5
        assert abs(v["mass"] - ref["m"]) < 1e-3 * res.errors["mass"]
        assert abs(v["sigma"] - ref["sg"]) < 1e-3 * res.errors["sigma"]
        assert abs(v["signal_yield"] - ref["s"]) < 1e-3 * res.errors["signal_yield"]
        assert abs(v["background_yield"] - ref["b"]) < 1e-3 * res.errors["background_yield"]


def test_refused_contents_in_kept_bins_say_why():
    rng = np.random.default_rng(3)
    base = MassHistogram(bins=400, range=(LO, HI)).fill(_power_law(rng, 50_000, 300))
    fit(base, "gaussian", "powerlaw", (LO, HI))
    counts = base.values().copy()
    counts[7] = -1.0
    with pytest.raises(FitError, match="negative sum of weights"):
        fit(MassHistogram.from_counts(counts, base.edges, base.values()), "gaussian",
            "powerlaw", (LO, HI))
    h = MassHistogram.from_counts(base.values().copy(), base.edges)
    h.values()[9] = np.nan
    h.variances()[9] = np.nan
    with pytest.raises(FitError, match="non-finite"):
        fit(h, "gaussian", "powerlaw", (LO, HI))
    with pytest.raises(FitError, match="holds no events"):
        fit(MassHistogram.from_counts(np.zeros(400), base.edges), "gaussian", "powerlaw",
            (LO, HI))
