"""The demo scenario: an invented collider run with a calibration peak and one invented resonance.

Which function to use
---------------------
* :func:`write_demo` -- write the demo data set (Parquet files plus ``truth.json``) to a
  directory, in bounded memory whatever the size (``peaksift demo OUTDIR`` calls it).
* :func:`generate` -- one in-memory ``pyarrow.Table`` of events (for tests and notebooks).
* :data:`DEMO` -- the default :class:`Scenario`; vary it with ``dataclasses.replace``.

What is simulated ("the demo run", proton-proton-like collisions at sqrt(s) = 10 TeV)
-------------------------------------------------------------------------------------
Every event has one hard process, drawn with the probabilities ``Scenario.fractions``:

* ``z_mumu``, ``z_ee`` -- the standard candle: the Z boson with mass and width from the
  ``particle`` package (PDG tables), decaying to a muon or electron pair;
* ``dy_mumu``, ``dy_ee`` -- a smoothly falling opposite-charge continuum with
  :math:`dN/dm \\propto (1 - x)^a / x^b`, :math:`x = m/\\sqrt s`;
* ``x_mumu`` -- one **invented** narrow resonance (default 152 GeV, width 1.5 GeV) decaying
  to a muon pair; there is no known particle at that mass;
* ``soft`` -- no hard process, only soft and fake objects.

Resonance masses follow the relativistic Breit-Wigner
:math:`f(m) \\propto 1/[(m^2 - M^2)^2 + M^2\\Gamma^2]` (PDG Review, "Resonances"), truncated
to ``Resonance.mass_range``.  The parent gets a transverse momentum (Gamma distribution), a
rapidity (Gaussian) and an azimuth, decays isotropically in its rest frame
(:func:`peaksift.kinematics.two_body_momentum`) and the daughters are boosted to the lab.

The detector: final-state radiation (a lepton loses a log-uniform fraction of its momentum
with a small probability), curvature smearing for muons with
:math:`\\sigma_{p_T}/p_T = a(\\eta) \\oplus b\\,p_T`, calorimeter smearing for electrons
:math:`\\sigma_E/E = s/\\sqrt{E} \\oplus c`, acceptance in :math:`|\\eta|` (electrons also lose
the barrel-endcap gap), reconstruction thresholds and efficiencies, and a relative isolation
(small for leptons from the hard process, large for fakes).  Every event also gets fake
muons and electrons and soft tracks, so pair combinatorics are real.

File layout: ``muon`` and ``electron`` are list-of-struct columns (pt, eta, phi, mass,
charge, isolation); ``track`` is stored as sibling columns ``track_pt, track_eta, track_phi,
track_charge`` without a mass field (read as massless); per-event ``run``, ``event``,
``n_vertices``.  The simulated-sample variant (``weighted=True``) generates the processes in
flatter proportions, adds a per-event ``weight`` (the ratio of true to generated process
fractions times an efficiency-correction factor near 1, so weighted sums reproduce the
unweighted yields) and the generator truth ``process`` and ``true_mass``.

Determinism: events are generated in blocks of :data:`BLOCK_EVENTS`; block ``k`` draws from
``numpy.random.default_rng(SeedSequence([seed, k]))``.  The same seed and number of events
give the same arrays, however the output is split into files and row groups.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import kinematics as kin
from .errors import InputError

__all__ = [
    "BLOCK_EVENTS",
    "DEMO",
    "DEMO_EVENTS",
    "DEMO_SEED",
    "PROCESSES",
    "SIGNAL_SAMPLE_MASSES",
    "Resonance",
    "Scenario",
    "breit_wigner_pdf",
    "generate",
    "generate_signal_sample",
    "write_demo",
    "write_signal_samples",
]

GENERATOR_VERSION = "peaksift.simulate 1"
DEMO_SEED = 104
DEMO_EVENTS = 300_000
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
    continuum_b: float = 3.6           # x^-b
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


# --------------------------------------------------------------------------- samplers


def breit_wigner_pdf(m: np.ndarray, mass: float, width: float,
                     mass_range: tuple[float, float] | None = None) -> np.ndarray:
    r"""The generator's relativistic Breit-Wigner density in the mass ``m``.

    .. math:: f(m) = \frac{k}{(m^2 - M^2)^2 + M^2\Gamma^2},\qquad
              k = \frac{2\sqrt2\,M\Gamma\gamma}{\pi\sqrt{M^2+\gamma}},\ \gamma=\sqrt{M^2(M^2+\Gamma^2)}

    (PDG Review, "Resonances"; the normalisation k holds on :math:`m \in [0, \infty)`).
    With ``mass_range`` the density is renormalised (numerically, ``scipy.integrate.quad``)
    to that range and is zero outside it.
    """
    m = np.asarray(m, dtype=float)
    g = np.sqrt(mass**2 * (mass**2 + width**2))
    k = 2.0 * np.sqrt(2.0) * mass * width * g / (np.pi * np.sqrt(mass**2 + g))
    f = k / ((m * m - mass * mass) ** 2 + mass * mass * width * width)
    if mass_range is None:
        return f
    from scipy.integrate import quad

    lo, hi = mass_range
    norm = quad(lambda x: k / ((x * x - mass * mass) ** 2 + mass * mass * width * width), lo, hi,
                points=[mass], limit=200)[0]
    return np.where((m >= lo) & (m <= hi), f / norm, 0.0)


def _sample_breit_wigner(rng: np.random.Generator, n: int, res: Resonance) -> np.ndarray:
    """Exact sampling of :func:`breit_wigner_pdf` on ``res.mass_range``.

    In ``s = m^2`` the density is ``1/[(s-M^2)^2+M^2G^2] / (2 sqrt(s))``: propose from the
    truncated Cauchy in ``s`` by inverse CDF, accept with probability ``sqrt(s_lo / s)``.
    """
    M, G = res.mass, res.width
    s_lo, s_hi = res.mass_range[0] ** 2, res.mass_range[1] ** 2
    u_lo = np.arctan((s_lo - M * M) / (M * G))
    u_hi = np.arctan((s_hi - M * M) / (M * G))
    out = np.empty(0)
    while out.size < n:
        k = int((n - out.size) * 1.3) + 16
        s = M * M + M * G * np.tan(rng.uniform(u_lo, u_hi, k))
        acc = rng.uniform(0.0, 1.0, k) < np.sqrt(s_lo / s)
        out = np.concatenate([out, np.sqrt(s[acc])])
    return out[:n]


def _continuum_inverse_cdf(sc: Scenario) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = sc.continuum_range
    m = np.geomspace(lo, hi, 8193)
    x = m / sc.sqrt_s
    pdf = (1.0 - x) ** sc.continuum_a / x**sc.continuum_b
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(m))])
    return cdf / cdf[-1], m


def _sample_continuum(rng: np.random.Generator, n: int, table: tuple[np.ndarray, np.ndarray]
                      ) -> np.ndarray:
    cdf, m = table
    return np.interp(rng.uniform(0.0, 1.0, n), cdf, m)


def _decay(rng: np.random.Generator, mass: np.ndarray, sc: Scenario, m_daughter: float
           ) -> tuple[np.ndarray, ...]:
    """Parent kinematics and isotropic two-body decay; returns the two daughters' (px,py,pz,E)."""
    n = mass.size
    scale = sc.parent_pt_scale * np.sqrt(mass / _MZ)
    pt = rng.gamma(sc.parent_pt_shape, 1.0, n) * scale
    y = rng.normal(0.0, sc.parent_y_sigma, n)
    y_max = np.log(sc.sqrt_s / mass)
    y = np.clip(y, -y_max, y_max)
    phi = rng.uniform(-np.pi, np.pi, n)
    mt = np.hypot(pt, mass)
    e_par = mt * np.cosh(y)
    bx, by, bz = pt * np.cos(phi) / e_par, pt * np.sin(phi) / e_par, mt * np.sinh(y) / e_par
    gamma = e_par / mass
    # rest frame: isotropic direction
    p_star = kin.two_body_momentum(mass, m_daughter, m_daughter)
    e_star = np.hypot(p_star, m_daughter)
    cost = rng.uniform(-1.0, 1.0, n)
    sint = np.sqrt(1.0 - cost * cost)
    ph = rng.uniform(-np.pi, np.pi, n)
    qx, qy, qz = p_star * sint * np.cos(ph), p_star * sint * np.sin(ph), p_star * cost
    out = []
    for sign in (1.0, -1.0):
        px, py, pz = sign * qx, sign * qy, sign * qz
        bp = bx * px + by * py + bz * pz
        # Lorentz boost by beta = p/E of the parent; (gamma - 1)/beta^2 = gamma^2/(gamma + 1)
        c = gamma * gamma / (gamma + 1.0) * bp + gamma * e_star
        out.append((px + c * bx, py + c * by, pz + c * bz, gamma * (e_star + bp)))
    return out[0], out[1]


def _polar(px: np.ndarray, py: np.ndarray, pz: np.ndarray) -> tuple[np.ndarray, ...]:
    pt = np.hypot(px, py)
    return pt, np.arcsinh(pz / pt), np.arctan2(py, px)


# --------------------------------------------------------------------------- detector


@dataclass
class _Objects:
    """Flat arrays of one collection while an event block is assembled."""

    event: list[np.ndarray] = field(default_factory=list)
    cols: dict[str, list[np.ndarray]] = field(default_factory=dict)

    def add(self, event: np.ndarray, **cols: np.ndarray) -> None:
        self.event.append(np.asarray(event, dtype=np.int64))
        for k, v in cols.items():
            self.cols.setdefault(k, []).append(np.asarray(v))


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


def _intended_pass(pt: np.ndarray, eta: np.ndarray, iso: np.ndarray) -> np.ndarray:
    return (pt > 20.0) & (np.abs(eta) < 2.4) & (iso < 0.15)


def _block(rng: np.random.Generator, n: int, first_event: int, sc: Scenario, weighted: bool,
           truth: bool, cont: tuple[np.ndarray, np.ndarray]) -> tuple[pa.Table, dict[str, Any]]:
    fr = sc.weighted_fractions if weighted else sc.fractions
    probs = np.array([fr[p] for p in PROCESSES], dtype=float)
    probs /= probs.sum()
    proc = rng.choice(len(PROCESSES), size=n, p=probs).astype(np.int8)
    true_mass = np.full(n, np.nan)
    muons, electrons = _Objects(), _Objects()
    stats: dict[str, Any] = {p: {"generated": int(np.count_nonzero(proc == i)),
                                 "both_leptons_selected": 0, "selected_in_search_window": 0}
                             for i, p in enumerate(PROCESSES)}
    lo_w, hi_w = INTENDED_SELECTION["search_window_gev"]
    for code, name in enumerate(PROCESSES):
        if name == "soft":
            continue
        idx = np.flatnonzero(proc == code)
        if idx.size == 0:
            continue
        if name.startswith("dy"):
            mass = _sample_continuum(rng, idx.size, cont)
        else:
            mass = _sample_breit_wigner(rng, idx.size, sc.z if name.startswith("z") else sc.x)
        true_mass[idx] = mass
        lepton = "muon" if name.endswith("mumu") else "electron"
        m_l = _M_MU if lepton == "muon" else _M_E
        d1, d2 = _decay(rng, mass, sc, m_l)
        reco = []
        for d, q in ((d1, -1), (d2, 1)):
            pt, eta, phi = _polar(d[0], d[1], d[2])
            charge = np.full(idx.size, q, dtype=np.int8)
            if lepton == "muon":
                pt = _fsr(rng, pt, sc.fsr_probability_muon, sc.fsr_fraction_range)
                pt, charge, kept = _muon_detector(rng, pt, eta, charge, sc)
            else:
                pt = _fsr(rng, pt, sc.fsr_probability_electron, sc.fsr_fraction_range)
                pt, kept = _electron_detector(rng, pt, eta, sc)
            iso = rng.exponential(sc.prompt_isolation_mean, idx.size)
            target = muons if lepton == "muon" else electrons
            target.add(idx[kept], pt=pt[kept], eta=eta[kept], phi=phi[kept],
                       mass=np.full(int(kept.sum()), m_l), charge=charge[kept], isolation=iso[kept])
            reco.append((pt, eta, phi, charge, iso, kept))
        (p1, e1, f1, c1, i1, k1), (p2, e2, f2, c2, i2, k2) = reco
        both = k1 & k2 & _intended_pass(p1, e1, i1) & _intended_pass(p2, e2, i2) & (c1 != c2)
        if lepton == "muon":
            mreco = kin.pair_mass(p1, e1, f1, m_l, p2, e2, f2, m_l)
            stats[name]["both_leptons_selected"] = int(both.sum())
            stats[name]["selected_in_search_window"] = int(
                (both & (mreco >= lo_w) & (mreco <= hi_w)).sum())
    # fakes: non-prompt leptons with soft spectra and poor isolation
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
    nvtx = rng.poisson(sc.vertices_mean, n).astype(np.int16)
    kt = rng.poisson(sc.tracks_per_vertex * nvtx)
    ev = np.repeat(np.arange(n), kt)
    nt = ev.size
    tracks = _Objects()
    tracks.add(ev, pt=sc.track_pt_min + rng.exponential(sc.track_pt_mean_above_min, nt),
               eta=rng.uniform(-sc.track_eta_max, sc.track_eta_max, nt),
               phi=rng.uniform(-np.pi, np.pi, nt),
               charge=rng.choice(np.array([-1, 1], np.int8), nt))
    cols: dict[str, pa.Array] = {}
    gidx = first_event + np.arange(n, dtype=np.int64)
    cols["run"] = pa.array((1000 + gidx // 1_000_000).astype(np.int32))
    cols["event"] = pa.array(gidx)
    cols["n_vertices"] = pa.array(nvtx)
    for name, objs in (("muon", muons), ("electron", electrons)):
        offsets, flat = _assemble(objs, n)
        struct = pa.StructArray.from_arrays(
            [pa.array(_round_mantissa(flat[k], _PRECISION[k])) for k in ("pt", "eta", "phi")]
            + [pa.array(flat["mass"].astype(np.float32)),
               pa.array(flat["charge"].astype(np.int8)),
               pa.array(_round_mantissa(flat["isolation"], _PRECISION["isolation"]))],
            ["pt", "eta", "phi", "mass", "charge", "isolation"])
        cols[name] = pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), struct)
    offsets, flat = _assemble(tracks, n)
    off = pa.array(offsets.astype(np.int32))
    for k in ("pt", "eta", "phi"):
        cols[f"track_{k}"] = pa.ListArray.from_arrays(
            off, pa.array(_round_mantissa(flat[k], _PRECISION["track"])))
    cols["track_charge"] = pa.ListArray.from_arrays(off, pa.array(flat["charge"].astype(np.int8)))
    if weighted:
        tf = np.array([sc.fractions[p] for p in PROCESSES], dtype=float)
        tf /= tf.sum()
        corr = np.clip(rng.normal(1.0, sc.weight_correction_sigma, n), 0.5, 1.5)
        cols["weight"] = pa.array((tf / probs)[proc] * corr)
    if truth or weighted:
        cols["process"] = pa.array(proc)
        cols["true_mass"] = pa.array(true_mass.astype(np.float32))
    return pa.table(cols), stats


def _round_mantissa(x: np.ndarray, bits: int) -> np.ndarray:
    """float32 rounded to ``bits`` mantissa bits (relative precision 2**-bits), as compact
    event formats store detector quantities; the zeroed low bits compress well."""
    u = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32)
    drop = 23 - int(bits)
    half = np.uint32(1 << (drop - 1))
    mask = np.uint32((0xFFFFFFFF >> drop) << drop)
    return ((u + half) & mask).view(np.float32)


# mantissa bits kept per stored field (2**-14 = 6e-5 relative, far below the resolutions)
_PRECISION = {"pt": 14, "eta": 14, "phi": 14, "isolation": 10, "track": 11}


def _assemble(objs: _Objects, n: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """Sort objects by event, then by decreasing pT; return offsets and flat columns."""
    if not objs.event:
        return np.zeros(n + 1, np.int64), {}
    ev = np.concatenate(objs.event)
    flat = {k: np.concatenate(v) for k, v in objs.cols.items()}
    order = np.lexsort((-flat["pt"], ev))
    ev = ev[order]
    flat = {k: v[order] for k, v in flat.items()}
    offsets = np.concatenate([[0], np.cumsum(np.bincount(ev, minlength=n))])
    return offsets, flat


def _blocks(n_events: int, seed: int, sc: Scenario, weighted: bool, truth: bool
            ) -> Iterator[tuple[pa.Table, dict[str, Any]]]:
    cont = _continuum_inverse_cdf(sc)
    for k, start in enumerate(range(0, n_events, BLOCK_EVENTS)):
        n = min(BLOCK_EVENTS, n_events - start)
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), k]))
        yield _block(rng, n, start, sc, weighted, truth, cont)


def _check_size(n_events: Any, seed: Any) -> tuple[int, int]:
    try:
        n = int(n_events)
    except (TypeError, ValueError):
        raise InputError(f"number of events must be a whole number, got {n_events!r}") from None
    if n < 1 or n != n_events:
        raise InputError(f"number of events must be a positive whole number, got {n_events!r}")
    try:
        s = int(seed)
    except (TypeError, ValueError):
        raise InputError(f"seed must be a whole number, got {seed!r}") from None
    if s < 0:
        raise InputError(f"seed must be zero or positive, got {seed!r}")
    return n, s


def generate(n_events: int, *, seed: int = DEMO_SEED, weighted: bool = False, truth: bool = False,
             scenario: Scenario = DEMO) -> pa.Table:
    """Generate ``n_events`` demo events in memory as a ``pyarrow.Table``.

    Parameters
    ----------
    n_events : int
    seed : int
        Same seed and ``n_events`` give identical arrays.
    weighted : bool
        The simulated-sample variant (flatter process mix, ``weight``, truth columns).
    truth : bool
        Also add the generator truth columns ``process`` (index into :data:`PROCESSES`) and
        ``true_mass`` (NaN for ``soft`` events) to an unweighted sample.
    scenario : Scenario
    """
    n, s = _check_size(n_events, seed)
    return pa.concat_tables([t for t, _ in _blocks(n, s, scenario, weighted, truth)])


def _writer(path: Path, schema: pa.Schema) -> pq.ParquetWriter:
    """zstd, byte-stream-split floats and delta-coded integers: about half the plain size."""
    enc = {}
    for f in schema:
        t = f.type
        if pa.types.is_list(t) and pa.types.is_struct(t.value_type):
            for sub in t.value_type:
                enc[f"{f.name}.list.element.{sub.name}"] = (
                    "BYTE_STREAM_SPLIT" if pa.types.is_floating(sub.type) else "PLAIN")
        elif pa.types.is_list(t):
            enc[f"{f.name}.list.element"] = (
                "BYTE_STREAM_SPLIT" if pa.types.is_floating(t.value_type) else "PLAIN")
        elif pa.types.is_floating(t):
            enc[f.name] = "BYTE_STREAM_SPLIT"
        else:
            enc[f.name] = "DELTA_BINARY_PACKED"
    return pq.ParquetWriter(path, schema, compression="zstd", compression_level=9,
                            use_dictionary=False, column_encoding=enc)


def write_demo(
    outdir: str | os.PathLike,
    *,
    n_events: int | None = None,
    seed: int | None = None,
    weighted: bool = False,
    files: int = 2,
    row_group_events: int = 50_000,
    scenario: Scenario = DEMO,
    share_folder: bool = False,
) -> dict[str, Any]:
    """Write the demo data set to ``outdir``: Parquet event files and ``truth.json``.

    Events are generated and written block by block (:data:`BLOCK_EVENTS` at a time), so
    memory stays near 150 MB (resident) whatever ``n_events``.  Files are written into a
    staging folder inside ``outdir`` and moved into place when all are complete (the
    output-folder contract of :mod:`peaksift._output`).

    Parameters
    ----------
    outdir : path
        Created if missing.  Files are ``events_NNN.parquet`` (``simulated_NNN.parquet`` for
        the weighted variant) and ``truth.json``.  A folder holding files peaksift did not
        write is refused unless ``share_folder``; files of an earlier demo written there
        (listed in its ``peaksift-manifest.json``) are replaced, nothing else is touched.
    n_events, seed : int, optional
        Defaults :data:`DEMO_EVENTS` and :data:`DEMO_SEED`.
    weighted : bool
        The simulated-sample variant with per-event weights and generator truth.
    files : int
        Number of files the events are split into (contiguous, nearly equal).
    row_group_events : int
        Events per Parquet row group (the reader's chunk unit).
    share_folder : bool
        Write beside files peaksift did not write (they are never touched; a name clash
        with one of them is refused).

    Returns
    -------
    dict
        ``files`` (list of paths), ``truth`` (the truth record), ``truth_file``, ``summary``
        (a few lines for the terminal).
    """
    from ._output import staged_output

    n, s = _check_size(DEMO_EVENTS if n_events is None else n_events,
                       DEMO_SEED if seed is None else seed)
    if int(files) < 1:
        raise InputError(f"files must be 1 or more, got {files}")
    if int(files) > n:
        raise InputError(f"{n} event{'s' if n != 1 else ''} cannot fill {files} files: ask for "
                         f"at least {files} events (peaksift demo --events {files})")
    if int(row_group_events) < 1:
        raise InputError(f"row_group_events must be positive, got {row_group_events}")
    out = Path(outdir)
    stem = "simulated" if weighted else "events"
    names = [f"{stem}_{i:03d}.parquet" for i in range(files)]
    with staged_output(out, "demo", share=share_folder, names=[*names, "truth.json"]) as stage:
        assert stage is not None
        totals, weight_sum = _write_events(stage.path, names, n, s, scenario, weighted,
                                           int(row_group_events))
        paths = [out / nm for nm in names]
        truth = _truth(scenario, n, s, weighted, paths, row_group_events, totals, weight_sum)
        _json_file(stage.path / "truth.json", truth)
    return _demo_summary(out, paths, truth, n, s, weighted, scenario)


def _json_file(path: Path, obj: Any) -> None:
    from ._files import atomic_write

    atomic_write(path, json.dumps(obj, indent=2, sort_keys=False) + "\n")


def _write_events(folder: Path, names: list[str], n: int, s: int, scenario: Scenario,
                  weighted: bool, row_group_events: int
                  ) -> tuple[dict[str, dict[str, int]], dict[str, float]]:
    """Generate the events block by block into ``folder``/``names`` (nearly equal,
    contiguous parts); returns the per-process counts and sums of weights."""
    files = len(names)
    bounds = [round(i * n / files) for i in range(files + 1)]
    paths = [folder / nm for nm in names]
    totals: dict[str, dict[str, int]] = {}
    weight_sum: dict[str, float] = {}
    writers: list[pq.ParquetWriter | None] = [None] * files
    pending: list[list[pa.Table]] = [[] for _ in range(files)]
    pending_n = [0] * files
    try:
        pos = 0
        for table, stats in _blocks(n, s, scenario, weighted, False):
            for k, v in stats.items():
                t = totals.setdefault(k, dict.fromkeys(v, 0))
                for kk, vv in v.items():
                    t[kk] += vv
            if weighted:
                proc = table.column("process").to_numpy()
                w = table.column("weight").to_numpy()
                for i, p in enumerate(PROCESSES):
                    weight_sum[p] = weight_sum.get(p, 0.0) + float(w[proc == i].sum())
            start = pos
            pos += table.num_rows
            for f in range(files):
                a, b = max(bounds[f], start), min(bounds[f + 1], pos)
                if a >= b:
                    continue
                pending[f].append(table.slice(a - start, b - a))
                pending_n[f] += b - a
                while pending_n[f] >= row_group_events or (pending_n[f] and b == bounds[f + 1]):
                    chunk = pa.concat_tables(pending[f]).combine_chunks()
                    take = min(row_group_events, chunk.num_rows)
                    if writers[f] is None:
                        writers[f] = _writer(paths[f], chunk.schema)
                    writers[f].write_table(chunk.slice(0, take), row_group_size=take)
                    rest = chunk.slice(take)
                    pending[f] = [rest] if rest.num_rows else []
                    pending_n[f] = rest.num_rows
    finally:
        for w_ in writers:
            if w_ is not None:
                with contextlib.suppress(pa.ArrowException):
                    w_.close()
    return totals, weight_sum


def _demo_summary(out: Path, paths: list[Path], truth: dict[str, Any], n: int, s: int,
                  weighted: bool, scenario: Scenario) -> dict[str, Any]:
    files = len(paths)
    truth_path = out / "truth.json"
    size = sum(p.stat().st_size for p in paths)
    x = scenario.x
    summary = (
        f"wrote {files} file{'s' if files != 1 else ''} with {n} events ({size / 1e6:.1f} MB) "
        f"to {out}/: {', '.join(p.name for p in paths)}\n"
        f"{scenario.name}: sqrt(s) = {scenario.sqrt_s / 1000:g} TeV, "
        f"{'simulated sample with per-event weights' if weighted else 'unweighted data'}, "
        f"seed {s}\n"
        f"truth (masses, widths, yields, intended selection): {truth_path}\n"
        f"selection the demo was designed for: muon pairs, cut \"{INTENDED_SELECTION['cut']}\", "
        f"opposite charge, search window {INTENDED_SELECTION['search_window_gev'][0]:g}-"
        f"{INTENDED_SELECTION['search_window_gev'][1]:g} GeV "
        f"(calibration peak: Z0 at {scenario.z.mass:.4f} GeV; invented resonance: see "
        f"truth.json, {x.name.split('(')[0]})"
    )
    return {"files": [str(p) for p in paths], "truth": truth, "truth_file": str(truth_path),
            "summary": summary, "outdir": str(out)}


def _truth(sc: Scenario, n: int, seed: int, weighted: bool, paths: list[Path],
           row_group_events: int, totals: dict[str, dict[str, int]],
           weight_sum: dict[str, float]) -> dict[str, Any]:
    from . import __version__

    fr = sc.weighted_fractions if weighted else sc.fractions
    tot = sum(fr.values())
    procs = {}
    descr = {
        "soft": "no hard process: fake leptons and soft tracks only",
        "z_mumu": "Z0 -> mu+ mu- (calibration peak)",
        "z_ee": "Z0 -> e+ e- (calibration peak)",
        "dy_mumu": "falling opposite-charge continuum -> mu+ mu-",
        "dy_ee": "falling opposite-charge continuum -> e+ e-",
        "x_mumu": f"invented resonance {sc.x.name} -> mu+ mu-",
    }
    for p in PROCESSES:
        d = {"description": descr[p], "fraction": fr[p] / tot,
             "expected_events": n * fr[p] / tot, **totals.get(p, {})}
        if weighted:
            d["sum_of_weights"] = weight_sum.get(p, 0.0)
        procs[p] = d
    return {
        "scenario": sc.name,
        "generator": GENERATOR_VERSION,
        "peaksift_version": __version__,
        "seed": seed,
        "n_events": n,
        "weighted": weighted,
        "block_events": BLOCK_EVENTS,
        "row_group_events": row_group_events,
        "files": [p.name for p in paths],
        "sqrt_s_gev": sc.sqrt_s,
        "calibration_peak": {
            "particle": sc.z.name, "pdgid": 23, "mass_gev": sc.z.mass, "width_gev": sc.z.width,
            "mass_range_gev": list(sc.z.mass_range),
            "source": "particle package (PDG tables)"},
        "invented_resonance": {
            "name": sc.x.name, "mass_gev": sc.x.mass, "width_gev": sc.x.width,
            "mass_range_gev": list(sc.x.mass_range), "decay": "mu+ mu-",
            "generated_events": procs["x_mumu"].get("generated", 0),
            "selected_in_search_window": procs["x_mumu"].get("selected_in_search_window", 0),
            "note": "invented for the demo; no known particle has this mass"},
        "lineshape": "relativistic Breit-Wigner f(m) ~ 1/((m^2 - M^2)^2 + M^2 Gamma^2), "
                     "truncated to mass_range",
        "continuum": {"mass_range_gev": list(sc.continuum_range),
                      "shape": "dN/dm ~ (1 - m/sqrt_s)^a / (m/sqrt_s)^b",
                      "a": sc.continuum_a, "b": sc.continuum_b},
        "processes": procs,
        "intended_selection": INTENDED_SELECTION,
        "columns": {
            "muon, electron": "list<struct<pt, eta, phi, mass (float32, GeV), charge (int8), "
                              "isolation (float32, relative)>>",
            "track_pt, track_eta, track_phi, track_charge": "sibling list columns, no mass "
                                                            "(massless)",
            "run, event, n_vertices": "per event",
            **({"weight, process, true_mass": "per event (simulated-sample variant)"}
               if weighted else {})},
        "parameters": sc.to_dict(),
    }


# ------------------------------------------------------------------ simulated signal samples
#: generated masses (GeV) of the demo's simulated signal samples
SIGNAL_SAMPLE_MASSES = (120.0, 137.5, 155.0, 172.5, 190.0)
#: natural width (GeV) of the samples' resonance: narrow, so the detector sets the peak
SIGNAL_SAMPLE_WIDTH = 0.05


def generate_signal_sample(mass: float, lepton: str, n_events: int, *, seed: int = DEMO_SEED,
                           scenario: Scenario = DEMO, width: float = SIGNAL_SAMPLE_WIDTH
                           ) -> tuple[pa.Table, dict[str, Any]]:
    """A simulated signal sample: ``n_events`` decays of a narrow resonance of ``mass`` (GeV)
    to a ``lepton`` pair (``"muon"`` or ``"electron"``), through the demo's detector
    (final-state radiation, smearing, acceptance, efficiencies, isolation, fake leptons).

    Returns the events (columns ``run, event, n_vertices, muon, electron, true_mass``, the
    data's layout without tracks) and the generator's truth for the intended selection
    (:data:`INTENDED_SELECTION`'s cuts on ``lepton``, opposite charge, mass inside the
    search window): ``efficiency`` (selected / generated, with its binomial error),
    ``resolution_68_gev`` (half the central 68% range of reconstructed minus generated
    mass of the selected events) and ``resolution_fwhm_gev`` (their full width at half
    maximum over 2 sqrt(2 ln 2), the Gaussian-equivalent core width).
    """
    if lepton not in ("muon", "electron"):
        raise InputError(f"lepton must be 'muon' or 'electron', got {lepton!r}")
    n, s = _check_size(n_events, seed)
    sc = scenario
    code = 0 if lepton == "muon" else 1
    rng = np.random.default_rng(np.random.SeedSequence([s, 7919, code, round(mass * 1000)]))
    res = Resonance("signal sample", float(mass), float(width), (0.9 * mass, 1.1 * mass))
    m_true = _sample_breit_wigner(rng, n, res)
    m_l = _M_MU if lepton == "muon" else _M_E
    d1, d2 = _decay(rng, m_true, sc, m_l)
    objs = {"muon": _Objects(), "electron": _Objects()}
    idx = np.arange(n)
    reco = []
    for d, q in ((d1, -1), (d2, 1)):
        pt, eta, phi = _polar(d[0], d[1], d[2])
        charge = np.full(n, q, dtype=np.int8)
        if lepton == "muon":
            pt = _fsr(rng, pt, sc.fsr_probability_muon, sc.fsr_fraction_range)
            pt, charge, kept = _muon_detector(rng, pt, eta, charge, sc)
        else:
            pt = _fsr(rng, pt, sc.fsr_probability_electron, sc.fsr_fraction_range)
            pt, kept = _electron_detector(rng, pt, eta, sc)
        iso = rng.exponential(sc.prompt_isolation_mean, n)
        objs[lepton].add(idx[kept], pt=pt[kept], eta=eta[kept], phi=phi[kept],
                         mass=np.full(int(kept.sum()), m_l), charge=charge[kept],
                         isolation=iso[kept])
        reco.append((pt, eta, phi, charge, iso, kept))
    for name, lam, ml, eta_max in (("muon", sc.fake_muons_per_event, _M_MU, sc.muon_eta_max),
                                   ("electron", sc.fake_electrons_per_event, _M_E,
                                    sc.electron_eta_max)):
        k = rng.poisson(lam, n)
        ev = np.repeat(idx, k)
        nf = ev.size
        objs[name].add(ev, pt=sc.fake_pt_min + rng.exponential(sc.fake_pt_mean_above_min, nf),
                       eta=rng.uniform(-eta_max, eta_max, nf), phi=rng.uniform(-np.pi, np.pi, nf),
                       mass=np.full(nf, ml), charge=rng.choice(np.array([-1, 1], np.int8), nf),
                       isolation=rng.gamma(sc.fake_isolation_shape, sc.fake_isolation_scale, nf))
    (p1, e1, f1, c1, i1, k1), (p2, e2, f2, c2, i2, k2) = reco
    lo_w, hi_w = INTENDED_SELECTION["search_window_gev"]
    m_reco = kin.pair_mass(p1, e1, f1, m_l, p2, e2, f2, m_l)
    both = (k1 & k2 & _intended_pass(p1, e1, i1) & _intended_pass(p2, e2, i2) & (c1 != c2)
            & (m_reco >= lo_w) & (m_reco <= hi_w))
    cols: dict[str, pa.Array] = {
        "run": pa.array(np.full(n, 2000 + code, np.int32)),
        "event": pa.array(np.arange(n, dtype=np.int64)),
        "n_vertices": pa.array(rng.poisson(sc.vertices_mean, n).astype(np.int16)),
    }
    for name in ("muon", "electron"):
        offsets, flat = _assemble(objs[name], n)
        struct = pa.StructArray.from_arrays(
            [pa.array(_round_mantissa(flat[k], _PRECISION[k])) for k in ("pt", "eta", "phi")]
            + [pa.array(flat["mass"].astype(np.float32)),
               pa.array(flat["charge"].astype(np.int8)),
               pa.array(_round_mantissa(flat["isolation"], _PRECISION["isolation"]))],
            ["pt", "eta", "phi", "mass", "charge", "isolation"])
        cols[name] = pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), struct)
    cols["true_mass"] = pa.array(m_true.astype(np.float32))
    k_sel = int(both.sum())
    eff = k_sel / n
    dm = (m_reco - m_true)[both]
    q16, q84 = np.percentile(dm, [15.87, 84.13]) if k_sel else (np.nan, np.nan)
    truth = {"mass_gev": float(mass), "lepton": lepton, "generated": n, "selected": k_sel,
             "efficiency": eff, "efficiency_error": float(np.sqrt(eff * (1 - eff) / n)),
             "resolution_68_gev": float(0.5 * (q84 - q16)),
             "resolution_fwhm_gev": _fwhm_sigma(dm), "natural_width_gev": float(width)}
    return pa.table(cols), truth


def _fwhm_sigma(x: np.ndarray) -> float:
    """Full width at half maximum of a histogram of ``x`` (bins of a tenth of the central
    68% half-range), over 2 sqrt(2 ln 2)."""
    if x.size < 100:
        return float("nan")
    q16, q50, q84 = np.percentile(x, [15.87, 50.0, 84.13])
    step = 0.1 * 0.5 * (q84 - q16)
    h, e = np.histogram(x, bins=np.arange(q50 - 6 * (q84 - q16), q50 + 6 * (q84 - q16), step))
    c = 0.5 * (e[1:] + e[:-1])
    hs = np.convolve(h, np.ones(3) / 3, mode="same")  # light smoothing against bin noise
    top = int(np.argmax(hs))
    half = 0.5 * hs[top]
    lo = top - int(np.argmax(hs[top::-1] < half))
    hi = top + int(np.argmax(hs[top:] < half))
    left = np.interp(half, [hs[lo], hs[lo + 1]], [c[lo], c[lo + 1]])
    right = np.interp(half, [hs[hi], hs[hi - 1]], [c[hi], c[hi - 1]])
    return float((right - left) / (2.0 * np.sqrt(2.0 * np.log(2.0))))


def write_signal_samples(outdir: str | os.PathLike, *, n_events: int = 10_000,
                         masses: tuple[float, ...] = SIGNAL_SAMPLE_MASSES,
                         leptons: tuple[str, ...] = ("muon", "electron"),
                         seed: int = DEMO_SEED, scenario: Scenario = DEMO) -> dict[str, Any]:
    """Write simulated signal samples (``signal_<lepton>_<mass>.parquet``, one per lepton and
    mass, :func:`generate_signal_sample`) and their ``truth.json`` to ``outdir``."""
    out = Path(outdir)
    out.mkdir(parents=True, exist_ok=True)
    samples = []
    for lepton in leptons:
        for m in masses:
            table, truth = generate_signal_sample(m, lepton, n_events, seed=seed,
                                                  scenario=scenario)
            path = out / f"signal_{lepton}_{m:g}.parquet"
            tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
            with _writer(tmp, table.schema) as w:
                w.write_table(table)
            os.replace(tmp, path)
            samples.append({"file": path.name, **truth})
    record = {"generator": GENERATOR_VERSION, "scenario": scenario.name, "seed": seed,
              "selection": {k: INTENDED_SELECTION[k] for k in ("cut", "charge", "choose",
                                                                "search_window_gev")},
              "note": "true efficiencies and resolutions of the generator for the intended "
                      "selection applied to each sample's lepton",
              "samples": samples}
    _json_file(out / "truth.json", record)
    return record
