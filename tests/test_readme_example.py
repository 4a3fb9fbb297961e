"""The README's library example runs as written on the demo data, and the fit it prints
is valid: the first thing a notebook user copies must not hand them an INVALID fit.

Reference for the numbers it prints: the demo's truth (the generator's invented resonance at 152 GeV,
``peaksift.simulate.scenario``), which the fitted mass must cover within 3 of its errors.
"""

from __future__ import annotations

import re
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def test_library_example_runs_and_fits_validly(monkeypatch, capsys):
    text = (REPO / "README.md").read_text()
    block = text[text.index("## Library example"):]
    code = re.search(r"```python\n(.*?)```", block, re.DOTALL).group(1)
    monkeypatch.chdir(REPO)
    scope: dict = {}
    exec(compile(code, "README.md", "exec"), scope)  # noqa: S102 -- the README's own code
    result = scope["result"]
    assert result.valid, result.problems
    assert abs(result.values["mass"] - 152.0) < 3 * result.errors["mass"]
    assert scope["s"].best["z_local"] > 0
    assert "FitResult(valid;" in capsys.readouterr().out
