"""Simulated signal samples: narrow resonances at a few masses through the demo's detector,
with the generator's true efficiency and resolution for the intended selection."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from .. import kinematics as kin
from ..errors import InputError
from .blocks import _check_size
from .detector import _add_fakes, _detect_pair
from .layout import _lepton_column, _Objects
from .processes import _decay, _sample_breit_wigner
from .scenario import (
    _M_E,
    _M_MU,
    DEMO,
    DEMO_SEED,
    GENERATOR_VERSION,
    INTENDED_SELECTION,
    Resonance,
    Scenario,
    _intended_pass,
)
from .write import _json_file, _writer

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
    reco = _detect_pair(rng, (d1, d2), lepton, sc, np.arange(n), objs[lepton])
    _add_fakes(rng, n, objs["muon"], objs["electron"], sc)
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
        cols[name] = _lepton_column(objs[name], n)
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
                         seed: int = DEMO_SEED, scenario: Scenario = DEMO,
                         share_folder: bool = False) -> dict[str, Any]:
    """Write simulated signal samples (``signal_<lepton>_<mass>.parquet``, one per lepton and
    mass, :func:`generate_signal_sample`) and their ``truth.json`` to ``outdir``, under the
    output-folder contract of :mod:`peaksift._output` (``share_folder`` as for
    :func:`write_demo`)."""
    from .._output import staged_output

    out = Path(outdir)
    names = [f"signal_{lepton}_{m:g}.parquet" for lepton in leptons for m in masses]
    samples = []
    with staged_output(out, "signal-samples", share=share_folder,
                       names=[*names, "truth.json"]) as stage:
        assert stage is not None
        for lepton in leptons:
            for m in masses:
                table, truth = generate_signal_sample(m, lepton, n_events, seed=seed,
                                                      scenario=scenario)
                name = f"signal_{lepton}_{m:g}.parquet"
                with _writer(stage.path / name, table.schema) as w:
                    w.write_table(table)
                samples.append({"file": name, **truth})
        record = {"generator": GENERATOR_VERSION, "scenario": scenario.name, "seed": seed,
                  "selection": {k: INTENDED_SELECTION[k] for k in ("cut", "charge", "choose",
                                                                    "search_window_gev")},
                  "note": "true efficiencies and resolutions of the generator for the intended "
                          "selection applied to each sample's lepton",
                  "samples": samples}
        _json_file(stage.path / "truth.json", record)
    return record
