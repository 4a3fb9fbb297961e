"""``peaksift.stats`` exports functions lazily; a submodule of the same name (``scan``)
imported first must not shadow the function (it did: ``from peaksift.stats import scan``
returned the module after ``import peaksift.stats.scan``).  Checked in a fresh interpreter,
since the order of imports is the point."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

SRC = str(Path(__file__).resolve().parents[1] / "src")


def test_function_wins_over_a_submodule_of_the_same_name():
    code = ("import importlib\n"
            "mod = importlib.import_module('peaksift.stats.scan')  # the submodule first\n"
            "import peaksift.stats\n"
            "from peaksift.stats import scan\n"
            "assert callable(scan) and scan is mod.scan, type(scan)\n"
            "assert peaksift.stats.scan is mod.scan\n"
            "import peaksift\n"
            "assert peaksift.scan is mod.scan\n")
    env = {**os.environ, "PYTHONPATH": SRC + os.pathsep + os.environ.get("PYTHONPATH", "")}
    r = subprocess.run([sys.executable, "-c", code], check=False, env=env, capture_output=True,
                       text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
