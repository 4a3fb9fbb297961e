"""The search's written outputs: results.json, report.md and a self-contained report.html.

Everything here works from the plain results dictionary (the content of ``results.json``,
:meth:`peaksift.search.SearchResult.to_dict`) and a mapping of figure names to PNG files, so a
report can be rebuilt from a results file without rerunning the search.

* :func:`write_results_json` -- ``results.json``, written atomically (temporary name, rename).
* :func:`render_markdown` / :func:`render_html` -- the meeting report as text; the HTML embeds
  every figure as a base64 ``data:`` URI and needs no other file.
* :func:`write_report` -- both reports into a directory, atomically.

The report is a list of sections (:data:`SECTIONS`), each one function
``section(results, figures) -> list of blocks`` (a heading, a paragraph, a table, a list, a
figure); both renderers draw the same blocks, so a new section is one function added to the
list, and the Markdown and HTML reports cannot disagree.

Numbers are written through :mod:`peaksift._format` (shared with the command-line summary):
a missing or non-finite value reads "n/a", and a p-value below the smallest double is given
as a power of ten from its ``log10_p_*`` entry.

The report always carries the caution that a local significance is not a discovery, says how
the look-elsewhere effect was treated, and defers to the analysis group's statistical
procedures and review.
"""

from __future__ import annotations

import base64
import html
import os
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ._files import atomic_write
from ._format import format_interval, format_pm, number
from ._json import dumps, plain
from .report_background import section_background_model
from .report_fits import section_background_fit, section_calibration, section_identification
from .report_limits import section_limits
from .report_sections import (
    BLINDED_CAPTIONS,
    CAPTIONS,
    CAUTION,
    Block,
    Section,
    fit_settings_text,
    section_caution,
    section_other_figures,
    section_provenance,
    section_result,
    section_warnings,
)
from .report_selection import section_selection

__all__ = [
    "CAUTION",
    "SECTIONS",
    "atomic_write",
    "blocks_html",
    "blocks_markdown",
    "fit_settings_text",
    "format_interval",
    "format_pm",
    "render_html",
    "render_markdown",
    "run_line",
    "write_report",
    "write_results_json",
]



# figure captions by name (kept under their former private names for existing callers)
_CAPTIONS, _BLINDED_CAPTIONS = CAPTIONS, BLINDED_CAPTIONS

# ------------------------------------------------------------------------------- writing
def write_results_json(results: Mapping[str, Any], path: str | os.PathLike[str]) -> Path:
    """Write the results dictionary as indented JSON (a list of numbers on one line),
    atomically; NaN/inf become ``null``."""
    text = dumps(plain(results))
    return atomic_write(path, text + "\n")


#: the report's sections in order; a new section is one function added here
SECTIONS: list[Section] = [
    section_warnings,
    section_result,
    section_background_fit,
    section_background_model,
    section_calibration,
    section_identification,
    section_limits,
    section_selection,
    section_other_figures,
    section_provenance,
    section_caution,
]


def _title(r: Mapping[str, Any]) -> str:
    cfg = r.get("config") or {}
    t = (cfg.get("output") or {}).get("title")
    if t:
        return str(t)
    ob = cfg.get("objects") or {}
    a = ob.get("collection", "object")
    b = ob.get("second_collection")
    ch = (cfg.get("pairing") or {}).get("charge", "")
    chs = {"opposite": "opposite-charge ", "same": "same-charge "}.get(ch, "")
    return f"Resonance search in {chs}{a}-{b} pairs" if b and b != a else \
        f"Resonance search in {chs}{a} pairs"


def run_line(r: Mapping[str, Any]) -> str:
    """The run label of the figures, as text: name, sqrt(s), L, channel."""
    cfg = r.get("config") or {}
    run = cfg.get("run") or {}
    lumi = (cfg.get("limits") or {}).get("luminosity")
    parts = [str(run.get("name") or ""),
             f"\u221as = {number(run['sqrt_s'])} TeV" if run.get("sqrt_s") else "",
             f"{number(lumi)} fb\u207b\u00b9" if lumi else ""]
    return ", ".join(p for p in parts if p)


def _blocks(r: Mapping[str, Any], fig: Mapping[str, Any]) -> list[Block]:
    out: list[Block] = [("h1", _title(r))]
    run = run_line(r)
    if run:
        out.append(("p", run))
    out.append(("caution", CAUTION))
    for section in SECTIONS:
        out += section(r, fig)
    return out


# ------------------------------------------------------------------------------ markdown
def _md_table(head: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    def esc(s: str) -> str:
        return str(s).replace("|", "\\|")
    out = ["| " + " | ".join(esc(h) for h in head) + " |",
           "|" + "|".join("---" for _ in head) + "|"]
    out += ["| " + " | ".join(esc(c) for c in row) + " |" for row in rows]
    return "\n".join(out)


def render_markdown(results: Mapping[str, Any], figures: Mapping[str, str] | None = None) -> str:
    """The meeting report as Markdown; ``figures`` maps figure names to relative PNG paths."""
    fig = dict(figures or {})
    return blocks_markdown(_blocks(results, fig), fig)


def blocks_markdown(blocks: Sequence[Block], figures: Mapping[str, str]) -> str:
    """Report blocks (``("h1", text)``, ``("p", text)``, ``("table", head, rows)``, ...) as
    Markdown; ``figures`` maps figure names to relative PNG paths."""
    fig = figures
    out: list[str] = []
    for b in blocks:
        kind = b[0]
        if kind == "h1":
            out += [f"# {b[1]}", ""]
        elif kind == "h2":
            out += [f"## {b[1]}", ""]
        elif kind == "h3":
            out += [f"### {b[1]}", ""]
        elif kind == "caution":
            out += [f"> **Caution.** {b[1]}", ""]
        elif kind == "p":
            out += [str(b[1]), ""]
        elif kind == "table":
            out += [_md_table(b[1], b[2]), ""]
        elif kind == "list":
            out += [f"- {x}" for x in b[1]] + [""]
        elif kind == "figure":
            out += [f"![{b[1]}]({fig[b[1]]})", "", f"*{b[2]}*", ""]
    return "\n".join(out)


# ---------------------------------------------------------------------------------- html
_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;max-width:60rem;
margin:2rem auto;padding:0 1rem;color:#1b1b1f;line-height:1.45}
h1{font-size:1.6rem;margin-bottom:.3rem}h2{font-size:1.25rem;margin-top:2rem;
border-bottom:1px solid #d6d8dc}h3{font-size:1.05rem}
table{border-collapse:collapse;margin:.6rem 0 1rem;font-size:.93rem}
th,td{border:1px solid #d6d8dc;padding:.25rem .6rem;text-align:left;vertical-align:top}
th{background:#f2f4f6}td.num{text-align:right;font-variant-numeric:tabular-nums;
white-space:nowrap}
.caution{background:#fff6e5;border-left:4px solid #e0a458;padding:.6rem .9rem;margin:1rem 0}
figure{margin:1rem 0}figure img{max-width:100%;height:auto;border:1px solid #eceef1}
figcaption{font-size:.9rem;color:#4a4d55}code{font-size:.9em}
.hash{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.8rem;word-break:break-all}
.run{color:#1f6f8b;font-weight:600;margin-top:0}
"""


def _h(s: Any) -> str:
    return html.escape(str(s), quote=True)


#: a number as the report writes it: sign, digits with thousands commas, one decimal point,
#: an exponent; "n/a" and "-" stand in for one (a version such as 3.11.7 is not a number)
_NUMERIC = re.compile(r"^[\u2212+\-]?(\d{1,3}(,\d{3})+|\d+)(\.\d+)?(e[+-]?\d+)?$|^n/a$|^-$")


def _html_table(head: Sequence[str], rows: Sequence[Sequence[str]], *,
                mono_last: bool = False) -> str:
    # a column of numbers is right-aligned (digits line up); a column that mixes numbers
    # with text stays left-aligned throughout, so it reads as one column
    numeric = [j > 0 and all(_NUMERIC.match(str(r[j])) for r in rows if j < len(r))
               for j in range(max((len(r) for r in rows), default=0))]
    out = ["<table>", "<tr>" + "".join(f"<th>{_h(x)}</th>" for x in head) + "</tr>"]
    for row in rows:
        cells = []
        for j, c in enumerate(row):
            cls = ' class="hash"' if (mono_last and j == len(row) - 1) else (
                ' class="num"' if numeric[j] else "")
            cells.append(f"<td{cls}>{_h(c)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</table>")
    return "\n".join(out)


def _img(path: str | os.PathLike[str], name: str, cap: str | None = None) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    cap = CAPTIONS.get(name, name) if cap is None else cap
    return (f'<figure id="fig-{_h(name)}"><img alt="{_h(name)}" '
            f'src="data:image/png;base64,{data}"><figcaption>{_h(cap)}</figcaption></figure>')


def render_html(results: Mapping[str, Any], figures: Mapping[str, str | os.PathLike[str]]
                | None = None) -> str:
    """The meeting report as one self-contained HTML page (figures embedded as base64 PNG)."""
    fig = dict(figures or {})
    return blocks_html(_title(results), _blocks(results, fig), fig, run_line(results))


def blocks_html(title: str, blocks: Sequence[Block],
                figures: Mapping[str, str | os.PathLike[str]], run_line: str = "") -> str:
    """Report blocks as one self-contained HTML page (figures embedded as base64 PNG);
    a paragraph equal to ``run_line`` before any other is styled as the run label."""
    fig = figures
    b: list[str] = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
                    f"<title>{_h(title)}</title>", f"<style>{_CSS}</style></head><body>"]
    first_p = True
    for blk in blocks:
        kind = blk[0]
        if kind in ("h1", "h2", "h3"):
            b.append(f"<{kind}>{_h(blk[1])}</{kind}>")
        elif kind == "caution":
            b.append(f'<div class="caution"><strong>Caution.</strong> {_h(blk[1])}</div>')
        elif kind == "p":
            cls = ' class="run"' if first_p and run_line and blk[1] == run_line else ""
            b.append(f"<p{cls}>{_h(blk[1])}</p>")
        elif kind == "table":
            b.append(_html_table(blk[1], blk[2], mono_last=len(blk) > 3 and blk[3] == "hash"))
        elif kind == "list":
            b.append("<ul>" + "".join(f"<li>{_h(x)}</li>" for x in blk[1]) + "</ul>")
        elif kind == "figure":
            b.append(_img(fig[blk[1]], blk[1], blk[2]))
        first_p = first_p and kind != "p"
    b.append("</body></html>")
    return "\n".join(b) + "\n"


def write_report(results: Mapping[str, Any], outdir: str | os.PathLike[str],
                 figures: Mapping[str, str | os.PathLike[str]]) -> dict[str, Path]:
    """Write ``report.md`` (figures by relative path) and ``report.html`` (figures embedded).

    ``figures`` maps figure names (``spectrum``, ``pvalue_scan``, ...) to PNG files inside
    ``outdir``.
    """
    outdir = Path(outdir)
    rel = {k: Path(os.path.relpath(Path(v), outdir)).as_posix() for k, v in figures.items()}
    md = atomic_write(outdir / "report.md", render_markdown(results, rel))
    ht = atomic_write(outdir / "report.html", render_html(results, figures))
    return {"markdown": md, "html": ht}

