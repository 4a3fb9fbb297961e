"""Checks of peaksift.kinematics against outside references (named beside each check)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import vector
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from particle import Particle
from scipy.constants import physical_constants

from peaksift import kinematics as kin
from peaksift.errors import DataWarning


def _sum(a, b):
    return tuple(x + y for x, y in zip(a, b))


def test_back_to_back_massless_gives_twice_the_energy():
    # Two massless objects of energy E each, back to back: m = 2E (common practice).
    e = np.array([1.0, 45.6, 1000.0, 6500.0])
    for eta in (0.0, 1.3, -2.4):
        a = kin.to_cartesian(e / np.cosh(eta), eta, 0.3, 0.0)
        b = kin.to_cartesian(e / np.cosh(eta), -eta, 0.3 + np.pi, 0.0)
        px, py, pz, en = _sum(a, b)
        np.testing.assert_allclose(kin.invariant_mass(en, px, py, pz), 2 * e, rtol=1e-12)
        np.testing.assert_allclose(
            kin.pair_mass(e / np.cosh(eta), eta, 0.3, 0, e / np.cosh(eta), -eta, 0.3 + np.pi, 0),
            2 * e, rtol=1e-12)


def test_collinear_light_pair_keeps_precision():
    # Two collinear massless objects have m = 0 exactly and a pair at small opening angle
    # theta has m^2 = 2 E1 E2 (1 - cos theta) (common practice); the factored pair formula
    # must reproduce it where E^2 - p^2 would lose all digits.
    pt, dphi = 1000.0, 1e-7
    m = kin.pair_mass(pt, 0.0, 0.0, 0.0, pt, 0.0, dphi, 0.0)
    np.testing.assert_allclose(m, np.sqrt(2 * pt * pt * (2 * np.sin(dphi / 2) ** 2)), rtol=1e-9)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    pt1=st.floats(1.0, 500.0), eta1=st.floats(-3, 3), phi1=st.floats(-3.1, 3.1),
    m1=st.floats(0.0, 100.0), pt2=st.floats(1.0, 500.0), eta2=st.floats(-3, 3),
    phi2=st.floats(-3.1, 3.1), m2=st.floats(0.0, 100.0),
    beta=st.tuples(st.floats(-0.6, 0.6), st.floats(-0.6, 0.6), st.floats(-0.6, 0.6)),
)
def test_mass_is_invariant_under_boosts(pt1, eta1, phi1, m1, pt2, eta2, phi2, m2, beta):
    # Invariant mass is Lorentz invariant (a property of special relativity, no number
    # needed); the boost itself is done by the `vector` package, outside this project.
    # Compared as m^2 relative to E^2: near a lightlike pair (m -> 0) the mass itself is
    # ill-conditioned (rounding eps E^2 in m^2 is sqrt(eps) E in m), its square is not.
    assume(sum(b * b for b in beta) < 0.9)  # a physical boost, |beta| < 1
    a = vector.obj(pt=pt1, eta=eta1, phi=phi1, mass=m1)
    b = vector.obj(pt=pt2, eta=eta2, phi=phi2, mass=m2)
    pa = kin.to_cartesian(pt1, eta1, phi1, m1)
    pb = kin.to_cartesian(pt2, eta2, phi2, m2)
    px, py, pz, e = _sum(pa, pb)
    m_rest = kin.invariant_mass(e, px, py, pz)
    boost = vector.obj(x=beta[0], y=beta[1], z=beta[2])
    ab, bb = a.boost_beta3(boost), b.boost_beta3(boost)
    s = ab + bb
    m_boosted = kin.invariant_mass(s.E, s.px, s.py, s.pz)
    scale2 = e * e + s.E * s.E
    assert abs(m_boosted**2 - m_rest**2) <= 1e-12 * scale2
    pm = kin.pair_mass(ab.pt, ab.eta, ab.phi, ab.mass, bb.pt, bb.eta, bb.phi, bb.mass)
    assert abs(pm**2 - m_rest**2) <= 1e-12 * scale2


def test_antiproton_threshold_is_six_proton_masses():
    # p + p -> p + p + p + pbar on a fixed target needs beam kinetic energy 6 m_p ~ 5.63 GeV
    # (textbook worked example: Griffiths, Introduction to Elementary Particles, 2nd ed., 2008).
    # Proton mass from scipy.constants (CODATA).
    mp = physical_constants["proton mass energy equivalent in MeV"][0] / 1000.0
    t = kin.threshold_beam_energy(4 * mp, mp, mp, kinetic=True)
    np.testing.assert_allclose(t, 6 * mp, rtol=1e-12)
    assert 5.62 < float(t) < 5.64  # "~5.63 GeV", from memory
    e_tot = kin.threshold_beam_energy(4 * mp, mp, mp)
    np.testing.assert_allclose(e_tot, 7 * mp, rtol=1e-12)
    # and that beam indeed reaches sqrt(s) = 4 m_p
    np.testing.assert_allclose(kin.sqrt_s_fixed_target(t, mp, mp, kinetic=True), 4 * mp, rtol=1e-12)
    np.testing.assert_allclose(kin.sqrt_s_fixed_target(e_tot, mp, mp), 4 * mp, rtol=1e-12)


def test_collider_sqrt_s():
    # Symmetric head-on massless beams: sqrt(s) = 2E; asymmetric: 2 sqrt(E1 E2) (common practice).
    np.testing.assert_allclose(kin.sqrt_s_collider(6500.0, 6500.0), 13000.0, rtol=1e-14)
    np.testing.assert_allclose(kin.sqrt_s_collider(27.5, 920.0), 2 * np.sqrt(27.5 * 920.0))
    # massive beams at rest give s = (m1 + m2)^2 (PDG Review, "Kinematics")
    np.testing.assert_allclose(kin.sqrt_s_collider(1.0, 2.0, 1.0, 2.0), 3.0)


def test_lepton_masses_match_codata():
    # The lepton masses peaksift uses (GeV) against scipy.constants.physical_constants
    # (CODATA, MeV): the known-particle table (peaksift.resonances.lookup) and the masses the
    # demo generator writes for its muons and electrons (peaksift.simulate.generate, stored
    # as float32, so 1e-7 relative).  CODATA and the PDG tables agree to far better than
    # 1e-6 for e and mu; the tau mass is known to ~1e-4 only.
    from peaksift import resonances, simulate

    codata = {name: physical_constants[f"{name} mass energy equivalent in MeV"][0] / 1000.0
              for name in ("electron", "muon", "tau")}
    for table_name, name, tol in [("e-", "electron", 1e-6), ("mu-", "muon", 1e-6),
                                  ("tau-", "tau", 1e-4)]:
        got = resonances.lookup(table_name).mass
        assert abs(got - codata[name]) / codata[name] < tol, (name, got, codata[name])
    tb = simulate.generate(50, seed=3)
    for name in ("muon", "electron"):
        m = np.unique(tb[name].combine_chunks().flatten().field("mass").to_numpy())
        assert m.size == 1, (name, m)
        assert abs(float(m[0]) - codata[name]) / codata[name] < 1e-7, (name, m, codata[name])


def test_two_body_momentum():
    # Z -> mu mu: p* = (M/2) sqrt(1 - 4 m^2/M^2) (PDG Review, "Kinematics", two-body decays);
    # masses from the particle package.
    mz = Particle.from_pdgid(23).mass / 1000
    mmu = Particle.from_pdgid(13).mass / 1000
    np.testing.assert_allclose(kin.two_body_momentum(mz, mmu, mmu),
                               mz / 2 * np.sqrt(1 - 4 * mmu**2 / mz**2), rtol=1e-13)
    # pi+ -> mu+ nu: p* = (m_pi^2 - m_mu^2) / (2 m_pi) ~ 29.79 MeV (from memory); pion mass
    # from the particle package, muon mass from scipy.constants (CODATA)
    mpi = Particle.from_pdgid(211).mass
    mmu_codata = physical_constants["muon mass energy equivalent in MeV"][0]
    p = kin.two_body_momentum(mpi, mmu_codata, 0.0)
    np.testing.assert_allclose(p, (mpi**2 - mmu_codata**2) / (2 * mpi), rtol=1e-12)
    assert 29.7 < float(p) < 29.9
    assert np.isnan(kin.two_body_momentum(1.0, 0.6, 0.6))


def test_rapidity_pseudorapidity_angles():
    # For massless objects y = eta (PDG Review, "Kinematics").
    px, py, pz, e = kin.to_cartesian([10.0, 20.0], [0.5, -2.0], [0.1, 3.0], [0.0, 0.0])
    np.testing.assert_allclose(kin.rapidity(e, pz), [0.5, -2.0], rtol=1e-12)
    np.testing.assert_allclose(kin.pseudorapidity(px, py, pz), [0.5, -2.0], rtol=1e-12)
    # Delta phi wraps into [-pi, pi) (common practice)
    np.testing.assert_allclose(kin.delta_phi(3.0, -3.0), 6.0 - 2 * np.pi)
    np.testing.assert_allclose(kin.delta_phi(-3.0, 3.0), 2 * np.pi - 6.0)
    np.testing.assert_allclose(kin.delta_r(0.0, 3.0, 0.3, -3.0), np.hypot(0.3, 2 * np.pi - 6.0))
    # Transverse mass of back-to-back pT = 40 GeV objects: 2 pT = 80 (common practice: Jacobian
    # edge at the parent mass).
    np.testing.assert_allclose(kin.transverse_mass(40.0, 0.0, 40.0, np.pi), 80.0)


def test_negative_mass_squared_policy():
    # Rounding-level negative m^2 -> 0; genuinely negative -> NaN with one DataWarning.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert kin.invariant_mass(100.0, 0.0, 0.0, 100.0 * (1 + 1e-15)) == 0.0
    with pytest.warns(DataWarning, match="2 of 3 four-vectors"):
        m = kin.invariant_mass([10.0, 10.0, 10.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0],
                               [11.0, 12.0, 6.0])
    assert np.isnan(m[0]) and np.isnan(m[1]) and m[2] == pytest.approx(8.0)


def test_cartesian_round_trip():
    rng = np.random.default_rng(1)
    pt, eta, phi, m = rng.uniform(1, 100, 50), rng.uniform(-3, 3, 50), rng.uniform(-3, 3, 50), \
        rng.uniform(0, 10, 50)
    back = kin.from_cartesian(*kin.to_cartesian(pt, eta, phi, m)[:3], kin.to_cartesian(pt, eta, phi, m)[3])
    for a, b in zip(back, (pt, eta, phi, m)):
        np.testing.assert_allclose(a, b, rtol=1e-8, atol=1e-7)


# ------------------------------------------------- polar pair formulas vs 60 digits
def _dec_sin_cos(x):
    """sin and cos of a Decimal by their Taylor series (written here; 60 digits)."""
    import decimal

    s, c, term_s, term_c, k = decimal.Decimal(0), decimal.Decimal(0), x, decimal.Decimal(1), 0
    eps = decimal.Decimal(10) ** -70
    while abs(term_s) > eps or abs(term_c) > eps:
        s += term_s
        c += term_c
        term_s = -term_s * x * x / ((2 * k + 2) * (2 * k + 3))
        term_c = -term_c * x * x / ((2 * k + 1) * (2 * k + 2))
        k += 1
    return s, c


def _reference_pair(pt1, eta1, phi1, m1, pt2, eta2, phi2, m2):
    """Mass, pT and rapidity of the summed four-vector from Cartesian components, all in
    60-digit decimal arithmetic (PDG Review, "Kinematics": px = pT cos phi, py = pT sin phi,
    pz = pT sinh eta, E^2 = (pT cosh eta)^2 + m^2; m^2 = E^2 - |p|^2,
    y = ln((E + pz)/(E - pz)) / 2), independent of peaksift.kinematics."""
    import decimal

    with decimal.localcontext() as ctx:
        ctx.prec = 60
        tot = [decimal.Decimal(0)] * 4
        for pt, eta, phi, m in ((pt1, eta1, phi1, m1), (pt2, eta2, phi2, m2)):
            pt, eta, phi, m = (decimal.Decimal(float(v)) for v in (pt, eta, phi, m))
            s, c = _dec_sin_cos(phi)
            x = eta.exp()
            sh, ch = (x - 1 / x) / 2, (x + 1 / x) / 2
            comp = (pt * c, pt * s, pt * sh, ((pt * ch) ** 2 + m * m).sqrt())
            tot = [a + b for a, b in zip(tot, comp)]
        px, py, pz, e = tot
        msq = e * e - px * px - py * py - pz * pz
        return (float(msq.sqrt()), float((px * px + py * py).sqrt()),
                float(((e + pz) / (e - pz)).ln() / 2))


def _check_pairs(cases, rtol_mass, rtol_pt, atol_y):
    cols = np.array(cases, dtype=float).T
    mass, pt, y = kin.pair_kinematics(*cols)
    ref = np.array([_reference_pair(*c) for c in cases]).T
    np.testing.assert_allclose(mass, ref[0], rtol=rtol_mass, atol=0)
    np.testing.assert_allclose(pt, ref[1], rtol=rtol_pt, atol=0)
    np.testing.assert_allclose(y, ref[2], rtol=0, atol=atol_y)
    np.testing.assert_array_equal(kin.pair_mass(*cols), mass)


def test_pair_kinematics_random_pairs_match_60_digit_cartesian():
    # Ordinary pairs, massless and massive (masses: 0, e, mu, tau from memory; a heavy
    # object), both forward and central; reference: 60-digit Cartesian sums (above).
    rng = np.random.default_rng(11)
    masses = [0.0, 0.000511, 0.10566, 1.777, 91.19]
    cases = [(rng.uniform(0.5, 500), rng.uniform(-4.5, 4.5), rng.uniform(-np.pi, np.pi),
              rng.choice(masses), rng.uniform(0.5, 500), rng.uniform(-4.5, 4.5),
              rng.uniform(-np.pi, np.pi), rng.choice(masses)) for _ in range(400)]
    _check_pairs(cases, rtol_mass=1e-14, rtol_pt=1e-14, atol_y=1e-14)


def test_pair_kinematics_near_collinear_and_back_to_back():
    # Nearly collinear pairs, where E^2 - |p|^2 in double precision loses up to all digits
    # (common practice: use a cancellation-free form), against the 60-digit reference.
    cases = []
    for m in (0.0, 0.000511, 0.10566):
        for d in (1e-3, 1e-5, 1e-7):
            # opening in azimuth only (also across phi = +-pi), and in pseudorapidity only
            cases += [(40.0, 0.7, 0.3, m, 25.0, 0.7, 0.3 + d, m),
                      (40.0, -1.9, np.pi - d / 2, m, 60.0, -1.9, -np.pi + d / 2, m)]
    # back to back with equal pT: the pair pT is tiny and must keep its relative precision
    cases += [(45.0, 0.4, 0.2, 0.10566, 45.0 * (1 + 1e-9), -1.1, 0.2 - np.pi, 0.10566),
              (30.0, 0.0, 0.0, 0.0, 30.0, 0.0, np.pi * (1 - 1e-8), 0.0)]
    _check_pairs(cases, rtol_mass=1e-14, rtol_pt=1e-13, atol_y=1e-14)
    # an opening d in pseudorapidity only: the mass is as sensitive to an ulp of eta as
    # |eta| / d (the conditioning of the problem), so the tolerance scales with it
    for d in (1e-3, 1e-5, 1e-7):
        for m in (0.0, 0.10566, 5.0):
            c = (40.0, 2.3, 0.3, m, 25.0, 2.3 + d, 0.3, m)
            got = kin.pair_kinematics(*c)
            ref = _reference_pair(*c)
            assert abs(got[0] - ref[0]) <= 10 * 2.3 / d * 2.2e-16 * ref[0], (c, got, ref)
            assert abs(got[1] - ref[1]) <= 1e-14 * ref[1]
            assert abs(got[2] - ref[2]) <= 1e-14


def test_half_angle_squares_match_numpy():
    # sin^2(x/2) and cos^2(x/2) against numpy's libm sin/cos (an outside implementation):
    # full relative precision on |x| <= 2 pi (azimuth differences of angles in [-pi, pi]),
    # including the points where the range reduction switches; beyond 2 pi whole turns are
    # removed first, which leaves an absolute error of a few ulp of pi.
    x = np.concatenate([np.linspace(-2 * np.pi, 2 * np.pi, 20001),
                        np.array([np.pi / 2, np.pi, 1.5 * np.pi, 2 * np.pi]) * (1 + 1e-16),
                        [0.0, 1e-300, -1e-12, -2 * np.pi, 2 * np.pi]])
    s2, c2 = kin.half_angle_squares(x)
    np.testing.assert_allclose(s2, np.sin(x / 2) ** 2, rtol=2e-15, atol=1e-300)
    np.testing.assert_allclose(c2, np.cos(x / 2) ** 2, rtol=2e-15, atol=1e-300)
    far = np.concatenate([np.linspace(2 * np.pi, 9 * np.pi, 7001), np.arange(2, 5) * 2 * np.pi])
    far = np.concatenate([far, -far])
    s2, c2 = kin.half_angle_squares(far)
    np.testing.assert_allclose(s2, np.sin(far / 2) ** 2, rtol=0, atol=4e-15)
    np.testing.assert_allclose(c2, np.cos(far / 2) ** 2, rtol=0, atol=4e-15)
    np.testing.assert_allclose(s2 + c2, 1.0, rtol=4e-16)
