"""Checking one value against its schema key: types, ranges, windows, parameter settings, paths."""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..errors import ConfigError, FitError, closest
from .schema import _Key


# ----------------------------------------------------------------------------- validation
def _where(source: str) -> str:
    return f"config {source}" if source != "<dict>" else "config"


def config_path(path: str, base_dir: Path) -> str:
    """A path as a config gives it: ``~`` expanded, relative to the config's directory
    ``base_dir`` unless absolute."""
    p = Path(path).expanduser()
    return str(p if p.is_absolute() else base_dir / p)


def _type_name(v: Any) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, int):
        return "an integer"
    if isinstance(v, float):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, Mapping):
        return "a table"
    return type(v).__name__


def _fmt(v: float, integer: bool = False) -> str:
    """A bound or value as text: integer keys as integers (``10000000``, not ``1e+07``)."""
    if integer and float(v).is_integer():
        return str(int(v))
    return f"{v:g}"


def _range_text(key: _Key) -> str:
    """``>= 0 and <= 10000000``: the allowed range of a numeric key."""
    integer = key.kind == "int"
    lo = "" if key.lo is None else (
        f"{'>' if key.lo_open else '>='} {_fmt(key.lo, integer)}")
    hi = "" if key.hi is None else (
        f"{'<' if key.hi_open else '<='} {_fmt(key.hi, integer)}")
    return " and ".join(x for x in (lo, hi) if x)


def _check_range(path: str, key: _Key, v: float, where: str) -> None:
    if not math.isfinite(v):
        raise ConfigError(f"{where}: {path} must be a finite number, got {v!r}")
    bad = False
    if key.lo is not None and (v < key.lo or (key.lo_open and v == key.lo)):
        bad = True
    if key.hi is not None and (v > key.hi or (key.hi_open and v == key.hi)):
        bad = True
    if bad:
        shown = _fmt(v, True) if key.kind == "int" else repr(v)
        raise ConfigError(f"{where}: {path} = {shown} is out of range; it must be "
                          f"{_range_text(key)}")


def _number(path: str, v: Any, where: str, *, integer: bool) -> float | int:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        want = "an integer" if integer else "a number"
        raise ConfigError(f"{where}: {path} must be {want}, got {_type_name(v)} ({v!r})")
    if integer and not isinstance(v, int):
        if float(v).is_integer():
            return int(v)
        raise ConfigError(f"{where}: {path} must be an integer, got {v!r}")
    return v if integer else float(v)


def _window(path: str, v: Any, where: str) -> tuple[float, float]:
    if not isinstance(v, (list, tuple)) or len(v) != 2:
        raise ConfigError(
            f"{where}: {path} must be a list of two numbers [low, high] in GeV, got {v!r}"
        )
    lo = _number(f"{path}[0]", v[0], where, integer=False)
    hi = _number(f"{path}[1]", v[1], where, integer=False)
    if not (math.isfinite(lo) and math.isfinite(hi)) or not hi > lo:
        raise ConfigError(f"{where}: {path} = {list(v)!r} must have finite low < high")
    if lo < 0:
        raise ConfigError(f"{where}: {path} = {list(v)!r}: masses cannot be negative")
    return (float(lo), float(hi))


def _value(path: str, key: _Key, v: Any, where: str) -> Any:
    k = key.kind
    if v is None:
        return None
    if k == "str":
        if not isinstance(v, str):
            raise ConfigError(f"{where}: {path} must be a string, got {_type_name(v)} ({v!r})")
        return v
    if k == "bool":
        if not isinstance(v, bool):
            raise ConfigError(f"{where}: {path} must be true or false, got {v!r}")
        return v
    if k in ("int", "float"):
        x = _number(path, v, where, integer=(k == "int"))
        if key.check is not None:
            problem = key.check(x)
            if problem:
                raise ConfigError(f"{where}: {path} {problem}")
        else:
            _check_range(path, key, float(x), where)
        return x
    if k == "choice":
        if not isinstance(v, str):
            raise ConfigError(
                f"{where}: {path} must be one of {', '.join(map(repr, key.choices))}, got {v!r}"
            )
        if v not in key.choices:
            hint = closest(v, key.choices)
            raise ConfigError(
                f"{where}: {path} = {v!r} is not allowed"
                + (f"; did you mean {hint!r}?" if hint else "")
                + f" (choose one of {', '.join(map(repr, key.choices))})"
            )
        return v
    if k == "window":
        return _window(path, v, where)
    if k in ("paths", "strings"):
        items = [v] if isinstance(v, str) else v
        if not isinstance(items, list) or not all(isinstance(x, str) for x in items):
            raise ConfigError(f"{where}: {path} must be a string or a list of strings, got {v!r}")
        if k == "paths" and not items:
            raise ConfigError(f"{where}: {path} is empty; list at least one file or glob")
        if key.choices:
            for x in items:
                if x not in key.choices:
                    hint = closest(x, key.choices)
                    raise ConfigError(
                        f"{where}: {path} contains {x!r}, which is not allowed"
                        + (f"; did you mean {hint!r}?" if hint else "")
                        + f" (allowed: {', '.join(map(repr, key.choices))})"
                    )
        return tuple(items)
    if k == "floats":
        if isinstance(v, tuple):  # from with_overrides
            v = list(v)
        if not isinstance(v, list):
            raise ConfigError(f"{where}: {path} must be a list of numbers, got {v!r}")
        vals = [float(_number(f"{path}[{i}]", x, where, integer=False)) for i, x in enumerate(v)]
        bad = [x for x in vals if not math.isfinite(x)]
        if bad:
            raise ConfigError(f"{where}: {path} must hold finite numbers, got {bad[0]!r}")
        return tuple(vals)
    if k in ("values", "ranges", "constraints"):
        if not isinstance(v, Mapping):
            raise ConfigError(f"{where}: {path} must be a table of parameter names, e.g. "
                              f"{_SETTING_EXAMPLE[k]}, got {_type_name(v)}")
        return {str(n): _parameter_setting(f"{path}.{n}", k, x, where) for n, x in v.items()}
    if k == "table":
        if not isinstance(v, Mapping):
            raise ConfigError(
                f"{where}: {path} must be a table (e.g. {{ degree = 3 }}), got {_type_name(v)}"
            )
        return dict(v)
    if k == "pairs":
        if (not isinstance(v, list) or len(v) < 2 or not all(
                isinstance(r, (list, tuple)) and len(r) == 2 for r in v)):
            raise ConfigError(
                f"{where}: {path} must be a list of at least two [mass, sigma] pairs, got {v!r}"
            )
        rows = []
        for i, (m, s) in enumerate(v):
            m = float(_number(f"{path}[{i}][0]", m, where, integer=False))
            s = float(_number(f"{path}[{i}][1]", s, where, integer=False))
            if not (math.isfinite(m) and math.isfinite(s)) or s <= 0:
                raise ConfigError(f"{where}: {path}[{i}] = {[m, s]!r}: sigma must be > 0")
            rows.append((m, s))
        ms = [r[0] for r in rows]
        if any(b <= a for a, b in itertools.pairwise(ms)):
            raise ConfigError(f"{where}: {path}: masses must increase from row to row")
        return tuple(rows)
    raise AssertionError(k)  # pragma: no cover - schema kinds are closed


_SETTING_EXAMPLE = {"values": "{ sigma = 2.0 }", "ranges": "{ width = [0.0, 100.0] }",
                    "constraints": "{ width = { kind = \"gaussian\", center = 30.0, width = 3.0 } }"}


def _constraint_kinds() -> tuple[str, ...]:
    """The constraint kinds a config may name (``peaksift.likelihood.CONSTRAINT_KINDS``,
    imported only when needed: the likelihood layer is slow to import)."""
    from ..likelihood import CONSTRAINT_KINDS

    return tuple(CONSTRAINT_KINDS)


def _parameter_setting(path: str, kind: str, v: Any, where: str) -> Any:
    """One entry of ``model.fix`` (a number), ``model.bounds`` (``[low, high]``) or
    ``model.constrain`` (``{kind, center, width}`` or ``[center, width]``), checked."""
    if kind == "values":
        x = float(_number(path, v, where, integer=False))
        if not math.isfinite(x):
            raise ConfigError(f"{where}: {path} must be a finite number, got {v!r}")
        return x
    if kind == "ranges":
        if not isinstance(v, (list, tuple)) or len(v) != 2:
            raise ConfigError(f"{where}: {path} must be [low, high], got {v!r}")
        lo = float(_number(f"{path}[0]", v[0], where, integer=False))
        hi = float(_number(f"{path}[1]", v[1], where, integer=False))
        if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
            raise ConfigError(f"{where}: {path} = {list(v)!r} must have finite low < high")
        return (lo, hi)
    if isinstance(v, (list, tuple)):
        if len(v) != 2:
            raise ConfigError(f"{where}: {path} must be [center, width] (Gaussian) or "
                              f"{{ kind = ..., center = ..., width = ... }}, got {v!r}")
        v = {"kind": "gaussian", "center": v[0], "width": v[1]}
    if not isinstance(v, Mapping):
        raise ConfigError(f"{where}: {path} must be {{ kind = ..., center = ..., width = ... }} "
                          f"or [center, width], got {_type_name(v)} ({v!r})")
    fields_ = ("kind", "center", "width")
    for f in v:
        if f not in fields_:
            hint = closest(f, fields_)
            raise ConfigError(f"{where}: unknown key {path}.{f}"
                              + (f"; did you mean {path}.{hint}?" if hint else "")
                              + " (a constraint has kind, center and width)")
    kinds = _constraint_kinds()
    kind_ = v.get("kind", "gaussian")
    if kind_ not in kinds:
        hint = closest(str(kind_), kinds)
        raise ConfigError(f"{where}: {path}.kind = {kind_!r} is not allowed"
                          + (f"; did you mean {hint!r}?" if hint else "")
                          + f" (choose one of {', '.join(map(repr, kinds))})")
    for f in ("center", "width"):
        if f not in v:
            raise ConfigError(f"{where}: {path}.{f} is required (a {kind_} constraint needs "
                              "center and width)")
    center = float(_number(f"{path}.center", v["center"], where, integer=False))
    width = float(_number(f"{path}.width", v["width"], where, integer=False))
    from ..likelihood import Constraint

    try:  # the likelihood layer's own rules (finite, positive width, positive median)
        Constraint(kind_, center, width)
    except FitError as exc:
        raise ConfigError(f"{where}: {path}: {' '.join(str(exc).split())}") from None
    return {"kind": kind_, "center": center, "width": width}


def _check_fit_parameters(md: dict[str, Any], window: tuple[float, float], where: str) -> None:
    """``model.fix`` / ``constrain`` / ``bounds`` name parameters of the free fit, each at
    most once across fix and the others, and ``sigma_from_resolution`` has a sigma to tie."""
    try:
        from .. import shapes
        from ..likelihood import Model

        sig = shapes.get(md["signal"], **dict(md["signal_options"]))
        bkg = shapes.get(md["background"], **dict(md["background_options"]))
        names = list(Model(sig, bkg, window).parameter_names)
    except (ImportError, AttributeError):  # models layer absent: the fit itself reports it
        return
    shape_bounds = {p.name: (p.lower, p.upper) for p in [*sig.parameters, *bkg.parameters]}
    what = f"{md['signal']} + {md['background']}"
    for key in ("fix", "constrain", "bounds"):
        for n in md[key]:
            if n not in names:
                hint = closest(n, names)
                raise ConfigError(
                    f"{where}: model.{key}.{n}: the free fit has no parameter {n!r}"
                    + (f"; did you mean model.{key}.{hint}?" if hint else "")
                    + f" (parameters of {what}: {', '.join(names)})")
    for n, v in md["fix"].items():
        for key in ("constrain", "bounds"):
            if n in md[key]:
                raise ConfigError(f"{where}: model.fix.{n} and model.{key}.{n} are both set; a "
                                  f"fixed parameter is neither constrained nor bounded: "
                                  f"remove one of them")
        lo, hi = shape_bounds.get(n, (-math.inf, math.inf))
        if not lo <= v <= hi:
            raise ConfigError(f"{where}: model.fix.{n} = {v:g} lies outside the range of "
                              f"{n} [{lo:g}, {hi:g}]")
    for n, c in md["constrain"].items():
        lo, hi = md["bounds"].get(n, shape_bounds.get(n, (-math.inf, math.inf)))
        if not lo <= c["center"] <= hi:
            raise ConfigError(f"{where}: model.constrain.{n}.center = {c['center']:g} lies "
                              f"outside the bounds of {n} [{lo:g}, {hi:g}]")
    tie = md["sigma_from_resolution"]
    unc = md["resolution_uncertainty"]
    if tie == "free":
        if unc is not None:
            raise ConfigError(f"{where}: model.resolution_uncertainty is set but "
                              "model.sigma_from_resolution = \"free\"; set it to "
                              "\"constrained\" or remove resolution_uncertainty")
        return
    if "sigma" not in [p.name for p in sig.parameters]:
        raise ConfigError(f"{where}: model.sigma_from_resolution = {tie!r}, but model.signal = "
                          f"{md['signal']!r} has no Gaussian sigma; use gaussian, crystalball "
                          "or voigt, or set sigma_from_resolution = \"free\"")
    for key in ("fix", "constrain") + (("bounds",) if tie == "fixed" else ()):
        if "sigma" in md[key]:
            raise ConfigError(f"{where}: model.{key}.sigma and model.sigma_from_resolution = "
                              f"{tie!r} both set sigma; remove one of them")
    if tie == "constrained" and unc is None:
        raise ConfigError(f"{where}: model.sigma_from_resolution = \"constrained\" needs "
                          "model.resolution_uncertainty, the relative width of the constraint "
                          "(e.g. 0.1 for 10%)")
    if tie == "fixed" and unc is not None:
        raise ConfigError(f"{where}: model.resolution_uncertainty is set but "
                          "model.sigma_from_resolution = \"fixed\" uses no uncertainty; set "
                          "it to \"constrained\" or remove resolution_uncertainty")
