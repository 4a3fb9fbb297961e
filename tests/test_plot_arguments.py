"""What a notebook user hands to a result's ``plot``: a run label as a name or a dict of
the config's ``[run]`` keys (as peaksift.RunLabel), and a path that cannot be written is an
OutputError naming it, never matplotlib's raw exception.

Reference for the label's text: the values given here, as the figure must show them.
"""

from __future__ import annotations

import numpy as np
import pytest

import peaksift
from peaksift import InputError, MassHistogram, OutputError


@pytest.fixture(scope="module")
def results():
    rng = np.random.default_rng(4)
    m = np.concatenate([100.0 + rng.exponential(40.0, 5000), rng.normal(200.0, 3.0, 150)])
    h = MassHistogram.from_masses(m[m < 300.0], bins=100, range=(100.0, 300.0))
    fit = peaksift.fit(h, "gaussian", "exponential", start={"mass": 200.0})
    scan = peaksift.scan(h, "gaussian", "exponential", 30, absolute_resolution=3.0,
                         refit=False)
    lim = peaksift.upper_limits(h, "gaussian", "exponential", [150.0, 250.0],
                                absolute_resolution=3.0)
    return fit, scan, lim


def _texts(fig) -> str:
    return "\n".join(t.get_text() for ax in fig.axes for t in ax.texts)


@pytest.mark.parametrize("which", [0, 1, 2])
def test_run_label_as_a_name_or_a_dict(results, which):
    r = results[which]
    fig = r.plot(run={"name": "my run", "sqrt_s": 13.5, "luminosity": 30})
    text = _texts(fig)
    assert "my run" in text and "13.5 TeV" in text and "30 fb" in text
    assert "her run" in _texts(r.plot(run="her run"))
    same = r.plot(run=peaksift.RunLabel(name="my run", sqrt_s=13.5, luminosity=30.0))
    assert _texts(same) == text
    with pytest.raises(InputError, match="unknown key"):
        r.plot(run={"name": "x", "energy": 13})
    with pytest.raises(InputError, match="run label"):
        r.plot(run=42)


@pytest.mark.parametrize("which", [0, 1, 2])
def test_unwritable_paths_are_output_errors(results, which, tmp_path):
    r = results[which]
    with pytest.raises(OutputError, match="no_such_folder"):
        r.plot(tmp_path / "no_such_folder" / "x.png")
    with pytest.raises(OutputError, match="x.pnj"):
        r.plot(tmp_path / "x.pnj")
    r.plot(tmp_path / "x.png")
    assert (tmp_path / "x.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
