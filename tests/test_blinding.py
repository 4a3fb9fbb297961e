"""The blinded-region rule: a bin is hidden when it overlaps the blinded range.

Expected masks are worked out by hand from the rule "a bin [e_i, e_i+1) is hidden when any
part of it lies inside (lo, hi)" (common practice: no count from inside the blinded range
may reach a fit or a figure through a straddling bin).  Exact comparisons (no tolerance).
"""

import numpy as np
import pytest

from peaksift.blinding import blinded_bins, hidden_range
from peaksift.errors import FitError

EDGES = np.array([100.0, 110.0, 120.0, 130.0, 140.0, 150.0])


def test_straddling_bins_are_hidden_touching_bins_are_not():
    # (115, 125) reaches into [110, 120) and [120, 130)
    assert blinded_bins(EDGES, (115.0, 125.0)).tolist() == [False, True, True, False, False]
    # (120, 130) matches one bin exactly; [110, 120) and [130, 140) only touch it
    assert blinded_bins(EDGES, (120.0, 130.0)).tolist() == [False, False, True, False, False]
    assert hidden_range(EDGES, (115.0, 125.0)) == (110.0, 130.0)
    assert hidden_range(EDGES, (120.0, 130.0)) == (120.0, 130.0)


def test_ranges_outside_the_bins_hide_nothing():
    assert not blinded_bins(EDGES, (150.0, 160.0)).any()
    assert hidden_range(EDGES, (150.0, 160.0)) is None
    assert hidden_range(EDGES, None) is None
    assert blinded_bins(EDGES, None).tolist() == [False] * 5
    # a range wider than the spectrum hides all of it
    assert hidden_range(EDGES, (0.0, 1000.0)) == (100.0, 150.0)


@pytest.mark.parametrize("blind", [(130.0, 120.0), (120.0, 120.0), "x", (1.0,)])
def test_a_bad_range_is_a_peaksift_error(blind):
    with pytest.raises(FitError, match="blind"):
        blinded_bins(EDGES, blind)
