"""A limit with systematics that no data could give is flagged, not reported as measured."""

from __future__ import annotations

import pytest


def test_a_limit_with_systematics_below_the_counting_floor_is_flagged():
    """CLs >= exp(-s) (Read, J. Phys. G 28 (2002) 2693): no data give a 95% CL limit below
    -ln(0.05) = 2.996 signal events.  An observed limit with systematics below half that
    floor is flagged (in results.json ``warnings``, hence the summary and the report);
    one at 0.6 of it is not.  Seen in a blinded demo run: 0.0106 fb against 0.545 fb."""
    import math

    from peaksift.search.doubts import FLOOR_FACTOR, doubts

    floor = -math.log(0.05) / (10.0 * 0.55)  # signal events per fb: L = 10/fb, eff = 0.55
    masses = [160.0, 172.17, 180.0]
    plain = {"masses": masses, "observed": [2.0] * 3, "counting_floor": [floor] * 3}

    def warned(obs):
        sy = {"limits": {"with_systematics": {"masses": masses, "observed": obs}}}
        return [w for w in doubts({"limits": plain, "systematics": sy})
                if "counting floor" in w["message"]]

    assert floor == pytest.approx(0.545, abs=1e-3)
    w = warned([2.0, 0.0106, None])
    assert len(w) == 1 and "172.17 GeV" in w[0]["message"] and "160.00" not in w[0]["message"]
    assert warned([2.0, (FLOOR_FACTOR + 0.1) * floor, 2.0]) == []
