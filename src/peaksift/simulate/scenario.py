"""The demo scenario: its constants, the particle masses it takes from the PDG tables, the
:class:`Scenario` parameters and the selection the demo was designed for."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

GENERATOR_VERSION = "peaksift.simulate 1"
DEMO_SEED = 104
DEMO_EVENTS = 300_000
# Read it as ``peaksift.simulate.BLOCK_EVENTS`` (the package attribute) at call time, never
# by importing it from here: tests shrink the block size by setting the package attribute.
BLOCK_EVENTS = 100_000
PROCESSES = ("soft", "z_mumu", "z_ee", "dy_mumu", "dy_ee", "x_mumu")


def _pdg_mass_width(pdgid: int) -> tuple[float, float]:
    from particle import Particle

    p = Particle.from_pdgid(pdgid)
    return p.mass / 1000.0, (p.width or 0.0) / 1000.0


_MZ, _GZ = _pdg_mass_width(23)
_M_MU = _pdg_mass_width(13)[0]
_M_E = _pdg_mass_width(11)[0]


@dataclass(frozen=True)
class Resonance:
    """A resonance of the scenario: mass and width (GeV) and the truncation range."""

    name: str
    mass: float
    width: float
    mass_range: tuple[float, float]
    known_particle: str | None = None


@dataclass(frozen=True)
class Scenario:
    """All parameters of the demo run (the truth file records every one of them)."""

    name: str = "the demo run"
    sqrt_s: float = 10_000.0
    fractions: Mapping[str, float] = field(default_factory=lambda: {
        "z_mumu": 0.20, "z_ee": 0.12, "dy_mumu": 0.055, "dy_ee": 0.03,
        "x_mumu": 0.00018, "soft": 0.59482})
    weighted_fractions: Mapping[str, float] = field(default_factory=lambda: {
        "z_mumu": 0.25, "z_ee": 0.10, "dy_mumu": 0.30, "dy_ee": 0.10, "x_mumu": 0.05,
        "soft": 0.20})
    z: Resonance = Resonance("Z0", _MZ, _GZ, (40.0, 600.0), "Z0 (pdgid 23)")
    x: Resonance = Resonance("X(152)", 152.0, 0.6, (112.0, 192.0), None)
    continuum_range: tuple[float, float] = (40.0, 600.0)
    continuum_a: float = 10.0          # (1 - x)^a
    continuum_b: float = 4.2           # x^-b
    continuum_shoulder_fraction: float = 0.03  # the broad shoulder's share of the continuum
    continuum_shoulder_mass: float = 145.0     # GeV, its mode
    continuum_shoulder_width: float = 0.15     # relative; log-normal width ln(1 + this)
    parent_pt_shape: float = 1.3       # Gamma shape of the parent pT
    parent_pt_scale: float = 6.0       # GeV at m = m_Z, scaling as sqrt(m / m_Z)
    parent_y_sigma: float = 1.7
    muon_eta_max: float = 2.4
    muon_pt_min: float = 5.0
    muon_efficiency: float = 0.96
    muon_res_a: float = 0.010          # sigma_pT/pT constant term at eta = 0
    muon_res_a_eta: float = 0.5        # ... times (1 + this * (|eta| / eta_max)^2)
    muon_res_b: float = 1.5e-4         # per GeV
    electron_eta_max: float = 2.5
    electron_gap: tuple[float, float] = (1.30, 1.45)
    electron_pt_min: float = 7.0
    electron_efficiency: float = 0.92
    electron_res_stochastic: float = 0.10   # GeV^0.5
    electron_res_constant: float = 0.007
    fsr_probability_muon: float = 0.12
    fsr_probability_electron: float = 0.30
    fsr_fraction_range: tuple[float, float] = (1e-3, 0.5)
    prompt_isolation_mean: float = 0.03     # exponential
    fake_isolation_shape: float = 2.0       # Gamma
    fake_isolation_scale: float = 0.25
    fake_muons_per_event: float = 0.30
    fake_electrons_per_event: float = 0.20
    fake_pt_min: float = 3.0
    fake_pt_mean_above_min: float = 4.0
    vertices_mean: float = 22.0
    tracks_per_vertex: float = 0.07
    track_pt_min: float = 0.5
    track_pt_mean_above_min: float = 1.2
    track_eta_max: float = 2.5
    weight_correction_sigma: float = 0.08

    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["fractions"] = dict(self.fractions)
        d["weighted_fractions"] = dict(self.weighted_fractions)
        return d


DEMO = Scenario()

#: the selection the demo was designed for (written to truth.json)
INTENDED_SELECTION: dict[str, Any] = {
    "collection": "muon",
    "cut": "pt > 20 and abs(eta) < 2.4 and isolation < 0.15",
    "charge": "opposite",
    "choose": "leading",
    "search_window_gev": [110.0, 200.0],
    "calibration_window_gev": [70.0, 110.0],
    "note": "opposite-charge isolated muon pairs; the search window excludes the Z peak",
}


def _intended_pass(pt: np.ndarray, eta: np.ndarray, iso: np.ndarray) -> np.ndarray:
    """Which leptons pass :data:`INTENDED_SELECTION`'s cut (for the generator's truth counts)."""
    return (pt > 20.0) & (np.abs(eta) < 2.4) & (iso < 0.15)
