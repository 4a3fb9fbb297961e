"""One wording for a fit's numbers and names everywhere it is printed.

* The goodness-of-fit chi-square: one decimal in the repr, the fit figure's caption and
  the report (the report printed 81.97 where the figure and the summary printed 82.0).
  Reference: Baker and Cousins' saturated chi-square, 2 sum(mu - n + n ln(n / mu))
  (Nucl. Instrum. Meth. 221 (1984) 437, eq. 11), with mu written here from the fitted
  values and the closed-form bin fractions of ``exp_gauss_reference`` (scipy's ndtr).
* A fit named as the outputs name it (``_vocabulary.FITS``): a free fit, a background-only
  fit (every signal yield held at 0), a calibration fit; kept through ``to_dict``.
* A combination's nuisances by their readable names, not their keys (the names the
  combination's configuration gives its channels).
"""

from __future__ import annotations

import numpy as np
from exp_gauss_reference import EDGES, WINDOW, exp_fractions, gauss_fractions

import peaksift
from peaksift.fitting import FitResult
from peaksift.fitting.figure import gof_caption
from peaksift.histogram import MassHistogram
from peaksift.report_sections import gof_text
from peaksift.search.combination_report import nuisance_label


def _hist(seed: int = 11) -> MassHistogram:
    rng = np.random.default_rng(seed)
    n = rng.poisson(3000.0 * exp_fractions(-1.2) + 150.0 * gauss_fractions(150.0, 4.0))
    h = MassHistogram(EDGES)
    h.weight_sum, h.weight_sq_sum = n.astype(float), n.astype(float)
    return h


def test_the_chi_square_has_one_decimal_everywhere():
    h = _hist()
    r = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True)
    v = r.values
    n = np.asarray(h.weight_sum, float)
    mu = (v["signal_yield"] * gauss_fractions(v["mass"], v["sigma"])
          + v["background_yield"] * exp_fractions(v["b1"]))
    chi2 = 2.0 * float(np.sum(mu - n + n * np.log(np.where(n > 0, n / mu, 1.0))))
    one = f"{chi2:.1f}"
    assert abs(r.gof_chi2 - chi2) < 1e-6 * chi2  # (the same chi-square, 1e-6 relative)
    assert f"chi2/ndf = {one}/{r.gof_ndf}" in repr(r)
    assert f"= {one}/{r.gof_ndf}" in gof_caption(r)
    assert gof_text(r.to_dict()["gof"]).startswith(f"\u03c7\u00b2 = {one} for {r.gof_ndf}")


def test_a_fit_is_named_as_the_outputs_name_it():
    h = _hist()
    free = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True)
    assert free.kind == "free_fit"
    assert repr(free).startswith("FitResult(valid; free fit: gaussian + exponential,")
    assert "<p>free fit: gaussian + exponential; <b>valid</b>;" in free._repr_html_()
    bonly = peaksift.fit(h, "gaussian", "exponential", WINDOW, binned=True,
                         fixed={"signal_yield": 0.0, "mass": 150.0, "sigma": 4.0})
    assert bonly.kind == "background_only"
    assert "; background-only fit: exponential," in repr(bonly).splitlines()[0]
    back = FitResult.from_dict(bonly.to_dict())
    assert back.kind == "background_only" and back == bonly


def test_combination_nuisances_have_readable_names():
    chans = ["dimuon", "dielectron"]
    assert nuisance_label("efficiency_dimuon", {"log_scale": [0.05, 0.0]}, chans) == \
        "efficiency x acceptance of dimuon"
    assert nuisance_label("luminosity_shared", {"log_scale": [0.02, 0.02]}, chans) == \
        "luminosity shared by dimuon and dielectron"
    assert nuisance_label("mass_scale_dielectron", {"shift_at_best": 0.001}, chans) == \
        "mass scale of dielectron"
