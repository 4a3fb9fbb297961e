"""The short table ``peaksift search`` prints at its end (and the rows ``peaksift fit``
prints): every number through :mod:`peaksift._format`, one ``WARNING`` line per doubt."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any


def _row(label: str, value: str) -> str:
    return f"  {label:<26} {value}"


def _summary(result: object) -> str:
    """The short table printed at the end of ``peaksift search``."""
    d = result.to_dict()  # type: ignore[attr-defined]
    if d.get("kind") == "combination":
        from ..search.combination_report import combination_summary_text

        return combination_summary_text(d)
    text = _summary_text(d)
    sm = d.get("signal_model")
    if sm:  # the scan's signal from simulated samples: say so, and flag a doubtful model
        state = (f"doubtful: {len(sm['notes'])} notes in results.json signal_model.notes"
                 if sm.get("doubtful") else
                 f"closure max {sm.get('max_closure_deviation') or 0:.2f} errors")
        head, _, last = text.rpartition("\n")  # before the closing caution line
        text = (f"{head}\n  signal model               {sm['shape']} from samples "
                f"({state})\n{last}")
    return text


def _summary_text(d: Mapping[str, Any]) -> str:
    """:func:`_summary` from the results dictionary; every number goes through
    :mod:`peaksift._format`, so a missing, NaN or infinite value prints ``n/a``."""
    from .._format import (
        chi_square,
        fixed,
        format_pm,
        mass_text,
        number,
        p_value,
        significance,
    )
    from ..report_sections import models_text

    def part(m: Any, key: str) -> Mapping[str, Any]:
        v = m.get(key) if isinstance(m, Mapping) else None
        return v if isinstance(v, Mapping) else {}

    best, fit, inp = part(d, "best"), part(d, "fit"), part(d, "input")
    pm, w, sy = part(fit, "peak_mass"), part(fit, "width"), part(fit, "signal_yield")
    blinded = bool(part(d, "blinding").get("active"))
    lines = ["peaksift search: summary",
             _row("events read", number(inp.get("events_read"))),
             _row("candidates in sidebands" if blinded else "candidates in window",
                  number(inp.get("candidates"))),
             *(_row("model", text) for text in models_text(d)),
             _row("best mass hypothesis", f"{mass_text(best.get('mass'))} GeV")]
    if blinded:  # intended: no fit inside the blinded window, which is not a failure
        lines.append(_row("signal fit", "not made: the run is blinded as configured "
                                        "(--unblind to fit)"))
        sb = d.get("background_fit") or {}
        if sb.get("kind") == "sideband_fit":
            by = sb.get("blinded_yield") or {}
            lines.append(_row("background (sidebands)",
                              f"chi2/ndf = {chi_square(sb.get('gof_chi2'))}/{sb.get('gof_ndf')} "
                              f"(p = {p_value(sb.get('gof_p_value'))}); "
                              f"{format_pm(by.get('value'), by.get('error'))} expected in the "
                              "blinded window"))
    else:
        lines += [_row("fitted mass", format_pm(pm.get("value"), pm.get("error"), "GeV")),
                  *_scaled_mass(part(part(d, "systematics"), "fitted_mass")),
                  _row(f"fitted width ({fit.get('width_parameter') or 'width'})",
                       format_pm(w.get("value"), w.get("error"), "GeV")),
                  _row("signal yield", format_pm(sy.get("value"), sy.get("error")))]
    lines += [_row("local significance", significance(best, "local", sigma="sigma")),
              _row("global significance", significance(best, "global", sigma="sigma"))]
    syst = part(d, "systematics")
    if syst:  # best is then the one with systematics; the plain numbers beside it
        plain_best = part(syst, "without_systematics")
        lines[-2] = _row("local significance", significance(best, "local", sigma="sigma")
                         + " with systematics")
        lines[-1] = _row("global significance", significance(best, "global", sigma="sigma")
                         + " with systematics")
        env = part(syst, "envelope")
        lines.append(_row("  without systematics", (
            f"local {significance(plain_best, 'local', sigma='sigma')}, global "
            f"{significance(plain_best, 'global', sigma='sigma')}")))
        if env:
            lines.append(_row("background envelope", ", ".join(env.get("labels") or [])
                              + f" (at the best mass: {part(env, 'best').get('function')})"))
        lines += _limit_lines(part(syst, "limits"), best.get("mass"))
    else:
        lines += _limit_lines({"without_systematics": d.get("limits")}, best.get("mass"))
    if not fit.get("valid") and not blinded:
        lines.append(_row("fit status", "INVALID: " + "; ".join(
            str(x) for x in fit.get("problems") or [])))
    _fit_lines(lines, fit)
    km = [k for k in d.get("known_matches") or [] if isinstance(k, Mapping)]
    lines.append(_row("known particles", ", ".join(
        f"{k.get('name')} ({fixed(k.get('distance_sigma'), 1)} sigma)" for k in km)
        or "none match"))
    cal = d.get("calibration")
    if isinstance(cal, Mapping) and cal:
        fm = part(cal, "fitted_mass")
        lines.append(_row(f"calibration {cal.get('particle')}",
                          f"{format_pm(fm.get('value'), fm.get('error'), 'GeV')} vs tables "
                          f"{fixed(cal.get('table_mass'), _decimals(fm.get('error')))} GeV "
                          f"(shift {_two_digits(cal.get('shift_relative_permille'))} per mille, "
                          f"{fixed(cal.get('shift_sigma'), 1, signed=True)} sigma)"))
    if blinded:
        lines.append(_row("blinding", "ACTIVE (data in the blinded window hidden)"))
    lim = d.get("limits") or {}
    if any(lim.get("flags") or []):
        n_toys = sum(1 for f in lim["flags"] if f.startswith("toys"))
        n_bad = sum(bool(x) for x in lim.get("asymptotic_doubtful") or [])
        n_floor = sum(bool(x) for x in lim.get("below_floor") or [])
        lines.append(_row("limits at low counts", f"of {len(lim['flags'])} masses: " + "; ".join(
            s for s in (f"{n_toys} from toys" if n_toys else "",
                        f"{n_bad} asymptotic DOUBTFUL" if n_bad else "",
                        f"{n_floor} below the counting floor" if n_floor else "") if s)
            + " (see the report)"))
    if "outputs" in d:
        lines.append(_row("outputs", str(part(d, "outputs").get("dir"))))
    _doubt_lines(lines, d)
    lines.append("  (a local significance is not a discovery; see the report's caution)")
    return "\n".join(lines)


def _decimals(error: Any) -> int:
    """The decimals :func:`~peaksift._format.format_pm` gives a value of this error (two
    significant digits of the error; 4 without one): the tables' mass beside the fitted
    one at the same precision."""
    try:
        e = float(error)
    except (TypeError, ValueError):
        return 4
    return max(0, 1 - math.floor(math.log10(e))) if math.isfinite(e) and e > 0 else 4


def _two_digits(x: Any) -> str:
    """A signed number to two significant digits, trailing zeros kept (-1.0, -0.050)."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(v):
        return "n/a"
    if v == 0:
        return "0.0"
    return f"{v:+.{max(0, 1 - math.floor(math.log10(abs(v))))}f}"


def _scaled_mass(fm: Mapping[str, Any]) -> list[str]:
    """The fitted mass with the mass scale profiled (``systematics.fitted_mass``)."""
    from .._format import fixed

    if not fm:
        return []
    size = (fm.get("mass_scale") or {}).get("size")
    return [_row("  with mass scale", f"{fixed(fm.get('value'))} +{fixed(fm.get('error_plus'))} "
                 f"-{fixed(fm.get('error_minus'))} GeV (scale uncertainty "
                 f"{fixed(100 * size if size is not None else None, 2)}% profiled)")]


def _limit_lines(lim: Mapping[str, Any], mass: Any) -> list[str]:
    """The observed limit at the limit mass nearest ``mass``, with and without systematics
    (without only, when the run has no systematics)."""
    from .._format import fixed

    w, wo = lim.get("with_systematics"), lim.get("without_systematics")
    if not isinstance(wo, Mapping) or not wo.get("masses"):
        return []
    if w is not None and (not isinstance(w, Mapping) or not w.get("masses")):
        return []
    ms = [float("inf") if m is None else float(m) for m in (w or wo)["masses"]]
    try:
        i = min(range(len(ms)), key=lambda j: abs(ms[j] - float(mass)))
    except (TypeError, ValueError):
        return []

    def pair(d: Mapping[str, Any]) -> str:  # two decimals, as the report's limit tables
        return (f"{fixed((d.get('observed') or [None] * (i + 1))[i])} observed, "
                f"{fixed((d.get('expected') or [None] * (i + 1))[i])} expected")

    if w is None:
        return [_row(f"limit at {fixed(ms[i])} GeV", f"{pair(wo)} {wo.get('unit')}")]
    return [_row(f"limit at {fixed(ms[i])} GeV", f"{pair(w)} {w.get('unit')} with "
                 f"systematics ({pair(wo)} without)")]


def _doubt_lines(lines: list[str], d: Mapping[str, Any]) -> None:
    """One WARNING line per doubt results.json lists (:mod:`peaksift.search.doubts`); the
    invalid main fit already has its ``fit status`` line."""
    for w in d.get("warnings") or []:
        if isinstance(w, Mapping) and w.get("topic") != "fit":
            lines.append(f"  WARNING: {w.get('message')}")


def _fit_lines(lines: list[str], fit: dict) -> None:
    """Give the fitted mass, width and yield lines their profile-likelihood intervals
    (``152.24 +0.50 -0.55 GeV``) where the fit has them, and say what the fit held or
    constrained."""
    from .._format import fit_interval_text
    from ..report import fit_settings_text

    iv = fit.get("intervals") or {}
    wname = fit.get("width_parameter") or "width"
    rows = {"fitted mass": ("peak_mass", "mass", "GeV"),
            f"fitted width ({wname})": ("width", wname, "GeV"),
            "signal yield": ("signal_yield", "signal_yield", "")}
    for i, line in enumerate(lines):
        for label, (key, par, unit) in rows.items():
            if line.startswith(_row(label, "")) and par in iv:
                lines[i] = _row(label, fit_interval_text(fit, key, par, unit))
    held = fit_settings_text(fit.get("settings") or {})
    if held:
        at = next((i for i, ln in enumerate(lines) if ln.startswith(_row("signal yield", ""))),
                  len(lines) - 1)
        lines.insert(at + 1, _row("fit settings", held))

