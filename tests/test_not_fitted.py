"""A fit that was not made shows no numbers, and significances on too few events are flagged.

A window with fewer events than free parameters is not fitted: its values are the start
values, which the repr, the notebook table, the report's Result table and the summary
show as "not fitted" (they read like fitted numbers), without a goodness of fit.  The
threshold for flagging significances (less than one background event under the signal)
is checked against the exact Poisson tail of a counting test (scipy.stats.poisson.sf)
beside the asymptotic Z = sqrt(2 (n ln(n/b) - n + b)) (Cowan, Cranmer, Gross, Vitells
2011, eq. 97).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

import peaksift
from peaksift.cli._summary import _summary_text
from peaksift.report_sections import _summary_rows
from peaksift.search.doubts import FEW_BACKGROUND, doubts


def test_an_unfitted_result_shows_no_start_values():
    r = peaksift.fit([150.0], "gaussian", "exponential", window=(100.0, 200.0))
    assert not r.valid and not r.fitted
    assert r.problems[0].startswith("not fitted: only 1 event in the window for 5 free")
    text = repr(r)
    start_mass = f"{r.values['mass']:g}"          # where the start finder put the peak
    assert "mass             = not fitted" in text and "peak: not fitted" in text
    assert f"mass {start_mass}" not in text and "FWHM" not in text
    assert "GoF: none (not fitted)" in text and "chi2/ndf" not in text
    html = r._repr_html_()
    assert html.startswith("<div><p>") and "<b>INVALID</b>: not fitted: only 1 event" in html
    assert "<td>not fitted</td>" in html and "peak: not fitted" in html and "FWHM" not in html
    assert "(1 mass &lt;= 20000" in html
    d = r.to_dict()
    assert d["fitted"] is False and type(r).from_dict(d).fitted is False
    # a fixed parameter is a given number, not a start value: shown
    r3 = peaksift.fit([150.0, 151.0, 152.0], "gaussian", "exponential", window=(100.0, 200.0),
                      fixed={"sigma": 2.0})
    assert "sigma            = 2 (fixed)" in repr(r3) and "only 3 events" in r3.problems[0]
    ok = peaksift.fit(np.random.default_rng(1).normal(150.0, 5.0, 400), "gaussian",
                      "exponential", window=(100.0, 200.0))
    assert ok.fitted and ok.to_dict()["fitted"] is True


def _results(fit: dict, **over) -> dict:
    r = {"fit": fit, "blinding": {"active": False}, "best": {"mass": 545.2, "z_local": 1.51},
         "input": {"candidates": 1}}
    r.update(over)
    return r


def test_report_and_summary_say_not_fitted_and_give_no_goodness_of_fit():
    fit = {"valid": False, "fitted": False, "width_parameter": "sigma",
           "problems": ["not fitted: only 1 event in the window for 4 free parameters"],
           "peak_mass": {"value": 543.6, "error": None},
           "width": {"value": 7.067, "error": None},
           "signal_yield": {"value": 1.05, "error": None},
           "background_yield": {"value": 1.0, "error": None},
           "gof": {"chi2": 7.453, "ndf": 95, "p_value": 1.0}}
    rows = dict(_summary_rows(_results(fit)))
    for label in ("Fitted peak mass", "Fitted width (sigma)", "Signal yield",
                  "Background yield (window)"):
        assert rows[label] == "not fitted"
    assert rows["Goodness of fit (free fit)"] == "none (not fitted)"
    text = _summary_text(_results(fit))
    assert "543.6" not in text and "7.067" not in text
    assert "fitted mass                not fitted" in text
    # results.json of earlier versions (no "fitted"): the problems say it
    old = {k: v for k, v in fit.items() if k != "fitted"}
    assert dict(_summary_rows(_results(old)))["Fitted peak mass"] == "not fitted"


def test_the_threshold_against_the_exact_poisson_tail():
    """Below one background event the asymptotic local significance is high by 0.15-0.3
    sigma at Z = 3-5; at 10 events by less than 0.1 (what FEW_BACKGROUND's comment says)."""
    def gaps(b):
        out = []
        for n in range(1, 200):
            if n <= b:
                continue
            za = np.sqrt(2.0 * (n * np.log(n / b) - (n - b)))
            ze = stats.norm.isf(stats.poisson.sf(n - 1, b))
            if 3.0 <= za <= 5.0:
                out.append(za - ze)
        return np.array(out)

    for b in (0.1, 0.5, 0.99):
        g = gaps(b)
        assert g.size and np.all((g > 0.1) & (g < 0.35)), (b, g)
    assert np.all(gaps(10.0) < 0.1)
    assert FEW_BACKGROUND == 1.0


def test_significances_on_too_few_events_are_flagged():
    fitted = {"valid": True, "fitted": True, "problems": [], "gof": {"p_value": 0.5}}
    lim = {"masses": [540.0, 545.0, 550.0], "background_under_signal": [0.8, 0.4, 0.3]}

    def sig(r):
        return [w["message"] for w in doubts(r) if w["topic"] == "significance"]

    (msg,) = sig(_results(fitted, limits=lim))
    assert msg.startswith("0.4 background events expected under the signal near the best "
                          "mass (545.00 GeV; fewer than 1)")
    enough = {**lim, "background_under_signal": [2.0, 1.5, 1.2]}
    assert sig(_results(fitted, limits=enough)) == []
    unfitted = {"valid": False, "fitted": False, "problems": ["not fitted: only 1 event"]}
    (msg,) = sig(_results(unfitted))
    assert msg.startswith("the window holds 1 candidate, fewer than the free fit's parameters")
    assert sig(_results(unfitted, blinding={"active": True})) == []


@pytest.mark.parametrize("n", [1, 2])
def test_the_fit_problem_counts_events_in_words(n):
    r = peaksift.fit([150.0 + i for i in range(n)], "gaussian", "exponential",
                     window=(100.0, 200.0))
    assert f"only {n} event{'s' if n > 1 else ''} in the window" in r.problems[0]


def test_toy_limits_outside_their_grid_are_a_warning():
    """The reviewer's 1-candidate run: 8 toy limits reported as NaN, said only in
    limits.notes; now a 'limits' warning counting them."""
    notes = [f"{m}: toy limit outside the grid [0.4412, 33.88]: reported as NaN"
             for m in ("543.012", "546.371", "549.729", "553.088")] + ["18 of 18 masses ..."]
    fitted = {"valid": True, "fitted": True, "problems": [], "gof": {"p_value": 0.5}}
    msgs = [w["message"] for w in doubts(_results(fitted, limits={"notes": notes}))
            if w["topic"] == "limits"]
    assert msgs == [("4 toy limits fell outside their grid and are reported as n/a (at "
                    "543.012, 546.371, 549.729 ... GeV): the band or observed value there "
                    "lies below or above every signal the toys tried")]
