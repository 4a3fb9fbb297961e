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
