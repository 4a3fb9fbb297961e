"""The signal model and the combination in the search: the [signal_model] and [combination]
configs on the demo (demo_data/dimuon.toml, dielectron.toml, combined.toml).  Expected
values: the generator's own truth (demo_data/signal/truth.json and an extra sample generated
here), scipy.stats.beta for Clopper-Pearson, and the one-channel search itself for the
"same numbers" check."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pytest
from scipy import stats

from peaksift import shapes, simulate
from peaksift.config import load_config
from peaksift.errors import ConfigError
from peaksift.search import run_search
from peaksift.search.combination import run_combination
from peaksift.search.signal import search_signal_model
from peaksift.stats.signal_model import SignalModel


@pytest.fixture(scope="module")
def dimuon(demo_dir):
    cfg = load_config(demo_dir / "dimuon.toml")
    return cfg, search_signal_model(cfg)


def _count_selected(cfg, path) -> int:
    from peaksift.histogram import in_range
    from peaksift.search.common import _collect

    one = dataclasses.replace(cfg, input=dataclasses.replace(cfg.input, files=(str(path),)),
                              calibration=dataclasses.replace(cfg.calibration, particle=""))
    col, _, _ = _collect(one, progress=False)
    return int(np.sum(in_range(np.asarray(col.window_mass), *cfg.spectrum.window)))


def test_demo_model_against_the_generator_and_an_extra_sample(dimuon, demo_dir, tmp_path):
    """At 146.25 GeV, between the samples: an extra sample generated there and counted
    through the same selection gives the efficiency, with its Clopper-Pearson 68% interval
    (scipy.stats.beta.ppf; Clopper and Pearson 1934); the interpolated efficiency agrees
    within 3 combined errors (band and interval half-width).  The interpolated peak's FWHM
    over 2.3548 agrees with the generator's FWHM-equivalent width of reconstructed minus
    true mass within 12% (a Crystal Ball core against a histogram's FWHM; the generator's
    truth is the outside reference).  At every sample mass the efficiency is within 3
    errors of the generator's count in truth.json."""
    cfg, sm = dimuon
    assert sm.shape == "crystalball" and not any("not valid" in n for n in sm.notes)
    m = 146.25
    table, truth = simulate.generate_signal_sample(m, "muon", 10_000, seed=31)
    path = tmp_path / "extra.parquet"
    import pyarrow.parquet as pq

    pq.write_table(table, path)
    k, n = _count_selected(cfg, path), 10_000
    lo = stats.beta.ppf(0.158655, k, n - k + 1)
    hi = stats.beta.ppf(0.841345, k + 1, n - k)
    assert abs(sm.efficiency(m) - k / n) < 3 * np.hypot(sm.band("efficiency", m),
                                                        0.5 * (hi - lo))
    shape = shapes.get("crystalball")
    p = sm.parameters_at(m)
    fwhm = shape.fwhm([p[q] for q in shape.parameter_names])
    assert fwhm / 2.3548 == pytest.approx(truth["resolution_fwhm_gev"], rel=0.12)
    rec = json.loads((demo_dir / "signal" / "truth.json").read_text())
    for s in rec["samples"]:
        if s["lepton"] != "muon":
            continue
        j = int(np.argmin(np.abs(sm.sample_masses - s["mass_gev"])))
        e = sm.points["efficiency"]["value"][j]
        assert abs(e - s["efficiency"]) < 3 * s["efficiency_error"]


def test_saved_model_is_reused_without_samples(dimuon, tmp_path):
    cfg, sm = dimuon
    res = tmp_path / "results.json"
    res.write_text(json.dumps({"signal_model": sm.to_dict()}))
    again = search_signal_model(dataclasses.replace(
        cfg, signal_model=dataclasses.replace(cfg.signal_model, files=(), saved=str(res))))
    assert isinstance(again, SignalModel) and again == sm


def test_signal_model_config_is_checked(demo_dir):
    raw = {"input": {"files": ["x.parquet"]}, "spectrum": {"window": [110.0, 200.0]},
           "model": {"resolution": {"relative": 0.01}}}
    with pytest.raises(ConfigError, match="one generated mass and one number"):
        load_config({**raw, "signal_model": {"files": ["a.parquet", "b.parquet"],
                                             "masses": [120.0], "generated": [1.0, 2.0]}})
    with pytest.raises(ConfigError, match="not both"):
        load_config({**raw, "signal_model": {"files": ["a.parquet"], "masses": [120.0],
                                             "generated": [1.0], "saved": "r.json"}})
    with pytest.raises(ConfigError, match="not a signal shape"):
        load_config({**raw, "signal_model": {"files": ["a.parquet"], "masses": [120.0],
                                             "generated": [1.0], "shape": "exponential"}})


def test_one_channel_through_the_combination_is_the_demo_search(demo_dir):
    """The demo search through the combination's path: its channel is the search itself
    (every results.json number equal) and the combined scan is its scan to the last digit."""
    alone = run_search(demo_dir / "search.toml", out=False, toys=20)
    # [combination.limits] is the combination's own: its limits off, its channel's kept
    comb = run_combination({"combination": {"channels": [str(demo_dir / "search.toml")],
                                            "names": ["dimuon"],
                                            "limits": {"enabled": False}}}, out=False, toys=20)
    a = alone.to_dict()
    c = comb.channels["dimuon"].to_dict()
    for key in ("scan", "best", "fit", "limits", "calibration"):
        assert c[key] == a[key], key
    assert np.array_equal(comb.combination.q0, alone.scan.q0, equal_nan=True)
    # the demo has [systematics]; a one-channel combination is its plain scan and says so,
    # so its global significance is the search's without systematics
    assert comb.best["z_global"] == a["systematics"]["without_systematics"]["z_global"]
    assert any("[systematics]" in n for n in comb.to_dict()["notes"])
    assert comb.limits is None and a["limits"]


def test_combination_config_is_checked(demo_dir, tmp_path):
    with pytest.raises(ConfigError, match="combination.channels must list"):
        run_combination({"combination": {"channels": []}}, out=False)
    with pytest.raises(ConfigError, match="unknown section"):
        run_combination({"combination": {"channels": ["a.toml"]}, "scan": {}}, out=False)
    text = (demo_dir / "search.toml").read_text().replace("luminosity = 10.0", "")
    text = text.replace("luminosity_uncertainty = 0.02\n", "").replace(
        "efficiency_uncertainty = 0.05\n", "")
    text = text.replace('files = ["events_*.parquet"]',
                        f'files = ["{demo_dir}/events_*.parquet"]').replace(
        '"background_template.json"', f'"{demo_dir}/background_template.json"')
    (tmp_path / "c.toml").write_text(text)
    with pytest.raises(ConfigError, match="needs limits.luminosity"):
        run_combination({"combination": {"channels": [str(tmp_path / "c.toml")]}}, out=False)


@pytest.fixture(scope="module")
def combined(demo_dir, tmp_path_factory):
    """The demo combination, run once: its result and its output directory."""
    out = tmp_path_factory.mktemp("combined") / "out"
    return run_combination(demo_dir / "combined.toml", out=out, toys=20), out


@pytest.mark.slow
def test_combined_demo_writes_its_report_with_every_channel(combined):
    """The demo combination (dimuon + dielectron, one shared luminosity): results.json holds
    the combined scan with its normalisation nuisances (one luminosity, one efficiency per
    channel: the config's 2% and 5%, as ln(1 + d), the log-normal scale), the combined
    limits with their method per mass; report.html embeds the combined p-value figure and
    one spectrum per channel, carries one table per channel and the caution (a local
    significance is not a discovery); no figure is left open in pyplot."""
    import math

    res, out = combined
    d = json.loads((out / "results.json").read_text())
    nuis = d["nuisances_at_best"]
    assert set(nuis) == {"luminosity_shared", "efficiency_dimuon", "efficiency_dielectron"}
    assert nuis["luminosity_shared"]["log_scale"] == pytest.approx([math.log1p(0.02)] * 2)
    assert nuis["efficiency_dimuon"]["log_scale"] == pytest.approx([math.log1p(0.05), 0.0])
    lim = d["limits"]
    assert len(lim["methods"]) == len(lim["masses"]) and lim["nuisances"]
    html = (out / "report.html").read_text()
    assert "A local significance is not a discovery" in html
    assert "Channel dimuon" in html and "Channel dielectron" in html
    assert html.count("data:image/png;base64") >= 5   # combined + 2 x (spectrum, p-values)
    for key in ("pvalue_combined", "dimuon/spectrum", "dielectron/spectrum"):
        assert (out / res.to_dict()["outputs"]["figures"][key]).is_file()
    import sys

    if "matplotlib.pyplot" in sys.modules:
        assert not sys.modules["matplotlib.pyplot"].get_fignums()


@pytest.mark.slow
def test_combined_outputs_name_the_fit_of_each_model_and_number(combined, demo_dir):
    """Which fit a model and a number come from, in every output of the demo combination:
    each channel's scan takes its signal shape from [signal_model] and the free fit from
    [model] (read here from the channel's own TOML file), and the report's channel table,
    the command-line summary, results.json ``models`` and the spectrum figure's box name
    them "scan: ..." and "free fit: ..." -- never a bare "crystalball / powerlaw" beside the
    free fit's numbers.  The free fit's mass is quoted as the figure's box quotes it: its
    profile-likelihood interval where the fit has one, rounded to two significant digits of
    the smaller error (common practice), else value ± error."""
    import math
    import re

    import tomllib
    from matplotlib.text import Text

    from peaksift.search.combination_report import combination_summary_text

    res, out = combined
    comb = tomllib.loads((demo_dir / "combined.toml").read_text())["combination"]
    d = json.loads((out / "results.json").read_text())
    html = (out / "report.html").read_text()
    summary = combination_summary_text(d).splitlines()
    assert " / powerlaw" not in html
    for name, path in zip(comb["names"], comb["channels"]):
        cfg = tomllib.loads((demo_dir / path).read_text())
        bkg = cfg["model"]["background"]
        scan = f"scan: {cfg['signal_model']['shape']} + {bkg}"
        free = f"free fit: {cfg['model']['signal']} + {bkg}"
        table = html[html.index(f"<h3>Channel {name}</h3>"):]
        table = table[:table.index("</table>")]
        assert f"<td>model</td><td>{scan} (best mass, significances, limits)</td>" in table
        assert f"<td>model</td><td>{free} (fitted mass, width and yields)</td>" in table
        assert any(ln.split()[0] == name and ln.endswith(f"({scan})") for ln in summary)
        assert f"Channel {name}: mass spectrum with the free fit." in html
        models = d["channels"][name]["models"]
        assert (models["scan"]["fit"], models["scan"]["signal"]) == ("scan",
                                                                     cfg["signal_model"]["shape"])
        assert (models["free_fit"]["fit"], models["free_fit"]["signal"]) == (
            "free fit", [cfg["model"]["signal"]])
        assert models["scan"]["background"] == models["free_fit"]["background"] == bkg
        fig = res.channels[name].plot(which="spectrum")
        texts = [t.get_text() for t in fig.findobj(Text)]
        # the box's title: one line, or broken after the fit's name where it would cover data
        assert free in "\n".join(texts).replace(":\n", ": "), texts
        fit = d["channels"][name]["fit"]
        value = fit["peak_mass"]["value"]
        iv = (fit.get("intervals") or {}).get("mass")
        if iv:
            dec = 1 - math.floor(math.log10(min(-iv[0], iv[1])))
            want = f"{value:.{dec}f} +{iv[1]:.{dec}f} -{-iv[0]:.{dec}f}"
        else:
            err = fit["peak_mass"]["error"]
            dec = max(0, 1 - math.floor(math.log10(err)))
            want = f"{value:.{dec}f} ± {err:.{dec}f}"
        assert f"<td>fitted peak mass [GeV]</td><td>{want}</td>" in table
        row = re.search(rf"<tr><td>{name}</td>(.*?)</tr>", html).group(1)
        assert f"<td>{want}" in row
        # the expected-limits cell is a range over the masses, and its header says so
        exp = d["channels"][name]["limits"]["expected"]
        assert f"<td>{min(exp):.2f}-{max(exp):.2f} fb</td>" in row
        assert "<th>expected limits (lowest-highest)</th>" in html
        value_cell, error_cell = want.split(" ", 1)  # the box's value and error columns
        assert value_cell in texts and error_cell in texts, (want, texts)


@pytest.mark.slow
def test_combined_report_and_summary_carry_every_channel_warning(combined):
    """A channel's doubt reaches the combination's readers: the dielectron free fit of the
    demo ends at the window's edge (mass at its bound 110 GeV, results.json ``fit.valid``
    false), and its warning heads report.html and prints in the summary, named by its
    channel (the combination printed nothing of it)."""
    from peaksift.search.combination_report import combination_summary_text

    _, out = combined
    d = json.loads((out / "results.json").read_text())
    fit = d["channels"]["dielectron"]["fit"]
    assert not fit["valid"] and fit["peak_mass"]["value"] == pytest.approx(110.0, abs=0.5)
    html = (out / "report.html").read_text()
    summary = combination_summary_text(d)
    assert html.index("<h2>Warnings</h2>") < html.index("<h2>Combination</h2>")
    for name, r in d["channels"].items():
        for w in r["warnings"]:
            assert f"<li>Warning: {name}: {w['message']}</li>" in html.replace("&#x27;", "'")
            if w["topic"] != "signal_model":  # those have their own summary line
                assert f"  WARNING: {name}: {w['message']}" in summary
    assert any(w["topic"] == "fit" for w in d["channels"]["dielectron"]["warnings"])
    # results.json's own top-level warnings hold them too (a reader of the file alone), and
    # the report is headed by the run label, as a search's (the config's [run] name)
    assert {(w["topic"], w["message"]) for w in d["warnings"]} >= {
        (w["topic"], f"{n}: {w['message']}") for n, r in d["channels"].items()
        for w in r["warnings"]}
    run = d["channels"]["dimuon"]["config"]["run"]["name"]
    md = (out / "report.md").read_text()
    assert md.splitlines()[2].startswith(run)


@pytest.mark.slow
def test_combined_report_shows_every_figure_it_wrote(combined):
    """Every figure the combination writes (results.json ``outputs.figures``: the channels'
    limits, candidates, calibration and signal model too, not only their spectra and
    p-values) is in report.html, with a caption in words, and in report.md."""
    import re

    _, out = combined
    d = json.loads((out / "results.json").read_text())
    figures = d["outputs"]["figures"]
    assert {"limits_combined", "dimuon/limits", "dimuon/calibration",
            "dielectron/signal_model_shapes"} <= set(figures)
    html = (out / "report.html").read_text()
    shown = re.findall(r'<img alt="([^"]+)" src="data:image/png;base64,', html)
    assert sorted(shown) == sorted(figures)
    captions = re.findall(r"<figcaption>([^<]*)</figcaption>", html)
    assert all(" " in c and not c.endswith(("_parameters", "_shapes")) for c in captions)
    md = (out / "report.md").read_text()
    assert all(f"]({path})" in md for path in figures.values())


@pytest.mark.slow
def test_combined_limits_figure_says_everything_inside_itself(combined):
    """The combined limits figure's header (method, channels, profiled nuisances) stays
    inside the figure: its list of nuisances ran off the right edge; every text's box,
    measured on the renderer, lies within the figure's."""
    from matplotlib.text import Text

    res, _ = combined
    fig = res.plot(which="limits")
    fig.canvas.draw()  # (the axis labels take their places when drawn)
    renderer = fig.canvas.get_renderer()
    width = fig.bbox.width
    header = [t for t in fig.findobj(Text) if "profiled:" in t.get_text()]
    assert header and all(n in header[0].get_text() for n in res.limits.nuisances)
    for t in fig.findobj(Text):
        if t.get_text().strip() and t.get_visible():
            box = t.get_window_extent(renderer)
            assert box.x0 >= -1 and box.x1 <= width + 1, (t.get_text(), box.x1, width)


@pytest.mark.slow
def test_combined_cross_section_is_quoted_with_its_error(combined):
    """The combination's fitted sigma x B at the best mass is quoted with its error, in the
    report and the notebook repr (it read "3.08 fb" alone): value ± error rounded to two
    significant digits of the error (common practice).  The error is the one Wald's
    approximation gives from the scan's own q0 = (mu_hat / sigma)^2 (Cowan, Cranmer, Gross,
    Vitells, EPJC 71 (2011) 1554, eq. 12-13 and section 3.1) within 20% (a Poisson
    likelihood at 3 sigma is not quite Gaussian)."""
    import math

    res, out = combined
    c = json.loads((out / "results.json").read_text())["combination"]
    i = c["best_index"]
    mu, err, q0 = c["cross_section"][i], c["cross_section_error"][i], c["q0"][i]
    assert err == pytest.approx(mu / math.sqrt(q0), rel=0.2)
    dec = max(0, 1 - math.floor(math.log10(err)))
    want = f"{mu:.{dec}f} ± {err:.{dec}f} {c['unit']}"
    html = (out / "report.html").read_text()
    assert f"<td>fitted sigma x B at the best mass</td><td>{want}</td>" in html
    assert f"sigma x B = {want})" in repr(res.combination)
    from peaksift.search.combination_report import combination_summary_text

    assert f"  sigma x B at best mass     {want}" in combination_summary_text(res.to_dict())


def test_sample_masses_from_the_per_event_truth_column(dimuon, demo_dir):
    """signal_model.mass_column = "true_mass": each sample's mass is the median of the
    generator's per-event true mass, which equals the generated mass in truth.json
    (demo_data/signal/truth.json, the generator's own record; Breit-Wigner of 0.05 GeV width,
    so the median sits within 0.01 GeV); the model built from them matches the one built
    from the configured masses (efficiency within 1e-3 absolute).  Giving both keys, or a
    missing column, is refused."""
    from peaksift.search.signal import sample_mass

    cfg, sm = dimuon
    truth = {s["file"]: s["mass_gev"]
             for s in json.loads((demo_dir / "signal" / "truth.json").read_text())["samples"]}
    for f in cfg.signal_model.files:
        from pathlib import Path

        assert sample_mass(f, "true_mass") == pytest.approx(truth[Path(f).name], abs=0.01)
    col = dataclasses.replace(cfg, signal_model=dataclasses.replace(
        cfg.signal_model, masses=(), mass_column="true_mass"))
    other = search_signal_model(col)
    m = np.array([130.0, 160.0, 185.0])
    assert np.allclose(other.efficiency(m), sm.efficiency(m), atol=1e-3)
    raw = {"input": {"files": [str(demo_dir / "events_*.parquet")]},
           "objects": {"collection": "muon"}, "spectrum": {"window": [110.0, 200.0]},
           "model": {"resolution": {"relative": 0.01}},
           "signal_model": {"files": list(cfg.signal_model.files), "mass_column": "true_mass",
                            "masses": list(cfg.signal_model.masses),
                            "generated": list(cfg.signal_model.generated)}}
    with pytest.raises(ConfigError, match="not both"):
        load_config(raw)
    with pytest.raises(ConfigError, match="is not a column"):
        sample_mass(cfg.signal_model.files[0], "generated_mass")


def test_channels_on_one_input_read_it_once_with_their_own_results(demo_dir, monkeypatch):
    """The combined demo's channels read the same files: one pass gives each channel exactly
    what its own search reads (``search.common._collect``, the single-channel path), and
    each chunk is read once, not once per channel."""
    from peaksift import events
    from peaksift.search.combination import _shared_reads
    from peaksift.search.common import _collect

    cfgs = [load_config(demo_dir / f"{n}.toml") for n in ("dimuon", "dielectron")]
    calls = []
    real = events.read_chunk

    def counting(spec, *a, **kw):
        calls.append(spec)
        return real(spec, *a, **kw)

    monkeypatch.setattr(events, "read_chunk", counting)
    shared = _shared_reads(["dimuon", "dielectron"], cfgs, progress=False)
    assert len(calls) == shared["dimuon"].engine_info["chunks"]
    for name, cfg in zip(("dimuon", "dielectron"), cfgs):
        own = _collect(cfg, progress=False)[0]
        got = shared[name]
        assert got.histogram == own.histogram
        np.testing.assert_array_equal(got.window_mass, own.window_mass)
        np.testing.assert_array_equal(got.window_weight, own.window_weight)
        assert (got.cutflow, got.requirements, got.events_read) == (
            own.cutflow, own.requirements, own.events_read)
    assert len(calls) == 3 * shared["dimuon"].engine_info["chunks"]  # + one per channel


def test_combination_settings_are_checked_against_the_schema():
    """[combination.significance] and [combination.limits] take the keys of [significance]
    and [limits] with their kinds and ranges (config.SCHEMA)."""
    base = {"channels": ["a.toml"]}
    with pytest.raises(ConfigError, match="unknown key combination.significance.toy"):
        run_combination({"combination": {**base, "significance": {"toy": 5}}}, out=False)
    with pytest.raises(ConfigError, match="combination.limits.cl"):
        run_combination({"combination": {**base, "limits": {"cl": 1.5}}}, out=False)
    with pytest.raises(ConfigError, match="combination.significance.method"):
        run_combination({"combination": {**base, "significance": {"method": "guess"}}},
                        out=False)



def _plain_channel(demo_dir, tmp_path) -> str:
    """The demo search without [systematics] and [calibration] (a cheaper channel), its
    input named by absolute path; written to ``tmp_path``."""
    keep, skip = [], False
    for line in (demo_dir / "search.toml").read_text().splitlines():
        if line.startswith("["):
            skip = line.strip() in ("[systematics]", "[calibration]")
        if not skip:
            keep.append(line)
    text = "\n".join(keep).replace('files = ["events_*.parquet"]',
                                   f'files = ["{demo_dir}/events_*.parquet"]')
    path = tmp_path / "plain.toml"
    path.write_text(text + "\n")
    return str(path)


def test_combination_significance_settings_change_the_global_significance(demo_dir,
                                                                          tmp_path):
    """[combination.significance] is what the combined global significance uses, not the
    channel's [significance] (upcrossings, 100 toys): with method = "toys", toys = 30 and
    its own seed the combination counts 30 background-only toys.  Outside reference: the
    toy p-value is the binomial frequency k / n with its standard error sqrt(p (1 - p) / n)
    (common practice; tolerance 1e-12), floored at the local p-value; the channel's own
    result keeps the channel's method."""
    channel = _plain_channel(demo_dir, tmp_path)
    comb = run_combination({"combination": {
        "channels": [channel], "names": ["dimuon"], "limits": {"enabled": False},
        "significance": {"method": "toys", "toys": 30, "seed": 5}}}, out=False)
    best, own = comb.best, comb.channels["dimuon"].to_dict()["best"]
    assert own["global_method"] != "toys"
    assert best["global_method"] == "toys" and best["n_toys"] + best["n_failed_toys"] == 30
    n, k = best["n_toys"], best["n_toys_above"]
    if k:
        p = k / n
        assert best["p_global"] == pytest.approx(max(p, best["p_local"]), rel=1e-12)
        assert best["p_global_error"] == pytest.approx(np.sqrt(p * (1 - p) / n), rel=1e-12)
    else:  # no toy above: the 95% upper bound 1 - 0.05^(1/n) (Clopper-Pearson, k = 0)
        assert best["p_global"] == pytest.approx(max(1 - 0.05 ** (1 / n), best["p_local"]),
                                                 rel=1e-12)
    # and they are the toys of the combination's seed (5), not of the channel's
    direct = comb.combination.global_significance("toys", toys=30, seed=5)
    assert direct["n_toys_above"] == k and direct["p_global"] == best["p_global"]


def test_combined_grid_covers_the_common_range_with_the_finest_step(demo_dir):
    """The combined scan's hypotheses: the demo's dimuon and dielectron channels both scan
    120-190 GeV; each step is the smaller of the two channels' half resolutions at that mass,
    their config tables interpolated linearly here with numpy.interp (the outside reference;
    tolerance 1e-9 GeV) -- the dielectron's, finer, everywhere here, where the first
    channel's own grid would be coarser.  One channel keeps its own grid; channels whose
    scans do not overlap are refused."""
    import tomllib

    from peaksift.search.combination import combined_masses
    from peaksift.search.common import _scan_masses

    cfgs = [load_config(demo_dir / f"{n}.toml") for n in ("dimuon", "dielectron")]
    tables = [np.array(tomllib.loads((demo_dir / f"{n}.toml").read_text())["model"]
                       ["resolution"]["table"]) for n in ("dimuon", "dielectron")]
    grid = combined_masses(cfgs)
    assert grid[0] == 120.0 and grid[-1] == pytest.approx(190.0, abs=1e-9)
    half = np.min([0.5 * np.interp(grid[:-1], t[:, 0], t[:, 1]) for t in tables], axis=0)
    np.testing.assert_allclose(np.diff(grid)[:-1], half[:-1], rtol=0, atol=1e-9)
    assert 0 < grid[-1] - grid[-2] <= half[-1] + 1e-9
    assert grid.size > _scan_masses(cfgs[0]).size
    assert np.array_equal(combined_masses(cfgs[:1]), _scan_masses(cfgs[0]))
    apart = dataclasses.replace(cfgs[1], scan=dataclasses.replace(cfgs[1].scan, start=191.0,
                                                                   stop=195.0))
    with pytest.raises(ConfigError, match="no common part"):
        combined_masses([cfgs[0], apart])
