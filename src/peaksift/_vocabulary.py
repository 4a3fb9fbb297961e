"""Choices that the configuration and a lower layer both name (each declared once here).

The configuration (pipeline layer) cannot import the statistics layer without loading it
(seconds of start-up for ``peaksift --help``), and the statistics layer may not import the
configuration; so a vocabulary that both need lives in this base-layer module.  So do the
names of the fits a search reports (:data:`FITS`), which the fit figures (models layer)
and the report and summary (output layer) both write.
"""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["FIGURES", "FITS", "LIMIT_METHODS", "LIMIT_METHOD_WORDS", "UNREADABLE_FILES",
           "figure_wanted", "method_words", "model_text"]

#: How :func:`peaksift.upper_limits` computes its CLs limits (``limits.method``):
#: ``"auto"``       asymptotic formulae, and toys at the masses where the formulae misplace
#:                  the expected bands (few background events under the signal);
#: ``"asymptotic"`` the formulae everywhere, such masses flagged in the result;
#: ``"toys"``       as ``"auto"``, plus toys at chosen masses (``toy_masses``).
LIMIT_METHODS: tuple[str, ...] = ("auto", "asymptotic", "toys")
#: each of :data:`LIMIT_METHODS` in words, as the report and the limit figures name it (the
#: bare "auto" told a reader nothing)
LIMIT_METHOD_WORDS: dict[str, str] = {
    "auto": "asymptotic, toys at low counts",
    "asymptotic": "asymptotic",
    "toys": "asymptotic, toys at low counts and at chosen masses",
}

#: What an input file that cannot be read does to a run (``execution.unreadable_files``,
#: :func:`peaksift.execution.collect`'s ``unreadable_files``):
#: ``"stop"``      the run stops with an error naming the file (default);
#: ``"left_out"``  the whole file is left out of the result and listed with the reason.
UNREADABLE_FILES: tuple[str, ...] = ("stop", "left_out")

#: The figures a search can draw, by the names ``output.figures`` takes (each is drawn only
#: when the run has its results: ``limits`` with limits, ``calibration`` with a calibration,
#: ``background_envelope`` with a [systematics] envelope, ``dedx`` with identification,
#: ``signal_model`` with samples; ``spectrum`` brings ``spectrum_log`` with
#: ``output.log_scale``; a combination's combined p-values go with ``pvalue_scan``, its
#: combined limits with ``limits``).
#: ``"all"`` (the default) and ``"none"`` stand alone.
FIGURES: tuple[str, ...] = ("spectrum", "pvalue_scan", "limits", "candidates",
                            "background_envelope", "calibration", "dedx", "signal_model")


def method_words(method: str) -> str:
    """A limit method (:data:`LIMIT_METHODS`) in words; another name as it is."""
    return LIMIT_METHOD_WORDS.get(method, method)


def figure_wanted(selection: tuple[str, ...], name: str) -> bool:
    """Whether ``output.figures = selection`` asks for the figure ``name``."""
    if "all" in selection:
        return True
    return name in selection


#: The fits a search reports numbers from: key -> (the words every output names the fit
#: with, the numbers it gives).  The report's tables, the fit figures' boxes, the
#: command-line summary and results.json ``models`` all name a model through
#: :func:`model_text`, so a reader can tell which fit a number comes from: the scan and the
#: free fit of one channel may differ in signal shape (the scan's from the signal samples or
#: the resolution model, the free fit's ``model.signal`` with its width floating).
FITS: dict[str, tuple[str, str]] = {
    "scan": ("scan", "best mass, significances, limits"),
    "free_fit": ("free fit", "fitted mass, width and yields"),
    "calibration": ("calibration fit", "the standard candle's mass and width"),
    "background_only": ("background-only fit", "the background without a signal"),
}


def model_text(fit: str, signal: str | Sequence[str], background: str, *,
               envelope: Sequence[str] = (), gives: bool = False) -> str:
    """The model of the fit ``fit`` (a key of :data:`FITS`) as every output names it:
    ``"free fit: gaussian + powerlaw"``.  ``envelope``: the background functions the scan
    profiles with systematics (its headline significances are those); ``gives``: followed
    by the numbers the fit gives."""
    if fit not in FITS:
        from .errors import InputError

        raise InputError(f"no fit named {fit!r} (a figure's or a model's kind): use one of "
                         f"{', '.join(map(repr, FITS))}")
    label, what = FITS[fit]
    sig = signal if isinstance(signal, str) else " + ".join(signal)
    # (a background-only fit holds its signal at zero: its model is the background's)
    text = f"{label}: {background}" if fit == "background_only" else \
        f"{label}: {sig} + {background}"
    if envelope:
        text += f"; with systematics {sig} + the envelope of {', '.join(envelope)}"
    return text + (f" ({what})" if gives else "")
