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


@pytest.mark.slow
def test_blinded_demo_limits_with_systematics_respect_the_counting_floor(tmp_path):
    """The blinded demo (145-160 GeV hidden): where the envelope's Asimov profile is not
    above its background-only value at small mu (q_A <= 0), that mu is not excluded.  Every
    observed limit with systematics then lies above the counting floor -ln(0.05)/(L eff)
    (Read, J. Phys. G 28 (2002) 2693) and within a factor 2 of the plain limit at the same
    mass (the systematics here widen the expected limits by at most 1.6x); before, four
    masses beside the blinded window read ~0.012 fb."""
    import math
    from pathlib import Path

    import peaksift

    demo = Path(__file__).resolve().parents[1] / "demo_data"
    text = (demo / "search.toml").read_text()
    text = (text.replace('files = ["events_*.parquet"]',
                         f'files = ["{(demo / "events_*.parquet").as_posix()}"]')
            .replace('template = "background_template.json"',
                     f'template = "{(demo / "background_template.json").as_posix()}"')
            .replace("toys = 100", "toys = 20"))
    cfg = tmp_path / "blind.toml"
    cfg.write_text(text + '\n[blinding]\nenabled = true\nwindow = [145.0, 160.0]\n')
    res = peaksift.run_search(cfg, out=False, progress=False)
    lim = res.systematics["limits"]
    w, plain = lim["with_systematics"], lim["without_systematics"]
    floor = -math.log(0.05) / (10.0 * 0.55)
    seen = 0
    for m, a, b in zip(w["masses"], w["observed"], plain["observed"]):
        if a is None or b is None:
            assert 145.0 <= m <= 160.0  # only the blinded masses have none
            continue
        seen += 1
        assert a >= floor, (m, a)
        assert 0.5 * b <= a <= 2.0 * b, (m, a, b)
    assert seen >= 15


def test_limits_with_several_minima_in_the_mass_scale_are_flagged():
    """The note of systematic_limits where a limit took a lower well of the mass scale
    than the nearest one becomes a ``limits`` warning; other notes do not."""
    import numpy as np

    from peaksift.search.doubts import doubts
    from peaksift.stats.scale_scan import several_minima_note

    note = several_minima_note(np.array([150.0, 151.0]), 0.05, "limits")
    assert "2 mass(es) (150, 151)" in note and "+-15%" in note
    sy = {"limits": {"notes": [note, "the limits leave out the template signal"]}}
    w = [d for d in doubts({"systematics": sy}) if d["topic"] == "limits"]
    assert [d["message"] for d in w] == [note]


def test_asymptotic_bands_with_a_scale_beyond_the_width_are_flagged():
    """The note of systematic_limits where asymptotic limits were made with the mass scale
    reaching beyond the peak's width becomes a ``limits`` warning naming the masses."""
    import numpy as np

    from peaksift.search.doubts import doubts
    from peaksift.stats.scale_scan import asimov_band_note

    note = asimov_band_note(np.array([150.0, 151.0]))
    assert "2 mass(es) (150, 151)" in note and 'limits.method = "toys"' in note
    w = [d for d in doubts({"systematics": {"limits": {"notes": [note]}}})
         if d["topic"] == "limits"]
    assert [d["message"] for d in w] == [note]


def test_q0_with_several_minima_in_the_mass_scale_is_flagged():
    """The scan's note where q0 took a lower well of the mass scale than the nearest one
    (in the systematics block's notes) becomes a ``significance`` warning; a spurious-signal
    note stays a ``background_model`` one."""
    import numpy as np

    from peaksift.search.doubts import doubts
    from peaksift.stats.scale_scan import several_minima_note

    note = "significance: " + several_minima_note(np.array([150.0]), 0.01, "q0")
    assert "the q0 there responds to the data within +-3% of the mass" in note
    sy = {"notes": [note, "spurious signal above 0.2 of the statistical error: x"]}
    topics = [(d["topic"], d["message"]) for d in doubts({"systematics": sy})]
    assert ("significance", note) in topics
    assert sorted(t for t, _ in topics) == ["background_model", "significance"]
