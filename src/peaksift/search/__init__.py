"""The whole search as one call: :func:`run_search` (``peaksift search CONFIG``).

Which function
--------------
* :func:`run_search` -- config in, everything out: read, select and pair (through
  :func:`peaksift.execution.collect`, on the configured engine), the spectrum, the
  background-only and signal-plus-background fits, the mass scan, the global significance,
  the upper limits, the known-particle matching, the calibration check, figures,
  ``results.json`` and the meeting report.  Returns a :class:`SearchResult`.
* :func:`run_spectrum` -- only the selected spectrum: its histogram file and figure.
* :func:`run_fit` -- one signal-plus-background fit started (or held) at a chosen mass, with
  its figure and JSON on request.

Outputs are written into a staging folder inside the output folder and moved into place at
the very end, so a failed or interrupted run leaves no partial outputs; a folder holding
files peaksift did not write is refused unless shared, and only the files peaksift wrote
(listed in ``peaksift-manifest.json``) are ever replaced (see :mod:`peaksift._output`).

Steps and where their numbers come from
---------------------------------------
1. Candidates: :func:`peaksift.execution.collect` with a :class:`~peaksift.execution.Selection`
   built from ``[objects]`` and ``[pairing]``.  The spectrum (and the calibration window, when
   configured) are filled from the candidate masses it returns, so one pass over the data
   serves both windows.
2. Scan: :func:`peaksift.scan` over the ``[scan]`` grid with the signal width fixed by the
   resolution model; q0 and Z_local = sqrt(q0) (Cowan, Cranmer, Gross, Vitells 2011).
3. Global significance: :meth:`ScanResult.global_significance` (upcrossings, Gross and
   Vitells 2010; or background-only toys).
4. Free fit at the best hypothesis with ``model.signal`` (mass and width float, unless
   ``model.fix`` / ``constrain`` / ``bounds`` / ``sigma_from_resolution`` say otherwise),
   with profile-likelihood intervals of mass, width and yield: the ``fit`` section of
   results.json (``fit.settings`` echoes what was held or constrained).  While blinded
   there is no such fit; the background is fitted on the sidebands instead
   (:func:`~peaksift.search.sideband.sideband_fit` -> :class:`SidebandFit`, the
   results.json ``background_fit``), extrapolated under the blinded window.
5. Limits: :func:`peaksift.upper_limits` (CLs, asymptotic or toys).
6. Known particles: :func:`peaksift.resonances.match_known` around the fitted mass.
"""

from __future__ import annotations

import importlib
from typing import Any

# loaded on first use: importing this package (or its light `parallel` module, which the
# command forks the figure process from before anything heavy is loaded) loads none of
# the statistics, the config or the events' modules
_EXPORTS = {"DEMO_CONFIG": "demo", "demo_config_text": "demo", "write_demo_config": "demo",
            "write_demo_template": "demo", "FIT_FILES": "fit", "run_fit": "fit",
            "SearchResult": "result", "SpectrumResult": "result", "run_search": "run",
            "SidebandFit": "sideband", "run_spectrum": "spectrum"}

__all__ = ["DEMO_CONFIG", "FIT_FILES", "SearchResult", "SidebandFit", "SpectrumResult",
           "demo_config_text",
           "run_fit", "run_search", "run_spectrum", "write_demo_config",
           "write_demo_template"]


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        value = getattr(importlib.import_module(f"{__name__}.{_EXPORTS[name]}"), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(__all__) | set(globals()))
