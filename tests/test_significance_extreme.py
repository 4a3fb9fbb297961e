"""Significances far beyond 37 sigma, where a p-value underflows a double.

The log-space helpers are checked against the asymptotic series of the normal tail
(Abramowitz, Stegun, Handbook of Mathematical Functions, 1964, eq. 26.2.12, written out here
from memory) and against Python's ``math.erfc``; the global p-value against the Gross-Vitells
formula (EPJC 70 (2010) 525, eq. 4) and the Clopper-Pearson bound (``scipy.stats.beta``).
End to end, a search on a generated spectrum with a huge peak (local Z ~ 90) must write
numbers (not nulls) into results.json, print its summary and render its report; and no
output path may fail on None, NaN or infinite values.
"""

from __future__ import annotations

import io
import json
import math
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import pytest
from scipy import special, stats

from peaksift._format import p_value, significance
from peaksift.stats.lee import global_from_toys, global_from_upcrossings
from peaksift.stats.significance import (
    log10_p,
    log_p_from_q0,
    log_p_from_z,
    z_from_log_p,
)

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

LN10 = math.log(10.0)


def tail_series_log(z: float, terms: int = 7) -> float:
    """ln Q(z) from Abramowitz & Stegun 26.2.12 (from memory):

    Q(z) = phi(z)/z * [1 - 1/z^2 + 1*3/z^4 - 1*3*5/z^6 + ...],  phi(z) = exp(-z^2/2)/sqrt(2 pi),

    an asymptotic series whose error is below the first term left out.  With 7 terms at
    z = 10 that term is 1*3*...*13 / 10^14 = 1.4e-9 (relative), less at larger z.
    """
    s, term = 1.0, 1.0
    for k in range(1, terms):
        term *= -(2 * k - 1) / (z * z)
        s += term
    return -0.5 * z * z - math.log(z) - 0.5 * math.log(2.0 * math.pi) + math.log(s)


# ----------------------------------------------------------------- log-space helpers
@pytest.mark.parametrize("z, tol", [(10.0, 1e-8), (38.0, 1e-10), (100.0, 1e-10)])
def test_log_p_matches_the_normal_tail_series(z, tol):
    """ln p(Z) against A&S 26.2.12; absolute tolerance on ln p (|ln p| = 53, 727, 5006)
    covers the series' remainder at Z = 10 (1.4e-9) and double rounding at Z = 100."""
    ref = tail_series_log(z)
    assert log_p_from_z(z) == pytest.approx(ref, abs=tol)
    assert log_p_from_q0(z * z) == pytest.approx(ref, abs=tol)
    assert log10_p(log_p_from_z(z)) == pytest.approx(ref / LN10, abs=tol)


def test_log_p_matches_erfc_where_p_is_representable():
    """p = erfc(Z / sqrt 2) / 2 (Python math.erfc, the C library) for Z = 1, 5, 10, 30;
    relative tolerance 1e-12 on ln p."""
    for z in (1.0, 5.0, 10.0, 30.0):
        ref = math.log(0.5 * math.erfc(z / math.sqrt(2.0)))
        assert log_p_from_z(z) == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("z", [10.0, 38.0, 100.0])
def test_z_from_log_p_inverts_the_series(z):
    """The A&S 26.2.12 value of ln p fed back gives Z (tolerance 1e-9 relative: at Z = 10 the
    series' 1.4e-9 error in ln p moves Z by ~1.4e-10)."""
    assert z_from_log_p(tail_series_log(z)) == pytest.approx(z, rel=1e-9)


def test_round_trip_z_log_p_z_up_to_z_1e4():
    """Z -> ln p -> Z for q0 up to 1e8 (Z = 1e4), where p itself is 0 from Z = 37.7
    (scipy.special.ndtr underflows); tolerance 1e-10 relative."""
    z = np.array([0.5, 1.0, 5.0, 10.0, 37.0, 38.0, 40.0, 100.0, 1000.0, 1e4])
    assert special.ndtr(-40.0) == 0.0  # the float p really is gone there
    back = z_from_log_p(log_p_from_z(z))
    np.testing.assert_allclose(back, z, rtol=1e-10)
    assert np.all(np.isfinite(log_p_from_q0(z * z)))


def test_z_from_log_p_edges():
    """p = 1/2 is Z = 0; p = 1 is Z = -inf; ln p > 0 is not a probability: NaN."""
    assert z_from_log_p(math.log(0.5)) == pytest.approx(0.0, abs=1e-12)
    assert z_from_log_p(0.0) == -math.inf
    assert math.isnan(z_from_log_p(0.1))


# ----------------------------------------------------------------- global p-value
def _scans_with_two_upcrossings(n: int = 40) -> np.ndarray:
    # every toy crosses u0 = 0.5 upwards exactly twice
    return np.tile(np.array([0.0, 1.0, 0.2, 2.0, 0.0]), (n, 1))


def test_gross_vitells_at_local_z_100_is_finite_and_below_local():
    """Gross, Vitells, EPJC 70 (2010) 525, eq. 4: p_global = p_local + N0 exp(-(u - u0)/2),
    here with u = 1e4 (Z_local = 100), N0 = 2, u0 = 0.5, summed in logs in this test; the
    returned Z_global must reproduce that ln p through A&S 26.2.12 (tolerance 1e-9 rel)."""
    u, u0, n0 = 1e4, 0.5, 2.0
    res = global_from_upcrossings(u, _scans_with_two_upcrossings(), u0=u0)
    assert res["N0"] == n0
    ln_loc = tail_series_log(100.0)
    ln_term = math.log(n0) - (u - u0) / 2.0
    ln_ref = max(ln_loc, ln_term) + math.log1p(math.exp(-abs(ln_loc - ln_term)))
    zg = res["z_global"]
    assert math.isfinite(zg) and 99.0 < zg < 100.0
    assert tail_series_log(zg) == pytest.approx(ln_ref, rel=1e-9)
    assert res["log10_p_global"] == pytest.approx(ln_ref / LN10, rel=1e-9)
    assert res["log10_p_local"] == pytest.approx(ln_loc / LN10, rel=1e-9)
    assert res["p_global"] == 0.0 and res["p_global_capped"] is False  # float underflow


def test_toys_with_none_above_give_a_bound_not_zero():
    """No toy reaches q0 = 1e4: p_global is the 95% Clopper-Pearson upper bound for 0 of n
    (Clopper, Pearson, Biometrika 26 (1934) 404: the 0.95 quantile of Beta(1, n),
    scipy.stats.beta.ppf), flagged as a bound, and Z_global its lower bound
    (scipy.special.ndtri)."""
    n = 50
    max_q0 = np.linspace(1.0, 12.0, n)
    res = global_from_toys(1e4, max_q0)
    bound = stats.beta.ppf(0.95, 1, n)
    assert res["p_global"] == pytest.approx(bound, rel=1e-9)
    assert res["p_global_is_upper_bound"] and res["z_global_is_lower_bound"]
    assert res["p_global_bound_cl"] == 0.95
    assert res["z_global"] == pytest.approx(-special.ndtri(bound), rel=1e-9)
    assert res["log10_p_global"] == pytest.approx(math.log10(bound), rel=1e-9)
    text = significance(res, "global")
    assert text.startswith("> ") and "p < " in text and f"no toy of {n}" in text


# ------------------------------------------------------------------------ formatting
def test_p_value_text():
    """A float p while it is a normal double, a power of ten below (formatting only)."""
    assert p_value(4.8e-5) == "4.80e-05"
    assert p_value(0.25) == "0.2500"
    assert p_value(0.0, -2173.87) == "10^-2173.9"
    assert p_value(None, -400.04) == "10^-400.0"
    assert p_value(0.0) == "< 2.2e-308"
    for bad in (None, math.nan, math.inf, -math.inf, "x"):
        assert p_value(bad, bad) == "n/a"


# --------------------------------------------------------------------- end to end
def _huge_peak_data(d: Path) -> Path:
    """3000 continuum pairs (60 GeV + exponential of 30 GeV) and 3000 in a 100 GeV peak of
    2 GeV width: two back-to-back muons of pT = m/2 at equal eta have invariant mass m."""
    rng = np.random.default_rng(11)
    m = np.concatenate([60.0 + rng.exponential(30.0, 3000), rng.normal(100.0, 2.0, 3000)])
    phi = rng.uniform(-np.pi, np.pi, m.size)
    eta = rng.uniform(-1.5, 1.5, m.size)
    rows = [[{"pt": m[i] / 2, "eta": float(eta[i]), "phi": float(phi[i]), "mass": 0.1057,
              "charge": 1, "isolation": 0.05},
             {"pt": m[i] / 2, "eta": float(eta[i]), "phi": float(phi[i] + np.pi),
              "mass": 0.1057, "charge": -1, "isolation": 0.05}] for i in range(m.size)]
    pq.write_table(pa.table({"muon": rows}), d / "events.parquet")
    cfg = d / "huge.toml"
    cfg.write_text("""
[input]
files = ["events.parquet"]
[objects]
collection = "muon"
cut = "pt > 5"
[spectrum]
window = [70.0, 150.0]
bins = 40
[model.resolution]
relative = 0.02
[significance]
method = "upcrossings"
toys = 20
[limits]
enabled = false
[output]
formats = ["png"]
""")
    return cfg


@pytest.fixture(scope="module")
def huge(tmp_path_factory):
    """One search through the command line; the SearchResult is kept for the figure checks."""
    from peaksift import search

    d = tmp_path_factory.mktemp("huge")
    cfg = _huge_peak_data(d)
    out = d / "out"
    kept = {}
    real = search.run_search

    def keep(*a, **kw):
        kept["result"] = real(*a, **kw)
        return kept["result"]

    from peaksift.cli import main

    buf = io.StringIO()
    with pytest.MonkeyPatch.context() as mp, redirect_stdout(buf):
        mp.setattr(search, "run_search", keep)
        rc = main(["search", str(cfg), "--out", str(out), "--quiet"])
    return {"rc": rc, "stdout": buf.getvalue(), "out": out, "result": kept.get("result"),
            "results": json.loads((out / "results.json").read_text())}


def test_results_json_holds_numbers_for_a_huge_peak(huge):
    best = huge["results"]["best"]
    for k in ("z_local", "z_global", "log10_p_local", "log10_p_global", "p_local", "p_global"):
        assert isinstance(best[k], float), (k, best[k])
    assert best["z_local"] > 40.0
    assert 0.9 * best["z_local"] < best["z_global"] <= best["z_local"]
    # the exponent is that of Z_local through A&S 26.2.12 (tolerance 1e-9 relative)
    assert best["log10_p_local"] == pytest.approx(
        tail_series_log(best["z_local"]) / LN10, rel=1e-9)
    assert best["log10_p_global"] >= best["log10_p_local"] and best["log10_p_global"] < -300
    # Gross-Vitells (EPJC 70 (2010) 525, eq. 4) from the stored N0, u0 and q0, in logs
    q0 = huge["results"]["scan"]["best"]["q0"]
    ln_loc = tail_series_log(math.sqrt(q0))
    ln_term = math.log(best["N0"]) - (q0 - best["u0"]) / 2.0
    ln_ref = max(ln_loc, ln_term) + math.log1p(math.exp(-abs(ln_loc - ln_term)))
    assert best["log10_p_global"] == pytest.approx(ln_ref / LN10, rel=1e-9)
    scan = huge["results"]["scan"]
    assert len(scan["log10_p_local"]) == len(scan["masses"])
    assert min(scan["log10_p_local"]) == pytest.approx(best["log10_p_local"], rel=1e-12)


def test_cli_exits_0_and_prints_p_as_a_power_of_ten(huge):
    assert huge["rc"] == 0
    out = huge["stdout"]
    local = next(x for x in out.splitlines() if "local significance" in x)
    glob = next(x for x in out.splitlines() if "global significance" in x)
    assert "sigma (p = 10^-" in local and "sigma (p = 10^-" in glob
    assert "n/a" not in local + glob


def test_report_renders_with_the_same_text(huge):
    md = (huge["out"] / "report.md").read_text()
    best = huge["results"]["best"]
    assert f"| Local significance | {significance(best, 'local')} |" in md
    assert "(p = 10^-" in significance(best, "global")
    assert "A local significance is not a discovery" in md
    assert (huge["out"] / "report.html").stat().st_size > 10_000


def test_scan_figure_says_the_curve_is_clipped(huge):
    from peaksift.plotting import scan_figure

    assert (huge["out"] / "figures" / "pvalue_scan.png").stat().st_size > 0
    fig = scan_figure(huge["result"].scan, huge["result"].best)
    texts = " ".join(t.get_text() for t in fig.axes[0].texts)
    assert "clipped" in texts and "10^-" in texts


def _poison(o, bad):
    """Every number in a results dictionary replaced by ``bad``."""
    if isinstance(o, dict):
        return {k: _poison(v, bad) for k, v in o.items()}
    if isinstance(o, list):
        return [_poison(v, bad) for v in o]
    if isinstance(o, (int, float)) and not isinstance(o, bool):
        return bad
    return o


@pytest.mark.parametrize("bad", [None, math.nan, math.inf, -math.inf])
def test_no_output_path_fails_on_missing_or_non_finite_numbers(huge, bad):
    from peaksift.cli import _summary_text
    from peaksift.plotting import scan_figure
    from peaksift.plotting.search import _fit_title
    from peaksift.report import render_html, render_markdown

    r = _poison(huge["results"], bad)
    for text in (_summary_text(r), render_markdown(r), render_html(r)):
        assert "n/a" in text
    empty = {k: None for k in r}
    for text in (_summary_text(empty), render_markdown(empty), render_html(empty)):
        assert "not a discovery" in text
    res = huge["result"]
    best = _poison(dict(res.best), bad)
    scan_figure(res.scan, best)
    _fit_title(type("R", (), {"best": best})())
