"""The command line: user mistakes exit 2 with one line and leave no outputs behind."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest

from peaksift.cli import main

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")


@pytest.fixture(scope="module")
def tiny_data(tmp_path_factory) -> Path:
    """A small opposite-charge dimuon file: a falling continuum (two muons per event)."""
    d = tmp_path_factory.mktemp("tiny")
    rng = np.random.default_rng(5)
    n = 3000
    m = 60.0 + rng.exponential(30.0, n)
    phi = rng.uniform(-np.pi, np.pi, n)
    eta = rng.uniform(-1.5, 1.5, n)
    rows = []
    for i in range(n):
        pt = m[i] / 2.0  # any valid kinematics will do for the error paths
        rows.append([
            {"pt": pt, "eta": float(eta[i]), "phi": float(phi[i]), "mass": 0.1057,
             "charge": 1, "isolation": 0.05},
            {"pt": pt, "eta": float(eta[i]), "phi": float(phi[i] + np.pi), "mass": 0.1057,
             "charge": -1, "isolation": 0.05},
        ])
    pq.write_table(pa.table({"muon": rows}), d / "events.parquet")
    return d


def _config(d: Path, extra: str = "", files: str = '"events.parquet"', cut: str = "pt > 5") -> Path:
    p = d / "c.toml"
    p.write_text(f"""
[input]
files = [{files}]
[objects]
collection = "muon"
cut = "{cut}"
[spectrum]
window = [70.0, 150.0]
bins = 40
[model.resolution]
relative = 0.02
{extra}
""")
    return p


def _run(capsys, argv):
    rc = main(argv)
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def _assert_nothing_written(parent: Path, name: str) -> None:
    assert not (parent / name).exists()
    leftovers = [p.name for p in parent.iterdir() if p.name.startswith(f".{name}.")]
    assert leftovers == [], f"partial outputs left behind: {leftovers}"


def _one_line(err: str) -> str:
    lines = [x for x in err.splitlines() if x.strip()]
    assert len(lines) == 1, err
    assert lines[0].startswith("peaksift: error: ")
    return lines[0]


def test_bad_key_suggests_and_exits_2(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data, '[model]\nbackgroud = "bernstein"\n')
    out = tmp_path / "out"
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(out)])
    assert rc == 2
    line = _one_line(err)
    assert "model.backgroud" in line and "did you mean model.background?" in line
    _assert_nothing_written(tmp_path, "out")


def test_missing_input_file_exits_2(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data, files='"no_such_dir/*.parquet"')
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(tmp_path / "out")])
    assert rc == 2
    line = _one_line(err)
    assert "input.files" in line and "no_such_dir" in line
    _assert_nothing_written(tmp_path, "out")


def test_missing_config_exits_2(capsys, tmp_path):
    rc, _, err = _run(capsys, ["search", str(tmp_path / "nope.toml")])
    assert rc == 2
    assert "does not exist" in _one_line(err)


def test_bad_cut_syntax_exits_2(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data, cut="pt > 5 and eta.real < 1")
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(tmp_path / "out")])
    assert rc == 2
    line = _one_line(err)
    assert "objects.cut" in line and "character" in line
    _assert_nothing_written(tmp_path, "out")


def test_unknown_cut_field_found_while_reading_leaves_nothing(tiny_data, capsys, tmp_path):
    # the field name can only be checked against the data: the run has started and staged
    # its output directory by then, and must remove it
    cfg = _config(tiny_data, cut="pt > 5 and isolaton < 0.1")
    out = tmp_path / "deep" / "out"
    rc, _, err = _run(capsys, ["spectrum", str(cfg), "--out", str(out)])
    assert rc == 2
    line = _one_line(err)
    assert "isolaton" in line and "isolation" in line
    # the config file and the key that holds the cut are named
    assert line.startswith(f"peaksift: error: config {cfg}: objects.cut: cut ")
    assert not (tmp_path / "deep").exists(), "directories made by the failed run remain"


def test_event_cut_error_found_while_reading_names_its_key(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data)
    cfg.write_text(cfg.read_text().replace(
        "[objects]\n", '[objects]\nevent_cut = "n_muon >= 2 and met > 3"\n'))
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(tmp_path / "out")])
    assert rc == 2
    line = _one_line(err)
    assert f"config {cfg}: objects.event_cut: cut 'n_muon >= 2 and met > 3'" in line
    assert "'met'" in line
    _assert_nothing_written(tmp_path, "out")


def test_missing_collection_names_the_config_key(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data, cut="")
    cfg.write_text(cfg.read_text().replace('collection = "muon"', 'collection = "electron"'))
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(tmp_path / "out")])
    assert rc == 2
    line = _one_line(err)
    assert f"config {cfg}: objects.collection: collection 'electron'" in line
    assert "collections present: muon" in line
    assert line.endswith("Name one of those in objects.collection")
    _assert_nothing_written(tmp_path, "out")


def test_input_without_events_says_so(tiny_data, capsys, tmp_path):
    t = pq.read_table(tiny_data / "events.parquet")
    pq.write_table(t.slice(0, 0), tmp_path / "empty.parquet")
    cfg = _config(tmp_path, files='"empty.parquet"')
    rc, _, err = _run(capsys, ["search", str(cfg), "--out", str(tmp_path / "out")])
    assert rc == 2
    line = _one_line(err)
    assert "input.files" in line and "no events" in line
    assert "loosen" not in line  # not a selection problem
    _assert_nothing_written(tmp_path, "out")


def test_fit_mass_outside_window_exits_2(tiny_data, capsys):
    cfg = _config(tiny_data)
    rc, _, err = _run(capsys, ["fit", str(cfg), "--mass", "300"])
    assert rc == 2
    assert "--mass 300" in _one_line(err)


def test_spectrum_writes_histogram_and_figure(tiny_data, capsys, tmp_path):
    from peaksift.histogram import MassHistogram

    cfg = _config(tiny_data)
    out = tmp_path / "spec"
    rc, stdout, _ = _run(capsys, ["spectrum", str(cfg), "--out", str(out), "--quiet"])
    assert rc == 0
    h = MassHistogram.load(out / "spectrum.json")
    assert h.nbins == 40 and h.lo == 70.0 and h.hi == 150.0
    assert (out / "figures" / "spectrum.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "candidates" in stdout
    # rerunning into a previous result replaces it; into a foreign directory refuses
    assert main(["spectrum", str(cfg), "--out", str(out), "--quiet"]) == 0
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    capsys.readouterr()
    rc, _, err = _run(capsys, ["spectrum", str(cfg), "--out", str(foreign)])
    assert rc == 2 and "holds files peaksift did not write (notes.txt)" in _one_line(err)
    assert (foreign / "notes.txt").read_text() == "keep me"


def test_spectrum_while_blinded_hides_the_window(tiny_data, capsys, tmp_path):
    from peaksift.histogram import MassHistogram

    cfg = _config(tiny_data, "[blinding]\nenabled = true\nwindow = [101.0, 110.0]\n")
    rc, stdout, _ = _run(capsys, ["spectrum", str(cfg), "--out", str(tmp_path / "b"),
                                  "--quiet"])
    assert rc == 0 and "outside the blinded window [101, 110] GeV" in stdout
    h = MassHistogram.load(tmp_path / "b" / "spectrum.json")
    # every 2 GeV bin sharing mass with [101, 110] is hidden: [100, 102) ... [108, 110)
    hidden = (h.edges[:-1] < 110.0) & (h.edges[1:] > 101.0)
    assert hidden.sum() == 5
    assert np.all(h.weight_sum[hidden] == 0) and np.all(h.weight_sq_sum[hidden] == 0)
    raw = json.loads((tmp_path / "b" / "spectrum.json").read_text())
    assert raw["blinded"]["hidden_range"] == [100.0, 110.0]
    assert not list((tmp_path / "b" / "figures").glob("candidates.*"))
    # the sidebands are those of the full spectrum (same data without blinding)
    _config(tiny_data)
    assert main(["spectrum", str(cfg), "--out", str(tmp_path / "u"), "--quiet"]) == 0
    full = MassHistogram.load(tmp_path / "u" / "spectrum.json")
    assert full.weight_sum[hidden].sum() > 0
    assert np.array_equal(full.weight_sum[~hidden], h.weight_sum[~hidden])
    assert (tmp_path / "u" / "figures" / "candidates.png").exists()


def test_overrides_reach_the_config(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data)
    rc, _, err = _run(capsys, ["search", str(cfg), "--toys", "-5", "--out", str(tmp_path / "o")])
    assert rc == 2
    # an integer key's value and bounds print as integers (the schema: 0 to 10_000_000)
    assert "significance.toys = -5 is out of range; it must be >= 0 and <= 10000000" \
        in _one_line(err)
    _assert_nothing_written(tmp_path, "o")


def test_demo_writes_a_ready_config(capsys, tmp_path):
    from peaksift.config import load_config

    out = tmp_path / "demo"
    rc, stdout, _ = _run(capsys, ["demo", str(out), "--events", "20000"])
    assert rc == 0
    cfg = load_config(out / "search.toml")
    truth = json.loads((out / "truth.json").read_text())
    assert [Path(f).name for f in cfg.input.files] == truth["files"]
    assert all(Path(f).exists() for f in cfg.input.files)
    assert "peaksift search" in stdout


def test_fit_command_prints_the_fit(tiny_data, capsys):
    cfg = _config(tiny_data)
    rc, stdout, _ = _run(capsys, ["fit", str(cfg), "--mass", "100", "--quiet"])
    assert rc == 0
    assert stdout.startswith("FitResult(") and "signal_yield" in stdout and "GoF" in stdout


# ----------------------------------------------------------------- peaksift fit --mass M
DEMO_CONFIG = Path(__file__).resolve().parents[1] / "demo_data" / "search.toml"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


@pytest.fixture(scope="module")
def demo_fits(tmp_path_factory):
    """``peaksift fit`` on the demo at 140 and 155 GeV, held and free, and free from 150
    and 111; each run writes its fit.json and fit.png with --out."""
    if not DEMO_CONFIG.exists():
        pytest.skip("demo data not generated")
    import io
    from contextlib import redirect_stdout

    base = tmp_path_factory.mktemp("fits")
    out = {}
    for mass, hold in ((140, True), (140, False), (155, True), (155, False), (150, False),
                       (111, False)):
        d = base / f"m{mass}{'_held' if hold else ''}"
        buf = io.StringIO()
        with redirect_stdout(buf):
            rc = main(["fit", str(DEMO_CONFIG), "--mass", str(mass), "--out", str(d), "--quiet"]
                      + (["--hold-mass"] if hold else []))
        assert rc == 0
        out[mass, hold] = {"dir": d, "stdout": buf.getvalue(),
                           "json": json.loads((d / "fit.json").read_text())}
    return out


def _values(fit_json: dict) -> dict:
    return {k: p["value"] for k, p in fit_json["parameters"].items()}


@pytest.mark.parametrize("mass", [140, 155])
def test_fit_holds_the_mass_exactly_and_writes_its_files(demo_fits, demo_nll, mass):
    from iminuit import Minuit

    from peaksift.fitting import FitResult

    run = demo_fits[mass, True]
    d = run["json"]
    assert d["peak_mass"]["value"] == float(mass)  # held: exactly the given mass
    assert d["parameters"]["mass"]["fixed"] is True
    assert d["run"]["mass_start"] == mass and d["run"]["mass_held"] is True
    assert sorted(p.name for p in run["dir"].iterdir()) == ["fit.json", "fit.png",
                                                           "peaksift-manifest.json"]
    assert (run["dir"] / "fit.png").read_bytes()[:8] == PNG_SIGNATURE
    assert FitResult.from_dict(d).peak_mass == float(mass)
    assert f"held at {mass:g} GeV" in run["stdout"]
    # outside reference: the NLL written here, at the fitted values, is the fit's minimum,
    # and MIGRAD on it from there (mass held) finds nothing lower (1e-6 and 5e-3 absolute)
    nll = demo_nll(d)
    assert nll(**_values(d)) == pytest.approx(d["nll"], abs=1e-6)
    mi = Minuit(nll, **_values(d))
    mi.errordef = 0.5
    mi.fixed["mass"] = True
    mi.limits["sigma"] = (1e-3, None)
    mi.migrad()
    assert mi.fval > d["nll"] - 5e-3
    # a held mass cannot beat the free fit (the profile likelihood's minimum)
    assert d["nll"] >= demo_fits[mass, False]["json"]["nll"] - 1e-6


# (from 140 GeV the fit ends in a spike at the width's floor, invalid: no intervals, see
# test_fit_at_a_spike_says_it_is_invalid_and_a_local_minimum)
@pytest.mark.parametrize("mass", [150, 155])
def test_fit_starts_at_the_mass_and_reports_intervals(demo_fits, demo_nll, mass):
    from iminuit import Minuit

    run = demo_fits[mass, False]
    d = run["json"]
    assert d["run"]["settings"]["start"]["mass"] == mass and d["run"]["mass_held"] is False
    assert d["parameters"]["mass"]["fixed"] is False
    assert f"started at {mass:g} GeV" in run["stdout"]
    assert set(d["intervals"]) == {"mass", "sigma", "signal_yield"}
    # the summary line gives the interval as value +upper -lower, e.g. 152.24 +0.53 -0.53 GeV
    line = next(ln for ln in run["stdout"].splitlines() if ln.strip().startswith("fitted mass"))
    assert re.search(r"\d+\.\d+ \+\d+\.\d+ -\d+\.\d+ GeV", line), line
    # outside reference: MIGRAD on the NLL written here, from the fitted values, stays
    # at the same minimum (5e-3 in NLL, a tenth of the error in mass)
    nll = demo_nll(d)
    mi = Minuit(nll, **_values(d))
    mi.errordef = 0.5
    mi.limits["sigma"] = (1e-3, None)
    mi.migrad()
    assert mi.fval > d["nll"] - 5e-3
    assert abs(mi.values["mass"] - d["peak_mass"]["value"]) < 0.1 * d["peak_mass"]["error"]


def test_fit_started_off_the_peak_reaches_the_lowest_minimum(demo_fits, demo_nll):
    """Started at 150 GeV the demo's free fit (background also started from the whole
    window, other widths minimised although the width's start is given) reaches the
    minimum found from 155 GeV: the NLL written here gives the same value at both fits'
    values (within 1e-3 in -2 ln L), and neither fit carries the warning that a lower
    minimum exists elsewhere (the fit's own note that a later start beat an earlier one is
    information, not that warning).  (Before, it settled in a minimum 0.1 or more above.)"""
    local, best = demo_fits[150, False]["json"], demo_fits[155, False]["json"]
    nll = demo_nll(local)
    gap = 2.0 * (nll(**_values(local)) - nll(**_values(best)))
    assert abs(gap) < 1e-3
    assert not any("a lower minimum exists" in n for n in local["notes"])
    assert not any("a lower minimum exists" in n for n in best["notes"])


def test_fit_at_a_spike_says_it_is_invalid_and_a_local_minimum(demo_fits, demo_nll):
    """Started at 111 GeV the demo's fit ends in a spike at the width's floor (invalid): the
    command prints a "fit status" line as the search's summary does, makes no
    profile-likelihood intervals (their ends would read as errors of an unmeasured width),
    and fit.json's "warnings" hold the invalid fit and the lower minimum elsewhere -- the
    fit from 155 GeV, whose Delta(-2 ln L) below this one, from the NLL written in the tests
    (conftest ``demo_nll``) at both fits' values, the warning quotes to 3 significant
    digits (tolerance 0.5 % of it)."""
    run, best = demo_fits[111, False], demo_fits[155, False]["json"]
    d = run["json"]
    assert not d["valid"] and d["intervals"] is None
    assert demo_fits[140, False]["json"]["intervals"] is None  # (invalid too, at 140 GeV)
    assert any(ln.strip().startswith("fit status") and "INVALID" in ln
               for ln in run["stdout"].splitlines())
    topics = [w["topic"] for w in d["warnings"]]
    assert topics[:2] == ["fit", "local_minimum"], topics
    nll = demo_nll(d)
    gap = 2.0 * (nll(**_values(d)) - nll(**_values(best)))
    quoted = float(re.search(r"-2 ln L lower by ([0-9.]+)", d["warnings"][1]["message"])[1])
    assert abs(quoted - gap) < 5e-3 * gap, (quoted, gap)
    assert abs(d["lower_minimum"]["mass"] - best["peak_mass"]["value"]) < \
        0.01 * best["peak_mass"]["error"]


def test_fit_out_refuses_a_directory_of_other_files(tiny_data, capsys, tmp_path):
    cfg = _config(tiny_data)
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    rc, _, err = _run(capsys, ["fit", str(cfg), "--mass", "100", "--out", str(foreign)])
    assert rc == 2 and "did not write" in _one_line(err)
    assert sorted(p.name for p in foreign.iterdir()) == ["notes.txt"]
    # a fit.json that peaksift fit did not write is not replaced either
    other = tmp_path / "other"
    other.mkdir()
    (other / "fit.json").write_text("{}")
    rc, _, err = _run(capsys, ["fit", str(cfg), "--mass", "100", "--out", str(other)])
    assert rc == 2 and "did not write (fit.json)" in _one_line(err)
    assert (other / "fit.json").read_text() == "{}"
    # a previous peaksift fit output is replaced; a file path is refused
    mine = tmp_path / "fits"
    assert main(["fit", str(cfg), "--mass", "100", "--out", str(mine), "--quiet"]) == 0
    first = json.loads((mine / "fit.json").read_text())
    assert main(["fit", str(cfg), "--mass", "120", "--out", str(mine), "--quiet",
                 "--hold-mass"]) == 0
    second = json.loads((mine / "fit.json").read_text())
    assert first["run"]["mass_start"] == 100 and second["peak_mass"]["value"] == 120.0
    assert sorted(p.name for p in mine.iterdir()) == ["fit.json", "fit.png",
                                                      "peaksift-manifest.json"]
    capsys.readouterr()
    rc, _, err = _run(capsys, ["fit", str(cfg), "--mass", "100", "--out",
                               str(foreign / "notes.txt")])
    assert rc == 2 and "not a folder" in _one_line(err)


def test_output_into_a_closed_pipe_is_not_a_traceback(tmp_path):
    """`peaksift demo DIR | head -1`: the reader leaves before peaksift's last line.  As
    Python's `signal` documentation recommends ("Note on SIGPIPE"), the command ends quietly
    with 128 + SIGPIPE = 141 and no traceback or "Exception ignored" line; its files are
    complete."""
    import os
    import subprocess
    import sys

    src = Path(__file__).resolve().parents[1] / "src"
    r, w = os.pipe()
    os.close(r)  # nobody will ever read: the first print fails with EPIPE
    env = {**os.environ, "PYTHONPATH": str(src)}
    proc = subprocess.run([sys.executable, "-m", "peaksift", "demo", str(tmp_path / "d"),
                           "--events", "2000"], stdout=w, stderr=subprocess.PIPE, text=True,
                          env=env, timeout=300, check=False)
    os.close(w)
    assert proc.returncode == 141, proc.stderr
    assert "Traceback" not in proc.stderr and "Exception ignored" not in proc.stderr
    assert (tmp_path / "d" / "truth.json").is_file()


_OTHER_LOGS = """
import argparse, logging, warnings
from peaksift import cli
cli._setup_logging(argparse.Namespace(quiet=False, verbose=0))
warnings.formatwarning = cli._one_line_warning
logging.getLogger("matplotlib.mathtext").warning("Font 'x' has no glyph\\nfor this")
logging.getLogger("matplotlib.mathtext").info("not shown")
warnings.warn("a library's warning")
"""


def test_other_libraries_warnings_print_as_one_line_of_ours():
    """A logged warning of another library (matplotlib logs a missing glyph, it does not
    warn) prints like a warnings.warn one: one ``peaksift: warning:`` line naming where it
    came from, no bare last-resort line; below WARNING nothing."""
    import subprocess
    import sys

    src = Path(__file__).resolve().parents[1] / "src"
    out = subprocess.run([sys.executable, "-c", _OTHER_LOGS], capture_output=True, text=True,
                         check=True, env={"PYTHONPATH": str(src), "PATH": "/usr/bin:/bin"})
    assert out.stderr.splitlines() == [
        "peaksift: warning: Font 'x' has no glyph for this (matplotlib.mathtext)",
        "peaksift: warning: a library's warning (UserWarning)"]


def test_module_command_flushes_its_output_and_keeps_its_exit_status(tmp_path):
    """``python -m peaksift`` ends with ``os._exit`` after its exit handlers (cli.run): what
    it printed must still arrive whole through a pipe, and the status must be main()'s
    (0 for a run, 2 for a user error), with the log records of -v flushed too."""
    import os
    import subprocess
    import sys

    src = Path(__file__).resolve().parents[1] / "src"
    env = {**os.environ, "PYTHONPATH": str(src)}
    ok = subprocess.run([sys.executable, "-m", "peaksift", "demo", str(tmp_path / "d"),
                         "--events", "2000", "-v"], capture_output=True, text=True, env=env,
                        timeout=300, check=False)
    assert ok.returncode == 0, ok.stderr
    assert "truth.json" in ok.stdout and ok.stdout.endswith("\n")  # the last line arrived
    bad = subprocess.run([sys.executable, "-m", "peaksift", "search",
                          str(tmp_path / "missing.toml")], capture_output=True, text=True,
                         env=env, timeout=120, check=False)
    assert bad.returncode == 2
    assert bad.stderr.startswith("peaksift: error:") and len(bad.stderr.splitlines()) == 1


def test_calibration_line_quotes_the_tables_at_the_fits_precision():
    """The tables' mass beside the fitted one at the fitted one's decimals (the error to two
    significant digits, as every number of the summary) and the shift to two significant
    digits with its significance: a 6-digit fit beside a 4-digit table mass suggested a
    shift twice the real one.  Reference: the phi(1020) mass 1.019461 GeV of the particle
    package's tables."""
    from peaksift.cli._summary import _summary_text

    d = {"calibration": {"particle": "phi(1020)", "table_mass": 1.019461,
                         "fitted_mass": {"value": 1.019409, "error": 0.000068},
                         "shift_relative_permille": -0.0498, "shift_sigma": -0.73}}
    line = next(ln for ln in _summary_text(d).splitlines() if "calibration" in ln)
    assert "1.019409 ± 0.000068 GeV vs tables 1.019461 GeV" in line
    assert "(shift -0.050 per mille, -0.7 sigma)" in line
