"""Checks of one topic across several keys, called by :func:`peaksift.config.build._build`
while it builds a Config: shapes (exist, right kind, options accepted), the resolution
(defined on the whole window, not far below a bin), cut expressions (parsed now), the
calibration window kept out of the blinded bins, ``[signal_model]`` and
``[identification]``.  Each raises :class:`~peaksift.errors.ConfigError` naming the keys
and the fix; the simpler cross-key rules stand in ``_build`` itself."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from ..errors import ConfigError, FitError, closest
from ..resolution import check_resolved
from .sections import IdentificationConfig, OwnMaterialConfig, ResolutionConfig
from .values import config_path


def _check_shape(path: str, name: str, where: str, kind: str,
                 options: Mapping[str, Any] | None = None) -> None:
    """The shape must exist, be of the right kind, and accept its options."""
    try:
        from .. import shapes
        table = shapes.available()
    except (ImportError, AttributeError):  # models layer absent: the fit itself reports it
        return
    names = [n for n, info in table.items() if info.get("kind") == kind]
    if name not in names:
        hint = closest(name, names)
        other = table.get(name, {}).get("kind")
        what = f"is a {other} shape, not a {kind} shape" if other else f"is not a {kind} shape"
        raise ConfigError(
            f"{where}: {path} = {name!r} {what}"
            + (f"; did you mean {hint!r}?" if hint else "")
            + f" (available: {', '.join(names)})"
        )
    if options:
        for k, v in options.items():  # every shape option is a number (start, order, ...)
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise ConfigError(f"{where}: {path}_options.{k} must be a number, got {v!r}")
        try:
            shapes.get(name, **dict(options))
        except (FitError, TypeError, ValueError) as exc:
            raise ConfigError(f"{where}: {path}_options {dict(options)!r} not accepted by "
                              f"{name!r}: {' '.join(str(exc).split())}") from None


def _check_calibration_outside_blinding(cal: tuple[float, float], blind: tuple[float, float],
                                        spectrum: Mapping[str, Any], where: str) -> None:
    """The calibration fit must not see blinded data: its window may not overlap the spectrum
    bins hidden by the blinding (every bin overlapping ``blinding.window``,
    :func:`peaksift.blinding.blinded_bins`)."""
    import numpy as np

    from ..blinding import hidden_range

    lo, hi = spectrum["window"]
    e = np.linspace(lo, hi, int(spectrum["bins"]) + 1)
    h0, h1 = hidden_range(e, blind) or blind
    c0, c1 = cal
    if c0 < h1 and c1 > h0:
        raise ConfigError(
            f"{where}: calibration.window [{c0:g}, {c1:g}] overlaps blinding.window "
            f"[{blind[0]:g}, {blind[1]:g}] (spectrum bins {h0:g}-{h1:g} GeV are hidden), so "
            f"the calibration fit would see blinded data; end calibration.window at or below "
            f"{h0:g} GeV or start it at or above {h1:g} GeV, or disable the calibration "
            "(calibration.particle = \"\")"
        )


def _check_calibration_particle(known: Any, window: Any, charge_rule: str | None,
                                where: str) -> None:
    """The calibration's particle must be one the pairs can be: its mass inside
    calibration.window (else its fit starts outside its bounds after the events are read)
    and its charge that of the pairing's pairs (a W+ among opposite-charge pairs "fits" the
    Z0 there with a shift of +134 per mille, reported as a calibration)."""
    from ..resonances import pair_charge

    lo, hi = float(window[0]), float(window[1])
    if not lo < known.mass < hi:
        raise ConfigError(f"{where}: calibration.window [{lo:g}, {hi:g}] does not contain "
                          f"{known.name}'s mass {known.mass:.6g} GeV (particle tables); set "
                          f"calibration.window around it")
    pc = pair_charge(charge_rule)
    if pc is not None and abs(round(float(known.charge))) != pc:
        made = "neutral" if pc == 0 else f"charge {pc}"
        raise ConfigError(f"{where}: calibration.particle {known.name!r} has charge "
                          f"{float(known.charge):+g}, but pairing.charge = {charge_rule!r} "
                          f"makes {made} pairs; calibrate on a particle of that charge")


def _check_template(path: Any, window: Any, where: str) -> None:
    """systematics.template must be a histogram file covering spectrum.window: else the
    spurious-signal test fails after every event is read and the scan and toys are run,
    its message naming the template's bins as if they were the spectrum's."""
    from ..errors import InputError
    from ..histogram import MassHistogram

    try:
        t = MassHistogram.load(path)
    except (OSError, InputError) as exc:
        raise ConfigError(f"{where}: systematics.template: cannot read {str(path)!r} ({exc}); "
                          "give a histogram saved by peaksift (spectrum.json layout)") from None
    lo, hi = float(window[0]), float(window[1])
    if not (t.lo <= lo and t.hi >= hi):
        raise ConfigError(f"{where}: systematics.template covers {t.lo:g}-{t.hi:g} "
                          f"{t.unit}, but spectrum.window is [{lo:g}, {hi:g}]; give a "
                          "template of simulated background over the whole window")


def _check_resolution(res: Mapping[str, Any], spectrum: Mapping[str, Any], where: str) -> None:
    """The resolution must be defined on the whole window (a table covers it) and not far
    below the bin width (:func:`peaksift.resolution.check_resolved`), so the scan's grid of
    hypotheses half a sigma apart stays finite."""
    import numpy as np

    cfg = ResolutionConfig(**res)
    lo, hi = spectrum["window"]
    r = cfg.resolution
    try:
        r.sigma(np.array([lo, hi]))
    except FitError:  # only a table can fail here: its rows do not reach the window's ends
        t0, t1 = r.mass_range  # type: ignore[misc]
        raise ConfigError(
            f"{where}: model.resolution.table covers {t0:g}-{t1:g} GeV but spectrum.window "
            f"is [{lo:g}, {hi:g}]; add rows so the table spans the window (sigma is not "
            "guessed beyond the measured points)") from None
    edges = np.linspace(lo, hi, int(spectrum["bins"]) + 1)
    try:
        check_resolved(r, 0.5 * (edges[1:] + edges[:-1]), edges, what="model.resolution")
    except FitError as exc:
        raise ConfigError(f"{where}: {exc}") from None


def _check_cut(path: str, text: str, where: str) -> None:
    """Parse a cut expression now (syntax and whitelist), so a typo stops the run up front."""
    if not text.strip():
        return
    try:
        from .. import cuts
    except ImportError:  # pragma: no cover - candidates layer missing
        return
    checker = getattr(cuts, "compile_cut", None)
    if checker is None:
        return
    try:
        checker(text)
    except ConfigError:
        raise
    except Exception as exc:
        from ..errors import CutError

        if isinstance(exc, CutError):
            raise CutError(f"{where}: {path}: {' '.join(str(exc).split())}") from None
        raise


def _check_signal_model(sm: dict[str, Any], res: Mapping[str, Any], base_dir: Path | None,
                        where: str) -> None:
    """``[signal_model]``: one mass and one generated count per file, a signal shape, and
    samples or a saved model but not both; paths resolved against the config's directory."""
    if base_dir is not None:
        sm["files"] = tuple(config_path(f, base_dir) for f in sm["files"])
        if sm["saved"]:
            sm["saved"] = config_path(sm["saved"], base_dir)
    if sm["files"] and sm["saved"]:
        raise ConfigError(f"{where}: give signal_model.files (samples) or signal_model.saved "
                          "(a previous results.json), not both")
    n = len(sm["files"])
    if sm["mass_column"] and sm["masses"]:
        raise ConfigError(f"{where}: give signal_model.masses or signal_model.mass_column "
                          "(the samples' generated masses read from a column), not both")
    n_mass = n if sm["mass_column"] else len(sm["masses"])
    if n and (n_mass != n or len(sm["generated"]) != n):
        raise ConfigError(
            f"{where}: signal_model.files has {n} samples but masses has "
            f"{len(sm['masses'])} and generated {len(sm['generated'])}; give one generated "
            "mass and one number of generated events per file (or signal_model.mass_column for "
            "the masses)")
    if n and any(g <= 0 for g in sm["generated"]):
        raise ConfigError(f"{where}: signal_model.generated must be > 0 for every sample")
    if n:
        _check_shape("signal_model.shape", sm["shape"], where, "signal")
    if (n or sm["saved"]) and res.get("natural_width"):
        raise ConfigError(f"{where}: model.resolution.natural_width cannot be combined with "
                          "[signal_model] (the samples give the whole peak shape)")


def _check_identification(ident: dict[str, Any], own: Mapping[str, Any], pr: dict[str, Any],
                          ob: Mapping[str, Any], where: str) -> bool:
    """The [identification] table and pairing.hypotheses / assignment; True when two
    different hypotheses pair one collection as two legs."""
    from ..cuts import compile_cut

    hyps = tuple(pr["hypotheses"])
    if len(hyps) > 2:
        raise ConfigError(f"{where}: pairing.hypotheses takes one name (both legs) or two (one "
                          f"per leg), got {len(hyps)}")
    pr["hypotheses"] = hyps
    two_legs = len(hyps) == 2 and hyps[0] != hyps[1] and not ob["second_collection"]
    if pr["assignment"] != "both" and not two_legs:
        raise ConfigError(f"{where}: pairing.assignment = {pr['assignment']!r} applies only "
                          "with two different pairing.hypotheses on one collection")
    if pr["assignment"] == "more_probable" and ident["resolution"] is None:
        raise ConfigError(f"{where}: pairing.assignment = \"more_probable\" compares dE/dx: "
                          "set identification.resolution (and the other [identification] keys)")
    if ident["resolution"] is None:
        for key in ("cut", "second_cut"):
            if ob[key].strip() and compile_cut(ob[key]).hypotheses:
                raise ConfigError(
                    f"{where}: objects.{key} uses dedx_deviation(...) but identification is "
                    "off; set identification.resolution (e.g. 0.07) in an [identification] "
                    "table")
        return two_legs
    if ident["samples_field"] and ident["reference_samples"] is None:
        raise ConfigError(f"{where}: identification.samples_field is set: give "
                          "identification.reference_samples too (the samples at which "
                          "identification.resolution holds)")
    if ident["material"] == "own":
        missing = [k for k in ("z_over_a", "mean_excitation_ev", "density") if own[k] is None]
        if missing:
            raise ConfigError(f"{where}: identification.material = \"own\" needs "
                              f"identification.own_material.{', .'.join(missing)}")
        if own["density_effect"] and len(own["density_effect"]) != 6:
            raise ConfigError(f"{where}: identification.own_material.density_effect takes six "
                              "numbers [C, X0, X1, a, k, delta0], got "
                              f"{len(own['density_effect'])}")
    elif any(v not in (None, (), []) for v in own.values()):
        raise ConfigError(f"{where}: [identification.own_material] is set but "
                          f"identification.material = {ident['material']!r}; set material = "
                          "\"own\" to use it")
    if ident["calibration_momentum"][0] <= 0:
        raise ConfigError(f"{where}: identification.calibration_momentum must lie above 0 GeV")
    try:
        IdentificationConfig(**ident, own_material=OwnMaterialConfig(**own)).response()
    except ConfigError as exc:
        raise ConfigError(f"{where}: identification: {exc}") from None
    return two_legs
