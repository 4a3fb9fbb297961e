"""CLs upper limits on sigma x B of a combination of channels: :func:`combined_limits`.

* asymptotic (CCGV: Cowan, Cranmer, Gross, Vitells, EPJC 71 (2011) 1554): q~mu (eq. 16)
  with every channel's background and the normalisation nuisances (luminosity,
  efficiency: :func:`peaksift.stats.channels.signal_norms`) profiled; sigma from the
  background-only Asimov data of every channel (eq. 32); the expected bands from
  :func:`~peaksift.stats.limits.expected_band_factor`.  A channel's
  ``background_candidates`` are profiled as a discrete choice, as in the combined scan
  (:mod:`peaksift.stats.channel_envelope`; Dauncey, Kenzie, Wardle, Davies, JINST 10 (2015)
  P04015): every ``2 NLL`` above is the minimum over the assignments of one function per
  channel of ``2 NLL + sum_c a_c N_c``, and the Asimov data of a channel come from the
  function its envelope takes at mu = 0 on the data;
* toys (Read, J. Phys. G 28 (2002) 2693) where the summed background under the signal is
  below ``low_count_background`` events and ``method="auto"`` (or at ``toy_masses`` with
  ``method="toys"``): :func:`peaksift.stats.channel_toy_limits.joint_toy_limit`, the toys
  generating every channel (the background-only ones with its envelope's function at
  mu = 0, the signal-plus-background ones with the function the data's envelope takes at
  mu) and every toy's q~mu profiled over the assignments of functions as above; its shape
  factors profiled, their global observables drawn per toy;
* where a channel's mass scale reaches beyond its peak's width, the asymptotic limits carry
  :func:`peaksift.stats.scale_scan.asimov_band_note` (the expected band from the Asimov
  data set is likely too low there), as a single channel's do;
* each channel's own limits from :func:`peaksift.upper_limits` with its luminosity,
  efficiency and their uncertainties (same ``method``).

Returns :class:`CombinedLimits` (``to_dict()``).
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from .._vocabulary import method_words
from ..errors import FitError
from .channel_envelope import channel_candidates, null_choice
from .channel_toy_limits import run_joint_toy_limit
from .channels import Channel, _full_model, _prepare, _prepare_all, signal_norms
from .cls import _BANDS, _bisect
from .envelope_choice import choice_entry, read_channel_entries
from .joint import profile_joint
from .joint_wells import joint_global, several_minima_notes
from .limits import LOW_COUNT_BACKGROUND, cls_asymptotic, expected_band_factor, upper_limits
from .scale_scan import asimov_band_note, needs_scan
from .toys import fit_background

__all__ = ["CombinedLimits", "combined_limits"]

_METHODS = ("asymptotic", "auto", "toys")


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
    methods: tuple[str, ...] = ()    # per mass: "asymptotic" or "toys"
    method: str = "asymptotic"
    nuisances: tuple[str, ...] = ()
    toys: Any = None                 # per toy mass: grid, CLs, number of toys
    #: per channel with background candidates: the functions profiled, their penalty and
    #: free parameters, and the one the Asimov data and the toys take (None: no envelope)
    envelope: Any = None

    # the band edges under the names LimitResult (and results.json) give them
    @property
    def expected_minus2(self) -> np.ndarray:
        return self.bands[0]

    @property
    def expected_minus1(self) -> np.ndarray:
        return self.bands[1]

    @property
    def expected_plus1(self) -> np.ndarray:
        return self.bands[3]

    @property
    def expected_plus2(self) -> np.ndarray:
        return self.bands[4]

    def __repr__(self) -> str:
        return (f"CombinedLimits({', '.join(self.channels)}; {self.masses.size} masses, "
                f"median expected {np.nanmedian(self.expected):.3g} {self.unit})")

    def _summary(self) -> list[tuple[str, str]]:
        obs = self.observed
        rows = [("channels", ", ".join(self.channels)),
                ("masses", f"{self.masses.size}, {self.masses[0]:.2f}-{self.masses[-1]:.2f} GeV"),
                ("limit", (f"{self.cl:.0%} CL CLs ({method_words(self.method)}) on sigma x B "
                           f"[{self.unit}]")),
                ("expected", f"{np.nanmin(self.expected):.3g}-{np.nanmax(self.expected):.3g}")]
        if np.isfinite(obs).any():
            rows.append(("observed", f"{np.nanmin(obs):.3g}-{np.nanmax(obs):.3g}"))
        return rows

    def plot(self, path: Any = None, *, run: Any = None, symbol: str | None = None,
             log: bool = True) -> Any:
        """The combined limits with their bands and each channel's expected limit, as a
        matplotlib Figure drawn without pyplot (the user's backend is left alone); ``run``:
        the run label, ``symbol``: the pair's mass symbol (mathtext); saved to ``path``
        when given.  See :func:`peaksift.stats.result_figures.combined_limits_figure`."""
        from .result_figures import combined_limits_figure

        return combined_limits_figure(self, path, run=run, symbol=symbol, log=log)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready, every key an attribute of the same name (``channels``: each
        channel's :meth:`LimitResult.to_dict`)."""
        return plain({
            "masses": self.masses, "observed": self.observed, "expected": self.expected,
            "expected_minus2": self.bands[0], "expected_minus1": self.bands[1],
            "expected_plus1": self.bands[3], "expected_plus2": self.bands[4], "cl": self.cl,
            "unit": self.unit, "method": self.method, "methods": list(self.methods),
            "nuisances": list(self.nuisances), "toys": self.toys or {},
            "flags": list(self.flags), "notes": list(self.notes),
            "channels": {n: r.to_dict() for n, r in self.channels.items()},
            "envelope": self.envelope})

    @classmethod
    def from_dict(cls, d: Any) -> CombinedLimits:
        """The CombinedLimits that :meth:`to_dict` wrote.  Dicts of earlier versions (the
        combined numbers under ``combined``) still load."""
        from .limit_result import LimitResult

        def arr(v: Any) -> np.ndarray:
            return np.array([np.nan if x is None else x for x in v], float)

        try:
            c = d.get("combined", d)  # earlier versions: the combined numbers nested
            bands = np.array([arr(c[k]) for k in ("expected_minus2", "expected_minus1",
                                                  "expected", "expected_plus1",
                                                  "expected_plus2")])
            return cls(masses=arr(c["masses"]), observed=arr(c["observed"]),
                       expected=arr(c["expected"]), bands=bands,
                       channels={n: LimitResult.from_dict(v)
                                 for n, v in (d.get("channels") or {}).items()},
                       cl=float(c["cl"]), unit=str(c["unit"]),
                       flags=tuple(c.get("flags") or ()), notes=tuple(c.get("notes") or ()),
                       methods=tuple(c.get("methods") or ()),
                       method=str(c.get("method", "asymptotic")),
                       nuisances=tuple(c.get("nuisances") or ()),
                       toys=dict(c.get("toys") or {}),
                       envelope=read_channel_entries(d.get("envelope")))
        except (KeyError, TypeError, ValueError) as exc:
            raise FitError(f"not combined limits written by CombinedLimits.to_dict: {exc!r}"
                           ) from None


class _Profiled:
    """The joint NLL at fixed sigma x B for a stack of problems, with warm starts.

    A warm start from a far-away sigma x B (a root search's first bracket) can leave a
    flexible background (a Bernstein polynomial with a coefficient at 0) where the fit
    does not recover: a fit that ends above the NLL of the background-only fits' point at
    this sigma x B is redone from there (never the case otherwise)."""

    def __init__(self, models, counts, fractions, conv, norms=None, shapes=None,
                 memo=None) -> None:
        self.models, self.counts, self.fractions, self.conv = models, counts, fractions, conv
        self.norms, self.nu, self.shapes = norms, None, shapes
        self.memo = {} if memo is None else memo   # joint_global's, shared by the problems
        self.theta0 = [np.repeat(m.theta[None, :], fractions[0].shape[0], axis=0)
                       for m in models]
        self.b0 = [np.full(fractions[0].shape[0], m.bkg_yield) for m in models]
        self.theta, self.b = self.theta0, self.b0
        self.several = np.zeros(fractions[0].shape[0], bool)   # the last nll's (joint_global)

    def _fit(self, mu: np.ndarray, theta: list, b: list, nu: Any, steps: int = 60) -> dict:
        def one(**kw: Any) -> dict:
            return profile_joint(self.models, self.counts, self.fractions, self.conv,
                                 mu_fixed=mu, norms=self.norms, nu_start=nu,
                                 shapes=self.shapes, steps=steps,
                                 **{"theta_start": theta, "b_start": b, **kw})

        if steps == 0:   # the start's value only
            return one()
        # each channel's mass scale at its lowest well (joint_wells), else the one fit
        return joint_global(one, self.models, self.counts, self.conv, self.shapes,
                            mu_fixed=mu, memo=self.memo)

    def nll(self, mu: np.ndarray) -> np.ndarray:
        r = self._fit(mu, self.theta, self.b, self.nu)
        cold = self._fit(mu, self.theta0, self.b0, None, steps=0)["nll"]
        bad = ~(r["nll"] <= cold) & np.isfinite(cold)
        if bad.any():
            r2 = self._fit(mu, self.theta0, self.b0, None)
            better = bad & (r2["nll"] < r["nll"])
            for key in ("theta", "b"):
                r[key] = [np.where(better.reshape((-1,) + (1,) * (v.ndim - 1)), v2, v)
                          for v, v2 in zip(r[key], r2[key])]
            r["nu"] = np.where(better[:, None], r2["nu"], r["nu"])
            r["nll"] = np.where(better, r2["nll"], r["nll"])
        self.theta, self.b, self.nu = r["theta"], r["b"], r["nu"]
        self.several = np.asarray(r.get("several", np.zeros(mu.size, bool)))
        return r["nll"]


class _Envelope:
    """Twice the joint NLL at fixed sigma x B profiled over the channels' background
    functions: the minimum over the assignments (one :class:`_Profiled` each) of ``2 NLL +
    penalty`` (Dauncey et al. 2015); with one assignment and no penalty exactly ``2 NLL``."""

    def __init__(self, problems: list, penalties: list) -> None:
        self.problems, self.penalties = problems, penalties

    def two_nll(self, mu: np.ndarray) -> np.ndarray:
        out = None
        for prob, pen in zip(self.problems, self.penalties):
            v = 2.0 * prob.nll(mu) + pen
            out = v if out is None else np.minimum(out, v)
        return out


def _null_two_nll(nll0: list, counts: list, penalties: list) -> float:
    """The envelope's ``2 NLL`` at mu = 0: per channel its best penalised background-only
    fit (``nll0[c][f]`` of candidate f), summed (the channels are independent there)."""
    return sum(min(2.0 * v + a * n for v, n in zip(vals, cnt))
               for vals, cnt, a in zip(nll0, counts, penalties))


def combined_limits(channels: Sequence[Channel], masses: Any, *, cl: float = 0.95,
                    blind: tuple[float, float] | None = None, unit: str = "fb",
                    low_count_background: float = LOW_COUNT_BACKGROUND,
                    method: str = "auto", toys: int = 300, seed: int = 0,
                    toy_masses: Any = None, executor: Any = None) -> CombinedLimits:
    """CLs upper limits on sigma x B, combined and per channel (see the module guide).

    ``method``: ``"asymptotic"`` (formulae everywhere; masses with fewer than
    ``low_count_background`` background events under the signal, summed over the channels,
    are flagged), ``"auto"`` (toys at those masses) or ``"toys"`` (toys at ``toy_masses``,
    default three spread over the range, and at the low-count ones).  ``toys`` per
    hypothesis and generating set; toy mass ``j`` uses the seed ``seed + j``.
    ``executor(func, tasks) -> results in task order`` runs the toy masses (e.g. on worker
    processes) and is handed to each channel's own limits.
    """
    if not 0 < cl < 1:
        raise FitError(f"cl must be in (0, 1), got {cl!r}; e.g. cl=0.95")
    if method not in _METHODS:
        raise FitError(f"combined limits method must be one of {', '.join(_METHODS)}, got "
                       f"{method!r}")
    chans, prepared, m_all, bl, conv = _prepare_all(channels, masses, blind)
    norms, norm_names = signal_norms(chans)
    nb5 = len(_BANDS)
    # the channels' mass-scale and resolution factors, profiled in the asymptotic limits
    sp_obs = [ch.shape_spec(p, bl) for ch, p in zip(chans, prepared)]
    sp_exp = [ch.shape_spec(p, bl, every_mass=True, repeat=nb5)
              for ch, p in zip(chans, prepared)]
    sp_obs = sp_obs if any(sp_obs) else None
    sp_exp = sp_exp if any(sp_exp) else None
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
            cl=cl, method=method, toys=toys, seed=seed, luminosity=float(ch.luminosity),
            luminosity_uncertainty=float(ch.luminosity_uncertainty),
            efficiency_uncertainty=float(ch.efficiency_uncertainty),
            toy_masses=toy_masses if method == "toys" else None,
            efficiency=None if ch.signal_model is not None and ch.efficiency is None else (
                lambda m, k=k, lumi=float(ch.luminosity): np.interp(m, m_all, k) / lumi),
            unit=unit, executor=executor,
            low_count_background=low_count_background)
    # every channel's background functions (its configured one alone without candidates),
    # profiled as a discrete choice: the assignments of one function per channel
    triples, labels, counts, penalties = channel_candidates(
        chans, prepared, lambda ch: _prepare(ch, m_all, blind))
    null = null_choice([[t[0] for t in tr] for tr in triples], counts, penalties)
    envelope = {ch.name: choice_entry(labels[c], counts[c], penalties[c], null[c])
                for c, ch in enumerate(chans) if ch.background_candidates} or None
    combos = list(itertools.product(*[range(len(tr)) for tr in triples]))
    pens = [sum(a * cnt[f] for a, cnt, f in zip(penalties, counts, combo)) for combo in combos]
    alpha = 1.0 - cl
    nm = m_all.size
    # the background-only Asimov data: each channel's envelope function at mu = 0
    fulls_all = [[_full_model(*t) for t in tr] for tr in triples]
    memo: dict = {}   # the mass-scale scans' fractions, shared by every joint fit here
    fulls = [fulls_all[c][null[c]] for c in range(len(chans))]
    asimov = [f.expected_background for f in fulls]
    a_stack = _Envelope([_Profiled([fulls_all[c][f] for c, f in enumerate(combo)], asimov,
                                   [np.tile(fulls_all[c][f].fractions, (nb5, 1))
                                    for c, f in enumerate(combo)],
                                   [np.tile(k, nb5) for k in conv], norms, sp_exp, memo)
                         for combo in combos], pens)
    env_a0 = _null_two_nll([[float(fit_background(f, a[None, :])[2][0]) for f in fa]
                            for fa, a in zip(fulls_all, asimov)], counts, penalties)
    target = np.repeat([expected_band_factor(n, cl) ** 2 for n in _BANDS], nm)
    info_s = sum((k[:, None] ** 2 * f.fractions**2 / np.maximum(a, 1e-300)).sum(axis=1)
                 for k, f, a in zip(conv, fulls, asimov))
    scale0 = np.tile(1.0 / np.sqrt(np.maximum(info_s, 1e-300)), nb5)
    bands = _bisect(lambda mu: a_stack.two_nll(mu) - env_a0 - target,
                    1e-2 * scale0, 1e3 * scale0).reshape(nb5, nm)
    # where a limit's profile took a well of a mass scale away from the nearest one (the
    # profiles' last evaluations: at the limits, to the bisection's tolerance)
    wells = np.any([p.several.reshape(nb5, nm) for p in a_stack.problems], axis=(0, 1))
    obs = np.full(nm, np.nan)
    keep = ~bl
    if keep.any():
        ck = [k[keep] for k in conv]
        used_asimov = [triples[c][null[c]][0].expected_background for c in range(len(chans))]
        hat = env_zero = None
        probs_o, probs_s = [], []
        for combo, pen in zip(combos, pens):
            models = [triples[c][f][0] for c, f in enumerate(combo)]
            free = joint_global(
                lambda models=models, **kw: profile_joint(
                    models, [m.counts for m in models], [m.fractions for m in models], ck,
                    steps=100, norms=norms, shapes=sp_obs, **kw),
                models, [m.counts for m in models], ck, sp_obs, memo=memo)
            wells[keep] |= free.get("several", False)
            nll_zero = sum(m.nll_background for m in models)
            two_hat = 2.0 * np.minimum(free["nll"], nll_zero) + pen
            two_zero = 2.0 * nll_zero + pen
            if hat is None or env_zero is None:
                hat, mu_hat, env_zero = two_hat, free["mu"], two_zero
            else:
                mu_hat = np.where(two_hat < hat, free["mu"], mu_hat)
                hat = np.minimum(hat, two_hat)
                env_zero = min(env_zero, two_zero)
            probs_o.append(_Profiled(models, [m.counts for m in models],
                                     [m.fractions for m in models], ck, norms, sp_obs, memo))
            probs_s.append(_Profiled(models, used_asimov, [m.fractions for m in models], ck,
                                     norms, sp_obs, memo))
        prob_o, prob_s = _Envelope(probs_o, pens), _Envelope(probs_s, pens)
        env_u0 = _null_two_nll([[float(fit_background(t[0], a[None, :])[2][0]) for t in tr]
                                for tr, a in zip(triples, used_asimov)], counts, penalties)

        def f_obs(mu: np.ndarray) -> np.ndarray:
            ref = np.where(mu_hat < 0, env_zero, hat)
            q = np.where(mu_hat > mu, 0.0, np.maximum(prob_o.two_nll(mu) - ref, 0.0))
            qa = np.maximum(prob_s.two_nll(mu) - env_u0, 1e-300)
            return alpha - cls_asymptotic(q, mu, mu / np.sqrt(qa))

        s0 = scale0[:nm][keep]
        lo = np.maximum(1e-2 * s0, 0.5 * np.maximum(mu_hat, 0.0))
        obs[keep] = _bisect(f_obs, lo, 1e3 * s0 + 3.0 * np.maximum(mu_hat, 0.0))
        wells[keep] |= np.any([p.several for p in probs_o + probs_s], axis=0)
    # the background under the signal of the combination (CCGV eqs. 28-30): the counting
    # background with the same Fisher information on sigma x B, from the Asimov data
    f_sums = sum(k * f.fractions.sum(axis=1) for k, f in zip(conv, fulls))
    b_under = f_sums**2 / np.maximum(info_s, 1e-300)
    low = b_under < low_count_background
    methods = ["asymptotic"] * nm
    want: list[int] = []
    if method != "asymptotic":
        want = list(np.flatnonzero(low))
    if method == "toys":
        picks = (np.linspace(0, nm - 1, 3).round().astype(int) if toy_masses is None else
                 [int(np.argmin(np.abs(m_all - float(x)))) for x in np.atleast_1d(toy_masses)])
        want += list(picks)
    toy_info: dict[str, Any] = {}
    todo, tasks = [], []
    for j in sorted({int(x) for x in want}):
        if bl[j]:
            notes.append(f"toy limits at {m_all[j]:g} skipped: blinded")
            continue
        row = int(np.sum(~bl[:j]))

        def at_row(m: Any, row: int = row) -> Any:
            return dataclasses.replace(m, masses=m.masses[row:row + 1],
                                       fractions=m.fractions[row:row + 1])

        one = [at_row(triples[c][null[c]][0]) for c in range(len(chans))]
        # with an envelope every toy's q~mu is profiled over the assignments of functions
        # (the toys generated from the function each envelope takes, as the asymptotic
        # limits' Asimov data and the single channel's toy limits)
        cands = None if not envelope else [[at_row(triples[c][f][0])
                                            for c, f in enumerate(combo)] for combo in combos]
        pens_t = None if not envelope else [p - min(pens) for p in pens]
        # the channels' shape factors at this hypothesis, profiled in every toy's fits
        shp = None if sp_obs is None else [
            None if sp is None else (sp[0], [np.asarray(v)[row:row + 1] if np.ndim(v) else v
                                             for v in sp[1]], sp[2]) for sp in sp_obs]
        todo.append(j)
        tasks.append((one, [float(k[j]) for k in conv], norms, cl, int(toys), int(seed) + j,
                      float(obs[j]), bands[:, j].copy(), shp, cands, pens_t))
    # one task per mass, each seeded by its mass: the engine does not change the result
    done = (list(executor(run_joint_toy_limit, tasks)) if executor is not None
            and len(tasks) > 1 else [run_joint_toy_limit(t) for t in tasks])
    if len(done) != len(tasks):
        raise FitError(f"the toy executor returned {len(done)} results for {len(tasks)} "
                       "toy limits")
    for j, res in zip(todo, done):
        obs[j] = res["observed"]
        bands[:, j] = [res["expected"][n] for n in _BANDS]
        methods[j] = "toys"
        toy_info[f"{m_all[j]:.6g}"] = plain({k: v for k, v in res.items()
                                             if k not in ("observed", "expected")})
        notes.extend(f"{m_all[j]:g}: {n}" for n in res["notes"])
    # where a channel's mass scale reaches beyond its peak's width the Asimov band lacks
    # the fluctuations each spectrum's limit follows (as for one channel)
    wide = np.zeros(nm, bool)
    for ch, p in zip(chans, prepared):
        sp = ch.shape_spec(p, bl, every_mass=True)
        if sp is not None:
            wide |= needs_scan(sp[0], sp[1], sp[2], nm)
    asimov_wide = [j for j in range(nm) if wide[j] and methods[j] == "asymptotic"]
    if asimov_wide:
        notes.append(asimov_band_note(m_all[asimov_wide]))
    notes += several_minima_notes(wells, m_all, sp_obs, "limits")
    flags = tuple(f"{b:.3g} background events expected under the signal (< "
                  f"{low_count_background:g}): asymptotic bands doubtful"
                  if b < low_count_background and m == "asymptotic" else ""
                  for b, m in zip(b_under, methods))
    if any(flags):
        notes.append(f"{sum(bool(f) for f in flags)} of {nm} masses have few background "
                     "events under the signal and asymptotic limits (method='auto' computes "
                     "them with toys)")
    return CombinedLimits(masses=m_all, observed=obs, expected=bands[2], bands=bands,
                          channels=per, cl=cl, unit=unit, flags=flags, notes=tuple(notes),
                          methods=tuple(methods), method=method, nuisances=norm_names,
                          toys=toy_info, envelope=envelope)
