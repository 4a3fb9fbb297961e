"""Invariant-mass histograms: :class:`MassHistogram` (``_mass``), the edge rule and bin
index (:mod:`~peaksift.histogram.binning`), and the cross-library histogram protocol both
ways (``_protocol``: :class:`MassAxis`, and :func:`as_spectrum`, what a fit, scan or limit
accepts as data).  The class's longer methods live beside it: ``_regroup`` (``restrict``,
``rebin``), ``_display`` (``plot``, the notebook table), ``_storage`` (``to_dict``, files)."""

from ._mass import MassHistogram
from ._protocol import MassAxis, as_spectrum
from .binning import in_range

# the public home of the classes (reprs, pickles and the documentation name it)
MassHistogram.__module__ = __name__
MassAxis.__module__ = __name__

__all__ = ["MassAxis", "MassHistogram", "as_spectrum", "in_range"]
