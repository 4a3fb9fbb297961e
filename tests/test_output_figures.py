"""``output.figures``: a run draws the figures it is asked for and no others, and its report
shows (and links) only those.

No number is computed here (the figures' contents are tested elsewhere); what is checked is
the run's files against the config, read independently from the output folder.
"""

from __future__ import annotations

import json

import pytest

import peaksift
from peaksift.config import load_config


@pytest.fixture(scope="module")
def quick(small_demo):
    """The demo search on the small demo set, made quick (few toys, few limit points)."""
    from pathlib import Path

    repo = Path(__file__).resolve().parents[1]
    return load_config(repo / "demo_data" / "search.toml").with_overrides(
        input__files=[str(p) for p in sorted(small_demo.glob("*.parquet"))],
        significance__toys=20, limits__points=3, calibration__particle="",
        calibration__window=None, output__formats=["png"])


def _files(out):
    return sorted(p.relative_to(out).as_posix() for p in (out / "figures").rglob("*")
                  if p.is_file()) if (out / "figures").exists() else []


@pytest.mark.parametrize("figures, expected", [
    (["pvalue_scan", "limits"], ["figures/limits.png", "figures/pvalue_scan.png"]),
    ("none", []),
])
def test_only_the_figures_asked_for_are_drawn_and_shown(quick, tmp_path, figures, expected):
    out = tmp_path / "out"
    peaksift.run_search(quick.with_overrides(output__figures=figures), out=out,
                        progress=False)
    assert _files(out) == expected
    d = json.loads((out / "results.json").read_text())
    assert sorted(d["outputs"]["figures"].values()) == sorted(p.split("/")[-1]
                                                              for p in expected)
    md = (out / "report.md").read_text()
    html = (out / "report.html").read_text()
    linked = [line for line in md.splitlines() if "](figures/" in line]
    assert sorted(x.split("](")[1].split(")")[0] for x in linked) == expected
    assert html.count("data:image/png;base64") == len(expected)
    manifest = json.loads((out / "peaksift-manifest.json").read_text())
    listed = json.dumps(manifest)
    assert all(p in listed for p in expected) and "spectrum.png" not in listed


@pytest.mark.parametrize("value, message", [
    (["spectrum", "pvalues"], "allowed: 'all', 'none', 'spectrum', 'pvalue_scan'"),
    (["all", "limits"], "not a mix"),
    ([], "write \"none\""),
])
def test_a_wrong_figure_selection_is_one_line_naming_the_valid_values(quick, value, message):
    with pytest.raises(peaksift.ConfigError) as err:
        quick.with_overrides(output__figures=value)
    text = str(err.value)
    assert message in text and "output.figures" in text and "\n" not in text


def test_a_combination_honours_the_figure_selection(demo_dir, tmp_path):
    """The combined p-value figure comes with ``pvalue_scan``; each channel draws what its
    own config asks for."""
    from peaksift.search.combination import run_combination

    ch = tmp_path / "ch.toml"
    text = (demo_dir / "search.toml").read_text().replace(
        'files = ["events_*.parquet"]', f'files = ["{demo_dir}/events_*.parquet"]').replace(
        '"background_template.json"', f'"{demo_dir}/background_template.json"')
    # without the demo's [systematics] (the envelope's figure is not in question here)
    text = text.replace("mass_scale = 0.002", "mass_scale = 0.0").replace(
        "mass_resolution = 0.1\n", "mass_resolution = 0.0\n").replace(
        'background_families = ["powersum", "exppoly1", "bernstein"]',
        "background_families = []")
    assert "background_families = []" in text
    ch.write_text(text.replace("[output]", '[output]\nfigures = ["spectrum"]', 1))
    res = run_combination({"combination": {"channels": [str(ch)], "names": ["one"]},
                           "output": {"figures": "none"}}, out=tmp_path / "o", toys=0)
    assert sorted(res.to_dict()["outputs"]["figures"]) == ["one/spectrum"]
    html = (tmp_path / "o" / "report.html").read_text()
    assert html.count("data:image/png;base64") == 1


def test_the_spectrum_command_draws_only_what_is_asked_for(quick, tmp_path):
    from peaksift.search import run_spectrum

    res = run_spectrum(quick.with_overrides(output__figures=["spectrum"]), out=tmp_path / "s")
    assert _files(tmp_path / "s") == ["figures/spectrum.png"]
    assert sorted(res.files) == ["spectrum", "spectrum.json"]


@pytest.mark.parametrize("shape", ["rising", "flat", "falling"])
@pytest.mark.parametrize("log", [False, True])
def test_the_blinded_spectrum_legend_covers_no_data_point(shape, log):
    """The blinded spectrum's legend (with the sideband fit: four rows) touches none of the
    drawn points or error bars, whatever the spectrum's shape (a rising one fills the upper
    right, where the legend used to go): every errorbar segment, read back from the axes in display coordinates, lies
    outside the legend's box (measured on the figure's renderer)."""
    import numpy as np

    from peaksift import plotting, shapes
    from peaksift.histogram import MassHistogram
    from peaksift.search.sideband import sideband_fit

    rng = np.random.default_rng(7)
    m = {"rising": 200.0 - rng.exponential(40.0, 20000),
         "flat": rng.uniform(110.0, 200.0, 9000),
         "falling": 110.0 + rng.exponential(30.0, 3000)}[shape]
    h = MassHistogram(bins=90, range=(110.0, 200.0)).fill(m)
    blind = (140.5, 160.0)
    fit = sideband_fit(h, "gaussian", shapes.get("bernstein", degree=3), (110.0, 200.0),
                       blind)  # four legend rows
    fig = plotting.spectrum_figure(h, blind=blind, log=log, title="a note", background=fit)
    ax = fig.axes[0]
    box = ax.get_legend().get_window_extent(fig.canvas.get_renderer())
    (bars,) = [c for c in ax.containers if hasattr(c, "has_yerr")]
    seg = np.array([s for s in bars.lines[2][0].get_segments() if len(s) == 2], float)
    lo, hi = (ax.transData.transform(seg[:, k]) for k in (0, 1))  # (x, y) of both ends
    ok = np.isfinite(lo).all(axis=1) & np.isfinite(hi).all(axis=1)
    touch = ((lo[:, 0] >= box.x0) & (lo[:, 0] <= box.x1)
             & (np.maximum(lo[:, 1], hi[:, 1]) >= box.y0)
             & (np.minimum(lo[:, 1], hi[:, 1]) <= box.y1))
    assert ok.sum() > 40 and not np.any(touch[ok])


def _segments_touching(fig, ax, artist):
    """How many of the drawn error bars and curve samples (read back from the axes, in
    display coordinates) lie in ``artist``'s box, measured on the figure's renderer."""
    import numpy as np

    box = artist.get_window_extent(fig.canvas.get_renderer())
    (bars,) = [c for c in ax.containers if hasattr(c, "has_yerr")]
    seg = np.array([s for s in bars.lines[2][0].get_segments() if len(s) == 2], float)
    curves = [ln.get_xydata() for ln in ax.get_lines() if len(ln.get_xdata()) > 50]
    # both ends of each error bar; a curve's samples as segments of no length
    lo = ax.transData.transform(np.concatenate([seg[:, 0], *curves]))
    hi = ax.transData.transform(np.concatenate([seg[:, 1], *curves]))
    touch = ((lo[:, 0] >= box.x0) & (lo[:, 0] <= box.x1)
             & (np.maximum(lo[:, 1], hi[:, 1]) >= box.y0)
             & (np.minimum(lo[:, 1], hi[:, 1]) <= box.y1))
    return int(np.count_nonzero(touch)), seg.shape[0]


@pytest.mark.parametrize("peak", [125.0, 152.5, 185.0])
def test_the_fit_values_table_covers_no_data_point_or_curve(peak):
    """The fit figure's table of fitted numbers (and its legend) touch none of the error bars
    and none of the drawn curves' samples, wherever a tall peak sits (on the left as the
    hadron demo's phi(1020), in the middle, or under the legend on the right); the peak
    here is narrower than the bins, so the fit is not valid and its reason sits in the
    table too: each of its text lines lies inside the table's box, none cut off.  Read back
    from the axes in display coordinates (common practice: matplotlib's window extents)."""
    import numpy as np
    from matplotlib.patches import FancyBboxPatch

    from peaksift import MassHistogram

    rng = np.random.default_rng(3)
    h = MassHistogram(bins=90, range=(110.0, 200.0)).fill(
        np.r_[110 + rng.exponential(30.0, 3000), np.full(300, peak)])
    fit = peaksift.fit(h, "gaussian", "exponential", start={"mass": peak, "sigma": 2.0})
    assert not fit.valid  # a spike inside one bin: sigma at its floor
    fig = fit.plot()
    ax = fig.axes[0]
    (table,) = [p for p in ax.patches if isinstance(p, FancyBboxPatch)]
    for artist in (table, ax.get_legend()):
        touching, bars = _segments_touching(fig, ax, artist)
        assert bars == 90 and touching == 0
    renderer = fig.canvas.get_renderer()
    box = table.get_window_extent(renderer)
    lines = [t for t in ax.texts if "not valid" in t.get_text() or "floor" in t.get_text()]
    assert lines and "sigma" in lines[0].get_text() and "floor" in lines[-1].get_text()
    for t in lines:
        e = t.get_window_extent(renderer)
        assert box.x0 <= e.x0 and e.x1 <= box.x1 and box.y0 <= e.y0 and e.y1 <= box.y1
