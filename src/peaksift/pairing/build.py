"""The public entry: :func:`pair`, and loading or warming the compiled kernels."""

from __future__ import annotations

import contextlib
import dataclasses
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np

from .._jit import numba_extensions_deferred
from ..cuts import CutLike, event_mask
from ..energy_loss import DedxResponse, hypothesis_mass
from ..errors import ConfigError, closest
from .assemble import _as_read_events, _pair_selected
from .candidates import ASSIGNMENT_RULES, CHOOSE_RULES, Candidates
from .collection import _charges, _check_options, _Collection, _is_no_cut, _selected
from .kernels import _count_pairs


# ------------------------------------------------------------------------- pair
def pair(
    events: Any,
    first: str,
    second: str | None = None,
    *,
    cut: CutLike = None,
    second_cut: CutLike = None,
    event_cut: CutLike = None,
    charge: str | None = None,
    choose: str = "all",
    target_mass: float | None = None,
    min_delta_r: float | None = None,
    event_offset: int = 0,
    hypotheses: str | Sequence[str] | None = None,
    identification: DedxResponse | None = None,
    assignment: str = "both",
) -> Candidates:
    """Build di-object candidates; see the module guide for the exact rules.

    Parameters
    ----------
    events : awkward.Array
        Events as read by :func:`peaksift.read_events` (collections of Momentum4D records
        with ``pt, eta, phi, mass``; optional per-event ``weight``).
    first : str
        Collection of the first object (``"muon"``).
    second : str, optional
        Collection of the second object; None (or ``first``) pairs ``first`` with itself.
    cut, second_cut : str, Cut, callable or mask, optional
        Object cuts on ``first`` and on ``second`` (see :mod:`peaksift.cuts`); an empty
        string means no cut.  ``second_cut`` needs a different ``second`` collection, or two
        different ``hypotheses`` (it then selects the second leg).
    event_cut : str, Cut, callable or mask, optional
        Event cut (per-event scalars, ``n_<collection>`` counts before object cuts).
    charge : {None, "any", "opposite", "same"}
        Charge requirement on the pair (needs a ``charge`` field).
    choose : {"all", "leading", "max_sum_pt", "closest"}
        What each event contributes.
    target_mass : float, optional
        Mass in GeV for ``choose="closest"`` (required there, refused otherwise).
    min_delta_r : float, optional
        Keep pairs with :math:`\\Delta R = \\sqrt{\\Delta\\eta^2 + \\Delta\\phi^2} \\ge`
        ``min_delta_r``; None or 0 for no requirement.
    event_offset : int
        Added to ``event_index`` (the global index of this chunk's first event).
    hypotheses : str or (str, str), optional
        Mass hypothesis of both legs, or of each leg (names of
        :data:`peaksift.energy_loss.HYPOTHESES`); None keeps the collections' masses.
    identification : DedxResponse, optional
        The dE/dx response behind ``dedx_deviation(...)`` in the cuts and the
        ``"more_probable"`` assignment.
    assignment : {"both", "more_probable"}
        What to keep when an unlike pair has two assignments (module guide).

    Returns
    -------
    Candidates

    Raises
    ------
    InputError
        Missing collection, kinematic field or ``charge`` field.
    ConfigError
        Unknown ``choose``/``charge``/hypothesis/``assignment``, missing ``target_mass``,
        bad ``min_delta_r``, ``"more_probable"`` without ``identification``.
    CutError
        A cut that cannot be parsed or names an unknown field.
    """
    return _pair(events, first, second, cut=cut, second_cut=second_cut,
                 event_cut=event_cut, charge=charge, choose=choose, target_mass=target_mass,
                 min_delta_r=min_delta_r, event_offset=event_offset,
                 hypotheses=_check_hypotheses(hypotheses, identification, assignment),
                 identification=identification, assignment=assignment)


def _check_hypotheses(hypotheses: Any, identification: Any, assignment: Any
                      ) -> tuple[str, str] | None:
    """The two legs' hypothesis names (or None), after checking every identification option."""
    if identification is not None and not isinstance(identification, DedxResponse):
        raise ConfigError("identification must be a peaksift.energy_loss.DedxResponse, got "
                          f"{type(identification).__name__}")
    if assignment not in ASSIGNMENT_RULES:
        guess = closest(str(assignment), ASSIGNMENT_RULES)
        hint = f"; did you mean {guess!r}?" if guess else ""
        raise ConfigError(f"assignment={assignment!r} is not a rule; use one of "
                          f"{', '.join(map(repr, ASSIGNMENT_RULES))}{hint}")
    if hypotheses is None:
        if assignment != "both":
            raise ConfigError("assignment applies only with two different hypotheses; set "
                              "hypotheses=('kaon', 'pion') (for example) or drop it")
        return None
    legs = (hypotheses, hypotheses) if isinstance(hypotheses, str) else tuple(hypotheses)
    if len(legs) != 2 or not all(isinstance(h, str) for h in legs):
        raise ConfigError(f"hypotheses must be one name or two names (one per leg), got "
                          f"{hypotheses!r}")
    for h in legs:
        hypothesis_mass(h, where="hypotheses")
    if assignment == "more_probable" and identification is None:
        raise ConfigError("assignment='more_probable' compares the dE/dx of both assignments; "
                          "pass identification=DedxResponse(...)")
    return legs  # type: ignore[return-value]


_KERNELS_LOADED = False  # the first kernel section of this process has run


@contextlib.contextmanager
def _kernels_without_extensions(first_section: bool = True) -> Iterator[None]:
    """Let the kernels load without numba's third-party extensions, once per process
    (:func:`peaksift._jit.numba_extensions_deferred`: awkward's and vector's numba
    extensions cost about 0.25-0.4 s at numba's first use, paid again by every worker
    process, and the kernels take plain numpy arrays).  Only our kernels run inside: cuts
    and other user code are evaluated before.  Tested: a user's ``numba.njit`` function
    over awkward arrays works after :func:`pair`, inside a callable cut of the first
    :func:`pair` call, and in another thread during it.  Once the first section has run
    this does nothing; ``first_section=False`` (the warm-up before forking) leaves the next
    section its turn.
    """
    global _KERNELS_LOADED
    if _KERNELS_LOADED:
        yield
        return
    with numba_extensions_deferred():
        yield
    _KERNELS_LOADED = _KERNELS_LOADED or first_section


def load_kernels() -> None:
    """Run numba's first-call set-up now (its typing and target contexts, about 0.25 s)
    by calling one small kernel; the other kernels then load from the disk cache in
    milliseconds.  Called before worker processes are forked from this one."""
    z = np.zeros(1, dtype=np.int64)
    q = np.zeros(1, dtype=np.int8)
    with _kernels_without_extensions(first_section=False):
        _count_pairs(z, z, z, z, True, q, q, -1, np.zeros(1, dtype=np.int64))


def warm_cache() -> None:
    """Compile (or load) every pairing kernel once, filling numba's on-disk cache.

    Run it where a cluster image is built (``python -c "import peaksift.pairing as p;
    p.warm_cache()"``): workers started from the image then load the kernels in
    milliseconds instead of compiling them (about 2 s with an empty cache).  Pairs two tiny
    events under every choice rule, with and without charge and overlap requirements."""
    import awkward as ak

    muon = ak.Array([[{"pt": 30.0, "eta": 0.1, "phi": 0.2, "mass": 0.1, "charge": 1},
                      {"pt": 20.0, "eta": -0.3, "phi": 2.9, "mass": 0.1, "charge": -1},
                      {"pt": 10.0, "eta": 1.0, "phi": -1.0, "mass": 0.1, "charge": -1}], []])
    ev = ak.zip({"muon": muon, "other": muon}, depth_limit=1)
    for choose in CHOOSE_RULES:
        tm = 91.0 if choose == "closest" else None
        for charge, dr in ((None, None), ("opposite", 0.1)):
            pair(ev, "muon", choose=choose, target_mass=tm, charge=charge, min_delta_r=dr)
            pair(ev, "muon", "other", choose=choose, target_mass=tm, charge=charge,
                 min_delta_r=dr)


def _pair(events: Any, first: str, second: str | None, *, cut: CutLike, second_cut: CutLike,
          event_cut: CutLike, charge: str | None, choose: str, target_mass: float | None,
          min_delta_r: float | None, event_offset: int,
          hypotheses: tuple[str, str] | None = None,
          identification: DedxResponse | None = None,
          assignment: str = "both") -> Candidates:

    mode, tm, dr = _check_options(choose, charge, target_mass, min_delta_r)
    if not isinstance(first, str):
        raise ConfigError(f"first must be a collection name, got {first!r}")
    one_collection = second is None or second == first
    # two different hypotheses on one collection: two views of it, paired as ordered legs
    unlike = one_collection and hypotheses is not None and hypotheses[0] != hypotheses[1]
    same = one_collection and not unlike
    events = _as_read_events(events, [first] if one_collection else [first, str(second)])
    if same and not _is_no_cut(second_cut):
        raise ConfigError(
            "second_cut applies only when pairing two different collections (or two "
            "different hypotheses); with one collection put the requirement in cut")
    n_events = len(events)

    ca = _Collection(events, first)
    cb = ca if same else _Collection(events, first if one_collection else str(second))
    if hypotheses is not None:
        ca.use_mass(hypothesis_mass(hypotheses[0]))
        if not same:
            cb.use_mass(hypothesis_mass(hypotheses[1]))

    ev_ok = None
    n_after = n_events
    if not _is_no_cut(event_cut):
        ev_ok = event_mask(events, event_cut)
        n_after = int(np.count_nonzero(ev_ok))

    sel_a, sa, ea = _selected(ca, cut, ev_ok, identification)
    if same:
        sel_b, sb, eb = sel_a, sa, ea
    else:
        sel_b, sb, eb = _selected(cb, second_cut, ev_ok, identification)

    if mode != 0:
        qa = _charges(ca, sel_a, charge)  # type: ignore[arg-type]
        qb = qa if same else _charges(cb, sel_b, charge)  # type: ignore[arg-type]
    else:
        qa = qb = np.zeros(1, dtype=np.int8)

    ordered = None
    if unlike:
        ordered = _ordered_inputs(ca, sel_a, sel_b, hypotheses, identification,  # type: ignore[arg-type]
                                  assignment)
    with _kernels_without_extensions():  # from here on only our own kernels and numpy
        out = _pair_selected(events, ca, cb, same, sel_a, sa, ea, sel_b, sb, eb, qa, qb,
                             mode, choose, tm, dr, n_events, n_after, event_offset, ordered)
    return out if hypotheses is None else dataclasses.replace(out, hypotheses=hypotheses)


def _ordered_inputs(coll: _Collection, sel_a: np.ndarray | None, sel_b: np.ndarray | None,
                    hypotheses: tuple[str, str], identification: DedxResponse | None,
                    assignment: str) -> tuple:
    """Arguments of :func:`_ordered_pairs` after the two selections: flat indices of each
    leg's selection, membership masks, squared deviations and the rule."""
    n = coll.n_objects
    ia = np.arange(n, dtype=np.int64) if sel_a is None else sel_a
    ib = np.arange(n, dtype=np.int64) if sel_b is None else sel_b
    rule = 1 if assignment == "more_probable" else 0
    if rule:
        ina = np.zeros(n, dtype=np.bool_)
        ina[ia] = True
        inb = np.zeros(n, dtype=np.bool_)
        inb[ib] = True
        where = f"collection {coll.name!r}"
        za2 = identification.deviation_of(hypotheses[0], coll.get, where) ** 2  # type: ignore[union-attr]
        zb2 = identification.deviation_of(hypotheses[1], coll.get, where) ** 2  # type: ignore[union-attr]
    else:
        ina = inb = np.zeros(1, dtype=np.bool_)
        za2 = zb2 = np.zeros(1)
    return ia, ib, rule, ina, inb, za2, zb2
