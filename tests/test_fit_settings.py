"""Parameters of the free fit fixed, constrained and bounded from a config file, and a natural
width measured through the config path with sigma tied to the resolution model.

Outside references: the generated truth (a Breit-Wigner of known width smeared by a Gaussian
of known sigma, drawn with scipy.stats), scipy.special.voigt_profile for the line shape of an
independent binned Poisson fit written here with iminuit, and the relative-resolution rule
sigma = r m (common practice).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import special, stats

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

M_TRUE, GAMMA_TRUE, REL_RES = 1234.0, 30.0, 0.02
WINDOW = (900.0, 1600.0)
BIN_WIDTH = 10.0
N_SIG, N_BKG, DECAY = 3000, 30000, 250.0


def _masses(seed: int) -> np.ndarray:
    """Breit-Wigner (Cauchy, half width GAMMA_TRUE/2) at M_TRUE smeared by a Gaussian of
    sigma REL_RES * M_TRUE, plus an exponential falling with decay length DECAY, both on the
    window (scipy.stats; inverse-CDF sampling for the truncated background)."""
    rng = np.random.default_rng(seed)
    s = stats.cauchy.rvs(loc=M_TRUE, scale=GAMMA_TRUE / 2, size=3 * N_SIG, random_state=rng)
    s = s + stats.norm.rvs(scale=REL_RES * M_TRUE, size=s.size, random_state=rng)
    s = s[(s >= WINDOW[0]) & (s < WINDOW[1])][:N_SIG]
    assert s.size == N_SIG
    u = rng.uniform(*stats.expon.cdf(WINDOW, scale=DECAY), N_BKG)
    return np.concatenate([s, stats.expon.ppf(u, scale=DECAY)])


def _write_pairs(path: Path, m: np.ndarray) -> None:
    """One opposite-charge pair of massless muons per event, back to back in phi at eta = 0
    with pT = m/2 each, so the pair mass is m (two back-to-back massless objects of energy
    E have m = 2E; common practice)."""
    n = m.size
    cols = {"pt": np.repeat(m / 2.0, 2), "eta": np.zeros(2 * n),
            "phi": np.tile([0.0, math.pi], n), "mass": np.zeros(2 * n),
            "charge": np.tile(np.array([1, -1], np.int32), n)}
    st = pa.StructArray.from_arrays([pa.array(v) for v in cols.values()], names=list(cols))
    offsets = pa.array(np.arange(0, 2 * n + 1, 2, dtype=np.int32))
    pq.write_table(pa.table({"muon": pa.ListArray.from_arrays(offsets, st)}), path)


def _independent_voigt_fit(m: np.ndarray, sigma_of_mass):
    """Extended binned Poisson fit (Baker and Cousins 1984, eq. 11) written here: a Voigt
    (scipy.special.voigt_profile, half width gamma = width/2) plus an exponential, each
    normalised on the window, sigma = ``sigma_of_mass(mass)`` computed inside the cost; bin
    integrals by 8-point Gauss-Legendre."""
    from iminuit import Minuit

    edges = np.arange(WINDOW[0], WINDOW[1] + 0.5 * BIN_WIDTH, BIN_WIDTH)
    n = np.histogram(m, edges)[0].astype(float)
    t, w = np.polynomial.legendre.leggauss(8)
    half = 0.5 * np.diff(edges)
    x = (0.5 * (edges[1:] + edges[:-1]))[:, None] + half[:, None] * t[None, :]

    def binned(f):
        return (f(x) * w[None, :]).sum(axis=1) * half

    def nll(mass, width, ns, slope, nb):
        fs = binned(lambda u: special.voigt_profile(u - mass, sigma_of_mass(mass), width / 2))
        fb = np.diff(np.exp(slope * (edges - WINDOW[0])))
        mu = ns * fs / fs.sum() + nb * fb / fb.sum()
        if np.any(mu <= 0):
            return 1e30
        return float(np.sum(mu - n + np.where(n > 0, n * np.log(np.where(n > 0, n, 1) / mu), 0)))

    mi = Minuit(nll, mass=M_TRUE, width=GAMMA_TRUE, ns=N_SIG, slope=-1.0 / DECAY, nb=N_BKG)
    mi.errordef = 0.5  # negative log-likelihood
    mi.limits["width"] = (0.1, 200.0)
    mi.migrad()
    mi.hesse()
    return mi


def test_natural_width_measured_from_a_config_with_sigma_tied_to_the_resolution(tmp_path):
    from peaksift.search import run_search

    m = _masses(seed=11)
    _write_pairs(tmp_path / "events.parquet", m)
    cfg = tmp_path / "search.toml"
    cfg.write_text(f"""
[input]
files = ["events.parquet"]
[spectrum]
window = [{WINDOW[0]}, {WINDOW[1]}]
bin_width = {BIN_WIDTH}
[model]
signal = "voigt"
background = "exponential"
sigma_from_resolution = "fixed"
[model.resolution]
relative = {REL_RES}
[significance]
toys = 0
[limits]
enabled = false
""")
    res = run_search(cfg, out=False)
    fr = res.fit
    d = res.to_dict()["fit"]
    tie = d["settings"]["sigma_from_resolution"]
    # sigma follows the relative resolution at the FITTED mass (sigma = r m, recomputed
    # inside the likelihood), not at the starting mass
    assert tie["mode"] == "fixed" and tie["follows"] == "the fitted mass"
    assert math.isclose(fr.values["sigma"], REL_RES * fr.peak_mass, rel_tol=1e-12)
    assert fr.valid, fr.problems
    assert fr.width_parameter == "width"
    # the width, its profile-likelihood interval asked for by default, covers the truth:
    # tolerance = the 68 % interval itself (one fixed seed, deterministic)
    lo, hi = fr.intervals["width"]
    assert fr.peak_width + lo <= GAMMA_TRUE <= fr.peak_width + hi, (fr.peak_width, lo, hi)
    assert set(d["intervals"]) == {"mass", "width", "signal_yield"}
    # an independent fit of the same masses with scipy's Voigt profile and sigma = r m inside
    # its cost: width and its HESSE error agree (0.05 standard errors; 5 % on the error)
    ref = _independent_voigt_fit(m, lambda mass: REL_RES * mass)
    assert ref.valid
    assert abs(fr.peak_width - ref.values["width"]) < 0.05 * ref.errors["width"]
    assert fr.peak_width_error == pytest.approx(ref.errors["width"], rel=0.05)
    assert abs(fr.peak_mass - ref.values["mass"]) < 0.05 * ref.errors["mass"]


# ------------------------------------------------------------------- config validation
def _cfg(**model):
    from peaksift.config import load_config

    return load_config({"input": {"files": "x.parquet"}, "spectrum": {"window": [900.0, 1600.0]},
                        "model": {"signal": "voigt", "background": "exponential",
                                  "resolution": {"relative": REL_RES}, **model}})


@pytest.mark.parametrize("model, words", [
    ({"fix": {"sigmaa": 2.0}}, ["model.fix.sigmaa", "did you mean model.fix.sigma?",
                                "mass, sigma, width, signal_yield, b1, background_yield"]),
    ({"constrain": {"widht": [30.0, 3.0]}}, ["model.constrain.widht",
                                             "did you mean model.constrain.width?"]),
    ({"bounds": {"signal_yeld": [0.0, 10.0]}}, ["did you mean model.bounds.signal_yield?"]),
    ({"constrain": {"width": {"kind": "lognorm", "center": 30.0, "width": 0.1}}},
     ["model.constrain.width.kind", "did you mean 'lognormal'?"]),
    ({"constrain": {"width": {"center": 30.0, "widht": 3.0}}},
     ["model.constrain.width.widht", "did you mean model.constrain.width.width?"]),
    ({"constrain": {"width": {"kind": "lognormal", "center": -1.0, "width": 0.1}}},
     ["model.constrain.width", "positive median"]),
    ({"constrain": {"width": [30.0, 0.0]}}, ["model.constrain.width", "positive width"]),
    ({"bounds": {"width": [50.0, 10.0]}}, ["model.bounds.width", "low < high"]),
    ({"fix": {"width": 30.0}, "bounds": {"width": [0.0, 100.0]}},
     ["model.fix.width and model.bounds.width"]),
    ({"fix": {"sigma": -1.0}}, ["model.fix.sigma = -1", "outside the range"]),
    ({"sigma_from_resolution": "constrained"}, ["needs model.resolution_uncertainty"]),
    ({"sigma_from_resolution": "fixed", "fix": {"sigma": 20.0}},
     ["model.fix.sigma and model.sigma_from_resolution"]),
    ({"resolution_uncertainty": 0.1}, ["model.resolution_uncertainty is set",
                                       "sigma_from_resolution = \"free\""]),
    ({"signal": "breitwigner", "sigma_from_resolution": "fixed"},
     ["model.sigma_from_resolution", "'breitwigner' has no Gaussian sigma"]),
])
def test_fit_keys_are_checked_with_the_key_named(model, words):
    from peaksift.errors import ConfigError

    with pytest.raises(ConfigError) as exc:
        _cfg(**model)
    for w in words:
        assert w in str(exc.value)


def test_constraint_kinds_are_the_likelihood_layers():
    from peaksift.config import reference_markdown
    from peaksift.likelihood import CONSTRAINT_KINDS

    for kind in CONSTRAINT_KINDS:
        c = _cfg(constrain={"width": {"kind": kind, "center": 30.0, "width": 0.2}})
        assert c.model.constrain["width"]["kind"] == kind
        assert f"`{kind}`" in reference_markdown()


def test_fit_keys_echo_and_round_trip():
    from peaksift.config import load_config

    c = _cfg(fix={"b1": -2.0}, constrain={"width": [30.0, 3.0]},
             bounds={"mass": [1100.0, 1400.0]}, sigma_from_resolution="constrained",
             resolution_uncertainty=0.1, intervals=False)
    d = c.to_dict()["model"]
    assert d["fix"] == {"b1": -2.0}
    assert d["constrain"] == {"width": {"kind": "gaussian", "center": 30.0, "width": 3.0}}
    assert d["bounds"] == {"mass": [1100.0, 1400.0]}
    assert load_config(c.to_dict()).to_dict() == c.to_dict()


def test_fit_keys_reach_the_fit(tmp_path):
    """fix, bounds, a log-normal constraint and sigma constrained around the resolution
    (sigma = r m at the starting mass, width = uncertainty x sigma; common practice) are
    what the fit used, and results of the fit command echo them."""
    from peaksift.likelihood import Constraint
    from peaksift.search import run_fit

    rng = np.random.default_rng(3)
    m = np.concatenate([rng.normal(1234.0, 25.0, 400), 900.0 + rng.exponential(250.0, 6000)])
    _write_pairs(tmp_path / "events.parquet", m[(m >= 900.0) & (m < 1600.0)])
    cfg = tmp_path / "c.toml"
    cfg.write_text("""
[input]
files = ["events.parquet"]
[spectrum]
window = [900.0, 1600.0]
bins = 70
[model]
signal = "voigt"
background = "exponential"
fix = { width = 5.0 }
bounds = { mass = [1150.0, 1300.0] }
constrain = { background_yield = { kind = "lognormal", center = 6000.0, width = 0.05 } }
sigma_from_resolution = "constrained"
resolution_uncertainty = 0.1
[model.resolution]
relative = 0.02
""")
    fr = run_fit(cfg, 1220.0)
    assert fr.values["width"] == 5.0 and "width" in fr.fixed
    assert fr.bounds["mass"] == (1150.0, 1300.0)
    s = 0.02 * 1220.0
    assert fr.constraints["sigma"] == Constraint("gaussian", s, 0.1 * s)
    assert fr.constraints["background_yield"] == Constraint("lognormal", 6000.0, 0.05)
    # width fixed: the intervals are those of the mass and the signal yield
    assert fr.valid, fr.problems
    assert set(fr.intervals) == {"mass", "signal_yield"}
    # sigma was taken at 1220 GeV; the resolution at the fitted mass differs by more than
    # 1 % (sigma = r m), and the fit says so
    assert abs(fr.peak_mass - 1220.0) > 0.01 * fr.peak_mass
    assert any("tied to the resolution at the starting mass 1220" in n for n in fr.notes)
