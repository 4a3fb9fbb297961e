"""``peaksift._lean_imports.scipy_special`` under adversarial conditions: a numpy that lacks
one of the listed submodules, modules the user loaded before, numpy's deprecated
``numpy.core`` alias, masked arrays pickled and type-checked afterwards.

The outside reference throughout is numpy's and scipy's own behaviour without the lean
import (numpy's ``__getattr__``/``__dir__``, ``importlib.util.find_spec``), run in fresh
interpreters (a test session has scipy loaded long before)."""

from __future__ import annotations

import importlib.util
import json
import os
import subprocess
import sys
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src"


def _run(script: str) -> dict:
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True,
                          text=True, check=True, timeout=300)
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_every_listed_name_is_a_numpy_submodule():
    """The list names submodules this numpy has (``importlib.util.find_spec``): a name
    numpy dropped would leave a stale entry (numpy 1.26 has no ``numpy.strings``)."""
    from peaksift._lean_imports import _LAZY

    for name in _LAZY:
        assert importlib.util.find_spec(f"numpy.{name}") is not None, name


_MISSING = r"""
import json
import peaksift._lean_imports as li
# a submodule this numpy does not have, as numpy.strings on numpy 1.26 (which scipy 1.17
# and our pyproject both accept): the list must not invent it
li._LAZY = li._LAZY + ("no_such_submodule",)
li.scipy_special()
import numpy as np
import scipy._lib._array_api as aa
xp = aa.np_compat
out = {"np": hasattr(np, "no_such_submodule"), "xp": hasattr(xp, "no_such_submodule")}
try:
    out["xp_attr"] = hasattr(getattr(xp, "no_such_submodule", None), "anything")
except Exception as e:
    out["xp_attr"] = type(e).__name__
print(json.dumps(out))
"""


def test_a_submodule_numpy_lacks_is_not_invented():
    """Fail safe if numpy drops a submodule (or is 1.26, without ``numpy.strings``): scipy's
    copy of numpy's namespace answers as numpy does (reference: ``hasattr(numpy, name)``
    is False), not a stand-in whose every attribute raises ModuleNotFoundError."""
    got = _run(_MISSING)
    assert got["np"] is False
    assert got["xp"] == got["np"], got
    assert got["xp_attr"] is False, got


_BEFORE = r"""
import json, sys, warnings, pickle
import numpy.ma, numpy.polynomial
import numpy as np
ma_before, poly_before = np.ma, np.polynomial
from peaksift._lean_imports import scipy_special, _OnFirstUse
special = scipy_special()
import scipy._lib._array_api as aa
xp = aa.np_compat
m = np.ma.masked_array([1.0, 2.0, 5.0], mask=[0, 1, 0])
with warnings.catch_warnings(record=True) as w:
    warnings.simplefilter("always")
    np.core.multiarray
    core_warn = [x.category.__name__ for x in w]
out = {
    "ma_same": np.ma is ma_before and xp.ma is ma_before,
    "poly_same": np.polynomial is poly_before and xp.polynomial is poly_before,
    "isinstance": isinstance(m, np.ma.MaskedArray) and isinstance(m, xp.ma.MaskedArray),
    "pickled_sum": float(pickle.loads(pickle.dumps(m)).sum()),
    "core_warn": core_warn,
    "left_on_numpy": [k for k, v in vars(np).items() if isinstance(v, _OnFirstUse)],
    "testing": hasattr(np.testing, "assert_allclose") and hasattr(xp.testing, "assert_allclose"),
}
print(json.dumps(out))
"""


def test_modules_loaded_before_are_kept_and_numpy_answers_as_before():
    """numpy.ma and numpy.polynomial loaded by the user first: numpy and scipy's copy hold
    those very modules; a masked array type-checks and pickles (1 + 5 = 6 unmasked);
    ``numpy.core`` still warns (numpy 2.0 release notes: a DeprecationWarning on use);
    no stand-in is left on numpy; numpy.testing answers through both."""
    got = _run(_BEFORE)
    assert got["ma_same"] and got["poly_same"] and got["isinstance"]
    assert got["pickled_sum"] == 6.0
    assert got["core_warn"] == ["DeprecationWarning"]
    assert got["left_on_numpy"] == []
    assert got["testing"]

