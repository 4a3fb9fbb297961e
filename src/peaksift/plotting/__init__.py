"""Figures of the search, in the peaksift style (:mod:`peaksift._style`), as PNG and PDF.

Which function
--------------
* :func:`search_figures` -- every figure of a :class:`~peaksift.search.SearchResult` into a
  directory: ``spectrum`` (fit, signal component, pulls, fitted numbers; optionally also
  ``spectrum_log``), ``pvalue_scan``, ``limits``, ``candidates`` (not while blinded: its
  histograms include the blinded window), ``calibration``.  Returns name -> PNG path;
  :func:`search_figure` returns one of them as a Figure (``SearchResult.plot``).
* :func:`spectrum_only` -- the selected spectrum without a fit (``peaksift spectrum``);
  :func:`spectrum_figure` its Figure.
* :func:`candidates` -- the candidates' pT (log scale) and rapidity in the search window.
* :func:`scan_figure` -- the p-value scan with the global significance noted; an excess
  beyond the axis floor is clipped there and its p stated (as a power of ten if need be).
* :func:`figure_labels` -- the run label and the pair's mass symbol from a configuration.
* :func:`envelope_figure` -- the background-function envelope: twice the profiled NLL
  against the signal yield at the best mass, one curve per candidate, the envelope over them
  (``background_envelope``, with ``[systematics]`` background families).
* :func:`save` -- write one figure in several formats.

Every figure carries the run label (name, sqrt(s), luminosity, channel) above its axes and
names its mass axis with the pair's symbol (``m_{\\mu\\mu}``); masses are written with two
decimals, significances with two, fitted values rounded to two digits of their error.  No
function here touches pyplot or the matplotlib backend.

The drawing of a fit, a scan and a limit curve belongs to their result objects
(``FitResult.plot``, ``ScanResult.plot``, ``LimitResult.plot``); this package lays them out,
adds what only the search knows (the global significance, the blinded window, the run) and
writes the files.
"""

from __future__ import annotations

from .candidates import candidates, candidates_figure
from .envelope import envelope_figure
from .labels import FigureLabels, figure_labels, save
from .limits import limits_figure
from .scan import scan_expectation, scan_figure
from .search import SEARCH_FIGURES, search_figure, search_figures
from .spectrum import (
    calibration_figure,
    calibration_fit_figure,
    spectrum_figure,
    spectrum_only,
)

__all__ = ["SEARCH_FIGURES", "FigureLabels", "calibration_figure", "calibration_fit_figure", "candidates",
           "candidates_figure", "envelope_figure", "figure_labels", "limits_figure", "save",
           "scan_expectation", "scan_figure", "search_figure", "search_figures",
           "spectrum_figure", "spectrum_only"]
