"""A weighted spectrum's approximation is said where its numbers are: not on stderr only.

Significances and limits of weighted data use scaled-Poisson effective counts (each bin's
sum of weights times k = sum(w)/sum(w^2) of the bin; Bohm and Zech, NIM A 748 (2014) 1,
"scaled Poisson distribution").  Checked: the overall factor the notes quote against numpy's
sums of the weights written here, the caveat in ScanResult / LimitResult notes, in
results.json warnings, the report and the terminal summary (with the sum of weights, again
against numpy); an unweighted spectrum carries none of it.
"""

from __future__ import annotations

import json
import re
import textwrap
import warnings
from pathlib import Path

import numpy as np
import pytest

import peaksift
from peaksift.cli import main

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

RNG = np.random.default_rng(24)
MASSES = np.concatenate([100.0 + RNG.exponential(40.0, 4000), RNG.normal(150.0, 2.0, 120)])
MASSES = MASSES[MASSES < 200.0]
WEIGHTS = RNG.uniform(0.2, 1.8, MASSES.size)


def _overall(note: str) -> float:
    return float(re.search(r"overall ([0-9.eE+-]+)\)", note).group(1))


def test_scan_and_limit_notes_say_it_with_the_factor_numpy_gives():
    h = peaksift.MassHistogram.from_masses(MASSES, WEIGHTS, bins=50, range=(100.0, 200.0))
    k = WEIGHTS.sum() / np.square(WEIGHTS).sum()   # numpy, on the weights themselves
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        s = peaksift.scan(h, "gaussian", "exponential", np.arange(120.0, 181.0, 1.0),
                          absolute_resolution=2.0, refit=False)
        lim = peaksift.upper_limits(h, "gaussian", "exponential", [150.0, 170.0],
                                    absolute_resolution=2.0, method="asymptotic")
    for notes in (s.notes, lim.notes):
        (note,) = [n for n in notes if n.startswith("weighted spectrum")]
        assert "scaled-Poisson" in note and "approximation" in note
        # printed with 4 significant digits: 5e-4 relative
        assert _overall(note) == pytest.approx(k, rel=5e-4)
    plain = peaksift.MassHistogram.from_masses(MASSES, bins=50, range=(100.0, 200.0))
    s0 = peaksift.scan(plain, "gaussian", "exponential", np.arange(120.0, 181.0, 1.0),
                       absolute_resolution=2.0, refit=False)
    assert not any("weighted" in n for n in s0.notes)


def _muons(m: np.ndarray) -> pa.Array:
    """Two back-to-back massless muons with pT = m/2 at eta = 0: invariant mass exactly m."""
    n = m.size
    st = pa.StructArray.from_arrays(
        [pa.array(np.repeat(m / 2.0, 2)), pa.array(np.zeros(2 * n)),
         pa.array(np.tile([0.0, np.pi], n)), pa.array(np.zeros(2 * n)),
         pa.array(np.tile(np.array([1, -1], np.int8), n))],
        names=["pt", "eta", "phi", "mass", "charge"])
    return pa.ListArray.from_arrays(pa.array(np.arange(0, 2 * n + 1, 2, dtype=np.int32)), st)


def _search(tmp_path: Path, weighted: bool, capsys) -> tuple[dict, str, str]:
    d = tmp_path / ("w" if weighted else "u")
    d.mkdir()
    cols = {"muon": _muons(MASSES)}
    if weighted:
        cols["weight"] = WEIGHTS
    pq.write_table(pa.table(cols), d / "ev.parquet")
    (d / "c.toml").write_text(textwrap.dedent("""\
        [input]
        files = ["ev.parquet"]
        [objects]
        collection = "muon"
        cut = "pt > 1"
        [spectrum]
        window = [100.0, 200.0]
        bins = 50
        [model]
        background = "exponential"
        [model.resolution]
        absolute = 2.0
        [significance]
        toys = 0
        [limits]
        enabled = false
        [output]
        formats = ["png"]
        figures = "none"
        """))
    out = d / "out"
    capsys.readouterr()
    assert main(["search", str(d / "c.toml"), "--out", str(out), "--quiet"]) == 0
    stdout = capsys.readouterr().out
    return (json.loads((out / "results.json").read_text()), stdout,
            (out / "report.md").read_text())


def test_a_weighted_search_flags_it_in_results_report_and_summary(tmp_path, capsys):
    r, stdout, report = _search(tmp_path, True, capsys)
    sig = [w["message"] for w in r["warnings"] if w["topic"] == "significance"
           and w["message"].startswith("weighted spectrum")]
    assert len(sig) == 1 and "significances and limits carry it" in sig[0]
    assert any(n.startswith("weighted spectrum") for n in r["scan"]["notes"])
    assert "WARNING: weighted spectrum" in stdout
    assert "The events are weighted" in report and "weighted spectrum" in report
    # the sum of weights row: numpy's sum over the window (every mass is inside it)
    row = next(x for x in stdout.splitlines() if x.strip().startswith("sum of weights"))
    printed = float(row.split()[3].replace(",", ""))
    assert printed == pytest.approx(WEIGHTS.sum(), rel=5e-4)  # 4 significant digits


def test_an_unweighted_search_says_nothing_of_weights(tmp_path, capsys):
    r, stdout, report = _search(tmp_path, False, capsys)
    assert not any("weighted" in w["message"] for w in r["warnings"])
    assert "sum of weights" not in stdout and "The events are weighted" not in report
