"""A scan of a kept preparation straight from its entry, and the same scan asked again with the very same inputs.

:func:`kept_scan` answers a scan whose preparation is kept (:mod:`.scan_prepared`) and
whose compiled call (:func:`.profile_calls.scan_table`) has been made once: every
hypothesis open, no nuisance, nothing asked but the result.  :func:`quick_scan` answers
the same scan asked again with the same objects (the histogram, the hypotheses' array, the
resolution, the options), before any key is made: it finds them by the histogram's
identity and checks the content of every array they hold against the copies taken when
they were remembered (:func:`remember`), so a histogram or a hypotheses' array changed in
place is prepared anew, never answered from the old content.

Why: a 100-bin scan's Python ran mostly with cold caches (the machine's other work or a
large scan in between), ~75 us of its ~1.1 ms, of which the key of plain values (four
byte strings hashed into one tuple) and its lookup were ~45 us; here the test is four byte
comparisons and some identities (issue 11: the scan's cost per mass and bin should not
depend on the number of bins).  The result's model (six array copies) is made when it is
first read (:func:`.scan_result.fresh_result`).
"""

from __future__ import annotations

from operator import is_
from typing import Any

import numpy as np
from scipy.special import ndtr as _ndtr

from ..histogram import MassHistogram
from ..likelihood.poisson import use_compiled
from .mass_grid import coarse_grid_note
from .scan_prepared import kept_entry, model_parts
from .scan_result import ScanResult, fresh_result
from .significance import p_from_q0, z_from_q0
from .toy_model import _compiled

__all__ = ["kept_scan", "quick_scan", "remember", "scan_arrays", "significances"]

#: the result's arrays a scan from the compiled table made for it alone
OWN = frozenset({"q0", "z_local", "p_local", "signal_yield", "signal_yield_error",
                 "background_yield", "converged"})

#: ``ndarray.all`` without its Python-level wrapper (numpy's ``_methods._all``; each
#: Python call costs ~10x with the caches cold, as a scan mostly runs): the same answer
_all = np.logical_and.reduce


def scan_arrays(table: tuple, nll_background: float, bl: np.ndarray, notes: list[str]
                ) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray, np.ndarray, int]:
    """The result's arrays (``q0``, ``s``, ``se``, ``b``), ``converged``, Z, p and the best
    row from the compiled table's answer (every hypothesis open): the numbers
    ``profile_signal``'s path makes (``scan.scan_prepared``); a note on unconverged rows."""
    s_hat, s_err, b_hat, nll, conv, unconverged, q0, z, neg_z, best, plain = table
    arr = {"q0": q0, "s": s_hat, "se": s_err, "b": b_hat}
    if unconverged:
        notes.append(f"{unconverged} hypotheses did not converge")
    if plain:
        # the table's Z and best (every q0 finite); p into -Z's array, the table's own
        return arr, conv, z, _ndtr(neg_z, neg_z), best
    # a zero, NaN or infinite q0 term: numpy's rules, as scan_prepared's
    arr["q0"] = np.where(s_hat > 0, np.maximum(2.0 * (nll_background - nll), 0.0), 0.0)
    z, p, best = significances(arr["q0"], True, bl)
    return arr, conv, z, p, best


def significances(q0: np.ndarray, every: bool, bl: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray, int]:
    """Z_local, p_local and the best hypothesis from q0 (NaN where blinded or not fitted)."""
    q0c = q0
    finite = bool(_all(np.isfinite(q0c)))
    if not finite:  # nan_to_num costs ~25 us, a 100-bin scan's 1%
        q0c = np.nan_to_num(q0c)
    if every and finite:
        # nothing hidden, no NaN: the general rule below picks the same values; z_from_q0's
        # and p_from_z's operations on the array written out (their checks of a scalar
        # cost ~10 us with cold caches)
        z = np.sqrt(np.maximum(q0c, 0.0))
        p = _ndtr(-z)   # p_from_q0's 1 - Phi(sqrt(q0)), the square root taken once
        return z, p, int(q0c.argmax())
    z = np.where(bl, np.nan, z_from_q0(q0c))
    p = np.where(bl, np.nan, p_from_q0(q0c))
    qsel = np.where(bl | np.isnan(q0), -np.inf, q0c)
    return z, p, int(np.argmax(qsel)) if np.isfinite(qsel).any() else 0


def kept_scan(key: tuple | None) -> tuple | None:
    """The scan of a kept preparation (:func:`.scan_prepared.kept_entry`) whose compiled
    call has been made (every hypothesis open, no nuisance, nothing asked but the result:
    no refit, no expected signal, no blinding), straight from the kept entry:
    ``(result, slot)``, ``slot`` the entry's (what :func:`remember` keeps); None where
    ``scan_prepared`` must answer (not kept, warnings to raise again, no compiled call,
    the compiled loop declining)."""
    hit = kept_entry(key)
    if hit is None:
        return None
    kept, seen, slot = hit
    if seen or not slot or slot[0] is None:
        return None
    if len(slot) < 2:
        slot.append(_kept_fields(kept))
    if len(slot) < 3:   # (the call made once by scan_table's dispatcher: compiled)
        slot.append(_compiled().scan_entry(slot[0]))
    call, fixed, run = slot[0], slot[1], slot[2]
    if call is None or fixed is None:   # (None also once the entry is dropped)
        return None
    result = _answer(call, fixed, run)
    return None if result is None else (result, slot)


def _answer(call: tuple, fixed: tuple, run: Any) -> ScanResult | None:
    """The result of the compiled call ``call`` (by ``run``, ``profile_calls.scan_entry``'s)
    with the fields ``fixed``, or None (the compiled loop declined a row)."""
    out = run(*call, 100, 1e-6)
    if out[0]:
        return None
    fields, model, m_all, open_, nll_b = fixed
    _, s_hat, s_err, b_hat, _, conv, unconverged, q0, z, neg_z, best, plain = out
    notes: Any = fields["notes"]
    if plain and not unconverged:
        # (scan_arrays' answer here, without its dict and call); p written into -Z's
        # array (the table's, made for this result): an array less to make, ~2 us cold
        p = _ndtr(neg_z, neg_z)
    else:
        notes = []
        arr, conv, z, p, best = scan_arrays(out[1:], nll_b, open_, notes)
        q0, s_hat, s_err, b_hat = arr["q0"], arr["s"], arr["se"], arr["b"]
        notes = (*notes, *fields["notes"])
    values = fields.copy()
    values.update(q0=q0, z_local=z, p_local=p, signal_yield=s_hat, signal_yield_error=s_err,
                  background_yield=b_hat, converged=conv, best_index=best,
                  best_mass=float(m_all[best]), notes=notes)
    return fresh_result(values, OWN, kept=True, model=model)


def _kept_fields(kept: tuple) -> tuple | None:
    """A kept preparation's part of every result of :func:`kept_scan`: the fields that
    depend on the preparation alone (its arrays as read-only views), the model's parts
    (:func:`.scan_prepared.model_parts`), the hypotheses, their blinded mask (none
    blinded) and the background-only NLL; None unless every hypothesis is open (then
    ``scan_prepared`` answers)."""
    _, _, model, spec, info, _, _ = kept
    m_all = info["masses"]
    if not m_all.size or model["masses"].size != m_all.size:
        return None
    ro = {name: a.view() for name, a in (("masses", m_all), ("sigma", info["sigma"]),
                                        ("blinded", info["blinded_mass"]))}
    for a in ro.values():
        a.flags.writeable = False
    fields = {**ro, "refit": None, "window": spec["window"], "blind": None,
              "signal_shape": info["signal"].name,
              "background_shape": info["background"].name, "weight_scale": spec["scale"],
              "z_expected": None, "unit": spec["unit"], "nuisances": None,
              "nuisance_factors": None,
              # the grid's note depends on the preparation alone: made once, here
              "notes": tuple(n for n in (coarse_grid_note(m_all, info["sigma"]),) if n)}
    open_ = np.zeros(m_all.size, bool)  # the blinded mask: none (every hypothesis open)
    open_.flags.writeable = False
    return fields, model_parts(kept), m_all, open_, float(model["nll_background"])


# ------------------------------------------------------------ the same inputs again
#: by ``id`` of the histogram: ``(options, masses, values, edges, masses' content, unit,
#: compiled, slot)``, the newest last; the identity is only where to look, the content
#: decides (a new histogram at a freed one's address holds other bins, or the same)
_QUICK: dict[int, tuple] = {}
_QUICK_COUNT = 8

def remember(data: Any, masses: Any, options: tuple, slot: list) -> None:
    """Keep ``slot`` (:func:`kept_scan`'s: the kept entry's, its parts set to None when
    the entry is dropped, so a remembered scan holds no preparation the store let go) for
    :func:`quick_scan` under the histogram
    ``data``, with copies of the content the kept preparation was made from (the
    histogram's bins and edges, the hypotheses).  ``options``: the scan's other inputs
    that its key held (``scan.scan``'s order), compared by identity, so kept only when
    each is immutable: the key admitted plain values, names and a Resolution without a
    function already; a list for the window or a mapping of signal parameters are not."""
    window, signal_params = options[5], options[7]
    if (type(data) is not MassHistogram or signal_params is not None
            or not (window is None or type(window) is tuple)):
        return
    values = data.values()
    if (values.dtype != np.float64 or values.tobytes() != data.variances().tobytes()):
        return   # weighted: not kept (prepared_key's rule)
    if type(masses) is np.ndarray:
        content: Any = (masses.dtype, masses.shape, masses.tobytes())
    elif type(masses) is int:
        content = None
    else:
        return
    _QUICK.pop(id(data), None)
    _QUICK[id(data)] = (options, masses, values.tobytes(), data.edges.tobytes(), content,
                        data.unit, use_compiled(), slot)
    while len(_QUICK) > _QUICK_COUNT:
        _QUICK.pop(next(iter(_QUICK)))


def quick_scan(data: Any, masses: Any, options: tuple) -> ScanResult | None:
    """The scan :func:`remember` kept for these inputs, made again (the compiled call,
    a fresh result), or None: not remembered, another object among the options or the
    hypotheses, or any content changed since (the bins, their variances, the edges, the
    hypotheses' array, the unit, ``PEAKSIFT_NUMPY_COST``).  The caller has checked that
    nothing but the result is asked (no refit, blinding, expected signal, nuisance)."""
    memo = _QUICK.get(id(data))
    if memo is None:
        return None
    kept_options, m, values, edges, content, unit, compiled, slot = memo
    if not (m is masses and type(data) is MassHistogram
            and all(map(is_, options, kept_options))):
        return None
    if content is not None and not (masses.dtype == content[0] and masses.shape == content[1]
                                    and masses.tobytes() == content[2]):
        return None
    if not (data.values().tobytes() == values and data.variances().tobytes() == values
            and data.edges.tobytes() == edges and data.unit == unit
            and use_compiled() is compiled):
        return None
    call, fixed, run = slot[0], slot[1], slot[2]
    if call is None or fixed is None:   # the kept entry was dropped since
        return None
    return _answer(call, fixed, run)
