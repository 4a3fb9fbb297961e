"""Known-particle matching against the particle-data tables (source: the `particle` package)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from peaksift.errors import ConfigError
from peaksift.resonances import fitted_widths, lookup, match_known, pair_charge

particle = pytest.importorskip("particle")
Particle = particle.Particle


def _z():
    return Particle.from_pdgid(23)  # particle package: Z0


def test_z_found_near_its_table_mass():
    z = _z()
    m_z = z.mass / 1000.0  # particle package, MeV -> GeV
    matches = match_known(91.19, error=0.05, resolution=2.0, charge=0)
    assert matches, "the Z must match a peak at 91.19 GeV"
    assert matches[0].name == z.name == "Z0"
    assert matches[0].mass == pytest.approx(m_z, rel=1e-12)
    assert matches[0].width == pytest.approx(z.width / 1000.0, rel=1e-12)


def test_distance_combines_errors_in_quadrature():
    z = _z()
    m_z, gamma = z.mass / 1000.0, z.width / 1000.0
    dm = 0.5 * (z.mass_upper + z.mass_lower) / 1000.0
    err, res = 0.4, 1.8
    sigma = math.sqrt(err**2 + res**2 + (gamma / 2) ** 2 + dm**2)  # module guide formula
    peak = m_z + 2.5 * sigma
    (first, *_) = match_known(peak, error=err, resolution=res, charge=0)
    assert first.name == "Z0"
    assert first.distance_sigma == pytest.approx(2.5, rel=1e-9)
    # just beyond 3 combined sigma the Z no longer matches
    far = match_known(m_z + 3.01 * sigma, error=err, resolution=res, charge=0)
    assert "Z0" not in [k.name for k in far]


def test_nothing_where_no_neutral_state_exists():
    # Independent look at the tables: no neutral, non-nucleus, non-quark entry lies in 150-170 GeV
    # (particle package; its H0 entry lies at 125 GeV, and the top quark is a quark).
    near = [
        p for p in Particle.all()
        if p.mass is not None and 150_000 < p.mass < 170_000 and p.charge == 0
        and not p.pdgid.is_nucleus and not p.pdgid.is_quark
    ]
    assert near == []
    assert match_known(160.0, error=0.3, resolution=1.6, charge=0) == []


def test_charge_must_fit_the_pair():
    # Delta(1232)++ (particle package, PDG id 2224) is doubly charged: a same-sign pair can be
    # one, an opposite-charge pair cannot.
    delta = Particle.from_pdgid(2224)
    m = delta.mass / 1000.0
    same = [k.name for k in match_known(m, error=0.001, resolution=0.001, charge=pair_charge("same"))]
    opp = [k.name for k in match_known(m, error=0.001, resolution=0.001, charge=0)]
    assert delta.name in same
    assert delta.name not in opp
    assert all(abs(k.charge) == 2 for k in match_known(m, error=0.001, charge=2))
    assert all(k.charge == 0 for k in match_known(m, error=0.001, charge=0))


def test_sorted_nearest_first_without_antiparticle_duplicates():
    b0 = Particle.from_pdgid(511)  # particle package: B0, its antiparticle is -511
    out = match_known(b0.mass / 1000.0, error=0.02, resolution=0.05, charge=0)
    d = [k.distance_sigma for k in out]
    assert d == sorted(d)
    ids = [abs(k.pdgid) for k in out]
    assert len(ids) == len(set(ids))
    assert 511 in [k.pdgid for k in out]
    assert -511 not in [k.pdgid for k in out]


def test_table_oddities_skipped():
    # a huge error sweeps a wide range: still no nuclei, quarks or mass-less entries
    out = match_known(91.19, error=10.0, resolution=0.0, charge=None)
    assert out and all(k.mass > 0 for k in out)
    for k in out:
        pid = particle.PDGID(k.pdgid)
        assert not pid.is_nucleus and not pid.is_quark and not pid.is_diquark


def test_pair_charge_rules():
    assert pair_charge("opposite") == 0
    assert pair_charge("same") == 2
    assert pair_charge("any") is None


def test_lookup_by_name_and_suggestion():
    assert lookup("Z0").pdgid == 23
    with pytest.raises(ConfigError, match="did you mean 'Z0'"):
        lookup("Z")


def test_table_read_from_the_particle_file_equals_the_packages_loader():
    # source: the `particle` package's own loader (Particle.all(), its default tables with the
    # nuclei), filtered here by the module guide's rules; peaksift reads only the particle
    # file, into a class of its own, and must neither load nor change Particle's table.
    # A fresh interpreter, so that no earlier test has loaded the class-wide table.
    import subprocess
    import sys

    code = r"""
import json
from particle import Particle, PDGID
from particle.particle.enums import Status
from peaksift.resonances import _table
ours = [(e.name, e.pdgid, e.mass, e.mass_error, e.width, e.charge) for e in _table()]
untouched = not Particle.table_loaded()
ref, seen = [], set()
for p in sorted(Particle.all(), key=lambda q: (abs(int(q.pdgid)), -int(q.pdgid))):
    pid = PDGID(int(p.pdgid))
    if abs(int(pid)) in seen or p.mass is None or not pid.is_valid:
        continue
    if pid.is_nucleus or pid.is_quark or pid.is_diquark or pid.is_generator_specific:
        continue
    if pid.is_technicolor or p.status in (Status.Further, Status.NotInPDT):
        continue
    seen.add(abs(int(pid)))
    up = p.mass_upper or 0.0
    lo = p.mass_lower if p.mass_lower is not None else up
    ref.append((p.name, int(pid), p.mass / 1e3, 0.5 * (up + lo) / 1e3,
                (p.width or 0.0) / 1e3, float(p.charge or 0.0)))
print(json.dumps({"untouched": untouched, "same": ours == ref, "n": len(ours)}))
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    got = __import__("json").loads(out.stdout)
    assert got["untouched"], "building the table loaded or changed Particle's own table"
    assert got["same"] and got["n"] > 200  # exact equality: the same file, the same floats


def test_a_measured_width_keeps_only_states_of_that_width():
    # The phi(1020) as the hadron demo measures it (Voigt, width 4.36 +- 0.22 MeV).  Source:
    # the particle package: phi(1020) width 4.249 +- 0.013 MeV; f(0)(980), 60 +- 50 MeV, sits
    # within its width of the same mass, so the mass rule alone keeps it.
    phi, f0 = Particle.from_name("phi(1020)"), Particle.from_name("f(0)(980)")
    m, dm = phi.mass / 1000.0, 0.067e-3
    by_mass = [k.name for k in match_known(m, error=dm, resolution=0.3e-3, charge=0)]
    assert phi.name in by_mass and f0.name in by_mass
    by_width = match_known(m, error=dm, resolution=0.3e-3, charge=0, width=(4.36e-3, 0.22e-3))
    assert [k.name for k in by_width] == [phi.name]
    # a state whose table range [G - dG-, G + dG+] misses the fit's 3-sigma interval is out
    for k in match_known(m, error=dm, resolution=0.3e-3, charge=0, width=(20e-3, 1e-3)):
        p = Particle.from_pdgid(k.pdgid)
        low, high = (p.width - p.width_lower) / 1e3, (p.width + p.width_upper) / 1e3
        assert low <= 23e-3 and high >= 17e-3


def test_a_narrow_gaussian_peak_is_not_a_broad_state():
    # Z0 (particle package): width 2.4955 GeV.  A Gaussian of sigma 2.0 GeV at its mass is a
    # Z seen with 2 GeV resolution; one of sigma 0.1 +- 0.01 GeV (FWHM 0.31 GeV, twice 0.61)
    # cannot be a state 2.5 GeV wide.
    z = _z()
    m = z.mass / 1000.0
    assert "Z0" in [k.name for k in match_known(m, error=0.05, charge=0, sigma=(2.0, 0.05))]
    assert "Z0" not in [k.name for k in match_known(m, error=0.05, charge=0, sigma=(0.1, 0.01))]


def test_a_gaussian_fitted_to_a_breit_wigner_still_matches_its_state():
    # A narrow Breit-Wigner (the phi(1020)'s table mass and width, particle package) smeared
    # by a 0.3 MeV Gaussian resolution over a flat background, fitted with peaksift's Gaussian:
    # the fitted sigma must not exclude the phi (the width rule's factor 2 margin).
    import peaksift

    phi = Particle.from_name("phi(1020)")
    m0, gamma = phi.mass / 1000.0, phi.width / 1000.0
    rng = np.random.default_rng(11)
    sig = m0 + 0.5 * gamma * rng.standard_cauchy(6000) + rng.normal(0.0, 0.3e-3, 6000)
    masses = np.concatenate([sig, rng.uniform(1.0, 1.04, 4000)])
    masses = masses[(masses > 1.0) & (masses < 1.04)]
    fr = peaksift.fit(masses, window=(1.0, 1.04), bins=80, signal="gaussian",
                      background="bernstein")
    s = fr.to_dict()["parameters"]["sigma"]
    out = match_known(s_mass := fr.to_dict()["parameters"]["mass"]["value"],
                      error=fr.to_dict()["parameters"]["mass"]["error"], resolution=0.3e-3,
                      charge=0, **fitted_widths(fr.to_dict()["parameters"]))
    assert abs(s_mass - m0) < 0.5e-3
    assert 2.3548 * s["value"] < 1.5 * gamma  # the fit really is about the peak's width
    assert phi.name in [k.name for k in out]


def test_fitted_widths_leaves_fixed_parameters_out():
    params = {"width": {"value": 4e-3, "error": 0.0, "fixed": True},
              "sigma": {"value": 3e-4, "error": 6e-5, "fixed": False}}
    assert fitted_widths(params) == {"sigma": (3e-4, 6e-5)}
