"""``Shape.pdf_near`` (the compiled density at a few masses, for the unbinned cost's sign
check at a peak) against outside references, within the 1e-10 relative that check's
margin (``likelihood.unbinned_cost.NEAR_MARGIN`` = 1e-9) needs."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from peaksift import shapes
from peaksift.likelihood.unbinned_cost import NEAR_MARGIN


@pytest.mark.parametrize(("m", "sg", "a", "n"), [(91.0, 2.0, 1.3, 2.7), (91.0, 2.0, 0.1, 1.02),
                                                 (91.0, 2.0, 5.0, 50.0), (80.0, 0.5, 0.6, 1.5)])
def test_crystalball_pdf_near_matches_scipy_crystalball(m, sg, a, n):
    """With the high-side tail beyond the window, the double-sided Crystal Ball is
    scipy.stats.crystalball(beta=alpha_low, m=n_low, loc=mass, scale=sigma) truncated to
    the window: pdf_near within 1e-10 relative at single masses across the window (the
    peak, the tail, the edges)."""
    s = shapes.get("crystalball")
    w = (60.0, m + 9.5 * sg)
    p = [m, sg, a, n, 10.0, 5.0]
    ref = stats.crystalball(beta=a, m=n, loc=m, scale=sg)
    z = ref.cdf(w[1]) - ref.cdf(w[0])
    assert NEAR_MARGIN >= 10 * 1e-10
    for x in np.linspace(*w, 41):
        at = np.array([x])
        np.testing.assert_allclose(s.pdf_near(at, p, w), ref.pdf(at) / z, rtol=1e-10)


def test_pdf_near_is_pdf_where_a_shape_has_no_compiled_density():
    """The default is pdf itself: the Gaussian's against scipy.stats.norm truncated to the
    window (1e-12 relative)."""
    s = shapes.get("gaussian")
    w = (60.0, 120.0)
    at = np.array([93.0])
    ref = stats.norm(91.0, 2.5)
    np.testing.assert_allclose(s.pdf_near(at, [91.0, 2.5], w),
                               ref.pdf(at) / (ref.cdf(w[1]) - ref.cdf(w[0])), rtol=1e-12)
