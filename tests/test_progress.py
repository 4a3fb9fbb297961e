"""Progress bars: a hidden bar loads nothing, a shown one is tqdm's and counts what it is told.

Why it matters: ``tqdm.auto`` costs ~40-70 ms of CPU to import (it looks for notebook
widgets), on the critical path of every quiet run (``-q``, a pipe, a test, a batch job).
"""

from __future__ import annotations

import io
import subprocess
import sys
import textwrap

from peaksift._progress import bar


def test_quiet_work_imports_no_tqdm():
    # the engines' map and the toys with progress off, in a fresh interpreter: tqdm must
    # not be among the loaded modules afterwards
    code = textwrap.dedent("""
        import sys
        import numpy as np
        from peaksift import MassHistogram
        from peaksift.execution import map_tasks
        from peaksift.stats.scan_inputs import _prepare_model
        from peaksift.stats.toys import run_toys

        assert map_tasks(abs, [1, -2, 3], progress=False) == [1, 2, 3]
        x = 100.0 + np.random.default_rng(1).exponential(100.0, 5000)
        h = MassHistogram(bins=100, range=(100.0, 500.0)).fill(x)
        model, _, _ = _prepare_model(h, "gaussian", "exponential", np.linspace(150, 450, 7),
                                     relative_resolution=0.01, window=None,
                                     natural_width=None, blind=None, signal_params=None,
                                     bins=None)
        run_toys(model, 8, seed=3, batch=4, progress=False)
        print("tqdm" in sys.modules)
    """)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == "False", done.stderr


def test_shown_bar_is_tqdm_and_counts():
    from tqdm.auto import tqdm

    out = io.StringIO()
    b = bar(5, shown=True, desc="things", unit="thing", file=out)
    assert isinstance(b, tqdm)
    b.update(2)
    b.update(3)
    assert b.n == 5
    b.close()
    assert "things" in out.getvalue()


def test_hidden_bar_takes_the_same_calls():
    b = bar(5, shown=False, desc="things", unit="thing", leave=False)
    b.update(2)
    b.update()
    b.close()
