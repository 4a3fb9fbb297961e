"""A MassHistogram on disk: ``.json`` (the ``spectrum.json`` format) or ``.npz``, both exact.

Version 2 names the per-bin arrays ``values`` and ``variances`` (the histogram protocol's
words) and the flow variances ``underflow_variance``/``overflow_variance``.  Version 1 files
(``weight_sum``, ``weight_sq_sum``, ``underflow_weight_sq_sum``, ...) still load, with a
DeprecationWarning saying how to rewrite them.
"""

from __future__ import annotations

import io
import json
import warnings
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from .._files import atomic_write
from ..errors import InputError

FORMAT = "peaksift-mass-histogram"
FORMAT_VERSION = 2
# version 1 key -> version 2 key
_V1_KEYS = {"weight_sum": "values", "weight_sq_sum": "variances",
            "underflow_weight_sq_sum": "underflow_variance",
            "overflow_weight_sq_sum": "overflow_variance"}


def to_dict(h: Any) -> dict[str, Any]:
    return {
        "format": FORMAT,
        "version": FORMAT_VERSION,
        "unit": h.unit,
        "label": h.label,
        "edges": h.edges.tolist(),
        "values": h.values().tolist(),
        "variances": h.variances().tolist(),
        "underflow": h.underflow,
        "overflow": h.overflow,
        "underflow_variance": h.underflow_variance,
        "overflow_variance": h.overflow_variance,
        "n_nan": h.n_nan,
    }


def _upgrade(d: dict[str, Any], where: str) -> dict[str, Any]:
    old = [k for k in _V1_KEYS if k in d]
    if not old:
        return d
    warnings.warn(f"{where}: a version 1 mass histogram (keys {', '.join(old)}); version 2 "
                  "calls them values/variances. It loads as before; save it again "
                  "(MassHistogram.load(p).save(p)) to rewrite it", DeprecationWarning,
                  stacklevel=4)
    return {_V1_KEYS.get(k, k): v for k, v in d.items()}


def from_dict(cls: Any, d: Any, where: str) -> Any:
    if not isinstance(d, dict):
        raise InputError(f"{where}: not a peaksift mass histogram (not a JSON object)")
    if d.get("format") != FORMAT:
        raise InputError(f"{where}: not a peaksift mass histogram (format key is "
                         f"{d.get('format')!r})")
    if int(d.get("version", 1)) > FORMAT_VERSION:
        raise InputError(f"{where}: mass histogram format version {d.get('version')} is newer "
                         f"than this peaksift reads ({FORMAT_VERSION}); update peaksift")
    d = _upgrade(d, where)
    try:
        h = cls(np.asarray(d["edges"], dtype=float), unit=str(d.get("unit", "GeV")),
                label=str(d.get("label", "m")))
        values = np.asarray(d["values"], dtype=float)
        variances = np.asarray(d["variances"], dtype=float)
    except KeyError as exc:
        raise InputError(f"{where}: missing key {exc.args[0]!r}") from None
    if values.shape != (h.nbins,) or variances.shape != (h.nbins,):
        raise InputError(f"{where}: {h.nbins} bins but values has {values.size} and variances "
                         f"{variances.size} entries")
    h.weight_sum, h.weight_sq_sum = values, variances
    h.underflow = float(d.get("underflow", 0.0))
    h.overflow = float(d.get("overflow", 0.0))
    h.underflow_variance = float(d.get("underflow_variance", 0.0))
    h.overflow_variance = float(d.get("overflow_variance", 0.0))
    h.n_nan = int(d.get("n_nan", 0))
    return h


def save(h: Any, path: Path) -> Path:
    if path.suffix.lower() == ".json":
        data = json.dumps(to_dict(h), indent=1).encode()
    else:
        buf = io.BytesIO()
        np.savez(
            buf,
            format=np.array(FORMAT),
            version=np.array(FORMAT_VERSION),
            unit=np.array(h.unit),
            label=np.array(h.label),
            edges=np.asarray(h.edges),
            values=h.values(),
            variances=h.variances(),
            flow=np.array([h.underflow, h.overflow, h.underflow_variance, h.overflow_variance]),
            n_nan=np.array(h.n_nan),
        )
        data = buf.getvalue()
    atomic_write(path, data)
    return path


def load(cls: Any, path: Path) -> Any:
    if not path.exists():
        raise InputError(f"histogram file {str(path)!r} does not exist")
    try:
        if path.suffix.lower() == ".json":
            return from_dict(cls, json.loads(path.read_text()), str(path))
        with np.load(path, allow_pickle=False) as z:
            flow = z["flow"]
            d = {k: z[k] for k in z.files if k in ("edges", *_V1_KEYS, "values", "variances")}
            d.update(format=str(z["format"]), unit=str(z["unit"]), label=str(z["label"]),
                     underflow=flow[0], overflow=flow[1], underflow_variance=flow[2],
                     overflow_variance=flow[3], n_nan=int(z["n_nan"]))
    except InputError:
        raise
    except (OSError, ValueError, KeyError, TypeError, EOFError, zipfile.BadZipFile) as exc:
        # corrupt file, wrong archive, missing arrays
        raise InputError(f"cannot read histogram file {str(path)!r}: {exc}") from None
    return from_dict(cls, d, str(path))
