"""dE/dx identification in cuts and pairing, on hand-made tracks and the hadron demo set.

Outside references: the PDG Review, "Passage of particles through matter" (the Bethe
equation, written out by hand here); scipy.stats.norm (the Gaussian expectation of a ±3 sigma
band: 99.73%, common practice) with binomial errors; the `particle` package (PDG tables) for
the kaon, pion and phi(1020) masses and width; an independent brute-force pairing loop
written in this file.
"""

from __future__ import annotations

import json
import math
from itertools import permutations
from pathlib import Path

import awkward as ak
import numpy as np
import pytest
import vector
from particle import Particle
from scipy import stats

from peaksift import cuts, read_events
from peaksift.cli import main
from peaksift.energy_loss import DedxResponse, fit_dedx_response, hypothesis_mass
from peaksift.errors import ConfigError, CutError, InputError
from peaksift.pairing import pair

vector.register_awkward()
REPO = Path(__file__).resolve().parents[1]
TRACKS = REPO / "demo_data" / "tracks"
HADRON_CONFIG = REPO / "demo_data" / "hadron_search.toml"
M_K = Particle.from_pdgid(321).mass / 1000.0   # PDG tables, GeV
M_PI = Particle.from_pdgid(211).mass / 1000.0


def _bethe_argon(p, m):
    """PDG Review, "Passage of particles through matter", Bethe equation for argon gas
    (Z/A 0.45059, I 188 eV; no density effect below betagamma 58), written out here."""
    me = 0.51099895069
    bg = p / m
    b2 = bg**2 / (1 + bg**2)
    g = np.sqrt(1 + bg**2)
    r = me / (m * 1000)
    tmax = 2 * me * bg**2 / (1 + 2 * g * r + r * r)
    return 0.307075 * 0.45059 / b2 * (0.5 * np.log(2 * me * bg**2 * tmax / 188e-6**2) - b2)


def _tracks(p, eta, dedx, charge):
    counts = [len(x) for x in p]
    flat = {k: np.concatenate([np.asarray(x, float) for x in v])
            for k, v in (("p", p), ("eta", eta), ("dedx", dedx), ("charge", charge))}
    pt = flat["p"] / np.cosh(flat["eta"])
    rec = ak.zip({"pt": pt, "eta": flat["eta"], "phi": np.linspace(-3, 3, pt.size),
                  "mass": np.zeros(pt.size), "charge": flat["charge"], "dedx": flat["dedx"]},
                 with_name="Momentum4D")
    return ak.Array({"track": ak.unflatten(rec, counts)})


def test_deviation_in_a_cut_matches_the_hand_written_bethe_curve():
    resp = DedxResponse("argon_gas", scale=2.0, resolution=0.07)
    p = np.array([0.3, 0.5, 0.8, 1.5])
    z = np.array([-3.5, -1.0, 2.9, 3.1])
    dedx = 2.0 * _bethe_argon(p, M_K) * (1 + 0.07 * z)
    ev = _tracks([p], [np.zeros(4)], [dedx], [np.ones(4)])
    mask = cuts.object_mask(ev.track, "abs(dedx_deviation(kaon)) < 3", name="track",
                            identification=resp)
    assert ak.to_list(mask) == [[False, True, True, False]]
    got = resp.deviation("kaon", p, dedx)
    np.testing.assert_allclose(got, z, atol=1e-3)  # the response's table: < 1e-4 relative


def test_cut_errors_name_the_position_and_the_choices():
    with pytest.raises(CutError, match=r"at character 27 \('k'\): 'kaonn' is not a known mass "
                                       r"hypothesis; use one of electron, pion, kaon"):
        cuts.compile_cut("pt > 1 and dedx_deviation(kaonn) < 3")
    ev = _tracks([[0.5]], [[0.0]], [[1.0]], [[1]])
    with pytest.raises(CutError, match="needs a dE/dx response"):
        cuts.object_mask(ev.track, "dedx_deviation(kaon) < 3")
    no_dedx = ak.Array({"track": ak.unflatten(ak.zip(
        {"pt": [0.5], "eta": [0.0], "phi": [0.0], "mass": [0.0]}, with_name="Momentum4D"), [1])})
    with pytest.raises(InputError, match="no field 'dedx'"):
        pair(no_dedx, "track", cut="dedx_deviation(kaon) < 3", identification=DedxResponse())
    with pytest.raises(ConfigError, match="'muon' is not a known mass hypothesis"):
        pair(ev, "track", hypotheses=("kaon", "muon"))
    with pytest.raises(ConfigError, match="more_probable"):
        pair(ev, "track", hypotheses=("kaon", "pion"), assignment="more_probable")


def _mass(p1, e1, f1, m1, p2, e2, f2, m2):
    """Invariant mass of two tracks (p, eta, phi) with the given masses, written out."""
    v = []
    for p, e, f, m in ((p1, e1, f1, m1), (p2, e2, f2, m2)):
        pt = p / math.cosh(e)
        v.append((math.hypot(p, m), pt * math.cos(f), pt * math.sin(f), pt * math.sinh(e)))
    s = [a + b for a, b in zip(*v)]
    return math.sqrt(max(s[0] ** 2 - s[1] ** 2 - s[2] ** 2 - s[3] ** 2, 0.0))


def test_mass_hypotheses_and_both_assignments_against_a_brute_force_loop():
    rng = np.random.default_rng(11)
    n_ev = 40
    counts = rng.integers(0, 6, n_ev)
    p = [rng.uniform(0.2, 1.2, k) for k in counts]
    eta = [rng.uniform(-1, 1, k) for k in counts]
    q = [rng.choice([-1, 1], k) for k in counts]
    resp = DedxResponse("argon_gas", scale=1.0, resolution=0.07)
    # dE/dx half way between the kaon and pion curves, smeared, so many tracks pass both
    dedx = [np.sqrt(_bethe_argon(x, M_K) * _bethe_argon(x, M_PI)) * rng.normal(1, 0.1, x.size)
            for x in p]
    ev = _tracks(p, eta, dedx, q)
    phi = ak.to_list(ev.track.phi)
    kcut, pcut = "abs(dedx_deviation(kaon)) < 4", "abs(dedx_deviation(pion)) < 4"
    for rule in ("both", "more_probable"):
        c = pair(ev, "track", cut=kcut, second_cut=pcut, charge="opposite",
                 hypotheses=("kaon", "pion"), identification=resp, assignment=rule)
        want = []
        for e in range(n_ev):
            zk = resp.deviation("kaon", p[e], dedx[e])
            zp = resp.deviation("pion", p[e], dedx[e])
            for i, j in permutations(range(counts[e]), 2):
                if not (abs(zk[i]) < 4 and abs(zp[j]) < 4 and q[e][i] * q[e][j] < 0):
                    continue
                swap_ok = abs(zk[j]) < 4 and abs(zp[i]) < 4
                if rule == "more_probable" and swap_ok:
                    mine, other = zk[i] ** 2 + zp[j] ** 2, zk[j] ** 2 + zp[i] ** 2
                    if not (mine < other or (mine == other and i < j)):
                        continue
                want.append((e, i, j, _mass(p[e][i], eta[e][i], phi[e][i], M_K,
                                            p[e][j], eta[e][j], phi[e][j], M_PI)))
        got = list(zip(c.event_index, c.first_index, c.second_index, c.mass))
        assert [g[:3] for g in got] == [w[:3] for w in want]
        np.testing.assert_allclose([g[3] for g in got], [w[3] for w in want], rtol=1e-9)
        assert c.hypotheses == ("kaon", "pion")
    both = pair(ev, "track", cut=kcut, second_cut=pcut, charge="opposite",
                hypotheses=("kaon", "pion"), identification=resp)
    best = pair(ev, "track", cut=kcut, second_cut=pcut, charge="opposite",
                hypotheses=("kaon", "pion"), identification=resp, assignment="more_probable")
    assert len(best) < len(both)  # the test data do have doubly assigned pairs
    # like hypotheses: unordered pairs, every leg with the kaon mass
    kk = pair(ev, "track", charge="opposite", hypotheses="kaon")
    e, i, j = int(kk.event_index[0]), int(kk.first_index[0]), int(kk.second_index[0])
    assert kk.mass[0] == pytest.approx(
        _mass(p[e][i], eta[e][i], phi[e][i], M_K, p[e][j], eta[e][j], phi[e][j], M_K), rel=1e-9)


@pytest.fixture(scope="module")
def demo_tracks():
    ev = read_events(str(TRACKS), "track")
    t = ak.flatten(ev.track)
    cols = {k: ak.to_numpy(t[k]).astype(float) for k in
            ("pt", "eta", "dedx", "dedx_samples", "truth_species")}
    cols["p"] = cols["pt"] * np.cosh(cols["eta"])
    return ev, cols


def _calibrated(cols):
    base = DedxResponse("argon_co2_70_30", scale=1.0, resolution=0.07,
                        samples_field="dedx_samples", reference_samples=40, samples_exponent=0.5)
    band = (cols["p"] > 0.4) & (cols["p"] < 0.6)
    return fit_dedx_response(cols["p"][band], cols["dedx"][band], base, hypothesis="pion",
                             samples=cols["dedx_samples"][band])


def _pure_pion_scale(cols):
    """The normal MLE (scipy.stats.norm.fit) of measured / Bethe mean on the generator-truth
    pions of the calibration band: what the clipped fit must find without using the truth."""
    band = (cols["p"] > 0.4) & (cols["p"] < 0.6) & (cols["truth_species"] == 211)
    b = DedxResponse("argon_co2_70_30", 1.0, 0.07).expected(cols["p"][band], M_PI)
    mu, _ = stats.norm.fit(cols["dedx"][band] / b)
    return mu


def test_scale_fit_on_the_demo_band_matches_the_pure_pion_mle(demo_tracks):
    # the band holds kaons, protons and electrons too; the 3-sigma clip must remove them.
    # Tolerance: 4 standard errors of the fit plus 0.3% for the clip on the truncated
    # mean's skewed distribution and the per-track weights of the fit.
    _, cols = demo_tracks
    fit = _calibrated(cols)
    want = _pure_pion_scale(cols)
    assert abs(fit.scale - want) < 4 * fit.scale.error + 0.003 * want


@pytest.mark.parametrize("species,code,p_range,neighbours", [
    ("kaon", 321, (0.15, 0.45), ("pion", "proton")),
    ("proton", 2212, (0.25, 0.8), ("kaon", "pion")),
])
def test_three_sigma_band_keeps_99_7_percent(demo_tracks, species, code, p_range, neighbours):
    """A ±3 sigma band keeps 2*Phi(3) - 1 = 99.73% of a Gaussian (scipy.stats.norm; common
    practice), within 3 binomial standard errors, on the tracks where the bands do not
    overlap (each neighbour's ±3 sigma band apart from the species', track by track)."""
    _, cols = demo_tracks
    resp = _calibrated(cols).response
    p, d, n = cols["p"], cols["dedx"], cols["dedx_samples"]
    s = (cols["truth_species"] == code) & (p > p_range[0]) & (p < p_range[1])
    rel = resp.relative_sigma(n)
    e1 = resp.expected(p, hypothesis_mass(species))
    for other in neighbours:
        e2 = resp.expected(p, hypothesis_mass(other))
        s &= np.abs(e1 - e2) > 3 * rel * (e1 + e2)
    z = resp.deviation(species, p[s], d[s], n[s])
    k, total = int(np.count_nonzero(np.abs(z) < 3)), int(s.sum())
    want = 2 * stats.norm.cdf(3) - 1
    assert total > 3000
    assert abs(k / total - want) < 3 * math.sqrt(want * (1 - want) / total)


def test_pions_are_not_taken_for_kaons_where_the_bands_are_apart(demo_tracks):
    # Gaussian expectation (scipy.stats.norm) of pions inside the kaon's ±3 sigma band,
    # summed track by track, against the count: Poisson, 3 standard deviations plus one.
    _, cols = demo_tracks
    resp = _calibrated(cols).response
    p, d, n = cols["p"], cols["dedx"], cols["dedx_samples"]
    s = (cols["truth_species"] == 211) & (p > 0.15) & (p < 0.45)
    ek, ep = resp.expected(p[s], M_K), resp.expected(p[s], M_PI)
    sp = resp.relative_sigma(n[s]) * ep
    sk = resp.relative_sigma(n[s]) * ek
    expect = np.sum(stats.norm.cdf((ek + 3 * sk - ep) / sp) - stats.norm.cdf((ek - 3 * sk - ep)
                                                                             / sp))
    seen = int(np.count_nonzero(np.abs(resp.deviation("kaon", p[s], d[s], n[s])) < 3))
    assert abs(seen - expect) < 3 * math.sqrt(expect) + 1


def test_phi_peak_recovers_the_table_mass(demo_tracks):
    """A Voigt with the phi(1020)'s table width (particle package) fitted to the demo's
    identified K+K- spectrum gives the table mass within two combined standard errors."""
    from peaksift import MassHistogram, fit, shapes

    ev, cols = demo_tracks
    resp = _calibrated(cols).response
    c = pair(ev, "track", cut="pt > 0.1 and abs(dedx_deviation(kaon)) < 3", charge="opposite",
             hypotheses="kaon", identification=resp)
    phi = Particle.from_pdgid(333)
    m0, g0, e0 = phi.mass / 1e3, phi.width / 1e3, (phi.mass_upper or 0.0) / 1e3
    h = MassHistogram(np.linspace(1.0, 1.06, 61)).fill(c.mass, c.weight)
    fr = fit(h, shapes.get("voigt"), shapes.get("bernstein", degree=3), (1.0, 1.06),
             start={"mass": 1.02, "sigma": 0.001}, fixed={"width": g0})
    d = fr.to_dict()["peak_mass"]
    assert d["error"] < 3e-4
    assert abs(d["value"] - m0) < 2 * math.hypot(d["error"], e0)


def _bad_config(tmp_path: Path, replace: tuple[str, str]) -> Path:
    text = HADRON_CONFIG.read_text().replace('files = ["tracks/tracks_*.parquet"]',
                                             f'files = ["{TRACKS}/tracks_*.parquet"]')
    assert replace[0] in text
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text.replace(*replace))
    return cfg


@pytest.mark.parametrize("replace,words", [
    (('material = "argon_co2_70_30"', 'material = "argonn"'),
     ["identification.material", "argon_gas", "lead", "own"]),
    (("abs(dedx_deviation(kaon)) < 3", "abs(dedx_deviation(kaonn)) < 3"),
     ["objects.cut", "character 33", "'kaonn' is not a known mass hypothesis"]),
    (('hypotheses = ["kaon"]', 'hypotheses = ["kaon", "muon"]'),
     ["pairing.hypotheses", "muon"]),
    (("resolution = 0.07 ", "resolution = 0.0 "), ["identification.resolution"]),
    (('field = "dedx" ', 'field = "energy_loss" '), ["no field 'energy_loss'"]),
])
def test_bad_input_exits_2_with_one_line_and_writes_nothing(tmp_path, capsys, replace, words):
    cfg = _bad_config(tmp_path, replace)
    out = tmp_path / "out"
    rc = main(["search", str(cfg), "--out", str(out)])
    err = capsys.readouterr().err
    lines = [x for x in err.splitlines() if x.strip()]
    assert rc == 2 and len(lines) == 1 and lines[0].startswith("peaksift: error: "), err
    for w in words:
        assert w in lines[0], lines[0]
    assert not out.exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".out")] == []


def test_committed_hadron_set_is_regenerated():
    # scripts/make_demo_data.py writes demo_data/tracks/ with the same arrays (determinism)
    import pyarrow.parquet as pq

    from peaksift import simulate_tracks

    truth = json.loads((TRACKS / "truth.json").read_text())
    fresh, counts = simulate_tracks.generate_tracks(truth["n_events"], seed=truth["seed"])
    stored = pq.read_table(TRACKS / "tracks_000.parquet")
    assert fresh.equals(stored)
    assert counts["phi_decays_both_kaons_kept"] == truth["phi_decays_both_kaons_kept"]


def test_hadron_search_reports_the_identification(tmp_path, demo_tracks):
    """The demo's hadron search end to end (fast settings): the phi(1020) calibration against the
    particle tables (within two combined standard errors), and the report's identification
    section and figure."""
    from peaksift import load_config, run_search

    # no toys and no profile-likelihood intervals: the slow parts, not what is checked here
    cfg = load_config(HADRON_CONFIG).with_overrides(significance__toys=0,
                                                    model__intervals=False)
    res = run_search(cfg, out=tmp_path / "out")
    d = json.loads((tmp_path / "out" / "results.json").read_text())
    ident = d["identification"]
    fit = ident["calibration_fit"]["scale"]
    want = _pure_pion_scale(demo_tracks[1])
    assert abs(fit["value"] - want) < 4 * fit["error"] + 0.003 * want  # as above
    cal = d["calibration"]
    assert cal["particle"] == "phi(1020)" and abs(cal["shift_sigma"]) < 2
    # the free fit, its Voigt sigma constrained to the resolution model, is valid and measures
    # the natural width: within 3 standard errors of the phi(1020)'s tabulated width (the
    # particle package's PDG tables, 4.249 MeV; the demo generated that width)
    from particle import Particle

    free = d["fit"]
    width = free["parameters"]["width"]
    assert free["valid"] and free["settings"]["sigma_from_resolution"]["mode"] == "constrained"
    pdg = Particle.from_name("phi(1020)").width / 1000.0  # MeV -> GeV
    assert 0 < width["error"] < 0.001 and abs(width["value"] - pdg) < 3 * width["error"]
    assert "dedx" in res.figures and (tmp_path / "out" / "figures" / "dedx.png").is_file()
    md = (tmp_path / "out" / "report.md").read_text()
    assert "## Particle identification (dE/dx)" in md and "figures/dedx.png" in md
    assert d["config"]["pairing"]["hypotheses"] == ["kaon"]
    # results.json keeps the whole record: read back, it draws the run's figure again, pixel
    # for pixel at the run's resolution (matplotlib's PNG reader)
    import matplotlib.image as mpimg

    from peaksift import SearchResult

    again = tmp_path / "again.png"
    fig = SearchResult.from_dict(d).plot(which="dedx")
    # headed by the run's label as every figure of the run (the config's [run] name)
    assert d["config"]["run"]["name"] in [t.get_text() for t in fig.axes[0].texts]
    fig.savefig(again, dpi=150)
    drawn = mpimg.imread(tmp_path / "out" / "figures" / "dedx.png")
    assert np.array_equal(mpimg.imread(again), drawn)


def test_identified_pairs_are_named_by_their_mass_hypothesis():
    """The hadron demo pairs tracks identified as kaons: its figures name the pair by the
    hypothesis (m_KK, K+K-: the particle tables' symbol K for the charged kaon), not by the
    collection ("track"); without hypotheses the collection names it."""
    from peaksift import load_config
    from peaksift.plotting import figure_labels

    lab = figure_labels(load_config(HADRON_CONFIG))
    assert lab.symbol == "m_{KK}" and lab.run.channel == "$K^+K^-$"
    plain = figure_labels(load_config(_config_dict()))
    assert plain.symbol == "m_{tt}"


def _config_dict(**sections):
    base = {"input": {"files": [str(TRACKS / "tracks_000.parquet")]},
            "objects": {"collection": "track"},
            "spectrum": {"window": [1.0, 1.08], "bins": 80},
            "model": {"resolution": {"absolute": 0.0011}}}
    for k, v in sections.items():
        base.setdefault(k, {}).update(v)
    return base


def test_config_own_material_and_cross_key_rules():
    from peaksift import load_config

    own = {"z_over_a": 0.45059, "mean_excitation_ev": 188.0, "density": 1.662e-3,
           "density_effect": [11.9480, 1.7635, 4.4855, 0.19714, 2.9618, 0.0]}
    cfg = load_config(_config_dict(identification={"resolution": 0.08, "material": "own",
                                                   "own_material": own, "scale": 1.0}))
    # the constants of argon gas (PDG tables) typed in by the user give argon's curve
    from peaksift.energy_loss import mean_energy_loss
    r = cfg.identification.response()
    bg = np.geomspace(0.2, 200, 50)
    np.testing.assert_allclose(mean_energy_loss(bg, r.material),
                               mean_energy_loss(bg, "argon_gas"), rtol=1e-12)
    assert cfg.to_dict()["identification"]["own_material"]["z_over_a"] == 0.45059
    bad = [
        ({"identification": {"resolution": 0.08, "material": "own"}},
         "identification.own_material.z_over_a"),
        ({"objects": {"cut": "abs(dedx_deviation(kaon)) < 3"}}, "identification is off"),
        ({"pairing": {"hypotheses": ["kaon", "pion"], "assignment": "more_probable"}},
         "set identification.resolution"),
        ({"pairing": {"hypotheses": ["kaon"], "assignment": "more_probable"}},
         "two different pairing.hypotheses"),
        ({"identification": {"resolution": 0.08, "samples_field": "dedx_samples"}},
         "identification.reference_samples"),
    ]
    for sections, words in bad:
        with pytest.raises(ConfigError, match=words.replace(".", r"\.")):
            load_config(_config_dict(**sections))
    # two hypotheses on one collection: second_cut selects the second leg
    cfg = load_config(_config_dict(objects={"cut": "pt > 0.1", "second_cut": "pt > 0.2"},
                                   pairing={"hypotheses": ["kaon", "pion"]}))
    assert cfg.pairing.hypotheses == ("kaon", "pion")
