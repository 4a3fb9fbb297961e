"""Several channels in one search: one parameter of interest, sigma x B, shared by all.

Which piece when
----------------
* :class:`Channel`           -- one spectrum with its background shape, signal (a
  :class:`~peaksift.stats.signal_model.SignalModel`, or a shape and a resolution), its
  efficiency x acceptance and its integrated luminosity (:mod:`.channel`, with its
  preparation on the combination's masses).
* :func:`combine`            -- the scan of the combination and of every channel, here:
  :class:`Combination` (:mod:`.channel_result`: ``global_significance`` with toys that
  generate every channel, ``plot`` of the local p-values, ``to_dict``).
* :func:`signal_norms`       -- the luminosity and efficiency uncertainties of the channels
  as normalisation nuisances of the joint likelihood (a luminosity shared by the channels
  of one ``luminosity_group`` is one nuisance, fully correlated).
* :func:`peaksift.stats.channel_limits.combined_limits` -- CLs limits on sigma x B of the
  combination (asymptotic, toys at low counts) and per channel.

The likelihood is the product of the channels' (:mod:`peaksift.stats.joint`): channel ``c``
expects ``mu L_c eff_c(m)`` signal events at a hypothesis ``m``, with its own background
profiled.  q0 = 2 [sum_c NLL_c(background only) - NLL(mu_hat)] for mu_hat > 0 (Cowan,
Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 12, for the product likelihood).

One channel goes through :func:`peaksift.scan` unchanged: the combination of one channel
*is* its scan (same numbers to the last digit), with sigma x B = yield / (L eff).

Luminosity and efficiency uncertainties enter as constrained log-normal factors on each
channel's signal (:mod:`peaksift.stats.joint`); in the scan they matter only through the
channels' relative normalisation (a common factor is absorbed by sigma x B).  A channel's
``shape_nuisances`` (mass scale, resolution) are profiled in the combined scan, the
asymptotic limits, the toys of the global significance (at each toy's highest points, as
for one channel; ``toy_constraints`` chooses the ensemble) and the toy limits (their global
observables drawn per toy, as for one channel); every one of those fits takes each
channel's lowest well of the mass scale (:mod:`peaksift.stats.joint_wells`).
A channel's ``background_candidates`` are profiled as a discrete choice in the combined scan,
its toys and the combined limits, asymptotic and toys (:mod:`peaksift.stats.channel_envelope`).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from .channel import Channel, _prepare, _prepare_all
from .channel_envelope import envelope_of_channels
from .channel_norms import signal_norms
from .channel_result import Combination
from .channel_toys import combined_toy_scans
from .joint import profile_joint
from .joint_start import joint_start
from .joint_wells import joint_global, several_minima_notes
from .scan import scan_prepared
from .significance import p_from_q0, z_from_q0
from .toys import fit_background

__all__ = [
    "Channel",
    "Combination",
    "combine",
    "combined_toy_scans",
    "signal_norms",
]


# ------------------------------------------------------------------ the scan
def combine(channels: Sequence[Channel], masses: Any, *, blind: tuple[float, float] | None
            = None, expected_cross_section: float | None = None, refit: bool = True,
            unit: str = "fb") -> Combination:
    """Scan the combination and every channel over mass hypotheses.

    ``masses``: an array (GeV), or a number of points spread over the first channel's
    window as in :func:`peaksift.scan`.  ``blind`` applies to every channel.
    ``expected_cross_section``: sigma x B whose median expected (Asimov) significance is
    reported per channel and combined.  ``unit``: of sigma x B (``fb`` for fb^-1).
    """
    chans, prepared, m_all, bl, conv = _prepare_all(channels, masses, blind)
    norms, norm_names = signal_norms(chans)
    specs = [ch.shape_spec(p, bl) for ch, p in zip(chans, prepared)]
    per, fits = {}, []
    for ch, (model, spec, info), k in zip(chans, prepared, conv):
        exp_s = None if expected_cross_section is None else (
            lambda m, k=k: float(expected_cross_section) * np.interp(m, m_all, k))
        fits.append({})
        per[ch.name] = scan_prepared(ch.data, model, spec, info, blind=blind,
                                     expected_signal=exp_s, natural_width=ch.natural_width,
                                     refit=refit, fits=fits[-1])
    nm = m_all.size
    mu, mu_err = np.full(nm, np.nan), np.full(nm, np.nan)
    shape_names = tuple(f"{nm}_{ch.name}" for ch, sp in zip(chans, specs) if sp is not None
                        for nm in sp[2].shape_active)
    n_fit = (0 if norms is None else norms.shape[1]) + len(shape_names)
    nu_fit = None if n_fit == 0 else np.full((nm, n_fit), np.nan)
    q0 = np.full(nm, np.nan)
    converged = np.zeros(nm, bool)
    notes: list[str] = []
    z_exp = envelope = env_models = None
    if len(chans) == 1:  # one channel: its scan is the combination (same numbers)
        s = per[chans[0].name]
        with np.errstate(divide="ignore", invalid="ignore"):
            mu, mu_err = s.signal_yield / conv[0], s.signal_yield_error / conv[0]
        q0, converged = np.array(s.q0), np.array(s.converged)
        z_exp = None if s.z_expected is None else np.array(s.z_expected)
        notes += list(s.notes)
    elif (~bl).any():
        models = [p[0] for p in prepared]
        # start: the channels' own fits combined to second order (joint_start);
        # a last step below 0.03 errors leaves q0 within ~1e-5 (Newton: the next would be
        # ~1e-3 errors), so the fit stops there
        start = joint_start(models, fits, [k[~bl] for k in conv], norms)
        shp = specs if any(specs) else None

        def joint(**kw: Any) -> dict[str, Any]:
            return profile_joint(models, [m.counts for m in models],
                                 [m.fractions for m in models], [k[~bl] for k in conv],
                                 steps=100, tol=3e-2, **{**start, **kw}, norms=norms,
                                 shapes=shp,
                                 curvature=[_curvature(f, m) for f, m in zip(fits, models)])

        # each channel's mass scale at its lowest well (joint_wells), else the one fit
        r = joint_global(joint, models, [m.counts for m in models], [k[~bl] for k in conv],
                         shp)
        nll0 = sum(m.nll_background for m in models)
        q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        q0[~bl], mu[~bl], mu_err[~bl], converged[~bl] = q, r["mu"], r["mu_error"], r["converged"]
        if nu_fit is not None:
            nu_fit[~bl] = np.concatenate([r["nu"]] + [fc - 1.0 for fc in r["factors"]],
                                         axis=1) if any(specs) else r["nu"]
        if not r["converged"].all():
            notes.append(f"{int((~r['converged']).sum())} combined hypotheses did not converge")
        several = r.get("several")
        if expected_cross_section is not None:
            z_exp = _expected_z(prepared, conv, float(expected_cross_section), norms)
        env = envelope_of_channels(chans, prepared, fits, specs, conv, bl, norms,
                                   lambda ch: _prepare(ch, m_all, blind))
        if env is not None:   # the channels' background functions profiled
            q0[~bl], mu[~bl], mu_err[~bl] = env["q0"], env["mu"], env["mu_error"]
            converged[~bl] = env["converged"]
            if nu_fit is not None:
                nu_fit[~bl] = env["nuisances"]
            envelope, env_models = env["entry"], env["toy_models"]
            several = env["several"]
        notes += several_minima_notes(several, m_all[~bl], shp, "q0")
    if bl.all():
        notes.append("every mass hypothesis is blinded")
    qsel = np.where(bl, -np.inf, np.nan_to_num(q0, nan=-np.inf))
    best = int(np.argmax(qsel)) if np.isfinite(qsel).any() else 0
    return Combination(
        masses=m_all, q0=q0, z_local=np.where(bl, np.nan, z_from_q0(np.nan_to_num(q0))),
        p_local=np.where(bl, np.nan, p_from_q0(np.nan_to_num(q0))), cross_section=mu,
        cross_section_error=mu_err, converged=converged, best_index=best,
        best_mass=float(m_all[best]), channels=per,
        conversion={ch.name: k for ch, k in zip(chans, conv)},
        luminosity={ch.name: float(ch.luminosity) for ch in chans},
        blind=None if blind is None else (float(blind[0]), float(blind[1])), blinded=bl,
        z_expected=z_exp, expected_cross_section=expected_cross_section, unit=unit,
        notes=tuple(notes), prepared=tuple(p[0] for p in prepared),
        nuisances=norm_names + shape_names,
        nuisance_values=nu_fit, norms=norms, envelope=envelope, envelope_models=env_models,
        shapes=tuple(specs),
        toy_constraints=tuple(ch.toy_constraints for ch in chans))


def _curvature(fit: dict, model: Any) -> Any:
    """The background shape's second derivatives at its background-only fit, as the
    channel's own scan computed them (else the parameters to compute them at)."""
    d2 = fit.get("curvature")
    return model.theta if d2 is None else d2


def _expected_z(prepared: list, conv: list[np.ndarray], xs: float, norms: Any = None
                ) -> np.ndarray:
    """Median expected Z of the combination (Asimov: each channel's background-only fit to
    its data over all window bins plus ``xs L_c eff_c(m)`` signal events)."""
    fulls, asimov, nll0 = [], [], 0.0
    for (model, spec, info), k in zip(prepared, conv):
        full = _full_model(model, spec, info)
        a = (np.broadcast_to(full.expected_background, full.fractions.shape)
             + (xs * k)[:, None] * full.fractions)
        th = np.repeat(model.theta[None, :], a.shape[0], axis=0)
        nll0 = nll0 + fit_background(full, a, th)[2]
        fulls.append(full)
        asimov.append(a)
    r = profile_joint(fulls, asimov, [f.fractions for f in fulls], conv,
                      mu_start=np.full(asimov[0].shape[0], xs), norms=norms)
    q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
    return np.sqrt(q)


def _full_model(model: Any, spec: Any, info: dict[str, Any]) -> Any:
    """The channel's model over every window bin and every hypothesis (expected values do
    not look at the data, so blinding does not matter for them)."""
    import dataclasses

    return dataclasses.replace(model, masses=info["masses"],
                               fractions=np.ascontiguousarray(info["window_fractions"]),
                               used=np.arange(spec.edges.size - 1), counts=spec.counts)
