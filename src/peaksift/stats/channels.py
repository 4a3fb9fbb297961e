"""Several channels in one search: one parameter of interest, sigma x B, shared by all.

Which piece when
----------------
* :class:`Channel`           -- one spectrum with its background shape, signal (a
  :class:`~peaksift.stats.signal_model.SignalModel`, or a shape and a resolution), its
  efficiency x acceptance and its integrated luminosity.
* :func:`combine`            -- the scan of the combination and of every channel:
  :class:`Combination` (``global_significance`` with toys that generate every channel,
  ``plot`` of the local p-values, ``to_dict``).
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
its toys and the asymptotic combined limits (:mod:`peaksift.stats.channel_envelope`); the
toy limits take the function its envelope chooses at mu = 0.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._format import format_pm, mass_text, no_best
from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from . import lee
from .channel_envelope import envelope_of_channels, envelope_toy_scans
from .channel_norms import signal_norms
from .channel_toys import combined_toy_scans
from .envelope_choice import read_channel_entries
from .joint import profile_joint
from .joint_start import joint_start
from .joint_wells import joint_global
from .scan import scan_prepared
from .scan_inputs import _prepare_model, _signal_params
from .scan_result import p_text
from .significance import p_from_q0, z_from_q0
from .toys import fit_background

__all__ = [
    "Channel",
    "Combination",
    "combine",
    "combined_toy_scans",
    "signal_norms",
]


@dataclass(frozen=True)
class Channel:
    """One channel of a combination.

    Parameters
    ----------
    name : str
    data : MassHistogram, masses, or (masses, weights)
    background : str or Shape
    luminosity : float
        Integrated luminosity (e.g. fb^-1; sigma x B then comes in fb).
    signal_model : SignalModel, optional
        Shape, resolution and efficiency as functions of mass (else give ``signal``,
        ``resolution`` and ``efficiency``).
    signal, resolution, signal_params, natural_width, window, bins :
        As in :func:`peaksift.scan`.
    efficiency : float or callable, optional
        Efficiency x acceptance (default the signal model's).
    luminosity_uncertainty, efficiency_uncertainty : float
        Relative uncertainties (e.g. 0.02), each a log-normal constrained nuisance of the
        joint likelihood (0: none).
    luminosity_group : str, optional
        Channels with the same group share one luminosity (one nuisance, fully correlated;
        their ``luminosity_uncertainty`` must agree); default: the channel's own.
    shape_nuisances : mapping, optional
        Relative sizes of the channel's signal-shape nuisances (``mass_scale``,
        ``mass_resolution``), profiled with their constraints in the combined scan;
        ``shape_constraint`` their kind (``"gaussian"`` or ``"lognormal"``);
        ``toy_constraints`` whether the combination's toys keep their constraints' centres
        at 1 (``"fixed"``) or draw them per toy (``"sampled"``).
    background_candidates : mapping, optional
        Label -> background shape: the channel's function is profiled as a discrete choice
        among them in the combined scan (:mod:`peaksift.stats.channel_envelope`), with
        ``background_penalty`` per free parameter (``background_parameters`` label ->
        count; default the shape's parameters and its yield).
    """

    name: str
    data: Any
    background: Any
    luminosity: float
    signal_model: Any = None
    signal: Any = None
    resolution: Any = None
    efficiency: Any = None
    signal_params: Mapping[str, float] | None = None
    natural_width: Any = None
    window: tuple[float, float] | None = None
    bins: int | None = None
    luminosity_uncertainty: float = 0.0
    efficiency_uncertainty: float = 0.0
    luminosity_group: str | None = None
    shape_nuisances: Mapping[str, float] | None = None
    shape_constraint: str = "gaussian"
    toy_constraints: str = "fixed"
    background_candidates: Mapping[str, Any] | None = None
    background_parameters: Mapping[str, int] | None = None
    background_penalty: float = 1.0

    def shape_spec(self, prepared: tuple, blinded: np.ndarray, *, every_mass: bool = False,
                   repeat: int = 1) -> Any:
        """``(signal, base_params, SignalNuisances)`` of this channel's shape factors for
        :func:`~peaksift.stats.joint.profile_joint` (None without any): at the unblinded
        hypotheses (``every_mass``: at all), the stack repeated ``repeat`` times."""
        sizes = {k: float(v) for k, v in (self.shape_nuisances or {}).items() if v}
        if not sizes:
            return None
        if self.toy_constraints not in ("fixed", "sampled"):
            raise FitError(f"channel {self.name!r}: toy_constraints must be 'fixed' or "
                           f"'sampled', got {self.toy_constraints!r}")
        from ..likelihood import SignalNuisances

        try:
            nuis = SignalNuisances.make(sizes, {k: self.shape_constraint for k in sizes})
        except FitError as exc:
            raise FitError(f"channel {self.name!r}: {exc}") from None
        if nuis.shape_active != tuple(k for k in nuis.shape_active if k in sizes) or set(
                sizes) - set(nuis.shape_active):
            raise FitError(f"channel {self.name!r}: shape_nuisances takes mass_scale and "
                           f"mass_resolution, got {sorted(sizes)}")
        _, spec, info = prepared
        keep = np.ones(blinded.size, bool) if every_mass else ~blinded
        base = _signal_params(info["signal"], spec.window, info["masses"][keep],
                              info["sigma"][keep], self.natural_width, info["signal_params"])
        base = [np.tile(np.asarray(v), (repeat,) + (1,) * (np.ndim(v) - 1)) if np.ndim(v)
                else v for v in base]
        return info["signal"], base, nuis

    def conversion(self, masses: np.ndarray) -> np.ndarray:
        """Signal events per unit of sigma x B at ``masses``: ``L eff(m)``."""
        if not (isinstance(self.luminosity, (int, float)) and self.luminosity > 0):
            raise FitError(f"channel {self.name!r}: luminosity must be a number > 0, got "
                           f"{self.luminosity!r}")
        eff = self.efficiency
        if eff is None:
            if self.signal_model is None:
                raise FitError(f"channel {self.name!r} has no efficiency: give efficiency= or "
                               "a signal_model")
            eff = self.signal_model.efficiency
        e = (np.asarray(eff(masses), float) if callable(eff)
             else np.full(masses.shape, float(eff)))
        if np.any(~np.isfinite(e) | (e < 0)):
            raise FitError(f"channel {self.name!r}: the efficiency must be finite and >= 0 at "
                           "every mass")
        return float(self.luminosity) * e


def _prepare(ch: Channel, masses: Any, blind: Any) -> tuple[Any, Any, dict[str, Any]]:
    try:
        return _prepare_model(ch.data, ch.signal, ch.background, masses,
                              resolution=ch.resolution, window=ch.window,
                              natural_width=ch.natural_width, blind=blind,
                              signal_params=ch.signal_params, bins=ch.bins,
                              signal_model=ch.signal_model)
    except FitError as exc:
        raise FitError(f"channel {ch.name!r}: {exc}") from None


def _prepare_all(channels: Any, masses: Any, blind: Any) -> tuple:
    """Every channel checked and prepared on one grid of masses (given, or spread over the
    first channel's window when a number): (channels,
    their (model, spectrum, info), the masses, the blinded-mass mask, the sigma x B to
    signal-yield conversion of each channel at those masses)."""
    chans = _check(channels)
    prepared = []
    for k, ch in enumerate(chans):
        prepared.append(_prepare(ch, masses, blind))
        if k == 0:
            masses = prepared[0][2]["masses"]
    m_all = np.asarray(masses, float)
    bl = prepared[0][2]["blinded_mass"]
    conv = [ch.conversion(m_all) for ch in chans]
    return chans, prepared, m_all, bl, conv


def _check(channels: Sequence[Channel]) -> list[Channel]:
    chans = list(channels)
    if not chans:
        raise FitError("combine needs at least one channel")
    names = [c.name for c in chans]
    if len(set(names)) != len(names):
        raise FitError(f"channel names must differ, got {names}")
    return chans


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


# ------------------------------------------------------------------ the result
@dataclass(frozen=True, repr=False, eq=False)
class Combination(FrozenValue):
    """Outcome of :func:`combine` (a frozen value).

    Attributes
    ----------
    masses, q0, z_local, p_local : ndarray
        The combination's scan (NaN where blinded).
    cross_section, cross_section_error : ndarray
        Fitted sigma x B (``unit``) and its error at every hypothesis.
    channels : mapping
        Channel name -> its own :class:`~peaksift.stats.scan.ScanResult`.
    conversion : mapping
        Channel name -> events per unit sigma x B at every hypothesis (``L eff(m)``).
    z_expected : ndarray or None
        Median expected combined significance of ``expected_cross_section``.
    """

    masses: np.ndarray
    q0: np.ndarray
    z_local: np.ndarray
    p_local: np.ndarray
    cross_section: np.ndarray
    cross_section_error: np.ndarray
    converged: np.ndarray
    best_index: int
    best_mass: float
    channels: Any
    conversion: Any
    luminosity: Any
    blind: tuple[float, float] | None
    blinded: np.ndarray
    z_expected: np.ndarray | None = None
    expected_cross_section: float | None = None
    unit: str = "fb"
    notes: tuple[str, ...] = ()
    prepared: tuple = field(default=(), compare=False)
    nuisances: tuple[str, ...] = ()
    nuisance_values: np.ndarray | None = None   # (n_masses, J) fitted, NaN where blinded
    #: per channel its background functions profiled in the scan (None: none were)
    envelope: Any = None
    norms: Any = field(default=None, compare=False)
    #: per channel its shape factors for the toys (None: none), and their ensemble
    shapes: tuple = field(default=(), compare=False)
    toy_constraints: tuple = field(default=(), compare=False)
    envelope_models: Any = field(default=None, compare=False)

    @property
    def best(self) -> dict[str, float]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i]),
                "cross_section": float(self.cross_section[i])}

    def _cross_section_text(self) -> str:
        """sigma x B at the best mass with its error (two significant digits of the error)."""
        i = self.best_index
        return format_pm(self.cross_section[i], self.cross_section_error[i], self.unit)

    def __repr__(self) -> str:
        b, why = self.best, no_best(self.best["z_local"], self.blinded)
        return (f"Combination({', '.join(self.channels)}; " + (f"no best: {why})" if why else
                f"best {mass_text(b['mass'])} GeV: Z_local = {b['z_local']:.2f}, sigma x B = "
                f"{self._cross_section_text()})"))

    def _summary(self) -> list[tuple[str, str]]:
        b, why = self.best, no_best(self.best["z_local"], self.blinded)
        rows = [("channels", ", ".join(self.channels)),
                ("masses", f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} GeV"),
                ("best mass", f"none: {why}" if why else f"{b['mass']:.2f} GeV"),
                ("Z local", "n/a" if why else f"{b['z_local']:.2f} (p = {p_text(b)})"),
                ("sigma x B at best", "n/a" if why else self._cross_section_text())]
        if self.blind is not None:
            rows.append(("blinded", f"{self.blind[0]:g}-{self.blind[1]:g} GeV"))
        return rows

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict whose keys are the attribute names (``channels``: each channel's
        :meth:`ScanResult.to_dict`), plus the ``best`` summary; blinded entries ``None``;
        without the prepared models (no toys from it)."""
        return plain({
            "masses": self.masses, "q0": self.q0, "z_local": self.z_local,
            "p_local": self.p_local, "cross_section": self.cross_section,
            "cross_section_error": self.cross_section_error,
            "converged": [bool(v) for v in self.converged], "best_index": int(self.best_index),
            "best_mass": float(self.best_mass), "best": self.best,
            "channels": {n: s.to_dict() for n, s in self.channels.items()},
            "conversion": dict(self.conversion), "luminosity": dict(self.luminosity),
            "blind": None if self.blind is None else list(self.blind),
            "blinded": [bool(v) for v in self.blinded], "z_expected": self.z_expected,
            "expected_cross_section": self.expected_cross_section, "unit": self.unit,
            "notes": list(self.notes), "nuisances": list(self.nuisances),
            "nuisance_values": self.nuisance_values, "norms": self.norms,
            "envelope": self.envelope})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Combination:
        """The Combination that :meth:`to_dict` wrote (without the models: no toys)."""
        from .scan_result import ScanResult

        def arr(v: Any) -> np.ndarray | None:  # None entries (blinded, NaN) back to NaN
            return None if v is None else np.array(v, float)

        try:
            blind = d.get("blind")
            return cls(
                masses=arr(d["masses"]), q0=arr(d["q0"]), z_local=arr(d["z_local"]),
                p_local=arr(d["p_local"]), cross_section=arr(d["cross_section"]),
                cross_section_error=arr(d["cross_section_error"]),
                converged=np.array(d["converged"], bool), best_index=int(d["best_index"]),
                best_mass=float(d["best_mass"]),
                channels={n: ScanResult.from_dict(v) for n, v in d["channels"].items()},
                conversion={n: arr(v) for n, v in d["conversion"].items()},
                luminosity={n: float(v) for n, v in d["luminosity"].items()},
                blind=None if blind is None else (float(blind[0]), float(blind[1])),
                blinded=np.array(d["blinded"], bool), z_expected=arr(d.get("z_expected")),
                expected_cross_section=d.get("expected_cross_section"), unit=d["unit"],
                notes=tuple(d.get("notes") or ()), nuisances=tuple(d.get("nuisances") or ()),
                nuisance_values=arr(d.get("nuisance_values")), norms=arr(d.get("norms")),
                envelope=read_channel_entries(d.get("envelope")))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"Combination.from_dict: not a combination written by "
                           f"Combination.to_dict ({exc!r})") from None

    def nuisances_at_best(self) -> dict[str, Any]:
        """Each nuisance at the best mass (results.json's ``combined.nuisances``)."""
        return plain({n: self._nuisance(j) for j, n in enumerate(self.nuisances)})

    def _nuisance(self, j: int) -> dict[str, Any]:
        """A normalisation nuisance (its pull and log-normal scale per channel) or a shape
        factor (its relative shift k - 1) at the best mass."""
        v = (None if self.nuisance_values is None
             else self.nuisance_values[self.best_index, j])
        nj = 0 if self.norms is None else self.norms.shape[1]
        if j < nj:
            return {"pull_at_best": v, "log_scale": self.norms[:, j]}
        return {"shift_at_best": v}

    def global_significance(self, method: str = "upcrossings", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5,
                            executor: Any = None) -> dict[str, Any]:
        """Global significance of the combination's best excess; the toys generate every
        channel from its background-only fit (each channel from its own seed stream) and
        are scanned with the joint likelihood (their batches on ``executor`` when given).
        As :meth:`ScanResult.global_significance`."""
        if method not in ("upcrossings", "toys"):
            raise FitError(f"global_significance method must be 'upcrossings' or 'toys', "
                           f"got {method!r}")
        if len(self.channels) == 1:
            return next(iter(self.channels.values())).global_significance(
                method, toys=toys, seed=seed, u0=u0, executor=executor)
        if not self.prepared:
            raise FitError("this Combination carries no models (rebuilt from a dict?); rerun "
                           "combine")
        mask = ~self.blinded
        if not mask.any():
            raise FitError("every mass hypothesis of this combination is blinded")
        q_obs = float(self.q0[self.best_index])
        gaps = np.diff(np.flatnonzero(mask)) > 1
        n = (1000 if method == "toys" else 200) if toys is None else int(toys)
        if method == "upcrossings" and n == 0:
            res = lee.global_from_upcrossings(q_obs, self.q0[mask][None, :], u0=u0,
                                              source="observed scan", gaps=gaps)
        else:
            conv = [np.asarray(k)[mask] for k in self.conversion.values()]
            kw = {"seed": seed, "norms": self.norms, "shapes": self.shapes or None,
                  "ensembles": self.toy_constraints or None, "executor": executor}
            scans = (combined_toy_scans(list(self.prepared), conv, n, **kw)
                     if self.envelope_models is None else
                     envelope_toy_scans(self.envelope_models, conv, n, **kw))
            res = (lee.global_from_toys(q_obs, scans.max(axis=1)) if method == "toys" else
                   lee.global_from_upcrossings(q_obs, scans, u0=u0, gaps=gaps))
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index])}
        out.update(res)
        return plain(out)

    def plot(self, path: Any = None, *, title: str | None = None, run: Any = None,
             symbol: str = "m", channel_scans: Any = None) -> Any:
        """Local p-value against mass: each channel (thin) and the combination (thick);
        see :func:`peaksift.stats.channel_plot.pvalue_figure` (no pyplot)."""
        from .channel_plot import pvalue_figure

        return pvalue_figure(self, path, title=title, run=run, symbol=symbol,
                             channel_scans=channel_scans)
