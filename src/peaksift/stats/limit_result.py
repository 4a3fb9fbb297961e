"""What :func:`~peaksift.stats.limits.upper_limits` returns: :class:`LimitResult` (observed and
expected limits with their bands, per mass, and the assumptions behind them)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from .._vocabulary import method_words
from ..errors import FitError

#: Below this many background events expected under the signal (``b_eff``, see
#: :func:`upper_limits`) the asymptotic CLs bands are misplaced.  Measured with
#: ``scripts/study_low_count_limits.py`` (Gaussian peak on a falling exponential, 200-600
#: background-only data sets per point; % of observed limits beyond the -1 / +1 sigma
#: edges of the same run, nominal 15.9 each, and beyond the -2 / +2 sigma edges, nominal
#: 2.3): b_eff 0.5: 0 / 5-6 and 0 / 0; b_eff 2: 15 / 6 and 0 / 0; 5: 13-15 / 8.5-9.5 and
#: 0 / 0.2; 10: 10-12 / 13-15 and 0.5-1 / 0.2-2; 20: 13-15 / 11.5-13 and 1 / 1-1.5;
#: 50: 12.5-16.5 / 14-16 and 1.5-2 / 1.5.  From 10 events on the +-1 sigma band holds
#: its content to within a third and what remains (2 sigma edges a little wide) errs on
#: the safe side; below it the upper edges hold half their content or less.
LOW_COUNT_BACKGROUND = 10.0


@dataclass(frozen=True, repr=False, eq=False)
class LimitResult(FrozenValue):
    r"""CLs upper limits against mass (a frozen value).


    Attributes
    ----------
    masses : ndarray
    observed : ndarray
        Observed limit (NaN inside a blinded range).
    expected, expected_minus2, expected_minus1, expected_plus1, expected_plus2 : ndarray
        Median expected limit and the +-1, +-2 sigma band edges (background-only).
    unit : str
        ``"events"`` (signal yield) or the cross-section unit (e.g. ``"fb"``).
    cl : float
        Confidence level (0.95).
    method : str
        ``"auto"``, ``"asymptotic"`` or ``"toys"``, as asked; ``methods`` says per mass
        which one gave the numbers.
    background_under_signal : ndarray
        Effective background under the signal, b_eff (events; effective counts for
        weighted spectra), see :func:`upper_limits`.
    counting_floor : ndarray
        The lowest CLs limit any data can give, :math:`-\ln(1-\mathrm{CL})` = 2.996
        signal events at 95% CL (Read 2002; CLs >= exp(-s)), in ``unit`` at the nominal
        luminosity and efficiency.  With their uncertainties a limit may go below it by
        the normalisation's 2 sigma factor before it is flagged.
    low_count_background : float
        The b_eff threshold below which the asymptotic bands are doubtful.
    asymptotic_doubtful : ndarray of bool
        Masses below that threshold whose numbers still come from the formulae.
    below_floor : ndarray of bool
        Masses with an observed limit or band edge below the counting floor.
    flags : tuple of str
        Per mass, why it is flagged ("" when it is not).
    assumptions : mapping
        With a luminosity: ``luminosity``, ``luminosity_uncertainty``, ``efficiency``
        (None when it depends on mass: then ``efficiency_range``),
        ``efficiency_uncertainty`` (relative) and the ``constraint`` kind; empty otherwise.
    """

    masses: np.ndarray
    observed: np.ndarray
    expected: np.ndarray
    expected_minus2: np.ndarray
    expected_minus1: np.ndarray
    expected_plus1: np.ndarray
    expected_plus2: np.ndarray
    unit: str
    cl: float
    method: str
    methods: tuple[str, ...]
    blind: tuple[float, float] | None
    blinded: np.ndarray
    conversion: np.ndarray
    constraint: str | None
    relative_uncertainty: float
    toys: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    mass_unit: str = "GeV"
    background_under_signal: np.ndarray | None = None
    counting_floor: np.ndarray | None = None
    low_count_background: float = LOW_COUNT_BACKGROUND
    asymptotic_doubtful: np.ndarray | None = None
    below_floor: np.ndarray | None = None
    flags: tuple[str, ...] = ()
    assumptions: Any = field(default_factory=dict)

    @property
    def mass(self) -> np.ndarray:
        """The same array as ``masses`` (an alias kept for code written when results.json
        called the masses ``mass``)."""
        return self.masses

    def _summary(self) -> list[tuple[str, str]]:
        obs = np.where(self.blinded, np.nan, self.observed)
        out = [("masses", (f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} "
                          f"{self.mass_unit}")),
               ("limit", f"{self.cl:.0%} CL CLs ({method_words(self.method)}) on "
                         + ("the signal yield" if self.unit == "events" else
                            f"sigma x B [{self.unit}]"))]
        if np.any(np.isfinite(obs)):
            j = int(np.nanargmax(obs / self.expected))
            out.append(("observed", (f"{np.nanmin(obs):.3g}-{np.nanmax(obs):.3g} {self.unit}; "
                                    f"furthest above expected at {self.masses[j]:.2f} "
                                    f"{self.mass_unit}: {obs[j]:.3g} vs {self.expected[j]:.3g}")))
        out.append(("expected", (f"{np.nanmin(self.expected):.3g}-"
                                f"{np.nanmax(self.expected):.3g} {self.unit}")))
        flagged = sum(1 for f in self.flags if f)
        if flagged:
            out.append(("flagged", f"{flagged} masses (see flags)"))
        return out

    def __repr__(self) -> str:
        return "LimitResult(" + "; ".join(f"{k} {v}" for k, v in self._summary()) + ")"

    def _repr_html_(self) -> str:
        import html

        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>"
                       for k, v in self._summary())
        return f"<div><b>LimitResult</b><table>{rows}</table></div>"

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> LimitResult:
        """The LimitResult that :meth:`to_dict` wrote (or a results.json ``limits``)."""
        def arr(key: str, default: Any = None) -> np.ndarray | None:
            v = d.get(key, default)
            if v is None:
                return None
            return np.array([np.nan if x is None else x for x in v], float)

        try:
            # results.json files written before the key took the attribute's name call the
            # masses "mass": still read, so the results of earlier runs load
            masses = arr("masses" if "masses" in d else "mass")
            blind = d.get("blind")
            return cls(
                masses=masses, observed=arr("observed"), expected=arr("expected"),
                expected_minus2=arr("expected_minus2"), expected_minus1=arr("expected_minus1"),
                expected_plus1=arr("expected_plus1"), expected_plus2=arr("expected_plus2"),
                unit=str(d["unit"]), cl=float(d["cl"]), method=str(d["method"]),
                methods=tuple(d.get("methods") or ()),
                blind=None if blind is None else (float(blind[0]), float(blind[1])),
                blinded=np.array(d.get("blinded") or [False] * masses.size, bool),
                conversion=arr("conversion"), constraint=d.get("constraint"),
                relative_uncertainty=float(d.get("relative_uncertainty") or 0.0),
                toys=dict(d.get("toys") or {}), notes=tuple(d.get("notes") or ()),
                mass_unit=str(d.get("mass_unit", "GeV")),
                background_under_signal=arr("background_under_signal"),
                counting_floor=arr("counting_floor"),
                low_count_background=float(d.get("low_count_background",
                                                 LOW_COUNT_BACKGROUND)),
                asymptotic_doubtful=None if d.get("asymptotic_doubtful") is None else
                np.array(d["asymptotic_doubtful"], bool),
                below_floor=None if d.get("below_floor") is None else
                np.array(d["below_floor"], bool),
                flags=tuple(d.get("flags") or ()), assumptions=dict(d.get("assumptions") or {}))
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"not a limit result written by LimitResult.to_dict: {exc!r}") \
                from None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: the search's ``limits`` keys (``masses``, ``observed``, ``expected``,
        ``expected_minus2``, ``expected_minus1``, ``expected_plus1``, ``expected_plus2``,
        ``unit``) plus ``cl``, ``method`` and details (per mass: ``methods``,
        ``background_under_signal``, ``counting_floor``, ``asymptotic_doubtful``,
        ``below_floor``, ``flags``); blinded observed entries are None."""
        return plain({
            "masses": self.masses, "observed": self.observed, "expected": self.expected,
            "expected_minus2": self.expected_minus2, "expected_minus1": self.expected_minus1,
            "expected_plus1": self.expected_plus1, "expected_plus2": self.expected_plus2,
            "unit": self.unit, "cl": self.cl, "method": self.method,
            "methods": list(self.methods),
            "blind": None if self.blind is None else list(self.blind),
            "blinded": [bool(v) for v in self.blinded],
            "conversion": self.conversion, "constraint": self.constraint,
            "relative_uncertainty": self.relative_uncertainty,
            "toys": self.toys, "notes": list(self.notes),
            "background_under_signal": self.background_under_signal,
            "counting_floor": self.counting_floor,
            "low_count_background": self.low_count_background,
            "asymptotic_doubtful": self.asymptotic_doubtful,
            "below_floor": self.below_floor, "flags": list(self.flags),
            "assumptions": dict(self.assumptions), "mass_unit": self.mass_unit,
        })

    def plot(self, path: Any = None, *, ax: Any = None, fig: Any = None,
             title: str | None = None, log: bool = True, run: Any = None,
             symbol: str | None = None, assumptions: str = "") -> Any:
        """Observed and expected limits with the +-1 and +-2 sigma bands.

        ``assumptions``: what the conversion to the limit's unit took (luminosity,
        efficiency, their uncertainties), written above the axes under the run label
        ``run`` (a :class:`peaksift._annotations.RunLabel`); ``symbol``: the mass symbol
        (mathtext).  Draws on ``ax`` or an empty ``fig`` when given, on a new Figure (made
        without pyplot) otherwise; saves to ``path``; returns the Figure.
        """
        from .._annotations import draw_header, plain_log_ticks, shade_blinded
        from .._style import COLORS, figure_style, target_axes

        with figure_style():
            fig, ax = target_axes(fig, ax)
            m = self.masses
            ax.fill_between(m, self.expected_minus2, self.expected_plus2, color=COLORS["band2"],
                            lw=0, label=r"expected $\pm 2\sigma$")
            ax.fill_between(m, self.expected_minus1, self.expected_plus1, color=COLORS["band1"],
                            lw=0, label=r"expected $\pm 1\sigma$")
            ax.plot(m, self.expected, ls="--", color=COLORS["expected"], label="expected")
            obs = np.where(self.blinded, np.nan, self.observed)
            if np.any(np.isfinite(obs)):
                ax.plot(m, obs, color=COLORS["observed"], marker="o", ms=2.5, lw=1.4,
                        label="observed")
            shade_blinded(ax, self.blind, label="blinded (expected only)")
            top = float(np.nanmax(np.r_[self.expected_plus2, obs]))
            bottom = float(np.nanmin(np.r_[self.expected_minus2, obs]))
            if log:
                ax.set_yscale("log")
                ax.set_ylim(bottom / 1.25, top * 2.2)  # room for the legend above the bands
                plain_log_ticks(ax)
            else:
                ax.set_ylim(0.0, top * 1.35)
            ax.set_xlim(m[0], m[-1])
            ax.set_xlabel(f"${symbol or 'm'}$ [{self.mass_unit}]")
            what = ("signal yield [events]" if self.unit == "events"
                    else rf"$\sigma \times B$ [{self.unit}]")
            ax.set_ylabel(f"{self.cl:.0%} CL upper limit on {what}")
            ax.legend(loc="upper right", ncol=2)
            assumptions = assumptions or assumptions_text(self.assumptions)
            note = f"CLs ({method_words(self.method)})" + (f";  {assumptions}" if assumptions
                                                           else "")
            draw_header(ax, run, (title + "\n" + note) if title else note)
            if path is not None:
                fig.savefig(path)
        return fig


def assumptions_text(a: Mapping[str, Any]) -> str:
    """``L = 10 fb⁻¹ ± 2%,  ε = 0.55 ± 5%`` (mathtext) from :attr:`LimitResult.assumptions`."""
    from .._format import number

    if not a or a.get("luminosity") is None:
        return ""
    lu, eu = a.get("luminosity_uncertainty") or 0.0, a.get("efficiency_uncertainty") or 0.0
    eff = a.get("efficiency")
    if eff is None and a.get("efficiency_range"):
        lo, hi = a["efficiency_range"]
        eff_txt = f"{number(lo, 3)}-{number(hi, 3)}"
    else:
        eff_txt = number(eff, 3)
    return (f"L = {number(a['luminosity'], 4)} fb$^{{-1}}$"
            + (f" $\\pm$ {number(100 * lu, 3)}%" if lu else "")
            + f",  $\\varepsilon$ = {eff_txt}" + (f" $\\pm$ {number(100 * eu, 3)}%" if eu else ""))
