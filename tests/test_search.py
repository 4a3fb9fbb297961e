"""The whole search end to end on the committed demo data, checked against its truth file.

One search run (through the command line) serves most checks; it uses the committed demo
data and the demo config's modest toy count, so it takes seconds.
"""

from __future__ import annotations

import hashlib
import json
import math
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from peaksift.cli import main

REPO_DIR = Path(__file__).resolve().parents[1]
DEMO = REPO_DIR / "demo_data"
CONFIG = DEMO / "search.toml"
TRUTH = DEMO / "truth.json"

pytestmark = pytest.mark.skipif(not TRUTH.exists(), reason="demo data not generated")

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2
#: the demo config's [systematics] switched off, for tests that do not read them
NO_SYSTEMATICS = {"systematics__mass_scale": 0.0, "systematics__mass_resolution": 0.0,
                  "systematics__background_families": []}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    out = tmp_path_factory.mktemp("search") / "demo_out"
    import io
    from contextlib import redirect_stdout

    buf = io.StringIO()
    with redirect_stdout(buf):
        rc = main(["search", str(CONFIG), "--out", str(out), "--quiet"])
    assert rc == 0
    results = json.loads((out / "results.json").read_text())
    return {"out": out, "stdout": buf.getvalue(), "results": results,
            "truth": json.loads(TRUTH.read_text())}


def test_results_json_has_every_key_with_sane_types(run):
    r = run["results"]
    assert isinstance(r["peaksift_version"], str)
    assert isinstance(r["config"], dict) and r["config"]["spectrum"]["window"] == [110.0, 200.0]
    inp = r["input"]
    assert isinstance(inp["files"], list) and inp["files"]
    for k in ("events_read", "events_selected", "candidates"):
        assert isinstance(inp[k], int) and inp[k] > 0
    assert inp["events_read"] >= inp["events_selected"] >= 1
    assert isinstance(inp["cutflow"], dict) and all(isinstance(v, int)
                                                    for v in inp["cutflow"].values())
    fit = r["fit"]
    assert isinstance(fit["valid"], bool)
    for k in ("peak_mass", "width", "signal_yield", "background_yield"):
        assert isinstance(fit[k]["value"], float) and isinstance(fit[k]["error"], float)
        assert fit[k]["error"] >= 0
    assert set(fit["gof"]) >= {"chi2", "ndf", "p_value"}
    assert isinstance(fit["gof"]["ndf"], int) and 0 <= fit["gof"]["p_value"] <= 1
    scan = r["scan"]
    n = len(scan["masses"])
    assert n > 20
    for k in ("z_local", "p_local", "signal_yield"):
        assert len(scan[k]) == n and all(isinstance(x, float) for x in scan[k])
    assert scan["masses"] == sorted(scan["masses"])
    best = r["best"]
    for k in ("mass", "z_local", "p_local", "z_global", "p_global"):
        assert isinstance(best[k], float)
    assert isinstance(best["global_method"], str)
    lim = r["limits"]
    nl = len(lim["masses"])
    assert nl > 5
    for k in ("observed", "expected", "expected_minus2", "expected_minus1", "expected_plus1",
              "expected_plus2"):
        assert len(lim[k]) == nl and all(isinstance(x, float) and x > 0 for x in lim[k])
    # the expected bands are ordered (Cowan et al. 2011, sec. 4.3: median with +-1, +-2 sigma)
    for i in range(nl):
        assert (lim["expected_minus2"][i] <= lim["expected_minus1"][i] <= lim["expected"][i]
                <= lim["expected_plus1"][i] <= lim["expected_plus2"][i])
    assert isinstance(lim["unit"], str)
    assert isinstance(r["known_matches"], list)
    pv = r["provenance"]
    assert pv["inputs"] and all(len(f["sha256"]) == 64 for f in pv["inputs"])
    assert len(pv["config_sha256"]) == 64 and isinstance(pv["seed"], int)
    for k in ("python", "numpy", "scipy", "iminuit", "awkward", "pyarrow"):
        assert isinstance(pv["versions"][k], str)
    assert pv["started"] <= pv["finished"] and pv["finished"].endswith("Z")


def test_systematics_block_with_and_without(run):
    """The demo's [systematics]: the order test, the envelope, the pulls, and the best
    hypothesis with systematics (the search's ``best``) beside the plain one."""
    r = run["results"]
    sy = r["systematics"]
    for k in ("nuisances", "background_choice", "envelope", "with_systematics",
              "without_systematics", "nuisance_pulls", "limits", "notes"):
        assert k in sy, k
    assert r["best"] == sy["with_systematics"]
    assert sy["with_systematics"]["z_local"] != sy["without_systematics"]["z_local"]
    env = sy["envelope"]
    assert set(env["labels"]) == set(sy["background_choice"]["kept"])
    assert env["best"]["function"] in env["labels"]
    # the envelope's masses under the attribute's name, one per local Z
    assert "mass" not in env and len(env["masses"]) == len(env["z_local"])
    assert set(sy["nuisance_pulls"]) == {"mass_scale", "mass_resolution"}
    assert all(abs(v) < 5 for v in sy["nuisance_pulls"].values())
    lim = sy["limits"]  # side by side: the plain limits and those with systematics
    assert lim["without_systematics"]["masses"] == r["limits"]["masses"]
    assert lim["without_systematics"]["observed"] == r["limits"]["observed"]
    w = lim["with_systematics"]
    assert w["masses"] == r["limits"]["masses"] and w["functions"] == env["labels"]
    # the bands ordered (Cowan et al. 2011, sec. 4.3) and the limits positive
    for i in range(len(w["masses"])):
        assert 0 < w["expected_minus2"][i] <= w["expected"][i] <= w["expected_plus2"][i]
        assert w["observed"][i] > 0
    assert any("mass scale" in p for p in lim["profiled"])
    md = (run["out"] / "report.md").read_text()
    assert "## Background model" in md and "background_envelope.png" in md
    assert "observed, with systematics" in md and "expected, plain" in md


def test_calibration_figure_from_the_results_json(run):
    """The calibration fit is kept in results.json (``calibration.fit``) and read back: its
    peak mass is the calibration's fitted mass, and SearchResult.plot draws the calibration
    figure from it (fit panel and pulls, the pair's mass symbol on the mass axis, the
    fitted and tabulated masses marked)."""

    from matplotlib.figure import Figure

    from peaksift.fitting.result import FitResult
    from peaksift.search.result import SearchResult

    cal = run["results"]["calibration"]
    fr = FitResult.from_dict(cal["fit"])
    assert fr.peak_mass.value == cal["fitted_mass"]["value"]
    assert fr.peak_mass.error == cal["fitted_mass"]["error"]
    fig = SearchResult.from_dict(run["results"]).plot(which="calibration")
    assert isinstance(fig, Figure) and len(fig.axes) == 2
    top, pulls = fig.axes
    assert top.get_ylabel().startswith("candidates / ") and pulls.get_ylabel() == "pull"
    assert pulls.get_xlabel() == r"$m_{\mu\mu}$ [GeV]"
    names = top.get_legend_handles_labels()[1]
    assert "fitted mass" in names and "mass in the tables" in names


def test_envelope_of_results_json_loads_as_an_envelope_result(run):
    """The demo's results.json writes the envelope in EnvelopeResult's own format: from_dict
    reads it, writes the same keys back (the figure's ``profile`` aside) and equals its own
    round trip; its numbers agree with scipy: p_local = norm.sf(z_local) and z_local =
    sqrt(q0) (Cowan et al., EPJC 71 (2011) 1554, eq. 53; to 1e-9), and the summary reads
    the function chosen at the best mass from it."""
    from scipy import stats

    from peaksift.stats.envelope import EnvelopeResult

    stored = run["results"]["systematics"]["envelope"]
    env = EnvelopeResult.from_dict(stored)
    again = json.loads(json.dumps(env.to_dict()))
    assert again == {k: v for k, v in stored.items() if k != "profile"}
    assert EnvelopeResult.from_dict(again) == env
    ok = ~env.blinded
    assert np.allclose(env.p_local[ok], stats.norm.sf(env.z_local[ok]), rtol=1e-9, atol=0)
    assert np.allclose(env.z_local[ok], np.sqrt(env.q0[ok]), rtol=1e-9, atol=1e-12)
    assert env.best["function"] in env.labels and env.best["function"] in run["stdout"]


def test_results_json_with_the_earlier_envelope_layout_still_loads(run):
    """A results.json written before the envelope took EnvelopeResult's format (functions,
    chosen_at_best, spurious_weights, null_choice by label) loads, the envelope's keys
    renamed, so the report and the summary read one format."""
    from peaksift.search.result import SearchResult

    d = json.loads(json.dumps(run["results"]))
    env = d["systematics"]["envelope"]
    old = {k: v for k, v in env.items() if k not in ("labels", "spurious", "best")}
    old.update(functions=env["labels"], chosen_at_best=env["best"]["function"],
               spurious_weights=env["spurious"], null_choice=env["labels"][env["null_choice"]])
    d["systematics"]["envelope"] = old
    back = SearchResult.from_dict(d).systematics["envelope"]
    assert back["labels"] == env["labels"] and back["null_choice"] == env["null_choice"]
    assert back["best"]["function"] == env["best"]["function"]
    assert back["spurious"] == env["spurious"]


def test_demo_background_makes_the_function_choice_visible(run):
    """What the demo's continuum is built for (its shoulder near 145 GeV): the single power
    law of ``[model]`` and the envelope differ by at least half a sigma in local Z at the
    best mass, and the spurious-signal test (limit 0.2 of the statistical error, common
    practice) flags the power law at the best mass, where the envelope's Bernstein candidate
    spuriously fits less than half as much."""
    sy = run["results"]["systematics"]
    plain, with_sy = sy["without_systematics"], sy["with_systematics"]
    assert plain["z_local"] - with_sy["z_local"] >= 0.5
    sp = sy["spurious_signal"]
    assert sp["powersum1"]["flagged"] and sp["powersum1"]["ratio_at_best"] > 0.2
    bern = [f for f in sy["envelope"]["labels"] if f.startswith("bernstein")]
    assert bern and abs(sp[bern[0]]["ratio_at_best"]) < 0.5 * sp["powersum1"]["ratio_at_best"]
    assert "powersum1" in run["stdout"] and "spurious signal" in run["stdout"]


def test_candidate_count_matches_the_spectrum_file(run):
    from peaksift.histogram import MassHistogram

    h = MassHistogram.load(run["out"] / "spectrum.json")
    assert not h.is_weighted
    assert run["results"]["input"]["candidates"] == int(h.total())
    assert (h.lo, h.hi, h.nbins) == (110.0, 200.0, 90)


def test_provenance_hashes_match_the_files(run):
    pv = run["results"]["provenance"]
    for f in pv["inputs"]:
        assert hashlib.sha256(Path(f["path"]).read_bytes()).hexdigest() == f["sha256"]
    assert hashlib.sha256(CONFIG.read_bytes()).hexdigest() == pv["config_sha256"]


def test_finds_the_invented_resonance_near_its_true_mass(run):
    truth = run["truth"]["invented_resonance"]
    fit = run["results"]["fit"]
    assert fit["valid"]
    m, e = fit["peak_mass"]["value"], fit["peak_mass"]["error"]
    # within 2 sigma of the generator's truth (the demo's truth file)
    assert abs(m - truth["mass_gev"]) < 2.0 * e, (m, e, truth["mass_gev"])
    assert abs(run["results"]["best"]["mass"] - truth["mass_gev"]) < 3.0 * 1.98


def test_local_significance_in_the_expected_range(run):
    """Expected: the counting-experiment Asimov significance Z_A(s, b) (Cowan, Cranmer, Gross,
    Vitells 2011, eq. 97) in +-2 resolution widths around the true mass, with s from the truth
    file and b from the sidebands at 3-6 resolution widths on either side (a sideband
    estimate, common practice).  Poisson fluctuations of s and b move the observed Z by about
    one unit, so the accepted range is Z_A +- 2 (forgiving)."""
    from peaksift.histogram import MassHistogram

    truth = run["truth"]["invented_resonance"]
    h = MassHistogram.load(run["out"] / "spectrum.json")
    m0, sigma = truth["mass_gev"], 1.98  # resolution at 150 GeV from the demo config's table
    c = h.centers
    signal_region = np.abs(c - m0) < 2 * sigma
    sidebands = (np.abs(c - m0) > 3 * sigma) & (np.abs(c - m0) < 6 * sigma)
    b = float(h.weight_sum[sidebands].mean()) * int(signal_region.sum())
    s = 0.9 * truth["selected_in_search_window"]  # ~90% of the peak lies inside +-2 sigma
    z_a = math.sqrt(2.0 * ((s + b) * math.log1p(s / b) - s))
    z = run["results"]["best"]["z_local"]
    assert z_a - 2.0 < z < z_a + 2.0, (z, z_a, s, b)


def test_global_not_above_local(run):
    best = run["results"]["best"]
    assert best["z_global"] <= best["z_local"] + 1e-9
    assert best["p_global"] >= best["p_local"]


def test_calibration_peak_where_the_tables_put_it(run):
    from particle import Particle

    cal = run["results"]["calibration"]
    m_z = Particle.from_pdgid(23).mass / 1000.0  # particle package (PDG tables)
    assert cal["particle"] == "Z0" and cal["table_mass"] == pytest.approx(m_z)
    # the fitted peak sits within 0.5% of the tables: the demo detector's radiative losses
    # shift reconstructed masses by a few per mille, which the check is there to show
    assert abs(cal["fitted_mass"]["value"] - m_z) / m_z < 5e-3
    assert cal["valid"]
    # and the known-particle matching names it (particle package: Z0, PDG id 23)
    assert cal["known_matches"][0]["name"] == "Z0"
    assert cal["known_matches"][0]["pdgid"] == 23


def test_no_known_particle_at_the_invented_mass(run):
    # particle package: no neutral state lies near 152 GeV
    assert run["results"]["known_matches"] == []
    assert "none match" in run["stdout"]


def test_summary_printed(run):
    out = run["stdout"]
    for label in ("best mass hypothesis", "fitted mass", "fitted width", "signal yield",
                  "local significance", "global significance", "outputs"):
        assert label in out
    assert str(run["out"]) in out


def test_summary_quotes_the_plain_limit_without_systematics(run):
    """A run without [systematics] still has a limit line: the plain limit at the limit
    mass nearest the best mass, as results.json ``limits`` holds it (two decimals)."""
    from peaksift.cli._summary import _summary_text

    d = {k: v for k, v in run["results"].items() if k != "systematics"}
    lim = d["limits"]
    i = int(np.argmin(np.abs(np.asarray(lim["masses"]) - d["best"]["mass"])))
    line = next(ln for ln in _summary_text(d).splitlines() if "limit at" in ln)
    assert f"limit at {lim['masses'][i]:.2f} GeV" in line
    assert (f"{lim['observed'][i]:.2f} observed, {lim['expected'][i]:.2f} expected "
            f"{lim['unit']}") in line


def test_outputs_name_the_fit_of_each_model(run):
    """Which fit a model and a number come from: the summary, report.html's Result table,
    results.json ``models`` and the spectrum figure's box name the scan's model ("scan:
    ...", with the envelope of [systematics] its significances profile) and the free fit's
    ("free fit: ..."), built from search.toml read here with tomllib: the scan's signal is
    a Gaussian of the resolution's width (``scan.signal`` empty and no natural width: the
    documented default, docs/config.md), the free fit's ``model.signal``; both take
    ``model.background``; the envelope holds one order of each configured family."""
    import tomllib
    from matplotlib.text import Text

    from peaksift.search import SearchResult

    cfg = tomllib.loads(CONFIG.read_text())
    bkg = cfg["model"]["background"]
    env = run["results"]["models"]["scan"]["envelope"]
    families = cfg["systematics"]["background_families"]
    assert len(env) == len(families)
    assert all(e.startswith(f) for e, f in zip(env, families))
    scan = (f"scan: gaussian + {bkg}; with systematics gaussian + the envelope of "
            f"{', '.join(env)} (best mass, significances, limits)")
    free = f"free fit: {cfg['model']['signal']} + {bkg}"
    lines = [ln.split(None, 1) for ln in run["stdout"].splitlines()]
    assert ["model", scan] in lines
    assert ["model", f"{free} (fitted mass, width and yields)"] in lines
    html = (run["out"] / "report.html").read_text()
    result = html[html.index("<h2>Result</h2>"):]
    result = result[:result.index("</table>")]
    assert f"<td>Model</td><td>{scan}</td>" in result
    assert f"<td>Model</td><td>{free} (fitted mass, width and yields)</td>" in result
    gof = run["results"]["fit"]["gof"]  # the free fit's, as its figure box quotes it
    assert (f"<td>Goodness of fit (free fit)</td><td>\u03c7\u00b2 = {gof['chi2']:.1f} for "
            f"{gof['ndf']} degrees of freedom (p = {gof['p_value']:.4f})</td>") in result
    assert "<td>Valid (free fit)</td><td>yes</td>" in result
    models = run["results"]["models"]
    assert models["free_fit"] == {"fit": "free fit", "signal": [cfg["model"]["signal"]],
                                  "background": bkg}
    assert (models["scan"]["fit"], models["scan"]["background"]) == ("scan", bkg)
    fig = SearchResult.from_dict(run["results"]).plot(which="spectrum")
    texts = "\n".join(t.get_text() for t in fig.findobj(Text))
    assert free in texts.replace(":\n", ": ")


def test_notebook_repr_quotes_the_free_fit_as_the_summary_does(run):
    """SearchResult's repr and notebook table name the free fit and quote its mass and
    yield with their profile-likelihood intervals, as the summary, the report and the
    figure do (they said 152.8 ± 1.6 beside the summary's 152.8 +1.5 -1.7); the interval
    rounded here to two significant digits of the smaller error (common practice)."""
    import math

    from peaksift.search import SearchResult

    res = SearchResult.from_dict(run["results"])
    fit = run["results"]["fit"]
    for key, par, unit in (("peak_mass", "mass", " GeV"), ("signal_yield", "signal_yield", "")):
        lo, hi = fit["intervals"][par]
        dec = max(0, 1 - math.floor(math.log10(min(-lo, hi))))
        v = fit[key]["value"]
        want = f"{v:,.{dec}f} +{hi:.{dec}f} -{-lo:.{dec}f}{unit}"
        label = "free fit mass" if key == "peak_mass" else "free fit signal yield"
        assert f"{label} {want};" in repr(res)
        assert f"<td>{label}</td><td>{want}</td>" in res._repr_html_()
    line = next(ln for ln in run["stdout"].splitlines() if ln.strip().startswith("fitted mass"))
    assert line.split(None, 2)[2] in repr(res)
    # the scan's best mass with the summary's two decimals (it read 152.6 beside 152.62)
    best = run["results"]["scan"]["best"]["mass"]
    assert f"best {best:.2f} GeV: Z_local" in repr(res.scan)
    # the significances qualified as the summary's, and every warning it prints there too
    assert "with systematics" in repr(res) and "with systematics" in run["stdout"]
    for w in run["results"]["warnings"]:
        if w["topic"] != "fit":
            assert f"WARNING: {w['message']}" in run["stdout"] and w["message"] in repr(res)


def test_notebook_repr_flags_an_invalid_free_fit(run):
    """An invalid free fit's mass and yield in SearchResult's repr and notebook table carry
    '(NOT valid)' and its problems, as the report's tables ('fit NOT valid', 'Valid (free
    fit) | NO: ...') and the summary's warning flag them (rule: no silently wrong number);
    the combined demo's dielectron fit, its mass at the window's edge, read '110 ± 81 GeV'
    there with nothing beside it.  A valid fit's rows carry no flag."""
    import copy

    from peaksift.search import SearchResult

    good = SearchResult.from_dict(run["results"])
    assert "NOT valid" not in repr(good) and "NOT valid" not in good._repr_html_()
    d = copy.deepcopy(run["results"])
    d["fit"]["valid"] = False
    d["fit"]["problems"] = ["mass at a bound (110)"]
    bad = SearchResult.from_dict(d)
    text, page = repr(bad), bad._repr_html_()
    for label in ("free fit mass", "free fit signal yield"):
        row = next(x for x in text.split("; ") if x.startswith(label + " "))
        assert row.endswith(" (NOT valid)")
        assert f"<td>{label}</td><td>{row[len(label) + 1:]}</td>" in page
    assert "free fit valid NO: mass at a bound (110)" in text
    assert "<td>free fit valid</td><td>NO: mass at a bound (110)</td>" in page


def test_readme_summary_is_this_run(run):
    """The README prints the demo's summary; it must be what the demo search prints, line
    for line (only the output folder differs), so a change of the demo's numbers updates it."""
    readme = (REPO_DIR / "README.md").read_text()
    start = readme.index("```\npeaksift search: summary\n") + 4
    block = readme[start:readme.index("```", start)].splitlines()
    out = run["stdout"]
    printed = out[out.index("peaksift search: summary"):].splitlines()
    printed = [ln.replace(str(run["out"]), "/path/to/demo_out") for ln in printed]
    assert block == printed[:len(block)] and len(printed) == len(block)


def test_profile_likelihood_intervals_by_default(run, demo_nll):
    """The free fit's mass, width and yield intervals (MINOS-type) in results.json, the
    summary and the report; the mass interval's ends are where the profile likelihood of the
    NLL written in the tests (conftest ``demo_nll``) rises by 1/2 (Wilks 1938: 68.3 % for one
    parameter), to 0.02 in -2 ln L."""
    import re

    from iminuit import Minuit

    fit = run["results"]["fit"]
    iv = fit["intervals"]
    assert set(iv) == {"mass", "sigma", "signal_yield"}
    assert all(lo < 0 < hi for lo, hi in iv.values())
    assert fit["settings"]["intervals"] == ["mass", "sigma", "signal_yield"]
    assert fit["settings"]["start"]["mass"] == run["results"]["best"]["mass"]
    nll = demo_nll(fit)
    values = {k: p["value"] for k, p in fit["parameters"].items()}
    for side in iv["mass"]:
        mi = Minuit(nll, **{**values, "mass": values["mass"] + side})
        mi.errordef = 0.5
        mi.fixed["mass"] = True
        mi.limits["sigma"] = (1e-3, None)
        mi.migrad()
        assert 2.0 * (mi.fval - fit["nll"]) == pytest.approx(1.0, abs=0.02)
    line = next(ln for ln in run["stdout"].splitlines() if ln.strip().startswith("fitted mass"))
    assert re.search(r"\d+\.\d+ \+\d+\.\d+ -\d+\.\d+ GeV$", line), line
    report = (run["out"] / "report.md").read_text()
    assert "(profile-likelihood interval)" in report


class _Images(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.srcs: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.srcs.append(dict(attrs).get("src", ""))

    def handle_data(self, data):
        self.text.append(data)


def test_every_figure_is_a_valid_png_and_only_the_asked_formats(run):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.image as mpimg

    figs = sorted((run["out"] / "figures").glob("*.png"))
    names = {p.stem for p in figs}
    assert {"spectrum", "pvalue_scan", "limits", "candidates", "calibration"} <= names
    for p in figs:
        raw = p.read_bytes()
        assert raw[:8] == PNG_SIGNATURE
        img = mpimg.imread(p)
        assert img.ndim == 3 and img.shape[0] > 200 and img.shape[1] > 300
        assert float(np.std(img)) > 0.01  # not a blank canvas
    # the demo asks for PNG only (output.formats; PDF is opt-in: a third more drawing time)
    assert not list((run["out"] / "figures").glob("*.pdf"))


def test_html_report_parses_and_embeds_every_figure(run):
    import base64

    page = (run["out"] / "report.html").read_text()
    parser = _Images()
    parser.feed(page)
    parser.close()
    embedded = [base64.b64decode(s.split(",", 1)[1]) for s in parser.srcs
                if s.startswith("data:image/png;base64,")]
    assert len(embedded) == len(parser.srcs), "every image is a data URI (self-contained)"
    for p in (run["out"] / "figures").glob("*.png"):
        assert p.read_bytes() in embedded, f"{p.name} not embedded"
    text = " ".join(parser.text)
    assert "A local significance is not a discovery" in text
    assert "statistical procedures" in text
    assert "look-elsewhere effect is included" in text
    md = (run["out"] / "report.md").read_text()
    assert "figures/spectrum.png" in md and "## Provenance" in md


def test_no_staging_directories_left(run):
    parent = run["out"].parent
    assert [p.name for p in parent.iterdir()] == ["demo_out"]


def _overlapping_bins(edges, lo, hi):
    """Bins sharing any mass with [lo, hi]: a partly covered bin is hidden too (common
    practice for blinding: no bin that holds blinded events is shown)."""
    e = np.asarray(edges)
    return (e[:-1] < hi) & (e[1:] > lo)


def test_blinded_run_hides_the_window_until_unblinded(tmp_path):
    from peaksift.config import load_config
    from peaksift.errors import ConfigError
    from peaksift.histogram import MassHistogram
    from peaksift.search import run_search

    b0, b1 = 140.5, 165.0  # starts mid-bin: the bin [140, 141) holds blinded events
    # without [systematics] and PDFs: nothing below reads them (the blinded demo with
    # systematics: tests/test_limit_doubts.py)
    cfg = load_config(CONFIG).with_overrides(blinding__enabled=True,
                                             blinding__window=[b0, b1],
                                             limits__enabled=False, calibration__particle="",
                                             significance__toys=20, output__log_scale=True,
                                             output__formats=["png"], **NO_SYSTEMATICS)
    res = run_search(cfg, out=tmp_path / "blind")
    out = tmp_path / "blind"
    d = json.loads((out / "results.json").read_text())
    assert d == json.loads(json.dumps(d))  # plain JSON
    scan = d["scan"]
    inside = [i for i, m in enumerate(scan["masses"]) if b0 <= m <= b1]
    assert inside and all(scan["z_local"][i] is None for i in inside)
    assert all(scan["z_local"][i] is not None for i in range(len(scan["masses"]))
               if i not in inside)
    assert d["fit"]["peak_mass"]["value"] is None and d["blinding"]["active"]
    assert not (b0 <= d["best"]["mass"] <= b1)
    assert res.fit is None
    figs = out / "figures"
    assert (figs / "spectrum.png").exists() and (figs / "spectrum_log.png").exists()
    # the pT/rapidity histograms include the blinded window: no such figure, and the
    # report says it is withheld
    assert not list(figs.glob("candidates.*"))
    md = (out / "report.md").read_text()
    assert "blinded" in md.lower() and "withheld while the run is blinded" in md
    # no signal-plus-background fit: the goodness of fit shown is the sideband fit's, with
    # one decimal as every chi-square (it read 81.97 here, 82.0 in the summary)
    bf = d["background_fit"]
    assert bf["kind"] == "sideband_fit" and "for None degrees of freedom" not in md
    assert (f"| Goodness of fit (background fit on the sidebands only) | "
            f"χ² = {bf['gof_chi2']:.1f} for {bf['gof_ndf']} degrees of freedom") in md

    # spectrum.json: every bin overlapping the window is empty, and the file says why
    h = MassHistogram.load(out / "spectrum.json")
    hidden = _overlapping_bins(h.edges, b0, b1)
    assert hidden.sum() == 25 and hidden[30]  # 140-165 GeV in 1 GeV bins, [140, 141) too
    assert np.all(h.weight_sum[hidden] == 0) and np.all(h.weight_sq_sum[hidden] == 0)
    raw = json.loads((out / "spectrum.json").read_text())
    assert raw["blinded"]["window"] == [b0, b1]
    assert raw["blinded"]["hidden_range"] == [140.0, 165.0]

    # --unblind lifts it for one run: numbers inside the window, the peak found again
    unres = run_search(cfg, out=False, unblind=True)
    un = unres.to_dict()
    assert un["blinding"]["unblinded"] and not un["blinding"]["active"]
    assert all(un["scan"]["z_local"][i] is not None for i in inside)
    assert 140.0 <= un["best"]["mass"] <= 165.0
    assert un["fit"]["valid"]

    # the counts are the sidebands': the full spectrum minus the hidden bins
    full = unres.histogram
    assert np.array_equal(full.weight_sum[~hidden], h.weight_sum[~hidden])
    n_hidden = int(full.weight_sum[hidden].sum())
    assert n_hidden > 0
    assert d["input"]["candidates"] == int(full.weight_sum[~hidden].sum()) == int(h.total())
    assert d["input"]["candidates"] == un["input"]["candidates"] - n_hidden
    assert d["input"]["sum_of_weights"] == pytest.approx(h.total())
    assert f"{d['input']['candidates']:,}" in md

    # a calibration window reaching into the hidden bins is refused before any reading
    with pytest.raises(ConfigError) as info:
        cfg.with_overrides(calibration__particle="Z0", calibration__window=[70.0, 140.3])
    msg = str(info.value)
    assert "calibration.window" in msg and "blinding.window" in msg and "\n" not in msg
    assert "140" in msg  # says where the calibration window has to end


def test_toys_run_on_the_configured_engine_with_the_same_result(monkeypatch):
    """significance.method = "toys" and limits.method = "toys" on engine "processes": the
    toy batches and the toy limits go through execution.map_tasks with that engine, and the
    global significance and the limits equal the serial run's (reference: the serial
    engine; toys seeded one by one or per mass, common practice)."""
    from peaksift import execution
    from peaksift.config import load_config
    from peaksift.search import run_search

    base = load_config(CONFIG).with_overrides(limits__method="toys", limits__toys=40,
                                              limits__points=5, limits__toy_masses=[130.0, 152.0],
                                              calibration__particle="",
                                              significance__method="toys",
                                              significance__toys=30)
    serial_run = run_search(base, out=False)
    serial = serial_run.to_dict()["best"]
    engines = []
    real = execution.map_tasks

    def spy(func, specs, **kw):
        engines.append((getattr(func, "__name__", ""), kw.get("engine"), kw.get("workers")))
        return real(func, specs, **kw)

    monkeypatch.setattr(execution, "map_tasks", spy)
    pool_run = run_search(base.with_overrides(execution__engine="processes",
                                              execution__workers=2), out=False)
    pool = pool_run.to_dict()["best"]
    assert ("run_toy_batch", "processes", 2) in engines
    assert ("run_toy_limit", "processes", 2) in engines  # the toy limits too
    assert serial_run.limits.methods.count("toys") == 2  # at limits.toy_masses
    lm = serial_run.limits.masses
    toy_at = lm[np.array(serial_run.limits.methods) == "toys"]
    np.testing.assert_array_equal(toy_at, [lm[np.argmin(np.abs(lm - m))] for m in (130, 152)])
    np.testing.assert_allclose(pool_run.limits.observed, serial_run.limits.observed,
                               rtol=1e-9)
    np.testing.assert_allclose(pool_run.limits.expected, serial_run.limits.expected,
                               rtol=1e-9)
    assert pool["n_toys"] == serial["n_toys"] == 30
    assert pool["n_toys_above"] == serial["n_toys_above"]
    for key in ("mass", "z_local", "p_local", "p_global", "z_global"):
        assert pool[key] == pytest.approx(serial[key], rel=1e-12, abs=1e-12), key


def test_toy_mass_outside_the_limit_scan_is_a_config_error():
    """A toy mass inside the window but outside the scanned masses (3 resolution sigma
    inside by default) names its key instead of moving to the edge point silently."""
    from peaksift.config import load_config
    from peaksift.errors import ConfigError
    from peaksift.search import run_search

    cfg = load_config(CONFIG).with_overrides(limits__method="toys", limits__toys=20,
                                             limits__toy_masses=(110.5,),
                                             calibration__particle="", significance__toys=20,
                                             **NO_SYSTEMATICS)  # the scan's masses only
    with pytest.raises(ConfigError, match=r"limits\.toy_masses\[0\] = 110\.5 lies outside "
                                          r"the limit scan"):
        run_search(cfg, out=False)


def test_spectrum_figure_hides_the_bins_the_statistics_leave_out(monkeypatch, tmp_path):
    """The figure hides exactly the bins that overlap the blinded range (as the scan does),
    including a bin whose centre lies on the range's edge."""
    from peaksift import plotting
    from peaksift.histogram import MassHistogram
    from peaksift.plotting import spectrum

    h = MassHistogram(bins=90, range=(110.0, 200.0))
    h.fill(np.repeat(h.centers, 3))
    drawn = []

    def keep(fig, outdir, name, formats=("png",)):
        for line in fig.axes[0].lines:
            x, y = np.asarray(line.get_xdata(), float), np.asarray(line.get_ydata(), float)
            if x.size == h.nbins:
                drawn.append((x, y))
        return tmp_path / f"{name}.png"

    monkeypatch.setattr(spectrum, "save", keep)
    plotting.spectrum_only(h, tmp_path, blind=(140.5, 165.0))
    assert drawn
    x, y = drawn[0]
    assert np.allclose(x, h.centers)
    hidden = _overlapping_bins(h.edges, 140.5, 165.0)
    assert np.all(np.isnan(y[hidden])) and np.all(y[~hidden] == 3)
