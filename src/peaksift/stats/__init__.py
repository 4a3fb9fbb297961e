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

import importlib
import sys
import types
from typing import Any

#: public name -> the module that holds it: imported on first use, so that importing one
#: piece (the config's work bounds, the scan) does not load scipy.stats and every other piece
_EXPORTS: dict[str, str] = {
    "BackgroundChoice": "background_choice",
    "choose_background": "background_choice",
    "spurious_signal": "background_choice",
    "EnvelopeResult": "envelope",
    "envelope_scan": "envelope",
    "binomial_error": "lee",
    "global_from_toys": "lee",
    "global_from_upcrossings": "lee",
    "upcrossings": "lee",
    "LimitResult": "limits",
    "cls_asymptotic": "limits",
    "expected_band_factor": "limits",
    "poisson_interval": "limits",
    "poisson_upper_limit": "limits",
    "run_toy_limit": "limits",
    "upper_limits": "limits",
    "scan": "scan",
    "ScanResult": "scan_result",
    "asimov_counts": "significance",
    "binned_q0": "significance",
    "counting_significance": "significance",
    "log10_p": "significance",
    "log_p_from_q0": "significance",
    "log_p_from_z": "significance",
    "p_from_q0": "significance",
    "p_from_z": "significance",
    "q0_from_nll": "significance",
    "z_from_log_p": "significance",
    "z_from_p": "significance",
    "z_from_q0": "significance",
    "ScanModel": "toys",
    "ToyBatch": "toys",
    "run_toy_batch": "toys",
    "run_toys": "toys",
}

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


class _Package(types.ModuleType):
    """The import system binds a submodule as an attribute of its package on first import;
    where a submodule shares its name with a public function (``scan``), that binding would
    make ``from peaksift.stats import scan`` return the module once anything imported
    ``peaksift.stats.scan``.  The function wins: such a binding is dropped (the module stays
    in ``sys.modules``)."""

    def __setattr__(self, name: str, value: Any) -> None:
        if (isinstance(value, types.ModuleType) and name in _EXPORTS
                and value.__name__ == f"{__name__}.{name}"):
            return
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        value = getattr(importlib.import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'peaksift.stats' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(__all__) | set(globals()))


class _Package(types.ModuleType):
    """Importing a submodule binds it on its package.  Where a public function has its
    module's name (``scan`` in ``scan.py``), that would hide the function from every later
    ``from peaksift.stats import scan``; the function is bound instead, as an eager
    ``from .scan import scan`` did."""

    def __setattr__(self, name: str, value: Any) -> None:
        if isinstance(value, types.ModuleType) and _EXPORTS.get(name) == name:
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
