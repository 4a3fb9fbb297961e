"""``peaksift._lean_imports.matplotlib_without_set_docs``: matplotlib imported inside it
works as matplotlib does (``set()`` with its properties and aliases, its errors, the same
pixels), only the generated ``set()`` docstrings are left out; classes made after the block
get theirs again.

Run in a fresh interpreter (a test session has matplotlib loaded long before, where the
block does nothing)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src"

_SCRIPT = r"""
import json, sys
from peaksift._lean_imports import matplotlib_without_set_docs
with matplotlib_without_set_docs():
    from matplotlib.lines import Line2D
    from matplotlib.text import Text
    from matplotlib.figure import Figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.artist import Artist
line = Line2D([0, 1], [0, 1])
line.set(lw=3.5, color="red", linestyle="--")  # an alias, a name, a style
try:
    line.set(no_such_property=1)
    unknown = "accepted"
except AttributeError as exc:
    unknown = str(exc)
class After(Text):  # made after the block: matplotlib's docstring again
    pass
out = {
    "lw": line.get_linewidth(), "color": line.get_color(), "ls": line.get_linestyle(),
    "unknown": unknown,
    "line_doc": Line2D.set.__doc__, "after_doc": After.set.__doc__ or "",
    "own_set": Line2D.set is not Artist.set and After.set is not Text.set,
    "restored": isinstance(Artist.__dict__["_update_set_signature_and_docstring"], classmethod)
        and Artist.__dict__["_update_set_signature_and_docstring"].__func__.__name__
        == "_update_set_signature_and_docstring",
}
fig = Figure(figsize=(2, 1.5)); FigureCanvasAgg(fig)
ax = fig.subplots(); ax.plot([0, 1, 2], [0, 1, 0], lw=2); ax.set_title("$m_{ee}$ [GeV]")
fig.canvas.draw()
import hashlib
out["pixels"] = hashlib.sha256(bytes(fig.canvas.buffer_rgba())).hexdigest()
print(json.dumps(out))
"""

_PLAIN = _SCRIPT.replace("with matplotlib_without_set_docs():", "if True:")


def _run(script: str) -> dict:
    env = {**os.environ, "PYTHONPATH": str(SRC), "MPLBACKEND": "Agg"}
    done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                          text=True, check=True, timeout=300)
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_artists_imported_without_set_docs_work_as_matplotlibs():
    """Against matplotlib imported as usual in another fresh process (the reference):
    ``set()`` takes names and aliases (lw -> linewidth) and rejects an unknown property
    with the same message; a small drawn figure has the same RGBA bytes (exact); the
    generated docstring ("Supported properties", matplotlib's ``Artist`` text) is absent
    only for the classes made inside the block, and the hook is restored."""
    lean, plain = _run(_SCRIPT), _run(_PLAIN)
    assert (lean["lw"], lean["color"], lean["ls"]) == (3.5, "red", "--")
    assert (lean["lw"], lean["color"], lean["ls"]) == (plain["lw"], plain["color"], plain["ls"])
    assert "no_such_property" in lean["unknown"] and lean["unknown"] == plain["unknown"]
    assert lean["pixels"] == plain["pixels"]
    assert "Supported properties" in plain["line_doc"]
    assert not lean["line_doc"]
    assert "Supported properties" in lean["after_doc"]
    assert lean["own_set"] and lean["restored"]
