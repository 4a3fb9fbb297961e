"""Configuration: TOML to validated frozen dataclasses, strict errors that name the key path."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import pytest

from peaksift.config import SCHEMA, Config, load_config, reference_markdown
from peaksift.errors import ConfigError

REPO_DIR = Path(__file__).resolve().parents[1]

MINIMAL = """
[input]
files = ["data/*.parquet"]

[spectrum]
window = [110.0, 200.0]

[model.resolution]
relative = 0.01
"""


def _write(tmp_path: Path, text: str, name: str = "search.toml") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def _err(tmp_path: Path, text: str) -> str:
    with pytest.raises(ConfigError) as info:
        load_config(_write(tmp_path, text))
    msg = str(info.value)
    assert "\n" not in msg, "errors are one line"
    return msg


def test_minimal_config_and_defaults(tmp_path):
    cfg = load_config(_write(tmp_path, MINIMAL))
    assert isinstance(cfg, Config)
    # paths are taken relative to the config file, not the working directory
    assert cfg.input.files == (str(tmp_path.resolve() / "data/*.parquet"),)
    assert cfg.spectrum.window == (110.0, 200.0)
    assert cfg.spectrum.bins == 100
    assert cfg.pairing.charge == "opposite"
    assert cfg.execution.engine == "serial"
    assert cfg.output.formats == ("png",)  # PDF on request (docs/decisions/png-by-default.md)
    assert len(cfg.sha256) == 64
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.spectrum.bins = 5  # type: ignore[misc]


def test_unknown_key_names_path_and_suggests(tmp_path):
    msg = _err(tmp_path, MINIMAL + '\n[model]\nbackgroud = "bernstein"\n')
    assert "model.backgroud" in msg
    assert "did you mean model.background?" in msg
    assert str(tmp_path / "search.toml") in msg


def test_unknown_section_suggests(tmp_path):
    msg = _err(tmp_path, MINIMAL + '\n[limit]\ncl = 0.9\n')
    assert "unknown section [limit]" in msg and "did you mean [limits]?" in msg


def test_bad_choice_suggests_value(tmp_path):
    msg = _err(tmp_path, MINIMAL + '\n[pairing]\ncharge = "oposite"\n')
    assert "pairing.charge" in msg and "did you mean 'opposite'?" in msg


def test_wrong_type(tmp_path):
    msg = _err(tmp_path, MINIMAL.replace("[spectrum]", '[spectrum]\nbins = "fifty"'))
    assert "spectrum.bins must be an integer" in msg
    msg = _err(tmp_path, MINIMAL + "\n[output]\nlog_scale = 1\n")
    assert "output.log_scale must be true or false" in msg
    msg = _err(tmp_path, MINIMAL + "\n[execution]\nunreadable_files = \"skip\"\n")
    assert "execution.unreadable_files" in msg and "'left_out'" in msg


def test_out_of_range(tmp_path):
    msg = _err(tmp_path, MINIMAL + "\n[limits]\ncl = 1.5\n")
    assert "limits.cl = 1.5 is out of range" in msg and "< 1" in msg
    msg = _err(tmp_path, MINIMAL + "\n[significance]\ntoys = -3\n")
    # integer keys print as integers, value and bounds (schema: 0 to 10_000_000)
    assert "significance.toys = -3 is out of range; it must be >= 0 and <= 10000000" in msg
    assert "1e+07" not in msg and "-3.0" not in msg
    msg = _err(tmp_path, MINIMAL + "\n[execution]\nchunk_events = 0\n")
    assert "execution.chunk_events = 0 is out of range" in msg and "<= 1000000000" in msg


def test_window_rules(tmp_path):
    msg = _err(tmp_path, MINIMAL.replace("[110.0, 200.0]", "[200.0, 110.0]"))
    assert "spectrum.window" in msg and "low < high" in msg
    msg = _err(tmp_path, MINIMAL + "\n[scan]\nstart = 90.0\n")
    assert "scan.start" in msg and "outside spectrum.window" in msg


def test_resolution_needs_exactly_one_form(tmp_path):
    msg = _err(tmp_path, MINIMAL + "absolute = 1.5\n")
    assert "model.resolution needs exactly one of" in msg
    cfg = load_config(_write(tmp_path, MINIMAL.replace(
        "relative = 0.01", "table = [[100.0, 1.0], [200.0, 3.0]]")))
    # linear interpolation between the rows (common practice)
    assert cfg.model.resolution.sigma(150.0) == pytest.approx(2.0)
    assert load_config(_write(tmp_path, MINIMAL)).model.resolution.sigma(160.0) == pytest.approx(1.6)


def test_bin_width_sets_bins_and_must_divide(tmp_path):
    cfg = load_config(_write(tmp_path, MINIMAL.replace("[spectrum]", "[spectrum]\nbin_width = 0.5")))
    assert cfg.spectrum.bins == 180
    msg = _err(tmp_path, MINIMAL.replace("[spectrum]", "[spectrum]\nbin_width = 0.7"))
    assert "spectrum.bin_width" in msg


def test_missing_required_and_missing_file(tmp_path):
    msg = _err(tmp_path, "[spectrum]\nwindow = [1.0, 2.0]\n[model.resolution]\nrelative=0.01\n")
    assert "input.files is required" in msg
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml")


def test_toml_syntax_error_points_at_line(tmp_path):
    msg = _err(tmp_path, MINIMAL + "\n[output\n")
    assert "TOML syntax error" in msg and "line" in msg


def test_calibration_particle_checked_against_tables(tmp_path):
    msg = _err(tmp_path, MINIMAL + '\n[calibration]\nparticle = "Z"\nwindow = [70.0, 110.0]\n')
    assert "calibration.particle" in msg and "'Z0'" in msg
    cfg = load_config(_write(tmp_path, MINIMAL + '\n[calibration]\nparticle = "Z0"\n'
                                                 "window = [70.0, 110.0]\n"))
    assert cfg.calibration.enabled


def test_shape_option_must_be_a_number(tmp_path):
    msg = _err(tmp_path, MINIMAL + '\n[model]\nsignal_options = { sigma = "wide" }\n')
    assert "model.signal_options.sigma must be a number, got 'wide'" in msg
    assert "could not convert" not in msg
    msg = _err(tmp_path, MINIMAL + '\n[model]\nbackground = "bernstein"\n'
                                   'background_options = { degree = "three" }\n')
    assert "model.background_options.degree must be a number, got 'three'" in msg


def test_calibration_window_may_not_overlap_the_blinding(tmp_path):
    blind = "\n[blinding]\nenabled = true\nwindow = [140.0, 160.0]\n"
    cal = '\n[calibration]\nparticle = "Z0"\nwindow = [{lo}, {hi}]\n'
    msg = _err(tmp_path, MINIMAL + blind + cal.format(lo=100.0, hi=145.0))
    assert "calibration.window [100, 145] overlaps blinding.window [140, 160]" in msg
    # the hidden bins are those overlapping the window: 100 bins of 0.9 GeV on 110-200, so
    # blinding from 140.0 hides [139.7, 140.6) too, and the message says where to stop
    assert "spectrum bins 139.7-160.4 GeV are hidden" in msg
    assert "at or below 139.7 GeV" in msg and "at or above 160.4 GeV" in msg
    msg = _err(tmp_path, MINIMAL + blind + cal.format(lo=70.0, hi=140.0))
    assert "calibration.window [70, 140] overlaps" in msg
    # a window clear of the hidden bins is fine; so is any window without blinding
    assert load_config(_write(tmp_path, MINIMAL + blind + cal.format(lo=70.0, hi=139.0)))
    assert load_config(_write(tmp_path, MINIMAL + cal.format(lo=70.0, hi=145.0)))


def test_cross_key_rules(tmp_path):
    assert "pairing.target_mass" in _err(tmp_path, MINIMAL + '\n[pairing]\nchoose = "closest"\n')
    assert "blinding.window" in _err(tmp_path, MINIMAL + "\n[blinding]\nenabled = true\n")
    assert "execution.address" in _err(
        tmp_path, MINIMAL + '\n[execution]\naddress = "tcp://h:8786"\n')


def test_toy_limit_masses(tmp_path):
    toys = '\n[limits]\nmethod = "toys"\ntoy_masses = [130, 152.5]\n'
    cfg = load_config(_write(tmp_path, MINIMAL + toys))
    assert cfg.limits.toy_masses == (130.0, 152.5)
    assert load_config(_write(tmp_path, MINIMAL)).limits.toy_masses == ()
    msg = _err(tmp_path, MINIMAL + "\n[limits]\ntoy_masses = [150.0]\n")
    assert "limits.toy_masses" in msg and "limits.method" in msg
    msg = _err(tmp_path, MINIMAL + toys.replace("152.5", "250.0"))
    assert "limits.toy_masses[1] = 250" in msg and "outside" in msg
    msg = _err(tmp_path, MINIMAL + toys.replace("152.5", '"high"'))
    assert "limits.toy_masses[1] must be a number" in msg


def test_dict_config_and_overrides(tmp_path):
    cfg = load_config({"input": {"files": "x.parquet"}, "spectrum": {"window": [1.0, 5.0]},
                       "model": {"resolution": {"absolute": 0.05}}}, base_dir=tmp_path)
    assert cfg.input.files == (str(tmp_path.resolve() / "x.parquet"),)
    cfg2 = cfg.with_overrides(significance__toys=7, execution__engine="processes")
    assert cfg2.significance.toys == 7 and cfg2.execution.engine == "processes"
    assert cfg2.input.files == cfg.input.files
    with pytest.raises(ConfigError, match="execution.engine"):
        cfg.with_overrides(execution__engine="threads")
    # the echo round-trips through validation unchanged
    assert load_config(cfg.to_dict()).to_dict() == cfg.to_dict()


def test_docs_page_lists_every_key_with_default():
    doc = (REPO_DIR / "docs" / "config.md").read_text()
    start, end = "<!-- reference:start -->\n", "<!-- reference:end -->"
    embedded = doc[doc.index(start) + len(start): doc.index(end)]
    assert embedded == reference_markdown(), "stale: run python scripts/make_config_doc.py"
    for sec, keys in SCHEMA.items():
        for k in keys:
            assert f"`{sec}.{k.name}`" in doc


def test_demo_config_is_valid_and_matches_the_template():
    from peaksift.search import demo_config_text

    path = REPO_DIR / "demo_data" / "search.toml"
    cfg = load_config(path)
    assert cfg.input.files == (str((REPO_DIR / "demo_data" / "events_*.parquet").resolve()),)
    assert cfg.calibration.particle == "Z0"
    # the committed file is the template that `peaksift demo` writes next to new data
    assert path.read_text() == demo_config_text(["events_*.parquet"])


def test_calibration_particle_must_be_one_the_pairs_can_be(tmp_path):
    """Refused before any event is read: a calibration window without the particle's mass
    (the Z0 at 91.19 GeV, particle package) and a particle of the wrong charge for the
    pairs (the W+ has charge +1, particle package; opposite-charge pairs are neutral)."""
    from particle import Particle

    z_mass = Particle.from_name("Z0").mass / 1000.0  # MeV -> GeV
    assert Particle.from_name("W+").charge == 1
    cal = '\n[calibration]\nparticle = "{}"\nwindow = [{}, {}]\n'
    msg = _err(tmp_path, MINIMAL + cal.format("Z0", 100.0, 150.0))
    assert "does not contain Z0's mass" in msg and f"{z_mass:.6g}" in msg
    msg = _err(tmp_path, MINIMAL + cal.format("W+", 70.0, 110.0))
    assert "charge +1" in msg and "neutral pairs" in msg
    load_config(_write(tmp_path, MINIMAL + cal.format("Z0", 70.0, 110.0)))  # accepted


def test_template_must_cover_the_window(tmp_path):
    """systematics.template is read with the config: a template over 110-165 GeV for a
    window of 110-200 GeV is refused before any event is read (the run failed after the
    scan and its toys, naming the template's bins as the spectrum's)."""
    import numpy as np

    from peaksift import MassHistogram

    MassHistogram.from_counts(np.ones(55), np.linspace(110.0, 165.0, 56)).save(
        tmp_path / "short.json")
    sy = '\n[systematics]\nbackground_families = ["exppoly"]\ntemplate = "{}"\n'
    msg = _err(tmp_path, MINIMAL + sy.format("short.json"))
    assert "template covers 110-165 GeV" in msg and "[110, 200]" in msg
    assert "cannot read" in _err(tmp_path, MINIMAL + sy.format("missing.json"))
    MassHistogram.from_counts(np.ones(90), np.linspace(110.0, 200.0, 91)).save(
        tmp_path / "whole.json")
    load_config(_write(tmp_path, MINIMAL + sy.format("whole.json")))
