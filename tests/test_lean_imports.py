"""``peaksift._lean_imports.scipy_special``: scipy.special imported without numpy's unused
lazily loaded submodules, and numpy and scipy working as before afterwards.

Run in a fresh interpreter (a test session has scipy loaded long before)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src"

_SCRIPT = r"""
import json, math, sys
from peaksift._lean_imports import scipy_special
special = scipy_special()
skipped = [m for m in ("numpy.f2py", "numpy.testing", "numpy.matlib") if m in sys.modules]
import numpy as np
import scipy._lib._array_api as aa
xp = aa.np_compat
out = {
    "skipped_loaded": skipped,
    "ndtr": float(special.ndtr(1.3)),
    "erf_ref": 0.5 * (1.0 + math.erf(1.3 / math.sqrt(2.0))),
    "gammaln": float(special.gammaln(7.5)),
    "lgamma_ref": math.lgamma(7.5),
    # numpy's own lazy loading answers again, and the shim's copies load the real modules
    "np_f2py_real": type(np.f2py).__name__ == "module" and hasattr(np.f2py, "run_main"),
    "np_ma": float(np.ma.masked_array([1.0, 2.0, 3.0], mask=[0, 1, 0]).sum()),
    "xp_ma": float(xp.ma.masked_array([1.0, 2.0], mask=[1, 0]).sum()),
    "np_poly": float(np.polynomial.Polynomial([1.0, 2.0, 3.0])(2.0)),
    "again_same": scipy_special() is special,
}
print(json.dumps(out))
"""


def test_scipy_special_without_numpys_unused_submodules():
    """In a fresh process: f2py, testing and matlib are not loaded by the import; scipy's
    functions against the standard library (``math.erf``: Phi(x) = (1 + erf(x / sqrt 2)) /
    2, Abramowitz and Stegun 26.2.29; ``math.lgamma``) to 1e-14; numpy's masked arrays and
    polynomials (closed forms: 1 + 3 = 4, 2, 1 + 2*2 + 3*4 = 17) work afterwards, through
    numpy and through scipy's copy of its namespace."""
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    done = subprocess.run([sys.executable, "-c", _SCRIPT], env=env, capture_output=True,
                          text=True, check=True, timeout=300)
    got = json.loads(done.stdout.strip().splitlines()[-1])
    assert got["skipped_loaded"] == []
    assert abs(got["ndtr"] - got["erf_ref"]) <= 1e-14
    assert abs(got["gammaln"] - got["lgamma_ref"]) <= 1e-13
    assert got["np_f2py_real"]
    assert got["np_ma"] == 4.0 and got["xp_ma"] == 2.0 and got["np_poly"] == 17.0
    assert got["again_same"]


_DOCS = r"""
import json, sys
lean = sys.argv[1] == "lean"
if lean:
    from peaksift._lean_imports import scipy_special
    special = scipy_special()
else:
    import scipy.special as special
import scipy._lib._array_api as aa
import numpy as np
x = np.linspace(-3.0, 3.0, 13)
print(json.dumps({
    "all": sorted(special.__all__),
    "table": sorted(getattr(f, "__name__", str(f)) for f in aa.xp_capabilities_table),
    "erf_doc": special.erf.__doc__ or "",
    "values": [float(v) for v in np.concatenate([special.erf(x), special.ndtri((x + 3.5) / 7.0),
                                                 special.gammaln(x + 4.0)])],
    "restored": aa.FunctionDoc.__name__,
}))
"""


def test_scipy_special_docstrings_left_as_they_are():
    """Against ``import scipy.special`` done the usual way in another fresh process (the
    reference): the same public names, the same table of array-library capabilities
    (scipy's own tests read it), the same values of erf, ndtri and gammaln on a grid
    (exactly: the same compiled functions); only the capability note scipy adds to each
    docstring ("Array API Standard Support") is left out, scipy's own text kept; scipy's
    docstring parser is back in place afterwards."""
    env = {**os.environ, "PYTHONPATH": str(SRC)}

    def run(mode: str) -> dict:
        done = subprocess.run([sys.executable, "-c", _DOCS, mode], env=env,
                              capture_output=True, text=True, check=True, timeout=300)
        return json.loads(done.stdout.strip().splitlines()[-1])

    lean, plain = run("lean"), run("plain")
    assert lean["all"] == plain["all"] and len(lean["all"]) > 100
    assert lean["table"] == plain["table"] and "erf" in lean["table"]
    assert lean["values"] == plain["values"]
    assert "Array API Standard Support" in plain["erf_doc"]
    assert "Array API Standard Support" not in lean["erf_doc"]
    assert "Returns the error function" in lean["erf_doc"]
    assert lean["restored"] == "FunctionDoc"
