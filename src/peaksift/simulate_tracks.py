"""The demo run's tracking chamber: soft charged tracks with momentum and measured dE/dx.

Which function to use
---------------------
* :func:`write_track_demo` -- write the hadron demo set (``tracks_000.parquet`` and
  ``truth.json``) to a directory (``scripts/make_demo_data.py`` puts it in
  ``demo_data/tracks/``; ``demo_data/hadron_search.toml`` searches it).
* :func:`generate_tracks` -- the same events in memory as a ``pyarrow.Table``.
* :data:`TRACK_DEMO` -- the default :class:`TrackScenario`; vary it with ``dataclasses.replace``.

What is simulated
-----------------
A minimum-bias stream of the invented run, seen by a central gas tracking chamber filled with
Ar/CO₂ 70/30 (:mod:`peaksift.energy_loss`).  Every event has a Poisson number of soft charged
tracks, each a pion, kaon, proton or electron with the fractions ``species``; a fraction of
the events also holds one φ(1020) → K⁺K⁻ decay (mass and width from the `particle` package,
PDG tables; non-relativistic Breit–Wigner, i.e. Cauchy, line shape truncated to
``phi_mass_range``, so a Voigt profile is the exact detector-smeared shape).  Tracks are kept
within ``|η| < eta_max`` and ``pT > pt_min`` and get a curvature smearing
:math:`\\sigma_{p_T}/p_T = a \\oplus b\\,p_T`.

The dE/dx measurement: a track crosses ``n`` sense wires (binomial); its reported value is a
truncated mean (the lowest ``truncation`` of ``reference_samples`` samples of a Landau-like
Moyal distribution), standardised once on a large reference draw and scaled to the track:
``dedx = scale * B(p/M) * (1 + sigma(n) * t)``, with B the Bethe mean loss, ``sigma(n) =
resolution * (reference_samples / n) ** 0.5`` and t the standardised truncated mean (mean 0,
variance 1, a short upper tail left by the truncation).  Its units are keV/cm: ``scale`` is
the gas density times 1000 times the truncated mean's ratio to the mean.

Determinism: one ``numpy.random.default_rng(SeedSequence([seed, 1020]))`` stream, separate
from the dimuon demo's streams, so the dimuon data are unchanged by this module.
"""

from __future__ import annotations

import dataclasses
import functools
import json
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import energy_loss as eloss
from .errors import InputError

__all__ = ["SPECIES_CODES", "TRACK_DEMO", "TRACK_DEMO_EVENTS", "TRACK_DEMO_SEED",
           "TrackScenario", "generate_tracks", "write_track_demo"]

TRACK_DEMO_SEED = 1020
TRACK_DEMO_EVENTS = 50_000
#: generator truth per track: the PDG code of the species (sign dropped)
SPECIES_CODES = {"electron": 11, "pion": 211, "kaon": 321, "proton": 2212}


def _phi_meson() -> tuple[float, float]:
    from particle import Particle

    p = Particle.from_pdgid(333)
    return p.mass / 1000.0, p.width / 1000.0


@dataclass(frozen=True)
class TrackScenario:
    """Every parameter of the hadron demo (the truth file records them all)."""

    name: str = "the demo run, minimum-bias tracks"
    tracks_per_event: float = 7.0
    species: Mapping[str, float] = field(default_factory=lambda: {
        "pion": 0.78, "kaon": 0.11, "proton": 0.08, "electron": 0.03})
    pt_shape: float = 2.0                  # Gamma shape of the soft tracks' pT
    pt_scale: float = 0.25                 # GeV
    pt_min: float = 0.1
    eta_max: float = 1.2
    phi_fraction: float = 0.10             # events with a phi(1020) -> K+ K- decay
    phi_mass: float = field(default_factory=lambda: _phi_meson()[0])
    phi_width: float = field(default_factory=lambda: _phi_meson()[1])
    phi_mass_range: tuple[float, float] = (0.995, 1.10)
    phi_pt_shape: float = 2.0
    phi_pt_scale: float = 0.4
    phi_y_sigma: float = 0.6
    curvature_a: float = 0.004             # sigma_pT / pT constant term
    curvature_b: float = 0.002             # per GeV
    material: str = "argon_co2_70_30"
    scale: float = 1.06                    # keV/cm per MeV cm^2/g
    resolution: float = 0.07               # sigma / dE/dx at reference_samples samples
    reference_samples: int = 40
    wires: int = 48                        # sense wires crossed; each gives a sample with
    wire_efficiency: float = 0.85          # this probability
    truncation: float = 0.6                # fraction of the lowest samples averaged

    def to_dict(self) -> dict[str, Any]:
        d = dataclasses.asdict(self)
        d["species"] = dict(self.species)
        return d


TRACK_DEMO = TrackScenario()


@functools.cache
def _truncated_mean_quantiles(n: int, keep: float) -> tuple[np.ndarray, np.ndarray]:
    """Quantile function of the standardised truncated mean of n Moyal samples.

    A Moyal variable is -ln(z²) with z standard normal (its density exp(-(x + e^-x)/2)/√(2π)),
    a common stand-in for the Landau distribution of the energy lost on one wire.
    """
    rng = np.random.default_rng(np.random.SeedSequence([TRACK_DEMO_SEED, 7]))
    z = rng.standard_normal((100_000, n))
    x = -np.log(z * z)
    k = max(1, round(n * keep))
    t = np.partition(x, k - 1, axis=1)[:, :k].mean(axis=1)
    t = (t - t.mean()) / t.std()
    probs = np.linspace(0.0, 1.0, 4001)
    return probs, np.quantile(t, probs)


def _species_masses() -> dict[str, float]:
    return {s: eloss.hypothesis_mass(s) for s in SPECIES_CODES}


def _decay_to_kaons(rng: np.random.Generator, n: int, sc: TrackScenario
                    ) -> tuple[np.ndarray, ...]:
    """phi(1020) parents decaying isotropically to K+ K-: (px, py, pz) of each kaon."""
    m_k = eloss.hypothesis_mass("kaon")
    lo, hi = sc.phi_mass_range
    u = rng.uniform(math.atan((lo - sc.phi_mass) / (0.5 * sc.phi_width)),
                    math.atan((hi - sc.phi_mass) / (0.5 * sc.phi_width)), n)
    m = sc.phi_mass + 0.5 * sc.phi_width * np.tan(u)   # truncated Cauchy by inverse CDF
    pt = rng.gamma(sc.phi_pt_shape, sc.phi_pt_scale, n)
    y = rng.normal(0.0, sc.phi_y_sigma, n)
    az = rng.uniform(-np.pi, np.pi, n)
    mt = np.hypot(pt, m)
    e = mt * np.cosh(y)
    beta = np.stack([pt * np.cos(az), pt * np.sin(az), mt * np.sinh(y)]) / e
    gamma = e / m
    q = np.sqrt(np.maximum(0.25 * m * m - m_k * m_k, 0.0))    # decay momentum
    cost = rng.uniform(-1.0, 1.0, n)
    sint = np.sqrt(1.0 - cost * cost)
    ph = rng.uniform(-np.pi, np.pi, n)
    k = np.stack([q * sint * np.cos(ph), q * sint * np.sin(ph), q * cost])
    e_star = np.hypot(q, m_k)
    out = []
    for sign in (1.0, -1.0):
        p = sign * k
        bp = np.sum(beta * p, axis=0)
        c = gamma * gamma / (gamma + 1.0) * bp + gamma * e_star   # Lorentz boost
        out.append(p + c * beta)
    return out[0], out[1]


def _measure(rng: np.random.Generator, p: np.ndarray, mass: np.ndarray, sc: TrackScenario
             ) -> tuple[np.ndarray, np.ndarray]:
    """(measured dE/dx in keV/cm, number of samples) for true momenta p and masses."""
    n = np.maximum(rng.binomial(sc.wires, sc.wire_efficiency, p.size), 10)
    bethe = np.empty(p.size)
    for m in np.unique(mass):
        s = mass == m
        bethe[s] = eloss.mean_energy_loss(p[s] / m, sc.material, mass=m)
    probs, q = _truncated_mean_quantiles(sc.reference_samples, sc.truncation)
    t = np.interp(rng.uniform(0.0, 1.0, p.size), probs, q)
    sigma = sc.resolution * np.sqrt(sc.reference_samples / n)
    return sc.scale * bethe * (1.0 + sigma * t), n


# mantissa bits kept per stored float (2**-12 = 2.4e-4 relative: far below the momentum and
# dE/dx resolutions); the zeroed low bits compress well
_BITS = {"pt": 12, "eta": 12, "phi": 12, "dedx": 10}


def _rounded(x: np.ndarray, bits: int) -> np.ndarray:
    """float32 rounded to ``bits`` mantissa bits."""
    u = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32)
    drop = 23 - int(bits)
    mask = np.uint32((0xFFFFFFFF >> drop) << drop)
    return ((u + np.uint32(1 << (drop - 1))) & mask).view(np.float32)


def generate_tracks(n_events: int = TRACK_DEMO_EVENTS, *, seed: int = TRACK_DEMO_SEED,
                    scenario: TrackScenario = TRACK_DEMO) -> tuple[pa.Table, dict[str, Any]]:
    """The hadron demo's events in memory, and counts for the truth record.

    Columns: ``run``, ``event`` and ``track``, a list of structs (pt, eta, phi: float32,
    charge: int8, dedx: float32 keV/cm, dedx_samples: int16, truth_species: int16 PDG code,
    truth_from_phi: bool).  Tracks carry no mass: pairing gives them a hypothesis.
    """
    try:
        n = int(n_events)
        s = int(seed)
    except (TypeError, ValueError):
        raise InputError(f"number of events and seed must be whole numbers, got {n_events!r}, "
                         f"{seed!r}") from None
    if n < 1 or s < 0:
        raise InputError(f"need a positive number of events and a seed >= 0, got {n}, {s}")
    sc = scenario
    rng = np.random.default_rng(np.random.SeedSequence([s, 1020]))
    masses = _species_masses()
    names = list(sc.species)
    frac = np.array([sc.species[k] for k in names], dtype=float)
    # soft tracks
    k = rng.poisson(sc.tracks_per_event, n)
    ev = np.repeat(np.arange(n), k)
    kind = rng.choice(len(names), size=ev.size, p=frac / frac.sum())
    pt = rng.gamma(sc.pt_shape, sc.pt_scale, ev.size)
    eta = rng.uniform(-sc.eta_max, sc.eta_max, ev.size)
    az = rng.uniform(-np.pi, np.pi, ev.size)
    charge = rng.choice(np.array([-1, 1], np.int8), ev.size)
    mass = np.array([masses[names[i]] for i in range(len(names))])[kind]
    code = np.array([SPECIES_CODES[names[i]] for i in range(len(names))], np.int16)[kind]
    from_phi = np.zeros(ev.size, dtype=bool)
    # phi(1020) -> K+ K-
    phi_ev = np.flatnonzero(rng.uniform(0.0, 1.0, n) < sc.phi_fraction)
    kp, km = _decay_to_kaons(rng, phi_ev.size, sc)
    parts = [(ev, pt, eta, az, charge, mass, code, from_phi)]
    for vec, q in ((kp, 1), (km, -1)):
        ptk = np.hypot(vec[0], vec[1])
        parts.append((phi_ev, ptk, np.arcsinh(vec[2] / ptk), np.arctan2(vec[1], vec[0]),
                      np.full(phi_ev.size, q, np.int8), np.full(phi_ev.size, masses["kaon"]),
                      np.full(phi_ev.size, SPECIES_CODES["kaon"], np.int16),
                      np.ones(phi_ev.size, dtype=bool)))
    ev, pt, eta, az, charge, mass, code, from_phi = (np.concatenate(c) for c in zip(*parts))
    # detector: acceptance, curvature smearing, dE/dx
    rel = np.hypot(sc.curvature_a, sc.curvature_b * pt)
    pt_meas = pt * np.abs(1.0 + rel * rng.normal(0.0, 1.0, pt.size))
    dedx, samples = _measure(rng, pt * np.cosh(eta), mass, sc)
    keep = (np.abs(eta) < sc.eta_max) & (pt_meas > sc.pt_min)
    order = np.lexsort((-pt_meas[keep], ev[keep]))   # by event, then decreasing pT
    ev = ev[keep][order]
    cols = {"pt": pt_meas[keep], "eta": eta[keep], "phi": az[keep], "charge": charge[keep],
            "dedx": dedx[keep], "dedx_samples": samples[keep].astype(np.int16),
            "truth_species": code[keep], "truth_from_phi": from_phi[keep]}
    cols = {c: v[order] for c, v in cols.items()}
    offsets = np.concatenate([[0], np.cumsum(np.bincount(ev, minlength=n))])
    struct = pa.StructArray.from_arrays(
        [pa.array(_rounded(v, _BITS[c]) if c in _BITS else v) for c, v in cols.items()],
        list(cols))
    table = pa.table({
        "run": pa.array(np.full(n, 2000, np.int32)),
        "event": pa.array(np.arange(n, dtype=np.int64)),
        "track": pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), struct),
    })
    phi_kept = np.bincount(ev[cols["truth_from_phi"]], minlength=n) if phi_ev.size else None
    counts = {
        "tracks": int(cols["pt"].size),
        "tracks_by_species": {s_: int(np.count_nonzero(cols["truth_species"] == c_))
                              for s_, c_ in SPECIES_CODES.items()},
        "phi_decays_generated": int(phi_ev.size),
        "phi_decays_both_kaons_kept": int(np.count_nonzero(phi_kept == 2))
        if phi_kept is not None else 0,
    }
    return table, counts


def write_track_demo(outdir: str | os.PathLike, *, n_events: int | None = None,
                     seed: int | None = None, scenario: TrackScenario = TRACK_DEMO
                     ) -> dict[str, Any]:
    """Write ``tracks_000.parquet`` and ``truth.json`` of the hadron demo to ``outdir``.

    Files are written under temporary names and renamed when complete.  Returns ``files``,
    ``truth`` and ``summary`` (a few lines for the terminal).
    """
    n = TRACK_DEMO_EVENTS if n_events is None else n_events
    s = TRACK_DEMO_SEED if seed is None else seed
    table, counts = generate_tracks(n, seed=s, scenario=scenario)
    out = Path(outdir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot create output directory '{out}': {exc.strerror}; choose a "
                         "writable directory") from None
    path = out / "tracks_000.parquet"
    tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
    try:
        pq.write_table(table, tmp, compression="zstd", compression_level=9,
                       use_dictionary=False, row_group_size=20_000)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    from . import __version__

    truth = {
        "scenario": scenario.name,
        "generator": "peaksift.simulate_tracks 1",
        "peaksift_version": __version__,
        "seed": int(s),
        "n_events": int(n),
        "files": [path.name],
        "phi_meson": {"mass_gev": scenario.phi_mass, "width_gev": scenario.phi_width,
                      "decay": "K+ K-", "source": "particle package (PDG tables)"},
        "dedx": {"material": scenario.material, "scale_kev_per_cm": scenario.scale,
                 "resolution_at_reference": scenario.resolution,
                 "reference_samples": scenario.reference_samples, "samples_exponent": 0.5,
                 "units": "keV/cm"},
        **counts,
        "columns": {"track": "list<struct<pt, eta, phi (float32), charge (int8), dedx "
                             "(float32, keV/cm), dedx_samples (int16), truth_species (int16, "
                             "PDG code), truth_from_phi (bool)>>",
                    "run, event": "per event"},
        "parameters": scenario.to_dict(),
    }
    tj = out / "truth.json"
    tmpj = tj.with_name(f".{tj.name}.tmp{os.getpid()}")
    tmpj.write_text(json.dumps(truth, indent=2) + "\n")
    os.replace(tmpj, tj)
    summary = (f"wrote {path} with {n} events and {counts['tracks']} tracks "
               f"({path.stat().st_size / 1e6:.1f} MB); phi(1020) -> K+K- decays: "
               f"{counts['phi_decays_generated']} ({counts['phi_decays_both_kaons_kept']} with "
               "both kaons in the chamber)")
    return {"files": [str(path)], "truth": truth, "truth_file": str(tj), "summary": summary}
