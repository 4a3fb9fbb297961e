"""What a figure says beside its data, the same on every figure (no peaksift imports here
but the palette of :mod:`peaksift._style`).

* :func:`mass_symbol` / :func:`mass_label` -- the pair's mass symbol (``m_{\\mu\\mu}``,
  ``m_{ee}``, ``m_{KK}``) from the collection names; every mass axis is labelled with it.
  :func:`channel_tex` -- the final state (``$\\mu^+\\mu^-$``).
* :func:`particle_tex` -- a particle name from the tables typeset (``Z0`` -> ``Z^0``).
* :class:`RunLabel` and :func:`draw_header` -- the run label (name, sqrt(s), integrated
  luminosity, channel) above the axes, and the figure's own statement under it;
  :func:`points_at` and :func:`text_width` place text in points (also for the value tables
  of :mod:`peaksift._value_table`).
* :func:`plain_log_ticks` -- a log y axis labelled with plain numbers (limits figures).
* :func:`shade_blinded` -- the blinded mass range, drawn the same way on every figure.
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from ._style import COLORS

# ---------------------------------------------------------------------- mass symbols
# collection name (lower case, singular) -> symbol of one object in the subscript
_OBJECT_SYMBOLS = {
    "muon": r"\mu", "mu": r"\mu", "electron": "e", "ele": "e", "e": "e", "positron": "e",
    "kaon": "K", "k": "K", "pion": r"\pi", "pi": r"\pi", "proton": "p", "p": "p",
    "photon": r"\gamma", "gamma": r"\gamma", "tau": r"\tau", "lepton": r"\ell",
    "track": "t", "jet": "j", "b_jet": "b", "bjet": "b", "deuteron": "d",
}


def _object_symbol(collection: str) -> str:
    name = str(collection).strip().lower()
    for cand in (name, name.rstrip("s"), name.removesuffix("es")):
        if cand in _OBJECT_SYMBOLS:
            return _OBJECT_SYMBOLS[cand]
    return r"\mathrm{" + re.sub(r"[^A-Za-z0-9]", "", str(collection))[:6] + "}"


def mass_symbol(first: str | None = None, second: str | None = None) -> str:
    """The pair's mass symbol as mathtext without dollars: ``m_{\\mu\\mu}``, ``m_{ee}``,
    ``m_{KK}``, ``m_{e\\mu}``; plain ``m`` without a collection name."""
    if not first:
        return "m"
    a = _object_symbol(first)
    b = _object_symbol(second) if second else a
    return f"m_{{{a}{b}}}"


def mass_label(first: str | None = None, second: str | None = None, unit: str = "GeV") -> str:
    """Axis label of a pair mass, ``$m_{\\mu\\mu}$ [GeV]`` (every mass axis uses this)."""
    return f"${mass_symbol(first, second)}$ [{unit}]" if unit else f"${mass_symbol(first, second)}$"


def channel_tex(first: str | None, second: str | None = None, charge: str | None = None
                ) -> str:
    """The final state as mathtext: ``$\\mu^+\\mu^-$`` for opposite charges, ``$\\mu^\\pm\\mu^\\pm$``
    for equal charges, ``$\\mu\\mu$`` otherwise; '' without a collection."""
    if not first:
        return ""
    a = _object_symbol(first)
    b = _object_symbol(second) if second else a
    if charge == "opposite":
        return f"${a}^+{b}^-$"
    if charge == "same":
        return f"${a}^\\pm{b}^\\pm$"
    return f"${a}{b}$"


_PARTICLE_TEX = [  # regex on the tables' names -> mathtext
    (re.compile(r"^([A-Za-z])0$"), r"$\1^0$"),
    (re.compile(r"^([A-Za-z])\+$"), r"$\1^+$"),
    (re.compile(r"^([A-Za-z])-$"), r"$\1^-$"),
    (re.compile(r"^J/psi(.*)$"), r"$J/\\psi$\1"),
    (re.compile(r"^psi(.*)$"), r"$\\psi$\1"),
    (re.compile(r"^Upsilon(.*)$"), r"$\\Upsilon$\1"),
    (re.compile(r"^phi(.*)$"), r"$\\phi$\1"),
    (re.compile(r"^omega(.*)$"), r"$\\omega$\1"),
    (re.compile(r"^rho(.*)$"), r"$\\rho$\1"),
    (re.compile(r"^eta(.*)$"), r"$\\eta$\1"),
]


def particle_tex(name: Any) -> str:
    """A particle name as written in the tables, typeset: ``Z0`` -> ``$Z^0$``,
    ``J/psi`` -> ``$J/\\psi$``, ``Upsilon(1S)`` -> ``$\\Upsilon$(1S)``; others unchanged."""
    s = str(name)
    for pat, rep in _PARTICLE_TEX:
        if pat.match(s):
            return pat.sub(rep, s)
    return s


# ------------------------------------------------------------------------- run label
@dataclass(frozen=True)
class RunLabel:
    """What a figure says about the data it shows.

    Attributes
    ----------
    name : str
        The run's name (``"demo run"``).
    sqrt_s : float or None
        Centre-of-mass energy in TeV.
    luminosity : float or None
        Integrated luminosity in fb^-1.
    channel : str
        The final state (mathtext allowed, e.g. ``$\\mu^+\\mu^-$``).
    """

    name: str = ""
    sqrt_s: float | None = None
    luminosity: float | None = None
    channel: str = ""

    def conditions(self) -> str:
        """``√s = 10 TeV,  10 fb⁻¹,  μ⁺μ⁻`` (mathtext)."""
        parts = []
        if self.sqrt_s is not None:
            parts.append(rf"$\sqrt{{s}}$ = {self.sqrt_s:g} TeV")
        if self.luminosity is not None:
            parts.append(f"{self.luminosity:g} fb$^{{-1}}$")
        if self.channel:
            parts.append(self.channel)
        return ",  ".join(parts)

    def text(self) -> str:
        """The whole label on one line."""
        return "  ".join(p for p in (self.name, self.conditions()) if p)

    def __bool__(self) -> bool:
        return bool(self.name or self.sqrt_s is not None or self.luminosity is not None
                    or self.channel)


def points_at(ax: Any, x: float, y: float) -> Any:
    """A transform in points whose origin is the axes point ``(x, y)`` (axes fraction)."""
    from matplotlib import transforms

    fig = ax.figure
    return (transforms.Affine2D().scale(1.0 / 72.0) + fig.dpi_scale_trans
            + transforms.ScaledTranslation(x, y, ax.transAxes))


def text_width(text: str, size: float, weight: str = "normal") -> float:
    """Width of ``text`` in points at font ``size`` (mathtext measured as mathtext; of its
    widest line when it has several: mathtext has no line breaks)."""
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import text_to_path

    if "\n" in text:
        return max(text_width(line, size, weight) for line in text.split("\n"))

    prop = FontProperties(size=size, weight=weight)
    ismath = text.count("$") >= 2 and text.count("$") % 2 == 0
    w, _, _ = text_to_path.get_text_width_height_descent(text, prop, ismath=ismath)
    return float(w)


def as_run_label(run: Any) -> RunLabel | None:
    """``run`` as a :class:`RunLabel`: one already, None, the run's name (a str) or a
    mapping of its fields (``name``, ``sqrt_s``, ``luminosity``, ``channel``: the config's
    ``[run]`` keys, with the luminosity in fb^-1); anything else an InputError."""
    from .errors import InputError

    if run is None or isinstance(run, RunLabel):
        return run
    if isinstance(run, str):
        return RunLabel(name=run)
    if isinstance(run, Mapping):
        fields = ("name", "sqrt_s", "luminosity", "channel")
        unknown = [k for k in run if k not in fields]
        if unknown:
            raise InputError(f"run label: unknown key(s) {', '.join(map(repr, unknown))}; "
                             f"give {', '.join(fields)}")
        try:
            return RunLabel(name=str(run.get("name") or ""),
                            sqrt_s=None if run.get("sqrt_s") is None else float(run["sqrt_s"]),
                            luminosity=(None if run.get("luminosity") is None
                                        else float(run["luminosity"])),
                            channel=str(run.get("channel") or ""))
        except (TypeError, ValueError):
            raise InputError(f"run label: sqrt_s and luminosity must be numbers (TeV, "
                             f"fb^-1), got {dict(run)!r}") from None
    raise InputError(f"run label: give a peaksift.RunLabel, the run's name or a dict of "
                     f"name, sqrt_s, luminosity, channel; got {type(run).__name__}")


def draw_header(ax: Any, run: Any = None, note: str = "") -> None:
    """The run label above the axes (name in teal, conditions in grey) and, under it, the
    figure's own statement ``note`` (best mass, significance, assumptions).  ``run``: what
    :func:`as_run_label` takes."""
    run = as_run_label(run)
    size = 9.5
    y = 4.0 if note else 3.0
    if note:
        ax.text(0.0, 4.0, note, transform=points_at(ax, 0.0, 1.0), fontsize=8.8,
                color=COLORS["muted"], va="bottom", ha="left")
        y = 4.0 + 8.8 * 1.45 * (note.count("\n") + 1)
    if run:
        x = 0.0
        if run.name:
            ax.text(0.0, y, run.name, transform=points_at(ax, 0.0, 1.0), fontsize=size,
                    fontweight="bold", color=COLORS["label"], va="bottom", ha="left")
            x = text_width(run.name, size, "bold") + 9.0
        cond = run.conditions()
        if cond:
            ax.text(x, y, cond, transform=points_at(ax, 0.0, 1.0), fontsize=size,
                    color=COLORS["data"], va="bottom", ha="left")


# ------------------------------------------------------------------------- log axes
def plain_log_ticks(ax: Any) -> None:
    """Tick labels of a log-scale y axis as plain numbers (``0.6``, ``2``, ``40``) instead
    of powers of ten (``6 x 10^-1``), which on an axis shorter than a few decades crowd the
    axis label off the figure.  Call after the limits are set: the intermediate ticks
    are labelled on an axis up to 1.3 decades (2 and 5 up to 2.5 decades; none beyond)."""
    import math

    from matplotlib.ticker import FuncFormatter

    lo, hi = ax.get_ylim()
    span = math.log10(hi / lo) if lo > 0 and hi > lo else 99.0
    keep = (2, 3, 4, 5, 6, 8) if span <= 1.3 else (2, 5) if span <= 2.5 else ()

    def plain(v: float, _pos: Any = None) -> str:
        return f"{v:g}"

    def minor(v: float, _pos: Any = None) -> str:
        if v <= 0:
            return ""
        lead = round(v / 10.0 ** math.floor(math.log10(v) + 1e-9), 6)
        return plain(v) if lead in keep else ""

    ax.yaxis.set_major_formatter(FuncFormatter(plain))
    ax.yaxis.set_minor_formatter(FuncFormatter(minor))


# ---------------------------------------------------------------------------- blinding
def shade_blinded(ax: Any, span: Sequence[float] | None, *, label: str | None = "blinded"
                  ) -> None:
    """The blinded mass range as a pale hatched band (the same on every figure; its legend
    swatch is the same patch, hatching included)."""
    if span is None:
        return
    ax.axvspan(float(span[0]), float(span[1]), facecolor=COLORS["blind"],
               edgecolor=COLORS["blind_edge"], hatch="////", linewidth=0.0, zorder=0.5,
               label=label)
