"""The detector response: final-state radiation, muon curvature and electron calorimeter
smearing, acceptance, thresholds and efficiencies, isolation, and fake leptons."""

from __future__ import annotations

import numpy as np

from .layout import _Objects
from .processes import _polar
from .scenario import _M_E, _M_MU, Scenario


def _fsr(rng: np.random.Generator, pt: np.ndarray, prob: float, frac: tuple[float, float]
         ) -> np.ndarray:
    hit = rng.uniform(0.0, 1.0, pt.size) < prob
    x = np.exp(rng.uniform(np.log(frac[0]), np.log(frac[1]), pt.size))
    return np.where(hit, pt * (1.0 - x), pt)


def _muon_detector(rng: np.random.Generator, pt: np.ndarray, eta: np.ndarray, charge: np.ndarray,
                   sc: Scenario) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Curvature smearing: 1/pT is Gaussian around the truth; returns pT, charge, kept mask."""
    a = sc.muon_res_a * (1.0 + sc.muon_res_a_eta * (np.abs(eta) / sc.muon_eta_max) ** 2)
    rel = np.hypot(a, sc.muon_res_b * pt)
    k = (1.0 + rel * rng.normal(0.0, 1.0, pt.size)) / pt
    q = np.where(k < 0, -charge, charge)
    pt_meas = 1.0 / np.abs(k)
    kept = (np.abs(eta) < sc.muon_eta_max) & (pt_meas > sc.muon_pt_min) & (
        rng.uniform(0.0, 1.0, pt.size) < sc.muon_efficiency)
    return pt_meas, q, kept


def _electron_detector(rng: np.random.Generator, pt: np.ndarray, eta: np.ndarray, sc: Scenario
                       ) -> tuple[np.ndarray, np.ndarray]:
    e = pt * np.cosh(eta)
    rel = np.hypot(sc.electron_res_stochastic / np.sqrt(e), sc.electron_res_constant)
    pt_meas = pt * np.abs(1.0 + rel * rng.normal(0.0, 1.0, pt.size))
    ae = np.abs(eta)
    kept = (ae < sc.electron_eta_max) & ~((ae > sc.electron_gap[0]) & (ae < sc.electron_gap[1]))
    kept &= (pt_meas > sc.electron_pt_min) & (rng.uniform(0.0, 1.0, pt.size)
                                              < sc.electron_efficiency)
    return pt_meas, kept


def _detect_pair(rng: np.random.Generator, daughters: tuple[tuple[np.ndarray, ...], ...],
                 lepton: str, sc: Scenario, event: np.ndarray, target: _Objects
                 ) -> list[tuple[np.ndarray, ...]]:
    """The two decay leptons (negative, then positive) through the detector; the kept ones
    are added to ``target`` at ``event``.  Returns per lepton (pt, eta, phi, charge,
    isolation, kept), all of them, for the generator's truth."""
    m_l = _M_MU if lepton == "muon" else _M_E
    n = event.size
    reco = []
    for d, q in zip(daughters, (-1, 1)):
        pt, eta, phi = _polar(d[0], d[1], d[2])
        charge = np.full(n, q, dtype=np.int8)
        if lepton == "muon":
            pt = _fsr(rng, pt, sc.fsr_probability_muon, sc.fsr_fraction_range)
            pt, charge, kept = _muon_detector(rng, pt, eta, charge, sc)
        else:
            pt = _fsr(rng, pt, sc.fsr_probability_electron, sc.fsr_fraction_range)
            pt, kept = _electron_detector(rng, pt, eta, sc)
        iso = rng.exponential(sc.prompt_isolation_mean, n)
        target.add(event[kept], pt=pt[kept], eta=eta[kept], phi=phi[kept],
                   mass=np.full(int(kept.sum()), m_l), charge=charge[kept], isolation=iso[kept])
        reco.append((pt, eta, phi, charge, iso, kept))
    return reco


def _add_fakes(rng: np.random.Generator, n: int, muons: _Objects, electrons: _Objects,
               sc: Scenario) -> None:
    """Fakes: non-prompt leptons with soft spectra and poor isolation, Poisson per event."""
    for target, lam, m_l, eta_max in ((muons, sc.fake_muons_per_event, _M_MU, sc.muon_eta_max),
                                      (electrons, sc.fake_electrons_per_event, _M_E,
                                       sc.electron_eta_max)):
        k = rng.poisson(lam, n)
        ev = np.repeat(np.arange(n), k)
        nf = ev.size
        target.add(ev, pt=sc.fake_pt_min + rng.exponential(sc.fake_pt_mean_above_min, nf),
                   eta=rng.uniform(-eta_max, eta_max, nf), phi=rng.uniform(-np.pi, np.pi, nf),
                   mass=np.full(nf, m_l), charge=rng.choice(np.array([-1, 1], np.int8), nf),
                   isolation=rng.gamma(sc.fake_isolation_shape, sc.fake_isolation_scale, nf))
