"""A fit's result does not reach into the next fit: the model of shapes given by name is
kept between fits (``peaksift.fitting.setup``), so a result's ``model`` is shared with the
later fits of the same shapes and window; changing it through one result must not change
what a later fit computes.

Reference: the same fit computed in a new Python process (nothing kept there), compared to
1e-9 relative in NLL and values (a fit is deterministic: the same numbers to rounding).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from peaksift.errors import PeaksiftError
from peaksift.fitting import fit
from peaksift.histogram import MassHistogram

_HERE = Path(__file__).resolve().parent
_SRC = str(_HERE.parent / "src")


def _histogram() -> MassHistogram:
    rng = np.random.default_rng(5)
    x = 100.0 + rng.exponential(40.0, 6000)
    x = np.concatenate([x[x < 200.0], rng.normal(150.0, 3.0, 250)])
    return MassHistogram.from_masses(x, bins=80, range=(100.0, 200.0))


def _fresh() -> dict:
    """The fit of the same histogram in a new process."""
    code = (f"import json, sys\nsys.path.insert(0, {str(_HERE)!r})\n"
            "from test_fit_kept_model import _histogram\nfrom peaksift.fitting import fit\n"
            "r = fit(_histogram())\n"
            "print(json.dumps({'nll': r.nll, 'values': dict(r.values)}))")
    env = {**os.environ, "PYTHONPATH": _SRC}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=env, check=True, timeout=120)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("change", ["window", "blocks", "signals", "parameters"])
def test_changing_a_results_model_leaves_later_fits_alone(change):
    h = _histogram()
    r = fit(h)
    m = r.model
    try:  # refused, or the result's own: either way no later fit may see it
        if change == "window":
            m.window = (120.0, 180.0)
        elif change == "blocks":
            m.blocks.append(m.blocks[0])
        elif change == "signals":
            m.signals[0] = m.background
        else:
            m.parameters = m.parameters[::-1]
    except (PeaksiftError, TypeError, AttributeError):
        pass
    ref = _fresh()
    for again in (fit(h), fit(h.copy())):  # the kept setup, and a histogram new to it
        assert again.nll == pytest.approx(ref["nll"], rel=1e-9)
        for k, v in ref["values"].items():
            assert again.values[k] == pytest.approx(v, rel=1e-9, abs=1e-9)
