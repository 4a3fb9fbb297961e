"""What every figure of one run states about it (:class:`FigureLabels`: the run label and
the pair's mass symbol, from a configuration by :func:`figure_labels`), and :func:`save`,
which writes a figure in several formats."""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .._annotations import RunLabel, channel_tex, mass_symbol
from .._style import figure_style

__all__ = ["FigureLabels", "figure_labels", "save"]


@dataclass(frozen=True)
class FigureLabels:
    """What every figure of one run says about it: the run label and the mass symbol."""

    run: RunLabel | None = None
    symbol: str = "m"

    def mass_axis(self, unit: str = "GeV") -> str:
        return f"${self.symbol}$ [{unit}]"


def figure_labels(cfg: Any) -> FigureLabels:
    """:class:`FigureLabels` from a validated configuration: the ``[run]`` keys (name,
    sqrt_s, channel; the luminosity is ``limits.luminosity``), the collections -- or the
    legs' mass hypotheses when the pairing has them (identified tracks: ``m_{KK}``, not the
    tracks' ``m_{tt}``) -- and the pairing's charge (the channel when ``run.channel`` is not
    set)."""
    if cfg is None:
        return FigureLabels()
    ob, pr = getattr(cfg, "objects", None), getattr(cfg, "pairing", None)
    first = getattr(ob, "collection", None)
    second = getattr(ob, "second_collection", None)
    hyp = list(getattr(pr, "hypotheses", None) or ())
    if hyp:
        first, second = hyp[0], hyp[-1]
    charge = getattr(pr, "charge", None)
    run_cfg = getattr(cfg, "run", None)
    lim = getattr(cfg, "limits", None)
    channel = getattr(run_cfg, "channel", "") or channel_tex(first, second, charge)
    run = RunLabel(name=getattr(run_cfg, "name", "") or "",
                   sqrt_s=getattr(run_cfg, "sqrt_s", None),
                   luminosity=getattr(lim, "luminosity", None),
                   channel=channel)
    return FigureLabels(run=run, symbol=mass_symbol(first, second))


def save(fig: Any, outdir: str | os.PathLike[str], name: str,
         formats: Sequence[str] = ("png", "pdf")) -> Path:
    """Save ``fig`` as ``outdir/name.<fmt>`` for each format; return the PNG path.

    PNG is always written (the reports embed it) even when not listed in ``formats``.
    """
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    fmts = list(dict.fromkeys(["png", *formats]))
    with figure_style():
        for fmt in fmts:
            fig.savefig(outdir / f"{name}.{fmt}", format=fmt)
    return outdir / f"{name}.png"
