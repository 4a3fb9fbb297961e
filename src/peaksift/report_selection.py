"""The report's selection section: the cuts and pairing, and the cut flow with one count per
requirement of the cut expressions, in order, from the same pass over the data.

Built from results.json alone, like every section (:mod:`peaksift.report_sections`).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from .report_sections import (
    CAPTIONS,
    Block,
    figure_block,
    is_blinded,
    models_text,
    num_text,
    window_count_label,
)

_WITHHELD_CANDIDATES = ("The candidates' transverse momentum and rapidity figure is withheld "
                        "while the run is blinded (its histograms include the candidates inside "
                        "the blinded window).")


# ---------------------------------------------------------------------------- selection
def _cutflow_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    """Per requirement, in order, from the same pass over the data; then the pairing's."""
    inp = r.get("input") or {}
    req = inp.get("requirements") or {}
    cf = inp.get("cutflow") or {}
    rows: list[tuple[str, str]] = [(str(k), num_text(v)) for k, v in req.items()]
    pairing = {"events_with_pair": "events with a pair passing the charge requirement",
               "candidates": "candidates (pairs kept by the choice)"}
    if req:
        rows += [(label, num_text(cf[k])) for k, label in pairing.items() if k in cf]
    else:
        rows = [(str(k).replace("_", " "), num_text(v)) for k, v in cf.items()]
    if rows and inp.get("candidates") is not None:
        rows.append((window_count_label(r), num_text(inp["candidates"])))
    return rows


def _selection_rows(r: Mapping[str, Any]) -> list[tuple[str, str]]:
    cfg = r.get("config") or {}
    ob = cfg.get("objects") or {}
    pr = cfg.get("pairing") or {}
    sp = cfg.get("spectrum") or {}
    md = cfg.get("model") or {}
    res = md.get("resolution") or {}
    rows = [("Objects", f"{ob.get('collection')}"
                        + (f" + {ob['second_collection']}" if ob.get("second_collection") else "")),
            ("Object cut", ob.get("cut") or "none")]
    if ob.get("second_cut"):
        rows.append(("Second-object cut", ob["second_cut"]))
    rows.append(("Event cut", ob.get("event_cut") or "none"))
    rows.append(("Pairing", f"charge {pr.get('charge')}, choose {pr.get('choose')}"))
    w = sp.get("window") or [None, None]
    rows.append(("Fit window", f"{num_text(w[0])}-{num_text(w[1])} GeV in {sp.get('bins')} bins"))
    rows += [("Model", text) for text in models_text(r)]
    if md.get("background_options"):
        rows.append(("Background options", str(md["background_options"])))
    kind = next((k for k in ("relative", "absolute", "table") if res.get(k) is not None), None)
    if kind:
        val = res[kind]
        txt = {"relative": f"\u03c3/m = {val}", "absolute": f"\u03c3 = {val} GeV",
               "table": f"table {val}"}[kind]
        rows.append(("Resolution model", txt + (f", natural width {res.get('natural_width')} GeV"
                                                if res.get("natural_width") else "")))
    bl = r.get("blinding") or {}
    if bl.get("enabled"):
        bw = bl.get("window") or [None, None]
        rows.append(("Blinding", f"{num_text(bw[0])}-{num_text(bw[1])} GeV "
                     + ("UNBLINDED for this run" if bl.get("unblinded") else "hidden")))
    return rows


def section_selection(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    """The selection settings, the per-requirement cut flow and the candidates figure."""
    inp = r.get("input") or {}
    out: list[Block] = [("h2", "Selection and cut flow"),
                        ("table", ["setting", "value"], _selection_rows(r))]
    flow = _cutflow_rows(r)
    if flow:
        out += [("p", ("Each requirement is counted after the ones above it, in the order "
                      "they are applied, in the same pass over the data that filled the "
                      "spectrum (objects are counted in events passing the event cut).")),
                ("table", ["step", "count"], flow)]
    out.append(("p", (f"Events read: {num_text(inp.get('events_read'))}; events with a candidate: "
                     f"{num_text(inp.get('events_selected'))}; {window_count_label(r)}: "
                     f"{num_text(inp.get('candidates'))}.")))
    ws = (r.get("scan") or {}).get("weight_scale")
    if isinstance(ws, (int, float)) and ws != 1.0 and inp.get("sum_of_weights") is not None:
        out.append(("p", (f"The events are weighted: the sum of the candidates' weights is "
                          f"{num_text(inp['sum_of_weights'])}. Significances and limits use "
                          "scaled-Poisson effective counts (each bin's sum of weights times "
                          "sum(w)/sum(w²) of the bin), an approximation for unequal weights; "
                          "see Warnings.")))
    if "candidates" in fig:
        out += figure_block(fig, "candidates", CAPTIONS["candidates"])
    elif is_blinded(r):
        out.append(("p", _WITHHELD_CANDIDATES))
    return out
