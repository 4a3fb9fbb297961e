"""A quoted limit computed with the asymptotic formulae at low counts is a warning.

The asymptotic CLs bands assume many background events under the signal (Cowan, Cranmer,
Gross, Vitells 2011, sec. 3: Wald's approximation; their fig. 7 shows the bands misplaced
at b of a few events).  The run uses toys below ``limits.low_count_background`` for the
plain limits; the limits with systematics (the headline) stay asymptotic unless
``systematics.toy_limits``.  Here: results dictionaries whose background under the signal
is the reviewer's low-count tail (b from 78 down to 0.74 events, threshold 10), the
expected count of flagged masses computed with numpy from them.
"""

from __future__ import annotations

import numpy as np

from peaksift.cli._summary import _summary_text
from peaksift.search.doubts import doubts

MASSES = list(np.linspace(155.85, 384.4, 25))
# the background under the signal of the reviewer's run (results.json limits), 3 digits
B = [78.6, 57.9, 43.3, 32.9, 25.3, 19.8, 15.6, 12.4, 10.0, 8.12, 6.65, 5.49, 4.56, 3.81,
     3.21, 2.71, 2.31, 1.97, 1.70, 1.46, 1.27, 1.10, 0.96, 0.84, 0.739]
THRESHOLD = 10.0
LOW = int(np.sum(np.array(B) < THRESHOLD))   # numpy: the masses below the threshold


def _plain(method_low: str) -> dict:
    return {"masses": MASSES, "background_under_signal": B, "low_count_background": THRESHOLD,
            "methods": [method_low if b < THRESHOLD else "asymptotic" for b in B],
            "flags": ["toys (low counts)" if b < THRESHOLD and method_low == "toys" else
                      "asymptotic, DOUBTFUL" if b < THRESHOLD else "" for b in B],
            "asymptotic_doubtful": [b < THRESHOLD and method_low != "toys" for b in B],
            "below_floor": [False] * 25,
            "observed": [2.0] * 25, "expected_minus2": [1.0] * 25, "expected_plus2": [3.0] * 25}


def _results(plain: dict, with_s_low: str | None) -> dict:
    r = {"fit": {"valid": True, "gof": {"p_value": 0.4}, "problems": []},
         "blinding": {"active": False}, "limits": plain, "best": {"mass": 336.79}}
    if with_s_low is not None:
        # its own background under the signal differs (the envelope's function): the
        # warning counts low masses as the run decides them, by the plain limits' b
        r["systematics"] = {"limits": {"with_systematics": {
            "masses": MASSES, "background_under_signal": [1.5 * b for b in B],
            "low_count_background": THRESHOLD,
            "methods": [with_s_low if b < THRESHOLD else "asymptotic" for b in B]}}}
    return r


def _limit_warnings(r: dict) -> list[str]:
    return [w["message"] for w in doubts(r) if w["topic"] == "limits"]


def test_headline_limits_asymptotic_at_low_counts_are_flagged():
    assert LOW == 16   # the reviewer's run: 16 of 25 masses below 10 events
    (msg,) = _limit_warnings(_results(_plain("toys"), "asymptotic"))
    assert msg.startswith(f"the limits with systematics (the headline ones) are asymptotic at "
                          f"{LOW} of 25 masses")
    assert "down to 0.739 events at 384.40 GeV" in msg and "systematics.toy_limits" in msg
    r = _results(_plain("toys"), "asymptotic")
    r["warnings"] = doubts(r)   # as SearchResult.to_dict writes them
    text = _summary_text(r)
    assert (f"{LOW} plain limits from toys, those with systematics asymptotic" in text
            and "WARNING: the limits with systematics" in text)


def test_toys_in_both_sets_give_no_warning_and_say_so():
    r = _results(_plain("toys"), "toys")
    assert _limit_warnings(r) == []
    assert f"{LOW} from toys with and without systematics" in _summary_text(r)


def test_plain_limits_asymptotic_at_low_counts_without_systematics():
    (msg,) = _limit_warnings(_results(_plain("asymptotic"), None))
    assert msg.startswith(f"the limits are asymptotic at {LOW} of 25 masses")
    assert 'limits.method = "auto"' in msg
    assert _limit_warnings(_results(_plain("toys"), None)) == []
