"""The results of the background choice: :class:`BackgroundCandidate` (one function's
background-only fit, its order test, and the spectrum its figure draws) and
:class:`BackgroundChoice` (every candidate, the kept ones).  Apart from
:mod:`.background_choice`, which fits them, so that each module stays one concept."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError

__all__ = ["BackgroundCandidate", "BackgroundChoice"]


@dataclass(frozen=True, repr=False, eq=False)
class BackgroundCandidate(FrozenValue):
    """One candidate function's background-only fit to the data.

    ``n_parameters`` counts every free parameter (shape parameters and the yield);
    ``order_p_value`` is the order test's p-value against the next order of its family
    (None for the highest order); ``spurious`` the largest |fitted signal| / stat. error
    on the template (None until :func:`spurious_signal` ran).

    What :meth:`plot` draws: the window's bin ``edges``, the ``observed`` counts the fit saw
    (NaN in the ``blinded`` bins, never kept; for a weighted spectrum the scaled-Poisson
    effective counts, ``weighted``) and the fit's ``expected`` counts in every bin (the
    blinded ones extrapolated).  None in a candidate read from a dict written before
    they were kept."""

    label: str
    family: str
    order: int
    n_parameters: int
    nll: float
    chi2: float
    ndf: int
    gof_p_value: float
    parameters: dict
    background_yield: float
    order_statistic: float | None = None
    order_p_value: float | None = None
    chosen: bool = False
    note: str = ""
    edges: np.ndarray | None = None
    observed: np.ndarray | None = None
    expected: np.ndarray | None = None
    blinded: np.ndarray | None = None
    weighted: bool = False

    @property
    def pulls(self) -> np.ndarray:
        """(n - mu) / sqrt(mu) per bin, NaN in the blinded bins (the counts as the fit saw
        them)."""
        if self.expected is None:
            raise FitError(f"background candidate {self.label}: no spectrum kept (read from "
                           "a dict written before candidates kept it); rerun choose_background")
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.blinded | (self.expected <= 0), np.nan,
                            (self.observed - self.expected) / np.sqrt(self.expected))

    def plot(self, path: Any = None, *, run: Any = None, symbol: str | None = None) -> Any:
        """The spectrum with this candidate's background-only fit (dashed where it is
        extrapolated under a blinded window) and the pulls beneath, as a matplotlib Figure
        drawn without pyplot (the user's backend is left alone); ``run``: the run label,
        ``symbol``: the pair's mass symbol (mathtext); saved to ``path`` when given.  See
        :func:`peaksift.stats.result_figures.background_candidate_figure`."""
        from .result_figures import background_candidate_figure

        return background_candidate_figure(self, path, run=run, symbol=symbol)

    def __repr__(self) -> str:
        tag = " (kept)" if self.chosen else ""
        return (f"BackgroundCandidate({self.label}{tag}: NLL {self.nll:.2f}, "
                f"{self.n_parameters} parameters, GOF p {self.gof_p_value:.3g})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, every key the attribute of the same name."""
        return plain({f: getattr(self, f) for f in self.__dataclass_fields__})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> BackgroundCandidate:
        """The candidate :meth:`to_dict` wrote (a non-finite number comes back as NaN)."""
        try:
            num = {k: math.nan if d[k] is None else float(d[k])
                   for k in ("nll", "chi2", "gof_p_value", "background_yield")}
            opt = {k: None if d.get(k) is None else float(d[k])
                   for k in ("order_statistic", "order_p_value")}
            arrays = {k: None if d.get(k) is None else
                      np.array([math.nan if v is None else v for v in d[k]], float)
                      for k in ("edges", "observed", "expected")}
            if d.get("blinded") is not None:
                arrays["blinded"] = np.array(d["blinded"], bool)
            return cls(label=str(d["label"]), family=str(d["family"]), order=int(d["order"]),
                       n_parameters=int(d["n_parameters"]), ndf=int(d["ndf"]),
                       parameters={k: math.nan if v is None else float(v)
                                   for k, v in dict(d["parameters"]).items()},
                       chosen=bool(d.get("chosen", False)), note=str(d.get("note", "")),
                       weighted=bool(d.get("weighted", False)), **num, **opt, **arrays)
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"not a background candidate written by BackgroundCandidate."
                           f"to_dict: {exc!r}") from None


@dataclass(frozen=True, repr=False, eq=False)
class BackgroundChoice(FrozenValue):
    """Every candidate's fit, the order test per family and the candidates kept."""

    candidates: tuple
    size: float
    window: tuple[float, float]
    blind: tuple[float, float] | None
    n_bins: int
    test: str = ("likelihood ratio 2(NLL_n - NLL_n+1) between consecutive orders; "
                 "p-value from chi-square with the difference in free parameters (Wilks)")

    @property
    def chosen(self) -> tuple[BackgroundCandidate, ...]:
        return tuple(c for c in self.candidates if c.chosen)

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(c.label for c in self.chosen)

    @property
    def kept(self) -> tuple[str, ...]:
        """The labels of the candidates kept (results.json ``kept``; as :attr:`labels`)."""
        return self.labels

    def candidate(self, label: str) -> BackgroundCandidate:
        for c in self.candidates:
            if c.label == label:
                return c
        raise FitError(f"no background candidate {label!r}; have "
                       f"{', '.join(c.label for c in self.candidates)}")

    def __repr__(self) -> str:
        return (f"BackgroundChoice({len(self.candidates)} candidates, kept "
                f"{', '.join(self.labels)}; order test size {self.size:g})")

    def to_dict(self) -> dict[str, Any]:
        return plain({"candidates": [c.to_dict() for c in self.candidates],
                      "kept": list(self.labels), "size": self.size,
                      "window": list(self.window),
                      "blind": None if self.blind is None else list(self.blind),
                      "n_bins": self.n_bins, "test": self.test})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> BackgroundChoice:
        """The choice :meth:`to_dict` wrote."""
        try:
            cands = tuple(BackgroundCandidate.from_dict(c) for c in d["candidates"])
            return cls(cands, float(d["size"]), tuple(float(v) for v in d["window"]),
                       None if d["blind"] is None else tuple(float(v) for v in d["blind"]),
                       int(d["n_bins"]), str(d["test"]))
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"not a background choice written by BackgroundChoice.to_dict: "
                           f"{exc!r}") from None

    def plot(self, path: Any = None, *, run: Any = None) -> Any:
        """Each candidate's goodness of fit and the order test between consecutive
        orders, as a matplotlib Figure drawn without pyplot (the user's backend is left
        alone); ``run``: the run label; saved to ``path`` when given.  See
        :func:`peaksift.stats.result_figures.background_choice_figure`."""
        from .result_figures import background_choice_figure

        return background_choice_figure(self, path, run=run)
