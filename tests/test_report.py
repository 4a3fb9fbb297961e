"""report.md / report.html / results.json writing, from a plain results dictionary.

The end-to-end content (numbers from a real search on the demo data) is checked in
test_search.py; here the rendering itself: tables, embedded figures, caution, atomic writes.
"""

from __future__ import annotations

import base64
import json
import math
from html.parser import HTMLParser

import numpy as np
import pytest

from peaksift.report import (
    CAUTION,
    atomic_write,
    format_pm,
    render_html,
    render_markdown,
    write_report,
    write_results_json,
)


def _results() -> dict:
    return {
        "peaksift_version": "0.1.0",
        "config": {"objects": {"collection": "muon", "cut": "pt > 20"},
                   "pairing": {"charge": "opposite", "choose": "all"},
                   "spectrum": {"window": [110.0, 200.0], "bins": 90},
                   "model": {"signal": "gaussian", "background": "bernstein",
                             "resolution": {"relative": 0.01}},
                   "output": {"title": ""}},
        "input": {"files": ["a.parquet"], "events_read": 1000, "events_selected": 400,
                  "candidates": 380, "cutflow": {"events": 1000, "candidates": 380}},
        "fit": {"valid": True, "peak_mass": {"value": 155.2, "error": 0.31},
                "width": {"value": 1.6, "error": 0.2},
                "signal_yield": {"value": 120.0, "error": 30.0},
                "background_yield": {"value": 3000.0, "error": 60.0},
                "gof": {"chi2": 80.1, "ndf": 84, "p_value": 0.6}},
        "scan": {"masses": [120.0, 150.0, 180.0], "z_local": [0.1, 3.9, 0.3],
                 "p_local": [0.46, 4.8e-5, 0.38], "signal_yield": [3.0, 118.0, 8.0]},
        "best": {"mass": 150.0, "z_local": 3.9, "p_local": 4.8e-5, "z_global": 2.9,
                 "p_global": 0.0019, "global_method": "upcrossings"},
        "limits": {"masses": [120.0, 150.0], "observed": [30.0, 210.0], "expected": [28.0, 40.0],
                   "expected_minus2": [15.0, 21.0], "expected_minus1": [20.0, 29.0],
                   "expected_plus1": [39.0, 56.0], "expected_plus2": [52.0, 75.0],
                   "unit": "events", "cl": 0.95},
        "known_matches": [],
        "provenance": {"inputs": [{"path": "a.parquet", "sha256": "ab" * 32}],
                       "config_sha256": "cd" * 32, "seed": 7,
                       "versions": {"python": "3.11", "numpy": np.__version__},
                       "started": "2026-01-01T00:00:00Z", "finished": "2026-01-01T00:01:00Z"},
    }


class _Collect(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.imgs: list[str] = []
        self.tables = 0
        self.stack: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.imgs.append(dict(attrs)["src"])
        elif tag == "table":
            self.tables += 1

    def handle_data(self, data):
        self.text.append(data)


def _png(tmp_path, name):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(2, 2))
    ax.plot([0, 1], [0, 1])
    p = tmp_path / f"{name}.png"
    fig.savefig(p)
    plt.close(fig)
    return p


def test_html_is_self_contained_and_parses(tmp_path):
    figs = {n: _png(tmp_path, n) for n in ("spectrum", "pvalue_scan", "limits", "candidates")}
    page = render_html(_results(), figs)
    parser = _Collect()
    parser.feed(page)
    parser.close()
    assert len(parser.imgs) == 4
    for src, path in zip(parser.imgs, figs.values()):
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]) == path.read_bytes()
    assert parser.tables >= 4
    text = " ".join(parser.text)
    assert "A local significance is not a discovery" in text
    assert "look-elsewhere effect is included" in text
    assert "No known particle matches" in text
    assert "155.20 ± 0.31 GeV" in text


def test_a_number_in_a_narrow_column_is_not_broken_across_lines():
    """A p-value such as 1.61e-05 in a narrow numeric column stays on one line (a browser
    otherwise breaks it after the exponent's hyphen, CSS Text Level 3, 5.2: "1.61e-" over
    "05"): numeric cells are right-aligned and not wrapped."""
    import re

    from peaksift.report import blocks_html

    page = blocks_html("t", [("table", ["mass", "p local"], [["152.45", "1.61e-05"]])], {})
    assert '<td class="num">1.61e-05</td>' in page
    rule = re.search(r"td\.num\{([^}]*)\}", page).group(1)
    assert "white-space:nowrap" in rule.replace("\n", "") and "text-align:right" in rule


def test_markdown_has_tables_caution_and_figure_links(tmp_path):
    md = render_markdown(_results(), {"spectrum": "figures/spectrum.png"})
    assert md.count(CAUTION) >= 2
    assert "![spectrum](figures/spectrum.png)" in md
    # the figure draws the free fit, whose mass floats away from the hypothesis it started at
    caption = md.split("![spectrum](figures/spectrum.png)")[1].split("\n\n")[1]
    assert "free fit" in caption and "at the best mass hypothesis, its" not in caption
    assert "| Local significance | 3.90 σ (p = 4.80e-05) |" in md
    assert "upcrossings" in md
    assert "| events | 1,000 |" in md  # one number format: the command line's


def test_results_json_reads_back_with_lists_on_one_line(tmp_path):
    """results.json parses (Python's json module, the standard's reader) to the values
    written, NaN as null; a list of numbers takes one line, a 2-d one a line a row."""
    d = {"scan": {"masses": np.linspace(120.0, 180.0, 61), "z": [1.5, float("nan"), None]},
         "counts": np.arange(12.0).reshape(3, 4), "fits": [{"a": 1}, {"b": [2, 3]}],
         "empty": {}, "none": [], "name": "m\u03bc\u03bc"}
    path = write_results_json(d, tmp_path / "results.json")
    text = path.read_text()
    back = json.loads(text)
    assert back["scan"]["masses"] == pytest.approx(list(np.linspace(120.0, 180.0, 61)),
                                                   rel=1e-15)
    assert back["scan"]["z"] == [1.5, None, None]
    assert back["counts"] == [[0, 1, 2, 3], [4, 5, 6, 7], [8, 9, 10, 11]]
    assert back["fits"] == [{"a": 1}, {"b": [2, 3]}] and back["empty"] == {}
    assert back["none"] == [] and back["name"] == "m\u03bc\u03bc"
    assert len(text.splitlines()) < 30


def test_format_pm_rounds_error_to_two_digits():
    # two significant digits on the error, value to the same decimal (common practice)
    assert format_pm(155.234, 0.3149, "GeV") == "155.23 ± 0.31 GeV"
    assert format_pm(1234.5, 56.0) == "1,234 ± 56"  # thousands marked as in number(1234)
    assert format_pm(1.0, None) == "1"


def test_masses_keep_five_significant_digits_below_10_gev():
    # a hypothesis at the phi(1020) (1.0194 GeV) must not read "1.02": two decimals from
    # 10 GeV up, five significant digits below (common practice for quoting masses)
    from peaksift._format import mass_text

    assert mass_text(152.6243) == "152.62"
    assert mass_text(1.019411) == "1.0194"
    assert mass_text(0.497611) == "0.49761"
    assert mass_text(float("nan")) == "n/a"


def test_fit_settings_use_the_one_value_error_format():
    # the summary's and report's "fit settings": a constraint's centre and width formatted
    # as every value ± error (two digits on the error, common practice), with its unit
    from peaksift.report_sections import fit_settings_text

    st = {"sigma_from_resolution": {"at_mass": 1.0194},
          "constraints": {"sigma": {"center": 3.0e-4, "width": 6.0e-5, "kind": "gaussian"},
                          "width": {"center": 4.249e-3, "width": 0.1, "kind": "lognormal"}}}
    assert fit_settings_text(st) == (
        "sigma constrained to the resolution model, 0.000300 ± 0.000060 GeV (Gaussian); "
        "width constrained to 0.004249 GeV within a relative 0.1 (log-normal)")


def test_results_json_atomic_and_nan_free(tmp_path):
    r = _results()
    r["fit"]["gof"]["p_value"] = float("nan")
    r["scan"]["z_local"] = np.array([0.1, np.inf, 0.2])
    p = write_results_json(r, tmp_path / "results.json")
    d = json.loads(p.read_text())
    assert d["fit"]["gof"]["p_value"] is None
    assert d["scan"]["z_local"] == [0.1, None, 0.2]
    assert [x.name for x in tmp_path.iterdir()] == ["results.json"]


def test_atomic_write_leaves_old_file_on_failure(tmp_path):
    target = tmp_path / "x.txt"
    atomic_write(target, "old")

    with pytest.raises(TypeError):
        atomic_write(target, object())  # type: ignore[arg-type]
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.txt"]


def test_write_report_relative_links(tmp_path):
    (tmp_path / "figures").mkdir()
    fig = _png(tmp_path / "figures", "spectrum")
    out = write_report(_results(), tmp_path, {"spectrum": fig})
    assert "](figures/spectrum.png)" in out["markdown"].read_text()
    assert "data:image/png;base64," in out["html"].read_text()


def _blinded_results() -> dict:
    """The results dictionary of a blinded run, as ``SearchResult.to_dict`` writes it."""
    r = _results()
    none = {"value": None, "error": None}
    r["fit"] = {"valid": False, "peak_mass": dict(none), "width": dict(none),
                "signal_yield": dict(none), "background_yield": dict(none),
                "gof": {"chi2": None, "ndf": None, "p_value": None},
                "problems": ["blinded: no signal-plus-background fit until --unblind"]}
    r["blinding"] = {"enabled": True, "window": [140.5, 165.0], "unblinded": False,
                     "active": True, "hidden_range": [140.0, 165.0]}
    r["input"]["candidates"] = 300
    return r


def test_blinded_report_says_what_is_hidden(tmp_path):
    from peaksift.report import _BLINDED_CAPTIONS, _CAPTIONS

    r = _blinded_results()
    figs = {n: _png(tmp_path, n) for n in ("spectrum", "pvalue_scan")}
    md = render_markdown(r, {n: f"figures/{n}.png" for n in figs})
    # no fit: the goodness of fit is n/a, not "n/a for None degrees of freedom"
    assert "| Goodness of fit (free fit) | n/a |" in md and "None" not in md
    # the spectrum caption does not promise a fit and pulls the blinded figure lacks
    assert f"*{_BLINDED_CAPTIONS['spectrum']}*" in md and _CAPTIONS["spectrum"] not in md
    # counts are labelled as the sidebands', and the withheld figure is mentioned
    assert ("candidates in the fit window 110-200 GeV outside the blinded bins 140-165 GeV "
            "(sidebands only while blinded): 300") in md
    assert "withheld while the run is blinded" in md
    text = render_html(r, figs)
    assert "withheld while the run is blinded" in text
    assert _BLINDED_CAPTIONS["spectrum"] in text and _CAPTIONS["spectrum"] not in text
    # an unblinded report keeps the fit caption and has no such notes
    plain = render_markdown(_results(), {"spectrum": "figures/spectrum.png"})
    assert _CAPTIONS["spectrum"] in plain and "withheld" not in plain
    assert "χ² = 80.1 for 84 degrees of freedom" in plain


def _full_results() -> dict:
    """A results dictionary with 25 limit points, the assumptions, a background-only fit
    and a per-requirement cut flow (as SearchResult.to_dict writes them)."""
    r = _results()
    m = np.linspace(113.87, 191.6, 25)
    exp = 5.8 * (113.87 / m) ** 2
    r["limits"] = {"masses": m.tolist(), "observed": (exp * 1.1).tolist(),
                   "expected": exp.tolist(), "expected_minus2": (exp * 0.52).tolist(),
                   "expected_minus1": (exp * 0.71).tolist(),
                   "expected_plus1": (exp * 1.42).tolist(),
                   "expected_plus2": (exp * 1.95).tolist(), "unit": "fb", "cl": 0.95,
                   "method": "auto",
                   "assumptions": {"luminosity": 10.0, "luminosity_uncertainty": 0.02,
                                   "efficiency": 0.55, "efficiency_uncertainty": 0.05,
                                   "constraint": "lognormal"}}
    r["limits"]["observed"][12] = 8.44  # the point that matters must not be skipped
    r["background_fit"] = {
        "valid": True, "background_shape": "powerlaw",
        "gof": {"chi2": 118.95, "ndf": 88, "p_value": 0.0156},
        "parameters": {"mass": {"value": 152.6, "error": 0.0, "fixed": True},
                       "power": {"value": 4.9927, "error": 0.2111, "fixed": False},
                       "background_yield": {"value": 980.0, "error": 31.3, "fixed": False}}}
    r["input"]["requirements"] = {"events read": 1000, "muon objects": 700,
                                  "muon: pt > 20": 500, "muon: abs(eta) < 2.4": 480,
                                  "events with at least 2 selected muon objects": 400}
    r["input"]["cutflow"] = {"events_in": 1000, "events_with_pair": 390, "candidates": 390}
    return r


def test_limit_method_is_named_in_words():
    """The limits' method reads as what it does (docs/config.md, ``limits.method``: auto =
    the asymptotic formulae, toys at the masses with few background events), in the report
    and the limit figure's header, not as the bare key "auto"."""
    from matplotlib.text import Text

    from peaksift.stats.limit_result import LimitResult

    r = _full_results()
    assert r["limits"]["method"] == "auto"
    md = render_markdown(r)
    assert "CLs upper limits (asymptotic, toys at low counts)" in md and "(auto)" not in md
    lim = LimitResult.from_dict(r["limits"])
    texts = [t.get_text() for t in lim.plot().findobj(Text)]
    assert any(t.startswith("CLs (asymptotic, toys at low counts)") for t in texts), texts
    assert "(auto)" not in repr(lim)


def test_report_has_every_limit_point_its_bands_and_the_assumptions(tmp_path):
    r = _full_results()
    lim = r["limits"]
    md = render_markdown(r)
    page = render_html(r)
    parser = _Collect()
    parser.feed(page)
    text = " ".join(parser.text)
    for doc in (md, text):
        # every point, formatted independently here with two decimals (the table's precision)
        for i, mass in enumerate(lim["masses"]):
            cells = [f"{mass:.2f}"] + [f"{lim[k][i]:.2f}" for k in (
                "observed", "expected", "expected_minus2", "expected_minus1",
                "expected_plus1", "expected_plus2")]
            if doc is md:
                assert "| " + " | ".join(cells) + " |" in md, cells
            else:
                assert all(c in text for c in cells)
        assert "8.44" in doc
        assert "L = 10 fb⁻¹ ± 2%" in doc and "ε = 0.55 ± 5%" in doc
        assert "log-normal" in doc
    # the table heads name the two bands on both sides
    assert "| −2σ | −1σ | +1σ | +2σ |" in md


def test_report_has_the_background_fit_and_each_requirement_in_order():
    r = _full_results()
    md = render_markdown(r)
    # one decimal, as the figures and the summary write a chi-square (_format.chi_square)
    assert "χ² = 119.0 for 88 degrees of freedom (p = 0.0156)" in md
    assert "| power | 4.99 ± 0.21 |" in md and "| background yield | 980 ± 31 |" in md
    assert "| mass |" not in md.split("## Background-only fit")[1].split("##")[0]
    steps = ["| events read | 1,000 |", "| muon objects | 700 |", "| muon: pt > 20 | 500 |",
             "| muon: abs(eta) < 2.4 | 480 |",
             "| events with at least 2 selected muon objects | 400 |"]
    at = [md.index(s) for s in steps]
    assert at == sorted(at)
    # the look-elsewhere numbers explained in plain words, beside the technical sentence
    assert "In plain words" in md and "somewhere in the scanned range" in md
    # N0 is a count of crossings, not of independent places; the trials factor is
    # p_global / p_local (Gross and Vitells, Eur. Phys. J. C 70 (2010) 525, eq. 1)
    best = {**r["best"], "N0": 5.2, "u0": 0.5, "log10_p_global": math.log10(0.0019),
            "log10_p_local": math.log10(4.8e-5), "p_global": 0.0019, "p_local": 4.8e-5}
    md = render_markdown({**r, "best": best})
    assert "independent places" not in md
    assert f"{0.0019 / 4.8e-5:.2g} times the local one" in md.replace("\n", " ")
