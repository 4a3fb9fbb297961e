"""Building a :class:`Config` from TOML or a mapping: sections, cross-key checks (those of one
topic in :mod:`.checks`), loading."""

from __future__ import annotations

import hashlib
import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..errors import ConfigError, FitError, closest

if sys.version_info >= (3, 11):  # pragma: no cover - version switch
    import tomllib as _toml
else:  # pragma: no cover
    import tomli as _toml
from .checks import (
    _check_calibration_outside_blinding,
    _check_calibration_particle,
    _check_cut,
    _check_identification,
    _check_resolution,
    _check_shape,
    _check_signal_model,
    _check_template,
)
from .plan import check_background_bins, check_bins, check_scan_plan
from .schema import _REQUIRED, _TOP, SCHEMA
from .sections import (
    BlindingConfig,
    CalibrationConfig,
    Config,
    ExecutionConfig,
    IdentificationConfig,
    InputConfig,
    LimitsConfig,
    ModelConfig,
    ObjectsConfig,
    OutputConfig,
    OwnMaterialConfig,
    PairingConfig,
    ResolutionConfig,
    RunConfig,
    ScanConfig,
    SignalModelConfig,
    SignificanceConfig,
    SpectrumConfig,
    SystematicsConfig,
)
from .values import _check_fit_parameters, _type_name, _value, _where, config_path


def _section(name: str, raw: Any, where: str) -> dict[str, Any]:
    keys = {k.name: k for k in SCHEMA[name]}
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{where}: [{name}] must be a table, got {_type_name(raw)}")
    sub = {s.split(".", 1)[1] for s in SCHEMA if s.startswith(name + ".")}
    out: dict[str, Any] = {}
    for k, v in raw.items():
        if k in sub:
            continue
        if k not in keys:
            valid = list(keys) + sorted(sub)
            hint = closest(k, valid)
            raise ConfigError(
                f"{where}: unknown key {name}.{k}"
                + (f"; did you mean {name}.{hint}?" if hint else "")
                + f" (valid keys in [{name}]: {', '.join(valid)})"
            )
        out[k] = _value(f"{name}.{k}", keys[k], v, where)
    for k, key in keys.items():
        if k not in out or (out[k] is None and not key.nullable):
            if key.default is _REQUIRED:
                raise ConfigError(f"{where}: {name}.{k} is required ({key.doc})")
            d = key.default
            out[k] = tuple(d) if isinstance(d, list) else (dict(d) if isinstance(d, dict) else d)
    return out


def section_values(name: str, raw: Any, where: str, allowed: tuple[str, ...],
                   path: str) -> dict[str, Any]:
    """The keys ``raw`` gives, each one of ``allowed`` of section ``name``, checked against
    the schema (kind and range) and without defaults: the settings a combination config
    puts over its first channel's (``path``: the table's name in messages, e.g.
    ``combination.significance``)."""
    if raw is None:
        return {}
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{where}: [{path}] must be a table, got {_type_name(raw)}")
    keys = {k.name: k for k in SCHEMA[name] if k.name in allowed}
    out: dict[str, Any] = {}
    for k, v in raw.items():
        if k not in keys:
            hint = closest(k, list(keys))
            raise ConfigError(f"{where}: unknown key {path}.{k}"
                              + (f"; did you mean {path}.{hint}?" if hint else "")
                              + f" (valid keys in [{path}]: {', '.join(keys)})")
        val = _value(f"{path}.{k}", keys[k], v, where)
        if val is None and not keys[k].nullable:
            raise ConfigError(f"{where}: {path}.{k} cannot be empty ({keys[k].doc})")
        out[k] = tuple(val) if isinstance(val, list) else val
    return out


def output_figures(value: Any, where: str) -> tuple[str, ...]:
    """``output.figures`` checked (also for a combination's [output]): ``"all"``,
    ``"none"`` or figure names, as a tuple."""
    key = next(k for k in SCHEMA["output"] if k.name == "figures")
    figs = value if isinstance(value, tuple) else _value("output.figures", key, value, where)
    if len(figs) != 1 and {"all", "none"} & set(figs):
        raise ConfigError(f"{where}: output.figures takes \"all\", \"none\" or a list of "
                          "figure names, not a mix (e.g. figures = [\"spectrum\", "
                          "\"pvalue_scan\"])")
    if not figs:
        raise ConfigError(f"{where}: output.figures is empty; write \"none\" for no figures")
    return figs


def _build(raw: Mapping[str, Any], *, source: str, base_dir: Path, sha256: str,
           resolve_paths: bool = True) -> Config:
    where = _where(source)
    if not isinstance(raw, Mapping):
        raise ConfigError(f"{where}: the configuration must be a table of sections")
    tops = [s for s in _TOP if "." not in s]
    for k, v in raw.items():
        if k not in tops:
            hint = closest(k, tops)
            hint_txt = f"; did you mean [{hint}]?" if hint else ""
            raise ConfigError(
                f"{where}: unknown section [{k}]{hint_txt} (sections: {', '.join(tops)})"
            )
    vals = {name: _section(name, raw.get(name), where) for name in tops}
    model_raw = raw.get("model") or {}
    res = _section("model.resolution", model_raw.get("resolution"), where)

    # ---- cross-key rules
    inp = vals["input"]
    if resolve_paths:
        inp["files"] = tuple(config_path(f, base_dir) for f in inp["files"])

    sp = vals["spectrum"]
    lo, hi = sp["window"]
    if sp["bin_width"] is not None:
        n = (hi - lo) / sp["bin_width"]
        if abs(n - round(n)) > 1e-6 * max(1.0, n) or round(n) < 1:
            raise ConfigError(
                f"{where}: spectrum.bin_width = {sp['bin_width']:g} GeV does not divide the "
                f"window [{lo:g}, {hi:g}] into whole bins ({n:.4g}); change the width or window"
            )
        sp["bins"] = round(n)
    check_bins(sp, where)

    given = [k for k in ("relative", "absolute", "table") if res[k] is not None]
    if len(given) != 1:
        raise ConfigError(
            f"{where}: model.resolution needs exactly one of relative, absolute or table "
            f"(got {', '.join(given) if given else 'none'}); e.g. [model.resolution] "
            "relative = 0.01 for sigma = 1% of the mass"
        )
    _check_resolution(res, sp, where)

    output_figures(vals["output"]["figures"], where)

    pr = vals["pairing"]
    if pr["choose"] == "closest" and pr["target_mass"] is None:
        raise ConfigError(f"{where}: pairing.target_mass is required when pairing.choose = "
                          "\"closest\" (the mass in GeV the chosen pair should be nearest)")

    ob = vals["objects"]
    for key in ("collection",):
        if not ob[key].strip():
            raise ConfigError(f"{where}: objects.{key} must name a collection, e.g. \"muon\"")
    for key in ("cut", "second_cut", "event_cut"):
        _check_cut(f"objects.{key}", ob[key], where)
    ident = vals["identification"]
    own = _section("identification.own_material",
                   (raw.get("identification") or {}).get("own_material"), where)
    two_legs = _check_identification(ident, own, pr, ob, where)
    if ob["second_cut"] and not ob["second_collection"] and not two_legs:
        raise ConfigError(f"{where}: objects.second_cut is set but objects.second_collection is "
                          "empty; name the second collection, give pairing.hypotheses two "
                          "different names (second_cut then selects the second leg), or move "
                          "the cut to objects.cut")

    sc = vals["scan"]
    if sc["step"] is not None and sc["points"] is not None:
        raise ConfigError(f"{where}: give scan.step or scan.points, not both")
    s0 = sc["start"] if sc["start"] is not None else lo
    s1 = sc["stop"] if sc["stop"] is not None else hi
    for k, v in (("start", sc["start"]), ("stop", sc["stop"])):
        if v is not None and not (lo <= v <= hi):
            raise ConfigError(f"{where}: scan.{k} = {v:g} lies outside spectrum.window "
                              f"[{lo:g}, {hi:g}]; the scan must stay inside the fit window")
    if not s1 > s0:
        raise ConfigError(f"{where}: scan.stop ({s1:g}) must be above scan.start ({s0:g})")
    check_scan_plan(ResolutionConfig(**res).resolution, res, sp, sc, where)

    md = vals["model"]
    _check_shape("model.signal", md["signal"], where, "signal", md["signal_options"])
    _check_shape("model.background", md["background"], where, "background",
                 md["background_options"])
    _check_fit_parameters(md, (lo, hi), where)
    if sc["signal"]:
        _check_shape("scan.signal", sc["signal"], where, "signal")

    bl = vals["blinding"]
    if bl["enabled"]:
        if bl["window"] is None:
            raise ConfigError(f"{where}: blinding.window is required when blinding.enabled = "
                              "true, e.g. window = [150.0, 170.0]")
        b0, b1 = bl["window"]
        if b0 < lo or b1 > hi:
            raise ConfigError(f"{where}: blinding.window [{b0:g}, {b1:g}] must lie inside "
                              f"spectrum.window [{lo:g}, {hi:g}]")
    check_background_bins(md, sp, bl, where)

    cal = vals["calibration"]
    if cal["particle"]:
        from ..resonances import lookup

        try:
            known = lookup(cal["particle"])
        except ConfigError as exc:
            raise ConfigError(f"{where}: calibration.particle: {exc}") from None
        if cal["window"] is None:
            raise ConfigError(f"{where}: calibration.window is required when "
                              "calibration.particle is set, e.g. window = [70.0, 110.0]")
        if bl["enabled"]:
            _check_calibration_outside_blinding(cal["window"], bl["window"], sp, where)
        _check_calibration_particle(known, cal["window"], pr["charge"], where)
        _check_shape("calibration.signal", cal["signal"], where, "signal",
                     cal["signal_options"])
        _check_shape("calibration.background", cal["background"], where, "background",
                     cal["background_options"])

    li = vals["limits"]
    if li["toy_masses"] and li["method"] != "toys":
        raise ConfigError(f"{where}: limits.toy_masses is set but limits.method = "
                          f"{li['method']!r}; set method = \"toys\" or remove toy_masses")
    for i, m in enumerate(li["toy_masses"]):
        if not (s0 <= m <= s1):
            raise ConfigError(f"{where}: limits.toy_masses[{i}] = {m:g} lies outside "
                              f"[{s0:g}, {s1:g}] GeV (spectrum.window, or scan.start / "
                              "scan.stop); choose masses inside the scan range")

    _check_signal_model(vals["signal_model"], res, base_dir if resolve_paths else None, where)

    sy = vals["systematics"]
    if sy["background_families"]:
        from ..stats.background_choice import candidate_shapes

        try:
            candidate_shapes(list(sy["background_families"]), sqrt_s=sy["sqrt_s"])
        except FitError as exc:
            raise ConfigError(f"{where}: systematics.background_families: {exc}") from None
    if sy["template"] and resolve_paths:
        sy["template"] = config_path(sy["template"], base_dir)
        _check_template(sy["template"], sp["window"], where)

    ex = vals["execution"]
    if ex["address"] and ex["engine"] != "dask":
        raise ConfigError(f"{where}: execution.address is set but execution.engine = "
                          f"{ex['engine']!r}; set engine = \"dask\" to use a scheduler")

    return Config(
        input=InputConfig(**inp),
        spectrum=SpectrumConfig(**sp),
        objects=ObjectsConfig(**ob),
        pairing=PairingConfig(**pr),
        identification=IdentificationConfig(**ident, own_material=OwnMaterialConfig(**own)),
        model=ModelConfig(**md, resolution=ResolutionConfig(**res)),
        scan=ScanConfig(**sc),
        significance=SignificanceConfig(**vals["significance"]),
        blinding=BlindingConfig(**bl),
        limits=LimitsConfig(**vals["limits"]),
        systematics=SystematicsConfig(**sy),
        calibration=CalibrationConfig(**cal),
        signal_model=SignalModelConfig(**vals["signal_model"]),
        execution=ExecutionConfig(**ex),
        run=RunConfig(**vals["run"]),
        output=OutputConfig(**vals["output"]),
        source=source,
        base_dir=base_dir,
        sha256=sha256,
    )


def load_config(config: str | Path | Mapping[str, Any] | Config, *,
                base_dir: str | Path | None = None) -> Config:
    """Read and validate a search configuration.

    Parameters
    ----------
    config : path, mapping or Config
        A TOML file, a mapping with the same layout (paths relative to ``base_dir``, default
        the working directory), or an already validated :class:`Config` (returned as is).
    base_dir : path, optional
        Directory for relative paths when ``config`` is a mapping.

    Raises
    ------
    peaksift.errors.ConfigError
        Missing file, TOML syntax error (with line and column), unknown key, wrong type or
        out-of-range value; the message names the key path and suggests a fix.
    """
    if isinstance(config, Config):
        return config
    if isinstance(config, Mapping):
        import json

        text = json.dumps(config, sort_keys=True, default=str).encode()
        return _build(config, source="<dict>",
                      base_dir=Path(base_dir).resolve() if base_dir else Path.cwd(),
                      sha256=hashlib.sha256(text).hexdigest())
    path = Path(config)
    if not path.exists():
        raise ConfigError(f"config file {str(path)!r} does not exist; check the path "
                          "(write one with `peaksift demo OUTDIR` for an example)")
    if path.is_dir():
        raise ConfigError(f"config {str(path)!r} is a directory; give the TOML file itself")
    data = path.read_bytes()
    try:
        raw = _toml.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(f"config {path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except _toml.TOMLDecodeError as exc:
        hint = ""
        if data.startswith(b"\xef\xbb\xbf"):  # some Windows editors save a UTF-8 byte-order mark
            hint = ("; the file starts with a UTF-8 byte-order mark (BOM), which TOML does "
                    "not allow: save it as UTF-8 without BOM")
        raise ConfigError(f"config {path}: TOML syntax error: {' '.join(str(exc).split())}"
                          f"{hint}") from None
    return _build(raw, source=str(path), base_dir=path.resolve().parent,
                  sha256=hashlib.sha256(data).hexdigest())
