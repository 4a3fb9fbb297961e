"""Choices that the configuration and a lower layer both name (each declared once here).

The configuration (pipeline layer) cannot import the statistics layer without loading it
(seconds of start-up for ``peaksift --help``), and the statistics layer may not import the
configuration; so a vocabulary that both need lives in this base-layer module.
"""

from __future__ import annotations

__all__ = ["FIGURES", "LIMIT_METHODS", "UNREADABLE_FILES", "figure_wanted"]

#: How :func:`peaksift.upper_limits` computes its CLs limits (``limits.method``):
#: ``"auto"``       asymptotic formulae, and toys at the masses where the formulae misplace
#:                  the expected bands (few background events under the signal);
#: ``"asymptotic"`` the formulae everywhere, such masses flagged in the result;
#: ``"toys"``       as ``"auto"``, plus toys at chosen masses (``toy_masses``).
LIMIT_METHODS: tuple[str, ...] = ("auto", "asymptotic", "toys")

#: What an input file that cannot be read does to a run (``execution.unreadable_files``,
#: :func:`peaksift.execution.collect`'s ``unreadable_files``):
#: ``"stop"``      the run stops with an error naming the file (default);
#: ``"left_out"``  the whole file is left out of the result and listed with the reason.
UNREADABLE_FILES: tuple[str, ...] = ("stop", "left_out")

#: The figures a search can draw, by the names ``output.figures`` takes (each is drawn only
#: when the run has its results: ``limits`` with limits, ``calibration`` with a calibration,
#: ``background_envelope`` with a [systematics] envelope, ``dedx`` with identification,
#: ``signal_model`` with samples; ``spectrum`` brings ``spectrum_log`` with
#: ``output.log_scale``; a combination's combined p-values go with ``pvalue_scan``).
#: ``"all"`` (the default) and ``"none"`` stand alone.
FIGURES: tuple[str, ...] = ("spectrum", "pvalue_scan", "limits", "candidates",
                            "background_envelope", "calibration", "dedx", "signal_model")


def figure_wanted(selection: tuple[str, ...], name: str) -> bool:
    """Whether ``output.figures = selection`` asks for the figure ``name``."""
    if "all" in selection:
        return True
    return name in selection
