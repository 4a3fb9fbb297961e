r"""Discrete profiling in a combination: each channel's choice of background function.

A channel with ``background_candidates`` (:class:`~peaksift.stats.channels.Channel`) has
its background function profiled as a discrete nuisance parameter (Dauncey, Kenzie,
Wardle, Davies, "Handling uncertainties in background shapes: the discrete profiling
method", JINST 10 (2015) P04015), as its own search does (:mod:`peaksift.stats.envelope`).
In the product likelihood each channel's choice is its own discrete parameter, so the
combination's envelope is the minimum over every assignment :math:`f = (f_1, \dots, f_C)`
of one function per channel, with the paper's penalty :math:`a_c` per free parameter
:math:`N_{c,f_c}` of each:

.. math:: -2\ln L_{env}(\mu) = \min_f \Big[\sum_c -2\ln L_{c,f_c}(\mu)
          + \sum_c a_c N_{c,f_c}\Big],

profiled over every channel's background and the nuisances at each assignment (the joint
fit of :mod:`peaksift.stats.joint`, one per assignment: the product of the channels'
candidate counts; each channel's mass scale at its lowest well,
:func:`peaksift.stats.joint_wells.joint_global`).  The discovery statistic is :math:`q_0 = -2\ln L_{env}(0) -
\min_{\mu \ge 0} -2\ln L_{env}(\mu)`: since the channels are independent under the null, its
first term is :math:`\sum_c \min_{f_c} [2\mathrm{NLL}^{(0)}_{c,f_c} + a_c N_{c,f_c}]`.

The scan and the toys of the global significance (:func:`envelope_toy_scans`: every channel
generated from the function its envelope takes at mu = 0, every assignment fitted) are
profiled this way, and so are the asymptotic combined limits
(:func:`peaksift.stats.channel_limits.combined_limits`, with :func:`channel_candidates` and
:func:`null_choice`) and their toy limits (:mod:`peaksift.stats.channel_toy_limits`: every
toy's q~mu profiled over the assignments).
"""

from __future__ import annotations

import dataclasses
import itertools
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import FitError
from .envelope_choice import choice_entry
from .joint import profile_joint
from .joint_start import joint_start
from .joint_wells import joint_global
from .toys import profile_signal

__all__ = ["channel_candidates", "envelope_of_channels", "envelope_toy_scans", "null_choice",
           "run_envelope_toy_scans"]


def _candidates(ch: Any) -> list[tuple[str, Any, int]]:
    """(label, shape, free parameters) of a channel's candidate functions (its configured
    function alone when it has none)."""
    cands = ch.background_candidates
    if not cands:
        return [("", ch.background, 0)]
    counts = dict(ch.background_parameters or {})
    out = []
    for label, shape in cands.items():
        n = counts.get(label)
        if n is None:
            n = len(getattr(shape, "parameters", ())) + 1   # its parameters and its yield
        out.append((str(label), shape, int(n)))
    return out


def channel_candidates(chans: list, prepared: list, prepare: Any) -> tuple:
    """Each channel's candidate functions prepared on the combination's masses: ``(triples,
    labels, counts, penalties)`` -- per channel the ``(model, spectrum, info)`` of each
    candidate (its own ``prepared`` entry when it has none), their labels (``""`` for the
    configured function), free-parameter counts and the channel's penalty per parameter.
    ``prepare(channel)`` prepares a channel with another background."""
    triples, labels, counts, penalties = [], [], [], []
    for c, ch in enumerate(chans):
        cands = _candidates(ch)
        pen = float(ch.background_penalty)
        if not (np.isfinite(pen) and pen >= 0):
            raise FitError(f"channel {ch.name!r}: background_penalty must be >= 0, got "
                           f"{ch.background_penalty!r}")
        mine = []
        for label, shape, _ in cands:
            if not ch.background_candidates:
                mine.append(prepared[c])
                continue
            trip = prepare(dataclasses.replace(ch, background=shape))
            if trip[0].used.size != prepared[c][0].used.size:
                raise FitError(f"channel {ch.name!r}: background candidate {label} sees "
                               "different bins than the channel's function")
            mine.append(trip)
        triples.append(mine)
        labels.append(tuple(lab for lab, _, _ in cands))
        counts.append(np.array([n for _, _, n in cands], float))
        penalties.append(pen)
    return triples, labels, counts, penalties


def null_choice(models: list, counts: list, penalties: list) -> list[int]:
    """Per channel the candidate of the best penalised background-only fit to its data
    (the envelope at mu = 0: the channels are independent there)."""
    return [int(np.argmin([2.0 * m.nll_background + a * n for m, n in zip(ms, cnt)]))
            for ms, cnt, a in zip(models, counts, penalties)]


def envelope_of_channels(chans: list, prepared: list, fits: list, specs: list,
                         conv: list[np.ndarray], bl: np.ndarray, norms: Any,
                         prepare: Any) -> dict[str, Any] | None:
    """The combined scan with the channels' background functions profiled (module guide).

    ``prepared``/``fits``: each channel's model and own profile fits with its configured
    function (reused for it when it has no candidates); ``prepare(channel)`` prepares a
    channel with another background on the combination's masses.  None when no channel
    has candidates; else a dict of ``q0``, ``mu``, ``mu_error``, ``converged`` (at the
    unblinded masses), ``entry`` (the Combination's ``envelope``), ``nuisances`` (the chosen fit's normalisation nuisances and shape
    factor shifts, as :func:`~peaksift.stats.channels.combine` lists them), ``labels`` (per
    channel its candidates), ``chosen`` ``(masses, channels)`` (each channel's function at
    each mass) and ``null_choice`` (at mu = 0)."""
    if not any(ch.background_candidates for ch in chans):
        return None
    triples, labels, counts, penalties = channel_candidates(chans, prepared, prepare)
    per: list[list[tuple[Any, dict]]] = []
    for c, ch in enumerate(chans):
        models = []
        for model, _, _ in triples[c]:
            if not ch.background_candidates:
                models.append((model, fits[c]))
                continue
            mb = model.masses.size
            fit = profile_signal(model, model.counts, model.fractions,
                                 theta_start=np.repeat(model.theta[None, :], mb, axis=0),
                                 b_start=np.full(mb, model.bkg_yield), steps=100)
            models.append((model, fit))
        per.append(models)
    k = [np.asarray(x)[~bl] for x in conv]
    # the null: each channel's best penalised background-only fit, independently
    null0 = sum(min(2.0 * m.nll_background + a * n for (m, _), n in zip(models, cnt))
                for models, cnt, a in zip(per, counts, penalties))
    nulls = null_choice([[m for m, _ in models] for models in per], counts, penalties)
    best = None
    shp = specs if any(specs) else None
    memo: dict = {}   # the channels' mass-scale scans' fractions, shared by the assignments
    for combo in itertools.product(*[range(len(p)) for p in per]):
        models = [per[c][f][0] for c, f in enumerate(combo)]
        cfits = [per[c][f][1] for c, f in enumerate(combo)]
        start = joint_start(models, cfits, k, norms)

        def joint(models: list = models, cfits: list = cfits, start: dict = start,
                  **kw: Any) -> dict[str, Any]:
            return profile_joint(
                models, [m.counts for m in models], [m.fractions for m in models], k,
                steps=100, tol=3e-2, **{**start, **kw},
                norms=norms, shapes=shp,
                curvature=[m.theta if f.get("curvature") is None else f["curvature"]
                           for m, f in zip(models, cfits)])

        # each channel's mass scale at its lowest well (joint_wells), as the plain scan
        r = joint_global(joint, models, [m.counts for m in models], k, shp, memo=memo)
        nll0 = sum(m.nll_background for m in models)
        q = np.where(r["mu"] > 0, np.maximum(2.0 * (nll0 - r["nll"]), 0.0), 0.0)
        pen = sum(a * cnt[f] for a, cnt, f in zip(penalties, counts, combo))
        two_nll = np.where(np.isfinite(q), 2.0 * nll0 - q, np.inf) + pen
        nuis = np.concatenate([r["nu"]] + [fc - 1.0 for fc in r["factors"]], axis=1)
        several = r.get("several", np.zeros(two_nll.size, bool))
        if best is None:
            best = {"two_nll": two_nll, "mu": r["mu"], "mu_error": r["mu_error"],
                    "converged": r["converged"], "nuisances": nuis, "several": several,
                    "chosen": np.tile(np.array(combo), (two_nll.size, 1))}
            continue
        take = two_nll < best["two_nll"]
        for key, val in (("two_nll", two_nll), ("mu", r["mu"]), ("mu_error", r["mu_error"]),
                         ("converged", r["converged"]), ("several", several)):
            best[key] = np.where(take, val, best[key])
        best["nuisances"] = np.where(take[:, None], nuis, best["nuisances"])
        best["chosen"][take] = combo
    assert best is not None
    out = {"q0": np.maximum(null0 - best["two_nll"], 0.0), "mu": best["mu"],
            "mu_error": best["mu_error"], "converged": best["converged"],
            "nuisances": best["nuisances"], "several": best["several"], "labels": labels,
            "chosen": best["chosen"], "null_choice": nulls,
            "penalties": penalties, "n_parameters": [tuple(int(v) for v in c) for c in counts]}
    out["entry"] = _entry(chans, out, bl)
    out["toy_models"] = (tuple(tuple(m for m, _ in models) for models in per),
                         tuple(tuple(float(v) for v in c) for c in counts),
                         tuple(penalties), tuple(nulls))
    return out


@dataclass(frozen=True)
class _EnvelopeToys:
    """Toys ``first .. first+count-1`` of :func:`envelope_toy_scans` (picklable)."""

    candidates: tuple    # per channel its candidates' ScanModels
    counts: tuple        # per channel its candidates' free parameters
    penalties: tuple
    null_choice: tuple   # per channel the candidate the toys are generated from
    conv: tuple
    seed: int
    norms: Any
    shapes: Any
    ensembles: Any
    first: int
    count: int


def envelope_toy_scans(toy_models: tuple, conv: list, n_toys: int, *, seed: int = 0,
                       norms: Any = None, shapes: Any = None, ensembles: Any = None,
                       executor: Any = None) -> np.ndarray:
    """q0 scans ``(n_toys, n_masses)`` of background-only toys with the channels' background
    functions profiled as in the observed scan: channel ``c`` generated from its
    background-only fit with the function the envelope takes at mu = 0 (its own seed
    stream, as :func:`~peaksift.stats.channel_toys.combined_toy_scans`), every assignment of
    one function per channel fitted (:func:`~peaksift.stats.channel_toys.toy_q0`, shape
    factors at each toy's highest points), and the envelope's q0 taken."""
    from .channel_toys import _TOY_CHUNK

    if n_toys < 1:
        raise FitError(f"toys must be a positive number of pseudo-experiments, got {n_toys}")
    cands, counts, pens, null = toy_models
    tasks = [_EnvelopeToys(cands, counts, pens, null, tuple(conv), seed, norms,
                           None if shapes is None else tuple(shapes),
                           None if ensembles is None else tuple(ensembles), first,
                           min(_TOY_CHUNK, n_toys - first))
             for first in range(0, n_toys, _TOY_CHUNK)]
    done = (list(executor(run_envelope_toy_scans, tasks)) if executor is not None
            and len(tasks) > 1 else [run_envelope_toy_scans(t) for t in tasks])
    if len(done) != len(tasks):
        raise FitError(f"the toy executor returned {len(done)} results for {len(tasks)} "
                       "batches of combined toys")
    return np.concatenate(done, axis=0)


def run_envelope_toy_scans(task: _EnvelopeToys) -> np.ndarray:
    """The envelope q0 scans of one batch of combined toys (pure)."""
    from .channel_toys import toy_q0
    from .toys import toy_counts

    raw = [toy_counts(task.candidates[c][f].expected_background,
                      np.random.SeedSequence(task.seed, spawn_key=(c,)), task.first, task.count)
           for c, f in enumerate(task.null_choice)]
    env0 = env1 = None
    for combo in itertools.product(*[range(len(c)) for c in task.candidates]):
        models = [task.candidates[c][f] for c, f in enumerate(combo)]
        q, nll0 = toy_q0(models, raw, task)
        pen = sum(a * task.counts[c][f] for c, (a, f) in enumerate(zip(task.penalties, combo)))
        zero = 2.0 * nll0 + pen
        one = np.where(np.isfinite(q), zero[:, None] - q, np.inf)
        env0 = zero if env0 is None else np.minimum(env0, zero)
        env1 = one if env1 is None else np.minimum(env1, one)
    assert env0 is not None and env1 is not None
    q_env = np.maximum(env0[:, None] - env1, 0.0)
    return np.where(np.isfinite(env1), q_env, np.nan)


def _entry(chans: list, env: dict, bl: np.ndarray) -> dict[str, Any]:
    """The combination's ``envelope`` entry: per channel with candidates its choice
    (:func:`~peaksift.stats.envelope_choice.choice_entry`), the function at each mass None
    where blinded."""
    out: dict[str, Any] = {}
    for c, ch in enumerate(chans):
        if not ch.background_candidates:
            continue
        chosen: list[Any] = [None] * bl.size
        for j, i in zip(np.flatnonzero(~bl), env["chosen"][:, c]):
            chosen[j] = int(i)
        out[ch.name] = choice_entry(env["labels"][c], env["n_parameters"][c],
                                    env["penalties"][c], env["null_choice"][c], chosen)
    return out
