"""Bethe energy loss and the dE/dx response, checked against outside references.

Sources: PDG Review of Particle Physics, "Passage of particles through matter" (the Bethe
equation, T_max, Bragg additivity); the PDG atomic and nuclear properties tables for the
minimum-ionisation values (listed in ../shared/REFERENCES.md, from memory there, hence the
1.5% tolerance); scipy.stats.norm.fit; the `particle` package and scipy.constants (CODATA).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from scipy.constants import physical_constants

from peaksift import energy_loss as el
from peaksift.errors import ConfigError, InputError, PeaksiftError

M_MU = physical_constants["muon mass energy equivalent in MeV"][0] / 1000.0  # CODATA, GeV
BG = np.geomspace(0.5, 100.0, 20001)

# PDG atomic and nuclear properties tables, <-dE/dx>_min in MeV cm^2/g (from memory, via
# ../shared/REFERENCES.md): tolerance 1.5% so that a small memory error cannot defeat it.
MIN_IONISATION = {"copper": 1.403, "iron": 1.451, "lead": 1.122, "silicon": 1.664,
                  "water": 1.992, "argon_gas": 1.519}


@pytest.mark.parametrize("name", sorted(MIN_IONISATION))
def test_minimum_ionisation_matches_the_pdg_tables(name):
    y = el.mean_energy_loss(BG, name, mass=M_MU)
    i = int(np.argmin(y))
    assert y[i] == pytest.approx(MIN_IONISATION[name], rel=0.015)
    # PDG Review, same chapter: the minimum sits near betagamma 3-3.5 (3-4 in REFERENCES.md)
    assert 2.8 <= BG[i] <= 4.0


def _bethe_by_hand(bg, za, i_ev, mass_gev, delta=0.0):
    """PDG Review, "Passage of particles through matter", Bethe equation, written out here."""
    me = physical_constants["electron mass energy equivalent in MeV"][0]
    b2 = bg**2 / (1 + bg**2)
    g = math.sqrt(1 + bg**2)
    r = me / (mass_gev * 1000)
    tmax = 2 * me * bg**2 / (1 + 2 * g * r + r * r)
    i = i_ev * 1e-6
    return 0.307075 * za / b2 * (0.5 * math.log(2 * me * bg**2 * tmax / i**2) - b2 - delta / 2)


@pytest.mark.parametrize("bg", [0.1, 0.3, 1.0, 3.0, 10.0])
def test_bethe_agrees_with_a_hand_written_formula_where_delta_vanishes(bg):
    # argon gas: X0 = 1.76, so delta = 0 below betagamma 58 (Sternheimer 1984)
    got = el.mean_energy_loss(bg, "argon_gas", mass=0.4937)
    assert got == pytest.approx(_bethe_by_hand(bg, 0.45059, 188.0, 0.4937), rel=1e-12)


def test_density_effect_follows_sternheimers_three_regions():
    # Sternheimer, Berger, Seltzer, At. Data Nucl. Data Tables 30 (1984) 261, written out
    # here with silicon's constants: below X0 delta0*10^(2(X-X0)); above X1 2 ln10 X - C
    cb, x0, x1, a, k, d0 = 4.4355, 0.2015, 2.8716, 0.14921, 3.2546, 0.14
    for x in (-0.5, 0.0, 1.0, 2.0, 3.5, 5.0):
        if x < x0:
            want = d0 * 10 ** (2 * (x - x0))
        elif x < x1:
            want = 2 * math.log(10) * x - cb + a * (x1 - x) ** k
        else:
            want = 2 * math.log(10) * x - cb
        assert el.density_correction(10**x, "silicon") == pytest.approx(want, rel=1e-12)


def test_same_betagamma_same_loss_for_kaon_and_pion():
    """The Bethe equation depends on the particle only through betagamma, up to T_max's mass
    terms 2 gamma m_e/M (PDG Review, same chapter): a kaon and a pion at the same betagamma
    differ by under 0.3% for betagamma <= 10 (there 2 gamma m_e (1/m_pi - 1/m_K) = 0.05, half
    its logarithm over a bracket of about 12 is 0.2%), and heavy particles not at all."""
    bg = np.geomspace(0.2, 10.0, 50)
    k = el.mean_energy_loss(bg, "argon_co2_70_30", mass=0.493677)
    p = el.mean_energy_loss(bg, "argon_co2_70_30", mass=0.13957)
    assert np.max(np.abs(k / p - 1)) < 3e-3
    h1 = el.mean_energy_loss(bg, "silicon", mass=1e3)
    h2 = el.mean_energy_loss(bg, "silicon", mass=1e4)
    np.testing.assert_allclose(h1, h2, rtol=1e-4)
    # and the same momentum gives different losses (what identification rests on)
    assert el.mean_energy_loss_at(0.5, 0.493677, "argon_gas") > 1.4 * el.mean_energy_loss_at(
        0.5, 0.13957, "argon_gas")


def test_one_over_beta_squared_rise_at_low_betagamma():
    # Below the minimum the loss rises as 1/beta^2 times a slowly varying logarithm
    # (PDG Review, same chapter): from betagamma 1 down to 0.1, beta^2 falls by a factor 50
    # and S rises by more than 20, while S*beta^2 (the bracket, ln(2 m_e c^2 b^2 g^2 / I) with
    # T_max ~ 2 m_e c^2 b^2 g^2: about 4.0 at 0.1 and 8.6 at 1 for argon) halves.
    bg = np.array([0.1, 1.0])
    s = el.mean_energy_loss(bg, "argon_gas", mass=0.938)
    b2 = bg**2 / (1 + bg**2)
    assert s[0] / s[1] > 20
    assert 1.7 < (s[1] * b2[1]) / (s[0] * b2[0]) < 2.4
    assert np.all(np.diff(el.mean_energy_loss(np.geomspace(0.1, 3, 40), "argon_gas")) < 0)


def test_tmax_tends_to_its_heavy_particle_limit():
    # T_max -> 2 m_e c^2 beta^2 gamma^2 for M >> gamma m_e (PDG Review, same chapter)
    me = physical_constants["electron mass energy equivalent in MeV"][0]
    bg = np.array([0.5, 3.0, 30.0])
    np.testing.assert_allclose(el.max_energy_transfer(bg, 1e4), 2 * me * bg**2, rtol=1e-5)
    # for a muon at betagamma 100 the mass term halves it: 2 gamma m_e/M = 0.97
    assert el.max_energy_transfer(100.0, M_MU) < 0.55 * 2 * me * 1e4


def test_argon_co2_mixture_by_bragg_additivity():
    # PDG Review: mixtures add mass stopping powers by mass fraction; 70/30 by volume with
    # the tables' densities (argon 1.662e-3, CO2 1.842e-3 g/cm^3)
    w_ar = 0.7 * 1.662e-3 / (0.7 * 1.662e-3 + 0.3 * 1.842e-3)
    bg = np.geomspace(0.3, 50, 30)
    want = (w_ar * el.mean_energy_loss(bg, "argon_gas")
            + (1 - w_ar) * el.mean_energy_loss(bg, "co2_gas"))
    np.testing.assert_allclose(el.mean_energy_loss(bg, "argon_co2_70_30"), want, rtol=1e-12)
    m = el.material("argon_co2_70_30")
    assert m.density == pytest.approx(0.7 * 1.662e-3 + 0.3 * 1.842e-3, rel=1e-12)


def test_user_material_and_hypothesis_masses():
    mine = el.Material("my_argon", 0.45059, 188.0, 1.662e-3, 11.9480, 1.7635, 4.4855,
                       0.19714, 2.9618, 0.0)
    np.testing.assert_allclose(el.mean_energy_loss(BG, mine), el.mean_energy_loss(BG, "argon_gas"))
    from particle import Particle  # PDG tables
    assert el.hypothesis_mass("kaon") == pytest.approx(Particle.from_pdgid(321).mass / 1e3)
    assert el.hypothesis_mass("deuteron") == pytest.approx(
        physical_constants["deuteron mass energy equivalent in MeV"][0] / 1e3)


def test_response_table_matches_the_formula():
    r = el.DedxResponse("argon_co2_70_30", scale=2.5, resolution=0.07)
    p = np.geomspace(0.02, 50, 3000)
    for m in (0.000511, 0.13957, 0.493677, 0.938272):
        want = 2.5 * el.mean_energy_loss(p / m, "argon_co2_70_30", mass=m)
        np.testing.assert_allclose(r.expected(p, m), want, rtol=1e-4)


def test_deviation_and_sample_dependent_resolution():
    r = el.DedxResponse("argon_gas", scale=1.0, resolution=0.08, samples_field="n",
                        reference_samples=30, samples_exponent=0.5)
    e = r.expected(0.4, el.hypothesis_mass("kaon"))
    # 120 samples: sigma halves for exponent 0.5 (sqrt(30/120) = 0.5, arithmetic)
    z = r.deviation("kaon", 0.4, e * 1.08, samples=120)
    assert z == pytest.approx(2.0, rel=1e-9)


def test_scale_and_resolution_fit_match_the_normal_mle():
    # For clean Gaussian u = d / B the MLE is scipy.stats.norm.fit (mean, 1/n std)
    rng = np.random.default_rng(3)
    p = rng.uniform(0.3, 0.6, 4000)
    r0 = el.DedxResponse("argon_co2_70_30", scale=1.0, resolution=0.07)
    b = r0.expected(p, el.hypothesis_mass("pion"))
    d = b * rng.normal(2.7, 2.7 * 0.065, p.size)
    fit = el.fit_dedx_response(p, d, r0, hypothesis="pion", clip=None)
    mu, sd = stats.norm.fit(d / b)
    assert fit.scale == pytest.approx(mu, rel=1e-10)
    assert fit.resolution == pytest.approx(sd / mu, rel=1e-10)
    assert abs(fit.scale - 2.7) < 4 * fit.scale.error
    assert fit.response.scale == fit.scale


def test_bad_inputs_are_one_line_errors_naming_the_choices():
    with pytest.raises(ConfigError, match="known: .*argon_gas.*lead") as e:
        el.material("aragon")
    assert "\n" not in str(e.value) and "did you mean 'argon_gas'" in str(e.value)
    with pytest.raises(ConfigError, match="known mass hypothesis; use one of electron, pion"):
        el.hypothesis_mass("kaon+", where="pairing.hypotheses")
    for bad in (0.0, -0.1, float("nan")):
        with pytest.raises(ConfigError, match="resolution must be a positive number"):
            el.DedxResponse(resolution=bad)
    with pytest.raises(InputError, match="no field 'dedx'"):
        el.DedxResponse().deviation_of("kaon", {"pt": [1.0], "eta": [0.0]}.__getitem__)
    assert issubclass(ConfigError, PeaksiftError)


@pytest.mark.parametrize("which", ["built-in mixture", "built-in element", "own material",
                                   "own mixture with samples"])
def test_response_from_dict_gives_it_back(which):
    """DedxResponse.from_dict(to_dict()) == the response, through JSON, for a built-in
    material, an own material (its constants written out) and an own mixture with the
    sample-dependent resolution; the expected dE/dx of the copy equals the original's."""
    import json

    mine = el.Material("my_argon", 0.45059, 188.0, 1.662e-3, 11.9480, 1.7635, 4.4855,
                       0.19714, 2.9618, 0.0)
    resp = {"built-in mixture": el.DedxResponse(),
            "built-in element": el.DedxResponse("silicon", scale=1.3, resolution=0.05),
            "own material": el.DedxResponse(mine, scale=2.0),
            "own mixture with samples": el.DedxResponse(
                el.mixture("my_mix", [(mine, 80.0), ("co2_gas", 20.0)]), field="dedx_trunc",
                samples_field="n_hits", reference_samples=40.0, samples_exponent=0.5)}[which]
    d = json.loads(json.dumps(resp.to_dict()))
    back = el.DedxResponse.from_dict(d)
    assert back == resp
    p = np.array([0.3, 1.0, 5.0])
    assert np.array_equal(back.expected(p, 0.13957), resp.expected(p, 0.13957))
    with pytest.raises(ConfigError, match="not a response"):
        el.DedxResponse.from_dict({"material": "silicon"})
