"""The demo generator: determinism, its Breit-Wigner, truth record, weights, committed set."""

from __future__ import annotations

import dataclasses
import itertools
import json

import awkward as ak
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from particle import Particle
from scipy.integrate import quad
from scipy.stats import kstest

from peaksift import events, simulate
from peaksift.cli import main as cli_main
from peaksift.errors import InputError


def _bw_cdf(mass: float, width: float, lo: float, hi: float):
    """CDF of f(m) ~ 1/((m^2-M^2)^2 + M^2 G^2) on [lo, hi] (PDG Review, "Resonances"),
    integrated numerically with scipy.integrate.quad on a grid dense near the peak."""
    def f(m):
        return 1.0 / ((m * m - mass * mass) ** 2 + mass * mass * width * width)

    u = np.linspace(np.arctan((lo - mass) / width), np.arctan((hi - mass) / width), 3001)
    grid = np.clip(mass + width * np.tan(u), lo, hi)
    grid[0], grid[-1] = lo, hi
    parts = [quad(f, a, b)[0] for a, b in itertools.pairwise(grid)]
    cdf = np.concatenate([[0.0], np.cumsum(parts)])
    cdf /= cdf[-1]
    return lambda x: np.interp(x, grid, cdf)


def test_true_masses_follow_the_breit_wigner():
    # Goodness of fit: Kolmogorov-Smirnov (scipy.stats.kstest) of the generator's true masses
    # against the numerically integrated relativistic Breit-Wigner CDF; fixed seed.
    fr = dict.fromkeys(simulate.PROCESSES, 0.0)
    fr.update(z_mumu=0.5, x_mumu=0.5)
    sc = dataclasses.replace(simulate.DEMO, fractions=fr)
    t = simulate.generate(16_000, seed=7, truth=True, scenario=sc)
    proc = t.column("process").to_numpy()
    mass = t.column("true_mass").to_numpy().astype(float)
    for code, res in ((simulate.PROCESSES.index("z_mumu"), sc.z),
                      (simulate.PROCESSES.index("x_mumu"), sc.x)):
        m = mass[proc == code]
        assert m.size > 7000
        lo, hi = res.mass_range
        p = kstest(m, _bw_cdf(res.mass, res.width, lo, hi)).pvalue
        assert p > 0.01, (res.name, p)
        # the test has power: a 30% wider line shape is rejected
        assert kstest(m, _bw_cdf(res.mass, 1.3 * res.width, lo, hi)).pvalue < 1e-4


def test_breit_wigner_pdf_is_normalised():
    # Normalisation by numerical integration (scipy.integrate.quad), as REFERENCES.md suggests.
    for M, G in ((91.1876, 2.4952), (152.0, 0.6), (10.0, 3.0)):
        def full(m, M=M, G=G):
            return simulate.breit_wigner_pdf(m, M, G)

        def ranged(m, M=M, G=G):
            return simulate.breit_wigner_pdf(m, M, G, (M - 5, M + 5))

        total = quad(full, 0, M, limit=400)[0] + quad(full, M, np.inf, limit=400)[0]
        assert total == pytest.approx(1.0, abs=1e-6)
        on_range = quad(ranged, M - 5, M + 5, points=[M])[0]
        assert on_range == pytest.approx(1.0, abs=1e-6)


def test_same_seed_same_arrays_however_written(tmp_path, monkeypatch):
    monkeypatch.setattr(simulate, "BLOCK_EVENTS", 1000)
    a = simulate.generate(3000, seed=11)
    assert a.equals(simulate.generate(3000, seed=11))
    assert not a.equals(simulate.generate(3000, seed=12))
    info = simulate.write_demo(tmp_path, n_events=3000, seed=11, files=2, row_group_events=700)
    back = pa.concat_tables([pq.read_table(f) for f in info["files"]])
    for name in a.column_names:
        assert back.column(name).equals(a.column(name)), name
    md = pq.ParquetFile(info["files"][0]).metadata
    assert [md.row_group(i).num_rows for i in range(md.num_row_groups)] == [700, 700, 100]


def test_committed_demo_set_is_regenerated(demo_dir):
    # scripts/make_demo_data.py regenerates demo_data/ with the same arrays
    truth = json.loads((demo_dir / "truth.json").read_text())
    assert truth["seed"] == simulate.DEMO_SEED and truth["n_events"] == simulate.DEMO_EVENTS
    fresh = simulate.generate(simulate.DEMO_EVENTS, seed=simulate.DEMO_SEED)
    stored = pa.concat_tables([pq.read_table(demo_dir / f) for f in truth["files"]])
    assert stored.schema.equals(fresh.schema)
    for name in fresh.column_names:
        assert stored.column(name).equals(fresh.column(name)), name
    size = sum((demo_dir / f).stat().st_size for f in truth["files"])
    assert size < 20e6


def test_truth_record(demo_dir):
    truth = json.loads((demo_dir / "truth.json").read_text())
    z = Particle.from_pdgid(23)  # particle package (PDG tables)
    assert truth["calibration_peak"]["mass_gev"] == pytest.approx(z.mass / 1000)
    assert truth["calibration_peak"]["width_gev"] == pytest.approx(z.width / 1000)
    x = truth["invented_resonance"]
    # no known particle (nuclei aside) within 10 GeV of the invented mass: particle package
    near = Particle.findall(lambda p: p.mass is not None and not p.pdgid.is_nucleus
                            and abs(p.mass / 1000 - x["mass_gev"]) < 10)
    assert near == []
    assert 130 <= x["mass_gev"] <= 190 and x["width_gev"] > 0
    assert sum(p["generated"] for p in truth["processes"].values()) == truth["n_events"]
    sel = truth["intended_selection"]
    assert sel["collection"] == "muon" and sel["charge"] == "opposite"
    lo, hi = sel["search_window_gev"]
    assert lo < x["mass_gev"] < hi and lo > z.mass / 1000 + 10
    assert truth["parameters"]["x"]["mass"] == x["mass_gev"]


def test_reconstructed_z_peak_and_isolation(small_demo):
    # The calibration peak sits at the Z mass of the particle package (PDG tables); the
    # tolerance allows for radiation and resolution (common practice: ~0.5%).
    ev = events.read_events(small_demo, "muon")
    mu = ev.muon[(ev.muon.pt > 20) & (ev.muon.isolation < 0.15)]
    mu = mu[ak.num(mu) >= 2]
    pair = mu[:, 0] + mu[:, 1]
    m = ak.to_numpy(pair.mass[mu[:, 0].charge != mu[:, 1].charge])
    peak = m[(m > 86) & (m < 96)]
    assert abs(np.median(peak) - Particle.from_pdgid(23).mass / 1000) < 0.5
    # the isolation field separates leptons from the hard process from fakes
    hard = ak.flatten(ev.muon.isolation[ev.muon.pt > 25])
    soft = ak.flatten(ev.muon.isolation[ev.muon.pt < 6])
    assert np.mean(hard < 0.15) > 0.9
    assert np.mean(soft < 0.15) < 0.5


def test_weighted_variant_reproduces_yields():
    # Weights = true / generated process fraction x a correction near 1: the weighted sums
    # reproduce the unweighted expectation (common practice for simulated samples).
    n = 30_000
    t = simulate.generate(n, seed=5, weighted=True)
    w = t.column("weight").to_numpy()
    proc = t.column("process").to_numpy()
    tf = np.array([simulate.DEMO.fractions[p] for p in simulate.PROCESSES])
    tf /= tf.sum()
    for i, p in enumerate(simulate.PROCESSES):
        if tf[i] * n > 1000:
            assert w[proc == i].sum() == pytest.approx(tf[i] * n, rel=0.05), p
    assert w.sum() == pytest.approx(n, rel=0.03)
    assert np.all(w > 0) and np.std(w[proc == 1]) > 0


def test_cli_demo_and_bad_sizes(tmp_path, capsys):
    assert cli_main(["demo", str(tmp_path / "d"), "--events", "2000", "--seed", "3",
                     "--weighted"]) == 0
    out = capsys.readouterr().out
    assert "wrote 2 files with 2000 events" in out and "truth.json" in out
    ev = events.read_events(tmp_path / "d" / "simulated_*.parquet")
    assert {"weight", "process", "true_mass"} <= set(ev.fields)
    with pytest.raises(InputError, match="positive whole number"):
        simulate.write_demo(tmp_path / "e", n_events=0)
    with pytest.raises(InputError, match="seed must be zero or positive"):
        simulate.generate(10, seed=-1)


def test_continuum_masses_follow_the_falling_term_plus_the_shoulder():
    # The continuum's true masses against its density written out here: (1 - f) times
    # (1 - x)^a / x^b (x = m / sqrt(s)) plus f times a log-normal with mode m0 and shape
    # ln(1 + r) (scipy.stats.lognorm: mode = scale * exp(-shape^2)), each normalised on the
    # continuum's range (scipy.integrate.quad); Kolmogorov-Smirnov (scipy.stats.kstest), seed
    # fixed.  The test has power: the falling term alone is rejected.
    from scipy.stats import lognorm

    fr = dict.fromkeys(simulate.PROCESSES, 0.0)
    fr.update(dy_mumu=1.0)
    sc = dataclasses.replace(simulate.DEMO, fractions=fr)
    t = simulate.generate(40_000, seed=9, truth=True, scenario=sc)
    m = t.column("true_mass").to_numpy().astype(float)
    lo, hi = sc.continuum_range
    f, m0 = sc.continuum_shoulder_fraction, sc.continuum_shoulder_mass
    w = np.log1p(sc.continuum_shoulder_width)
    hump = lognorm(w, scale=m0 * np.exp(w * w))
    assert hump.pdf(m0) > hump.pdf(m0 * 0.99) and hump.pdf(m0) > hump.pdf(m0 * 1.01)

    def falling(v):
        x = v / sc.sqrt_s
        return (1 - x) ** sc.continuum_a / x ** sc.continuum_b

    grid = np.geomspace(lo, hi, 2001)
    parts = [quad(falling, a, b)[0] for a, b in itertools.pairwise(grid)]
    f_cdf = np.concatenate([[0.0], np.cumsum(parts)]) / sum(parts)
    h_cdf = (hump.cdf(grid) - hump.cdf(lo)) / (hump.cdf(hi) - hump.cdf(lo))

    def cdf(x, share=f):
        return np.interp(x, grid, (1 - share) * f_cdf + share * h_cdf)

    assert 0.0 < f < 0.2
    assert kstest(m, cdf).pvalue > 0.01
    assert kstest(m, lambda x: cdf(x, 0.0)).pvalue < 1e-4
    # the density the generator documents is normalised on the range
    assert quad(lambda v: simulate.continuum_pdf(np.array([v]), sc)[0], lo, hi, points=[m0],
                limit=200)[0] == pytest.approx(1.0, abs=1e-4)
