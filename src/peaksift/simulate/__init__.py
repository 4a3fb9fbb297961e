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
  :math:`dN/dm \\propto (1 - x)^a / x^b`, :math:`x = m/\\sqrt s`, plus a broad shoulder
  (``Scenario.continuum_shoulder_*``, log-normal in the mass: :func:`continuum_pdf`), so that no single
  power law describes the search window and the demo's background-function choice matters;
* ``x_mumu`` -- one **invented** narrow resonance (default 152 GeV, width 0.6 GeV) decaying
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
charge, isolation); ``track`` is stored as sibling list columns ``track.pt, track.eta,
track.phi, track.charge`` (the names Arrow gives a flattened struct) without a mass field
(read as massless); per-event ``run``, ``event``,
``n_vertices``.  The simulated-sample variant (``weighted=True``) generates the processes in
flatter proportions, adds a per-event ``weight`` (the ratio of true to generated process
fractions times an efficiency-correction factor near 1, so weighted sums reproduce the
unweighted yields) and the generator truth ``process`` and ``true_mass``.

Determinism: events are generated in blocks of :data:`BLOCK_EVENTS`; block ``k`` draws from
``numpy.random.default_rng(SeedSequence([seed, k]))``.  The same seed and number of events
give the same arrays, however the output is split into files and row groups.

Modules
-------
* ``scenario`` -- constants (:data:`DEMO_SEED`, :data:`BLOCK_EVENTS`, :data:`PROCESSES`, ...),
  PDG masses, :class:`Resonance`, :class:`Scenario`, :data:`DEMO`, the intended selection;
* ``processes`` -- Breit-Wigner density and sampling, the continuum (:func:`continuum_pdf`),
  the parent's decay;
* ``detector`` -- final-state radiation, muon and electron response, isolation, fakes;
* ``layout`` -- objects per event turned into the stored Arrow columns;
* ``blocks`` -- one block of events from its own random stream, :func:`generate`;
* ``write`` -- :func:`write_demo`: Parquet files, ``truth.json``, the summary;
* ``signal_samples`` -- :func:`generate_signal_sample`, :func:`write_signal_samples`;
* ``expected`` -- :func:`expected_background`, the noise-free background in the search window
  (the demo search's background template).
"""

from __future__ import annotations

from .blocks import generate
from .expected import expected_background
from .processes import breit_wigner_pdf, continuum_pdf
from .scenario import (
    BLOCK_EVENTS,
    DEMO,
    DEMO_EVENTS,
    DEMO_SEED,
    GENERATOR_VERSION,
    INTENDED_SELECTION,
    PROCESSES,
    Resonance,
    Scenario,
)
from .signal_samples import (
    SIGNAL_SAMPLE_MASSES,
    SIGNAL_SAMPLE_WIDTH,
    generate_signal_sample,
    write_signal_samples,
)
from .write import write_demo

__all__ = [
    "BLOCK_EVENTS",
    "DEMO",
    "DEMO_EVENTS",
    "DEMO_SEED",
    "GENERATOR_VERSION",
    "INTENDED_SELECTION",
    "PROCESSES",
    "SIGNAL_SAMPLE_MASSES",
    "SIGNAL_SAMPLE_WIDTH",
    "Resonance",
    "Scenario",
    "breit_wigner_pdf",
    "continuum_pdf",
    "expected_background",
    "generate",
    "generate_signal_sample",
    "write_demo",
    "write_signal_samples",
]
