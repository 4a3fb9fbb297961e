"""Several channels in one search: one parameter of interest, sigma x B, shared by all.

Which piece when
----------------
* :class:`Channel`           -- one spectrum with its background shape, signal (a
  :class:`~peaksift.stats.signal_model.SignalModel`, or a shape and a resolution), its
  efficiency x acceptance and its integrated luminosity.
* :func:`combine`            -- the scan of the combination and of every channel:
  :class:`Combination` (``global_significance`` with toys that generate every channel,
  ``plot`` of the local p-values, ``to_dict``).
* :func:`combined_limits`    -- asymptotic CLs limits on sigma x B of the combination and
  per channel: :class:`CombinedLimits`.

The likelihood is the product of the channels' (:mod:`peaksift.stats.joint`): channel ``c``
expects ``mu L_c eff_c(m)`` signal events at a hypothesis ``m``, with its own background
profiled.  q0 = 2 [sum_c NLL_c(background only) - NLL(mu_hat)] for mu_hat > 0 (Cowan,
Cranmer, Gross, Vitells, EPJC 71 (2011) 1554, eq. 12, for the product likelihood).

One channel goes through :func:`peaksift.scan` unchanged: the combination of one channel
*is* its scan (same numbers to the last digit), with sigma x B = yield / (L eff).

Not here (said plainly): toy-based limits of the combination (the asymptotic formulae are
used; masses with few background events are flagged as in :func:`peaksift.upper_limits`),
and luminosity / efficiency uncertainties in the combined likelihood.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from . import lee
from .cls import _BANDS, _bisect
from .joint import profile_joint
from .limits import LOW_COUNT_BACKGROUND, cls_asymptotic, expected_band_factor, upper_limits
from .scan import scan_prepared
from .scan_inputs import _prepare_model
from .significance import p_from_q0, z_from_q0
from .toys import fit_background, toy_counts

__all__ = [
    "Channel",
    "Combination",
    "CombinedLimits",
    "combine",
    "combined_limits",
    "combined_toy_scans",
]

_TOY_CHUNK = 25   # toys per joint fit stack (toys x masses rows)


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
    """Every channel checked and prepared on the first channel's grid of masses: (channels,
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
    per = {}
    for ch, (model, spec, info), k in zip(chans, prepared, conv):
        exp_s = None if expected_cross_section is None else (
            lambda m, k=k: float(expected_cross_section) * np.interp(m, m_all, k))
        per[ch.name] = scan_prepared(ch.data, model, spec, info, blind=blind,
                                     expected_signal=exp_s, natural_width=ch.natural_width,
                                     refit=refit)
    nm = m_all.size
    mu, mu_err = np.full(nm, np.nan), np.full(nm, np.nan)
    q0 = np.full(nm, np.nan)
    converged = np.zeros(nm, bool)
    notes: list[str] = []
    z_exp = None
    if len(chans) == 1:  # one channel: its scan is the combination (same numbers)
        s = per[chans[0].name]
        with np.errstate(divide="ignore", invalid="ignore"):
            mu, mu_err = s.signal_yield / conv[0], s.signal_yield_error / conv[0]
        q0, converged = np.array(s.q0), np.array(s.converged)
        z_exp = None if s.z_expected is None else np.array(s.z_expected)
        notes += list(s.notes)
    elif (~bl).any():
        models = [p[0] for p in prepared]
        r = profile_joint(models, [m.counts for m in models], [m.fractions for m in models],
                          [k[~bl] for k in conv], steps=100,
                          mu_start=_start(list(per.values()), conv)[~bl])
        nll0 = sum(m.nll_background for m in models)
        q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        q0[~bl], mu[~bl], mu_err[~bl], converged[~bl] = q, r["mu"], r["mu_error"], r["converged"]
        if not r["converged"].all():
            notes.append(f"{int((~r['converged']).sum())} combined hypotheses did not converge")
        if expected_cross_section is not None:
            z_exp = _expected_z(prepared, conv, float(expected_cross_section))
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
        notes=tuple(notes), prepared=tuple(p[0] for p in prepared))


def _start(scans: list, conv: list[np.ndarray]) -> np.ndarray:
    """Starting sigma x B of the joint fit: the channels' own fitted yields over their
    conversions, averaged with inverse-variance weights (0 where none is usable)."""
    num, den = 0.0, 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        for s, k in zip(scans, conv):
            w = np.where(k > 0, (k / np.asarray(s.signal_yield_error)) ** 2, 0.0)
            w = np.where(np.isfinite(w), w, 0.0)
            num = num + w * np.nan_to_num(np.asarray(s.signal_yield) / k)
            den = den + w
        out = np.where(den > 0, num / den, 0.0)
    return np.where(np.isfinite(out), out, 0.0)


def _expected_z(prepared: list, conv: list[np.ndarray], xs: float) -> np.ndarray:
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
                      mu_start=np.full(asimov[0].shape[0], xs))
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

    @property
    def best(self) -> dict[str, float]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i]),
                "cross_section": float(self.cross_section[i])}

    def __repr__(self) -> str:
        b = self.best
        return (f"Combination({', '.join(self.channels)}; best {b['mass']:.4g} GeV: "
                f"Z_local = {b['z_local']:.2f}, sigma x B = {b['cross_section']:.3g} "
                f"{self.unit})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: ``combined`` (the combination's scan) and ``channels`` (each
        channel's scan, with its luminosity and conversion)."""
        return plain({
            "combined": {
                "masses": self.masses, "z_local": self.z_local, "p_local": self.p_local,
                "q0": self.q0, "cross_section": self.cross_section,
                "cross_section_error": self.cross_section_error, "unit": self.unit,
                "z_expected": self.z_expected,
                "expected_cross_section": self.expected_cross_section,
                "best": self.best, "blind": None if self.blind is None else list(self.blind),
                "notes": list(self.notes)},
            "channels": {n: {**s.to_dict(), "luminosity": self.luminosity[n],
                             "conversion": self.conversion[n]}
                         for n, s in self.channels.items()}})

    def global_significance(self, method: str = "upcrossings", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5) -> dict[str, Any]:
        """Global significance of the combination's best excess; the toys generate every
        channel from its background-only fit (each channel from its own seed stream) and
        are scanned with the joint likelihood.  As :meth:`ScanResult.global_significance`."""
        if method not in ("upcrossings", "toys"):
            raise FitError(f"global_significance method must be 'upcrossings' or 'toys', "
                           f"got {method!r}")
        if len(self.channels) == 1:
            return next(iter(self.channels.values())).global_significance(
                method, toys=toys, seed=seed, u0=u0)
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
            scans = combined_toy_scans(list(self.prepared),
                                       [np.asarray(k)[mask] for k in self.conversion.values()],
                                       n, seed=seed)
            res = (lee.global_from_toys(q_obs, scans.max(axis=1)) if method == "toys" else
                   lee.global_from_upcrossings(q_obs, scans, u0=u0, gaps=gaps))
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index])}
        out.update(res)
        return plain(out)

    def plot(self, path: Any = None, *, title: str | None = None) -> Any:
        """Local p-value against mass: each channel (thin) and the combination (thick)."""
        from .._style import COLORS, figure_style, use_headless_backend

        use_headless_backend()
        import matplotlib.pyplot as plt

        palette = [COLORS["total"], COLORS["signal"], COLORS["accent"], COLORS["background"]]
        with figure_style():
            fig, ax = plt.subplots(figsize=(7.0, 4.6))
            m = self.masses
            lows = []
            for j, (name, s) in enumerate(self.channels.items()):
                p = np.where(s.blinded, np.nan, np.maximum(s.p_local, 1e-300))
                ax.plot(m, p, lw=1.1, color=palette[j % len(palette)], label=name)
                lows.append(np.nanmin(p) if np.isfinite(p).any() else 0.1)
            p = np.where(self.blinded, np.nan, np.maximum(self.p_local, 1e-300))
            ax.plot(m, p, lw=2.0, color=COLORS["observed"], label="combined")
            lows.append(np.nanmin(p) if np.isfinite(p).any() else 0.1)
            lowest = max(min(min(lows), p_from_q0(9.0)) * 0.3, p_from_q0(64.0))
            ax.set_yscale("log")
            ax.set_ylim(lowest, 1.0)
            ax.set_xlim(m[0], m[-1])
            for k in range(1, 6):
                pk = p_from_q0(float(k * k))
                if pk < lowest:
                    break
                ax.axhline(pk, color=COLORS["accent"], lw=0.8, ls=":")
                ax.text(m[-1], pk, f" {k}$\\sigma$", va="center", ha="left",
                        color=COLORS["accent"], fontsize=9, clip_on=False)
            if self.blind is not None:
                ax.axvspan(self.blind[0], self.blind[1], color=COLORS["blind"], zorder=0,
                           label="blinded", hatch="//", ec="#c9c9d2", lw=0)
            ax.set_xlabel("mass hypothesis [GeV]")
            ax.set_ylabel("local $p$-value")
            ax.legend(loc="lower left")
            ax.text(0.99, 0.02, "local p-values: a local excess is not a discovery",
                    transform=ax.transAxes, fontsize=8.5, va="bottom", ha="right")
            if title:
                ax.set_title(title)
            if path is not None:
                fig.savefig(path)
        return fig


def combined_toy_scans(models: list, conv: list[np.ndarray], n_toys: int, *,
                       seed: int = 0) -> np.ndarray:
    """q0 scans ``(n_toys, n_masses)`` of background-only toys of every channel, each
    channel fluctuated from its background-only fit (toy ``i`` of channel ``c`` from
    ``SeedSequence(seed, spawn_key=(c, i))``), fitted with the joint likelihood."""
    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    nm = models[0].masses.size
    out = np.empty((n_toys, nm))
    roots = [np.random.SeedSequence(seed, spawn_key=(c,)) for c in range(len(models))]
    for first in range(0, n_toys, _TOY_CHUNK):
        cnt = min(_TOY_CHUNK, n_toys - first)
        counts, th0, b0, nll0 = [], [], [], 0.0
        for c, m in enumerate(models):
            n = toy_counts(m.expected_background, roots[c], first, cnt)
            th, b, nll = fit_background(m, n)
            counts.append(np.repeat(n, nm, axis=0))
            th0.append(np.repeat(th, nm, axis=0))
            b0.append(np.repeat(b, nm))
            nll0 = nll0 + np.repeat(nll, nm)
        r = profile_joint(models, counts, [np.tile(m.fractions, (cnt, 1)) for m in models],
                          [np.tile(k, cnt) for k in conv], theta_start=th0, b_start=b0,
                          steps=40)
        q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        q[~np.isfinite(r["nll"]) | ~np.isfinite(nll0)] = np.nan
        out[first:first + cnt] = q.reshape(cnt, nm)
    return out


# ------------------------------------------------------------------ limits
@dataclass(frozen=True, repr=False, eq=False)
class CombinedLimits(FrozenValue):
    """Outcome of :func:`combined_limits`: the combination's CLs limits on sigma x B
    (observed, expected median and +-1, +-2 sigma bands) and each channel's
    :class:`~peaksift.stats.limits.LimitResult`."""

    masses: np.ndarray
    observed: np.ndarray
    expected: np.ndarray
    bands: np.ndarray        # (5, n_masses): -2, -1, 0, +1, +2 sigma
    channels: Any
    cl: float
    unit: str
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()

    def __repr__(self) -> str:
        return (f"CombinedLimits({', '.join(self.channels)}; {self.masses.size} masses, "
                f"median expected {np.nanmedian(self.expected):.3g} {self.unit})")

    def to_dict(self) -> dict[str, Any]:
        return plain({
            "combined": {"masses": self.masses, "observed": self.observed,
                         "expected": self.expected, "expected_minus2": self.bands[0],
                         "expected_minus1": self.bands[1], "expected_plus1": self.bands[3],
                         "expected_plus2": self.bands[4], "cl": self.cl, "unit": self.unit,
                         "method": "asymptotic", "flags": list(self.flags),
                         "notes": list(self.notes)},
            "channels": {n: r.to_dict() for n, r in self.channels.items()}})


class _Profiled:
    """The joint NLL at fixed sigma x B for a stack of problems, with warm starts."""

    def __init__(self, models, counts, fractions, conv) -> None:
        self.models, self.counts, self.fractions, self.conv = models, counts, fractions, conv
        self.theta = [np.repeat(m.theta[None, :], fractions[0].shape[0], axis=0)
                      for m in models]
        self.b = [np.full(fractions[0].shape[0], m.bkg_yield) for m in models]

    def nll(self, mu: np.ndarray) -> np.ndarray:
        r = profile_joint(self.models, self.counts, self.fractions, self.conv, mu_fixed=mu,
                          theta_start=self.theta, b_start=self.b)
        self.theta, self.b = r["theta"], r["b"]
        return r["nll"]


def combined_limits(channels: Sequence[Channel], masses: Any, *, cl: float = 0.95,
                    blind: tuple[float, float] | None = None, unit: str = "fb",
                    low_count_background: float = LOW_COUNT_BACKGROUND) -> CombinedLimits:
    """Asymptotic CLs upper limits on sigma x B, combined and per channel.

    The combination's q~mu (CCGV eq. 16) profiles every channel's background at each
    sigma x B; sigma from the background-only Asimov data of every channel (CCGV eq. 32);
    the expected bands from :func:`~peaksift.stats.limits.expected_band_factor`.  Each
    channel's own limits come from :func:`peaksift.upper_limits` (asymptotic) with its
    luminosity and efficiency.  A mass where the summed background under the signal is
    below ``low_count_background`` events is flagged (the formulae misplace the bands).
    """
    if not 0 < cl < 1:
        raise FitError(f"cl must be in (0, 1), got {cl!r}; e.g. cl=0.95")
    chans, prepared, m_all, bl, conv = _prepare_all(channels, masses, blind)
    per = {}
    notes = []
    for ch, k in zip(chans, conv):
        if not np.all(k > 0):
            notes.append(f"channel {ch.name!r}: no limits of its own (its efficiency is 0 at "
                         "some mass); it still enters the combination")
            continue
        per[ch.name] = upper_limits(
            ch.data, ch.signal, ch.background, m_all, resolution=ch.resolution,
            window=ch.window, natural_width=ch.natural_width, blind=blind,
            signal_params=ch.signal_params, bins=ch.bins, signal_model=ch.signal_model,
            cl=cl, method="asymptotic", luminosity=float(ch.luminosity),
            efficiency=None if ch.signal_model is not None and ch.efficiency is None else (
                lambda m, k=k, lumi=float(ch.luminosity): np.interp(m, m_all, k) / lumi),
            unit=unit,
            low_count_background=low_count_background)
    alpha = 1.0 - cl
    nm = m_all.size
    fulls = [_full_model(*p) for p in prepared]
    asimov = [f.expected_background for f in fulls]
    nb5 = len(_BANDS)
    a_stack = _Profiled(fulls, asimov, [np.tile(f.fractions, (nb5, 1)) for f in fulls],
                        [np.tile(k, nb5) for k in conv])
    nll_a0 = sum(float(fit_background(f, a[None, :])[2][0]) for f, a in zip(fulls, asimov))
    target = np.repeat([expected_band_factor(n, cl) ** 2 for n in _BANDS], nm)
    info_s = sum((k[:, None] ** 2 * f.fractions**2 / np.maximum(a, 1e-300)).sum(axis=1)
                 for k, f, a in zip(conv, fulls, asimov))
    scale0 = np.tile(1.0 / np.sqrt(np.maximum(info_s, 1e-300)), nb5)
    bands = _bisect(lambda mu: 2.0 * (a_stack.nll(mu) - nll_a0) - target,
                    1e-2 * scale0, 1e3 * scale0).reshape(nb5, nm)
    obs = np.full(nm, np.nan)
    keep = ~bl
    if keep.any():
        models = [p[0] for p in prepared]
        ck = [k[keep] for k in conv]
        free = profile_joint(models, [m.counts for m in models],
                             [m.fractions for m in models], ck, steps=100)
        mu_hat, nll_hat = free["mu"], free["nll"]
        nll_zero = sum(m.nll_background for m in models)
        nll_hat = np.minimum(nll_hat, nll_zero)
        prob_o = _Profiled(models, [m.counts for m in models], [m.fractions for m in models],
                           ck)
        used_asimov = [m.expected_background for m in models]
        prob_s = _Profiled(models, used_asimov, [m.fractions for m in models], ck)
        nll_u0 = sum(float(fit_background(m, a[None, :])[2][0])
                     for m, a in zip(models, used_asimov))

        def f_obs(mu: np.ndarray) -> np.ndarray:
            ref = np.where(mu_hat < 0, nll_zero, nll_hat)
            q = np.where(mu_hat > mu, 0.0, np.maximum(2.0 * (prob_o.nll(mu) - ref), 0.0))
            qa = np.maximum(2.0 * (prob_s.nll(mu) - nll_u0), 1e-300)
            return alpha - cls_asymptotic(q, mu, mu / np.sqrt(qa))

        s0 = scale0[:nm][keep]
        lo = np.maximum(1e-2 * s0, 0.5 * np.maximum(mu_hat, 0.0))
        obs[keep] = _bisect(f_obs, lo, 1e3 * s0 + 3.0 * np.maximum(mu_hat, 0.0))
    # the background under the signal of the combination (CCGV eqs. 28-30, as upper_limits)
    b_under = sum(np.asarray(r.background_under_signal) for r in per.values())
    flags = tuple(f"{b:.3g} background events expected under the signal (< "
                  f"{low_count_background:g}): asymptotic bands doubtful"
                  if b < low_count_background else "" for b in b_under)
    if any(flags):
        notes.append(f"{sum(bool(f) for f in flags)} of {nm} masses have few background "
                     "events under the signal; the combined limits there are asymptotic only "
                     "(no toys for the combination yet)")
    return CombinedLimits(masses=m_all, observed=obs, expected=bands[2], bands=bands,
                          channels=per, cl=cl, unit=unit, flags=flags, notes=tuple(notes))

