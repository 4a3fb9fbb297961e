"""Search statistics: local significance, mass scans, look-elsewhere effect, limits, toys.

Which piece when
----------------
* :func:`scan` -> :class:`ScanResult`                  -- q0 / Z_local / p_local vs mass, the
  best hypothesis and its refit, ``global_significance()`` and ``plot()``.
* :func:`upper_limits` -> :class:`LimitResult`         -- CLs limits (asymptotic or toys) with
  expected bands, on the yield or on sigma x B (:func:`run_toy_limit`: one mass's toy
  limit, the unit of work for execution engines).
* :mod:`.significance`                                 -- q0, Z, p conversions (also in log
  space, for Z beyond ~37 where p underflows); Asimov and counting-experiment sensitivities.
* :mod:`.lee`                                          -- upcrossings (Gross-Vitells) and
  toy-based global p-values.
* :mod:`.toys`                                         -- the batched toy engine
  (:func:`run_toys`, :func:`run_toy_batch` for execution engines).
* :func:`choose_background` -> :class:`BackgroundChoice` -- candidate background families,
  the order test between nested orders, goodness of fit; :func:`spurious_signal` on a
  template (:mod:`.background_choice`).
* :func:`envelope_scan` -> :class:`EnvelopeResult`     -- discrete profiling of the
  background function for the scan and its toys (:mod:`.envelope`).
* :mod:`.shape_profile`                                -- the signal's mass-scale and
  resolution nuisance parameters profiled in the scan and its toys (``scan(nuisances=)``).
"""

from __future__ import annotations

from .background_choice import BackgroundChoice, choose_background, spurious_signal
from .envelope import EnvelopeResult, envelope_scan
from .lee import binomial_error, global_from_toys, global_from_upcrossings, upcrossings
from .limits import (
    LimitResult,
    cls_asymptotic,
    expected_band_factor,
    poisson_interval,
    poisson_upper_limit,
    run_toy_limit,
    upper_limits,
)
from .scan import scan
from .scan_result import ScanResult
from .significance import (
    asimov_counts,
    binned_q0,
    counting_significance,
    log10_p,
    log_p_from_q0,
    log_p_from_z,
    p_from_q0,
    p_from_z,
    q0_from_nll,
    z_from_log_p,
    z_from_p,
    z_from_q0,
)
from .toys import ScanModel, ToyBatch, run_toy_batch, run_toys

__all__ = [
    "BackgroundChoice",
    "EnvelopeResult",
    "LimitResult",
    "ScanModel",
    "ScanResult",
    "ToyBatch",
    "asimov_counts",
    "binned_q0",
    "binomial_error",
    "choose_background",
    "cls_asymptotic",
    "counting_significance",
    "envelope_scan",
    "expected_band_factor",
    "global_from_toys",
    "global_from_upcrossings",
    "log10_p",
    "log_p_from_q0",
    "log_p_from_z",
    "p_from_q0",
    "p_from_z",
    "poisson_interval",
    "poisson_upper_limit",
    "q0_from_nll",
    "run_toy_batch",
    "run_toy_limit",
    "run_toys",
    "scan",
    "spurious_signal",
    "upcrossings",
    "upper_limits",
    "z_from_log_p",
    "z_from_p",
    "z_from_q0",
]
