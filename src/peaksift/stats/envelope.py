r"""Discrete profiling: the choice of background function as a nuisance parameter.

Which piece when
----------------
* :func:`envelope_scan` -> :class:`EnvelopeResult` -- the scan with the background function
  profiled as a discrete parameter over a set of candidates (e.g. the orders kept by
  :func:`peaksift.stats.background_choice.choose_background`): q0, Z_local and p_local at
  every mass, the function chosen there, :meth:`EnvelopeResult.global_significance` (toys
  with the same profiling) and :meth:`EnvelopeResult.profile_curves` (the envelope against
  the signal yield, for the figure).
* :func:`envelope_minimum` -- the envelope's best signal yield and 68% interval from
  stacked profile curves (used by the bias and coverage study).
* :func:`run_envelope_toy_batch` -- one picklable batch of envelope toys.

Method (Dauncey, Kenzie, Wardle, Davies, "Handling uncertainties in background shapes: the
discrete profiling method", JINST 10 (2015) P04015): with candidate functions c of
:math:`N_c` free parameters, the profiled likelihood is the envelope

.. math:: -2\ln L_{env}(s) = \min_c\,[\,-2\ln L_c(s) + a\,N_c\,]

with the paper's penalty of :math:`a = 1` per free parameter (``penalty``).  The discovery
statistic is :math:`q_0 = -2\ln L_{env}(0) - \min_{s \ge 0} -2\ln L_{env}(s)`, i.e. with
:math:`2\,\mathrm{NLL}^{(1)}_c(m) = 2\,\mathrm{NLL}^{(0)}_c - q_{0,c}(m)` from each candidate's
own profile scan (:func:`peaksift.stats.scan`, signal nuisances included),

.. math:: q_0^{env}(m) = \min_c[2\mathrm{NLL}^{(0)}_c + aN_c]
          - \min_c[2\mathrm{NLL}^{(0)}_c - q_{0,c}(m) + aN_c].

Toys are generated from the background-only fit of the function the envelope chooses at
s = 0 and each is evaluated with the same envelope: every candidate's batched (linearised)
toy scan, then exact fits, signal nuisances free, of the function the envelope takes at the
toy's highest points, round after round until the toy's maximum sits at a refitted point
(:func:`run_envelope_toy_batch`; measured against every candidate refitted at every mass
by ``scripts/study_nuisance_refine.py``).  ``spurious=`` adds each candidate's spurious
signal as a yield uncertainty (:func:`spurious_weights`).
The asymptotic Z = sqrt(q0) of the envelope is an approximation (the paper's; the choice
of function is not a continuous parameter): the toy study in ``scripts/study_envelope.py``
measures its calibration.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._json import plain
from .._values import FrozenValue
from ..errors import FitError
from . import lee
from .envelope_choice import choice_entry, read_choice_entry
from .shape_profile import NUISANCE_REFINE, refine_toy_points, top_points
from .significance import p_from_q0, z_from_q0
from .toys import (
    ScanModel,
    ToyBatch,
    fit_background,
    profile_signal,
    run_toys,
    scan_toy_counts,
    toy_counts,
)

__all__ = ["PENALTY", "EnvelopeResult", "EnvelopeToyBatch", "envelope_batch_from_toy_batch",
           "envelope_minimum", "envelope_scan", "profile_curves", "run_envelope_toy_batch",
           "spurious_weights"]

#: the paper's penalty per free parameter, in units of -2 ln L
PENALTY = 1.0
#: rounds of exact refits at the toys' highest envelope points (see run_envelope_toy_batch)
_REFINE_ROUNDS = 40
#: points per toy refitted in each later round
_REFINE_MORE = 12


@dataclass(frozen=True)
class EnvelopeToyBatch:
    """Toys ``first .. first+count-1`` of an envelope: every candidate's prepared scan model
    (same bins and masses), their free-parameter counts, the penalty and the expectation
    the toys fluctuate."""

    models: tuple
    n_parameters: tuple
    penalty: float
    seed: int
    first: int
    count: int
    expected: np.ndarray
    weights: tuple = ()


def _envelope_q0(nll0: np.ndarray, q0: np.ndarray, k: np.ndarray, penalty: float,
                 weights: Any = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``nll0 (..., C)``, ``q0 (..., C, M)`` -> (q0 of the envelope (..., M), the function
    chosen with a signal (..., M), the one chosen without (...,)).

    ``weights (C,)``: each candidate's spurious-signal term (see :func:`spurious_weights`)
    lowers its background-only NLL at mass m by ``q0_c(m) (1 - w_c) / 2``."""
    base = 2.0 * nll0 + penalty * k                              # (..., C)
    with_signal = base[..., None] - q0                            # (..., C, M)
    if weights is None or len(weights) == 0:
        null_m = np.min(base, axis=-1)[..., None]
    else:
        w = np.asarray(weights, float)[:, None]
        null_m = np.min(base[..., None] - np.maximum(q0, 0.0) * (1.0 - w), axis=-2)
    best = np.min(with_signal, axis=-2)
    return (null_m - best, np.argmin(with_signal, axis=-2), np.argmin(base, axis=-1))


def spurious_weights(ratios: Any) -> np.ndarray:
    r"""The factor ``1 / (1 + r^2)`` by which a spurious-signal yield term of size
    ``r`` statistical errors scales a candidate's q0.

    The spurious signal :math:`S = r\,\sigma_s` is added in quadrature to the statistical
    error :math:`\sigma_s` of the yield (common practice for a spurious-signal
    uncertainty): :math:`Z = \hat s/\sqrt{\sigma_s^2 + S^2} = Z_{stat}/\sqrt{1 + r^2}`.
    It is the Gaussian approximation of a signal-shaped yield term :math:`\theta S f_i`
    with :math:`\tfrac12\theta^2` in the NLL (degenerate with the yield at free signal,
    absorbing :math:`\min_\theta[(\theta S - \hat s)^2/\sigma_s^2 + \theta^2] =
    \hat s^2/(\sigma_s^2 + S^2)` without it); the tests measure the difference from that
    term (3% of q0 at r = 0.5, q0 ~ 13).  A factor of q0 needs no refit, so the toys apply
    it too.
    """
    r = np.asarray(ratios, float)
    return 1.0 / (1.0 + r * r)


def run_envelope_toy_batch(spec: EnvelopeToyBatch) -> np.ndarray:
    """Envelope q0 scans ``(count, n_masses)`` of the toys of ``spec`` (pure, picklable)."""
    nc = len(spec.models)
    n = toy_counts(spec.expected, spec.seed, spec.first, spec.count)
    m = spec.models[0].masses.size
    q = np.empty((spec.count, nc, m))
    nll0 = np.empty((spec.count, nc))
    units, fits = [], []
    for c, model in enumerate(spec.models):
        units.append(ToyBatch(model, spec.seed, spec.first, spec.count, spec.expected))
        with np.errstate(all="ignore"):
            fits.append(fit_background(model, n))
        # run_toy_batch's scans of these counts, from the fits just made (not again)
        q[:, c] = scan_toy_counts(model, n, fits[-1])
        nll0[:, c] = fits[-1][2]
    k = np.asarray(spec.n_parameters, float)
    # Exact fits (signal nuisances free) of the function the envelope takes at its highest
    # points, until each toy's maximum sits at a point whose function is refitted: the
    # linearised values elsewhere may overshoot (a candidate whose background-only fit
    # is poor can show q0 in the hundreds), and a toy's maximum is its global p-value's.
    done = np.zeros((spec.count, nc, m), bool)
    cols_all = np.arange(m)
    for _ in range(_REFINE_ROUNDS):
        env, chosen, _ = _envelope_q0(nll0, q, k, spec.penalty, spec.weights)
        settled = done[np.arange(spec.count)[:, None], chosen, cols_all[None, :]]
        top = np.max(np.where(settled, env, -np.inf), axis=1)
        open_ = np.where(~settled & (env > top[:, None]), env, -1.0)
        # the first round takes each toy's top points; later rounds every point still
        # above the settled maximum
        rows, cols = top_points(open_, NUISANCE_REFINE if not done.any() else _REFINE_MORE)
        if rows.size == 0:
            break
        which = chosen[rows, cols]
        for c in range(nc):
            sel = which == c
            if sel.any():
                qc = q[:, c].copy()
                refine_toy_points(units[c], qc, rows[sel], cols[sel], n, fits[c])
                q[:, c] = qc
                done[rows[sel], c, cols[sel]] = True
    env, _, _ = _envelope_q0(nll0, q, k, spec.penalty, spec.weights)
    bad = ~np.isfinite(nll0).all(axis=1)
    env[bad] = np.nan
    return env


@dataclass(frozen=True, repr=False, eq=False)
class EnvelopeResult(FrozenValue):
    """The envelope scan (see the module guide).

    Attributes
    ----------
    masses, q0, z_local, p_local : ndarray
        The envelope's local significance at every mass (NaN where blinded).
    labels, n_parameters : tuple
        The candidate functions and their free-parameter counts.
    chosen : ndarray of int
        Index (into ``labels``) of the function the envelope takes at each mass with the
        signal free; ``null_choice`` the one without signal.
    candidate_q0 : dict label -> ndarray
        Each candidate's own q0 scan (the single-function numbers, for comparison).
    nll_background : dict label -> float
        Each candidate's background-only NLL (without the saturated constant).
    signal_yield, signal_yield_error : ndarray
        Of the chosen function at each mass.
    """

    masses: np.ndarray
    q0: np.ndarray
    z_local: np.ndarray
    p_local: np.ndarray
    labels: tuple
    n_parameters: tuple
    penalty: float
    chosen: np.ndarray
    null_choice: int
    candidate_q0: dict
    nll_background: dict
    signal_yield: np.ndarray
    signal_yield_error: np.ndarray
    best_index: int
    best_mass: float
    blinded: np.ndarray
    unit: str = "GeV"
    scans: tuple = field(default=(), compare=False)
    #: each candidate's spurious-signal weight (:func:`spurious_weights`); empty: none
    spurious: tuple = ()

    @property
    def best(self) -> dict[str, Any]:
        i = self.best_index
        return {"mass": float(self.best_mass), "z_local": float(self.z_local[i]),
                "p_local": float(self.p_local[i]), "q0": float(self.q0[i]),
                "function": self.labels[int(self.chosen[i])]}

    def __repr__(self) -> str:
        b = self.best
        return (f"EnvelopeResult({len(self.labels)} functions, best {b['mass']:.4g} "
                f"{self.unit}: Z_local = {b['z_local']:.2f} with {b['function']})")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict whose keys are the attribute names (``chosen`` and
        ``null_choice`` index ``labels``), plus the ``best`` summary; blinded entries
        ``None``; without the scans."""
        return plain({
            "masses": self.masses, "q0": self.q0, "z_local": self.z_local,
            "p_local": self.p_local,
            **choice_entry(self.labels, self.n_parameters, self.penalty, self.null_choice,
                           self.chosen),
            "candidate_q0": dict(self.candidate_q0),
            "nll_background": dict(self.nll_background), "signal_yield": self.signal_yield,
            "signal_yield_error": self.signal_yield_error, "best_index": int(self.best_index),
            "best_mass": float(self.best_mass), "best": self.best,
            "spurious": list(self.spurious),
            "blinded": [bool(v) for v in self.blinded], "unit": self.unit})

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> EnvelopeResult:
        """Back from :meth:`to_dict` (without the scans: no toys or curves from it)."""
        def arr(v: Any) -> np.ndarray:
            return np.array([np.nan if x is None else x for x in v], float)

        try:
            # dicts written before the keys took the attribute names ("mass", "functions",
            # "spurious_weights", the chosen functions by label) still load
            choice = read_choice_entry(d)
            masses = arr(d["masses"] if "masses" in d else d["mass"])
            best = d.get("best_index")
            if best is None:
                best = int(np.flatnonzero(masses == d["best"]["mass"])[0])
            spurious = d["spurious"] if "spurious" in d else d.get("spurious_weights")
            return cls(masses=masses, q0=arr(d["q0"]), z_local=arr(d["z_local"]),
                       p_local=arr(d["p_local"]), labels=tuple(choice["labels"]),
                       n_parameters=tuple(choice["n_parameters"]), penalty=choice["penalty"],
                       chosen=np.array(choice["chosen"], int),
                       null_choice=choice["null_choice"],
                       candidate_q0={k: arr(v) for k, v in d["candidate_q0"].items()},
                       nll_background=dict(d["nll_background"]),
                       signal_yield=arr(d["signal_yield"]),
                       signal_yield_error=arr(d["signal_yield_error"]), best_index=int(best),
                       best_mass=float(masses[int(best)]),
                       blinded=np.array(d["blinded"], bool), unit=d["unit"],
                       spurious=tuple(spurious or ()))
        except (KeyError, TypeError, ValueError, IndexError) as exc:
            raise FitError(f"EnvelopeResult.from_dict: not an envelope result dict ({exc!r}); "
                           "pass what EnvelopeResult.to_dict() wrote") from exc

    def plot(self, path: Any = None, *, run: Any = None, symbol: str | None = None,
             title: str | None = None) -> Any:
        """Local p-value of the envelope and of each candidate function alone against the
        mass hypothesis, as a matplotlib Figure drawn without pyplot (the user's backend is
        left alone); ``run``: the run label, ``symbol``: the pair's mass symbol (mathtext);
        saved to ``path`` when given.  See
        :func:`peaksift.stats.result_figures.envelope_figure`."""
        from .result_figures import envelope_figure

        return envelope_figure(self, path, run=run, symbol=symbol, title=title)

    # -------------------------------------------------------------- toys
    def _models(self) -> list[ScanModel]:
        if not self.scans or any(s.model is None for s in self.scans):
            raise FitError("this EnvelopeResult carries no scan models (rebuilt from a "
                           "dict?); rerun envelope_scan")
        return [s.model for s in self.scans]

    def toy_scans(self, toys: int, *, seed: int = 0, workers: int | None = None,
                  progress: bool | None = None, executor: Any = None,
                  batch: int = 250, expected: np.ndarray | None = None) -> np.ndarray:
        """Envelope q0 scans of background-only toys ``(toys, n_unblinded)``, generated from
        the background-only fit of the function the envelope chooses without signal (or
        from ``expected``, per used bin, e.g. a known truth in a study)."""
        models = self._models()
        if expected is None:
            expected = models[self.null_choice].expected_background
        toys = int(toys)
        if toys < 1:
            raise FitError(f"toys must be a positive number, got {toys}")
        # run_toys' batching and engines, with the envelope batch as the unit of work
        proto = models[0]
        extras = dict(proto.extras)
        extras["envelope"] = (tuple(models), tuple(self.n_parameters), self.penalty,
                              tuple(self.spurious))
        carrier = dataclasses.replace(proto, extras=extras)
        return run_toys(carrier, toys, seed=seed, workers=workers, progress=progress,
                        expected=expected, batch=batch, executor=executor,
                        batch_function=envelope_batch_from_toy_batch)

    def global_significance(self, method: str = "toys", *, toys: int | None = None,
                            seed: int = 0, u0: float = 0.5, workers: int | None = None,
                            progress: bool | None = None, executor: Any = None
                            ) -> dict[str, Any]:
        """Global significance of the envelope's best excess, from toys evaluated with the
        same envelope (``"toys"``: fraction above; ``"upcrossings"``: Gross and Vitells,
        EPJC 70 (2010) 525).  Same keys as :meth:`peaksift.stats.ScanResult.global_significance`."""
        def scans(n: int) -> np.ndarray:
            return self.toy_scans(n, seed=seed, workers=workers, progress=progress,
                                  executor=executor)

        res = lee.global_from_scan(self.q0, self.best_index, self.blinded, scans,
                                   method=method, toys=toys, u0=u0, observed_fallback=False)
        out = {"mass": float(self.best_mass), "z_local": float(self.z_local[self.best_index]),
               "p_local": float(self.p_local[self.best_index]),
               "profiling": "discrete (envelope)"}
        out.update(res)
        return plain(out)

    # ------------------------------------------------------------ curves
    def profile_curves(self, index: int | None = None, grid: np.ndarray | None = None
                       ) -> dict[str, Any]:
        """Twice the profiled NLL (plus the penalty) against the signal yield at mass
        ``index`` (default the best), one curve per function, and their envelope; all
        relative to the envelope's minimum.  The signal shape's factors sit at their
        centres here (the curves are for the figure; the scan profiles them)."""
        models = self._models()
        j = self.best_index if index is None else int(index)
        if self.blinded[j]:
            raise FitError("no profile curves inside the blinded range")
        row = int(np.sum(~self.blinded[:j]))  # index among the unblinded hypotheses
        s_hat = float(self.signal_yield[j])
        err = float(self.signal_yield_error[j])
        if grid is None:
            err = err if np.isfinite(err) and err > 0 else max(abs(s_hat), 1.0)
            grid = np.linspace(s_hat - 3.5 * err, s_hat + 3.5 * err, 71)
        grid = np.asarray(grid, float)
        curves = profile_curves(models, row, grid, self.n_parameters, self.penalty)
        env = curves.min(axis=0)
        ref = float(env.min())
        return {"signal_yield": grid, "mass": float(self.masses[j]),
                "curves": {lab: curves[c] - ref for c, lab in enumerate(self.labels)},
                "envelope": env - ref}


def envelope_batch_from_toy_batch(spec: ToyBatch) -> np.ndarray:
    """Adapter: a :class:`ToyBatch` whose model carries ``extras["envelope"]`` ->
    :func:`run_envelope_toy_batch` (so :func:`run_toys` batches and distributes it)."""
    models, k, penalty, weights = spec.model.extras["envelope"]
    return run_envelope_toy_batch(EnvelopeToyBatch(models, k, penalty, spec.seed, spec.first,
                                                   spec.count, spec.expected, weights))


def profile_curves(models: list[ScanModel], row: int, grid: np.ndarray,
                   n_parameters: Any, penalty: float, counts: np.ndarray | None = None
                   ) -> np.ndarray:
    """``2 NLL_c(s) + penalty N_c`` on ``grid`` at hypothesis ``row`` for every model,
    ``(C, S)``; ``counts (T, N)`` gives ``(T, C, S)`` for toys instead of the data."""
    out = []
    for c, model in enumerate(models):
        n = model.counts[None, :] if counts is None else np.atleast_2d(counts)
        t = n.shape[0]
        f = np.broadcast_to(model.fractions[row], (t * grid.size, model.used.size))
        nn = np.repeat(n, grid.size, axis=0)
        ss = np.tile(grid, t)
        th0 = np.repeat(model.theta[None, :], t * grid.size, axis=0)
        b0 = np.maximum(nn.sum(axis=1) - ss, 1.0)
        with np.errstate(all="ignore"):
            r = profile_signal(model, nn, f, s_fixed=ss, theta_start=th0, b_start=b0,
                               steps=80)
        val = 2.0 * r["nll"] + penalty * float(n_parameters[c])
        out.append(val.reshape(t, grid.size))
    arr = np.stack(out, axis=1)  # (T, C, S)
    return arr[0] if counts is None else arr


def envelope_minimum(grid: np.ndarray, curves: np.ndarray) -> dict[str, np.ndarray]:
    """Best yield and 68% interval of stacked envelopes.

    ``curves (T, C, S)`` (twice NLL plus penalty on ``grid``) -> ``s_hat``, ``lower``,
    ``upper`` (where the envelope rises by 1 above its minimum, linear interpolation on the
    grid; NaN where the grid does not reach it) and ``chosen`` (function at the minimum).
    The minimum is refined by a parabola through the three lowest grid points."""
    env = curves.min(axis=1)                            # (T, S)
    t, s = env.shape
    i = np.clip(np.argmin(env, axis=1), 1, s - 2)
    y0, y1, y2 = (env[np.arange(t), i + d] for d in (-1, 0, 1))
    h = grid[1] - grid[0]
    den = y0 - 2 * y1 + y2
    shift = np.where(den > 0, 0.5 * (y0 - y2) / np.where(den > 0, den, 1.0), 0.0)
    s_hat = grid[i] + np.clip(shift, -1, 1) * h
    vmin = np.where(den > 0, y1 - 0.25 * (y0 - y2) * np.clip(shift, -1, 1), y1)
    lo = np.full(t, np.nan)
    hi = np.full(t, np.nan)
    for r in range(t):
        d = env[r] - vmin[r] - 1.0
        k = int(np.argmin(env[r]))
        left = np.flatnonzero(d[:k] > 0)
        right = np.flatnonzero(d[k:] > 0)
        if left.size:
            a = left[-1]
            lo[r] = grid[a] + (grid[a + 1] - grid[a]) * d[a] / (d[a] - d[a + 1])
        if right.size:
            b = k + right[0]
            hi[r] = grid[b - 1] + (grid[b] - grid[b - 1]) * d[b - 1] / (d[b - 1] - d[b])
    chosen = np.argmin(curves[np.arange(t), :, np.argmin(env, axis=1)], axis=1)
    return {"s_hat": s_hat, "lower": lo, "upper": hi, "chosen": chosen}


def envelope_scan(data: Any, candidates: Any, signal: Any, masses: Any, *,
                  penalty: float = PENALTY, spurious: Mapping[str, float] | None = None,
                  **scan_options: Any) -> EnvelopeResult:
    """The scan with the background function profiled as a discrete nuisance parameter.

    Parameters
    ----------
    data, signal, masses :
        As in :func:`peaksift.stats.scan`.
    candidates : BackgroundChoice, mapping label -> shape, or labels / families
        The functions of the envelope (a BackgroundChoice: the orders it kept).
    penalty : float
        Added to -2 ln L per free parameter (the paper's 1).
    spurious : mapping label -> float, optional
        Each candidate's spurious signal in statistical errors of the signal yield, added
        as a signal-yield uncertainty (:func:`spurious_weights`); missing labels: 0.
    **scan_options :
        Passed to every candidate's :func:`peaksift.stats.scan` (resolution, window, blind,
        bins, signal_params, natural_width, nuisances, nuisance_toys); ``refit`` is off.

    Returns
    -------
    EnvelopeResult
    """
    from .background_choice import BackgroundChoice, candidate_shapes
    from .scan import scan

    sqrt_s = scan_options.pop("sqrt_s", None)  # the dijet family's, not the scan's
    if isinstance(candidates, BackgroundChoice):
        shapes_ = candidate_shapes(list(candidates.labels), sqrt_s=sqrt_s)
        counts = {c.label: c.n_parameters for c in candidates.chosen}
    elif isinstance(candidates, Mapping):
        shapes_ = dict(candidates)
        counts = {}
    else:
        shapes_ = candidate_shapes(candidates, sqrt_s=sqrt_s)
        counts = {}
    if not shapes_:
        raise FitError("the envelope needs at least one candidate function")
    if not (np.isfinite(penalty) and penalty >= 0):
        raise FitError(f"the envelope's penalty must be >= 0, got {penalty!r}")
    scan_options["refit"] = False
    labels = tuple(shapes_)
    scans = tuple(scan(data, signal, shapes_[lab], masses, **scan_options) for lab in labels)
    first = scans[0]
    for lab, s in zip(labels, scans):
        if s.model is None or s.model.used.size != first.model.used.size:
            raise FitError(f"envelope candidate {lab} sees different bins than {labels[0]}")
    k = np.array([counts.get(lab, len(shapes_[lab].parameters) + 1) for lab in labels], float)
    nll0 = np.array([s.model.nll_background for s in scans])
    bl = np.asarray(first.blinded)
    q = np.stack([np.nan_to_num(np.asarray(s.q0), nan=0.0) for s in scans])  # (C, M)
    weights = (() if spurious is None else
               tuple(float(w) for w in spurious_weights([spurious.get(lab, 0.0)
                                                          for lab in labels])))
    env, chosen, null = _envelope_q0(nll0, q, k, penalty, weights)
    env = np.where(bl, np.nan, np.maximum(env, 0.0))
    z = np.where(bl, np.nan, z_from_q0(np.nan_to_num(env)))
    p = np.where(bl, np.nan, p_from_q0(np.nan_to_num(env)))
    sy = np.stack([np.asarray(s.signal_yield) for s in scans])
    se = np.stack([np.asarray(s.signal_yield_error) for s in scans])
    cols = np.arange(env.size)
    best = int(np.nanargmax(np.where(bl, -np.inf, env))) if (~bl).any() else 0
    return EnvelopeResult(
        masses=np.asarray(first.masses), q0=env, z_local=z, p_local=p, labels=labels,
        n_parameters=tuple(int(v) for v in k), penalty=float(penalty), chosen=chosen,
        null_choice=int(null), candidate_q0={lab: np.asarray(s.q0) for lab, s in
                                             zip(labels, scans)},
        nll_background=dict(zip(labels, map(float, nll0))),
        signal_yield=sy[chosen, cols], signal_yield_error=se[chosen, cols],
        best_index=best, best_mass=float(first.masses[best]), blinded=bl,
        unit=first.unit, scans=scans, spurious=weights)
