"""upper_limits refuses what the configuration refuses, and says what it assumed.

Outside references: the configuration schema's own ranges as a config file meets them
(``load_config`` on a TOML written here) for the refusals; sigma x B = N / (L x eff), the
definition of a cross-section limit from an event limit (any textbook; exact without
uncertainties), for the numbers.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pytest

from peaksift import MassHistogram, upper_limits
from peaksift.config import load_config
from peaksift.errors import ConfigError, FitError

MASSES = [150.0, 200.0]


@pytest.fixture(scope="module")
def h() -> MassHistogram:
    rng = np.random.default_rng(20)
    m = 100.0 + rng.exponential(40.0, 3000)
    return MassHistogram.from_masses(m[m < 300.0], bins=100, range=(100.0, 300.0))


def _limits(h, **kw):
    return upper_limits(h, "gaussian", "exponential", MASSES, absolute_resolution=3.0,
                        method="asymptotic", **kw)


def _config_refuses(tmp_path, key: str, value: float) -> bool:
    p = tmp_path / f"{key}.toml"
    p.write_text(textwrap.dedent(f"""\
        [input]
        files = ["x.parquet"]
        [spectrum]
        window = [100.0, 300.0]
        [model.resolution]
        absolute = 3.0
        [limits]
        luminosity = 10.0
        {key} = {value}
        """))
    try:
        load_config(p)
    except ConfigError:
        return True
    return False


@pytest.mark.parametrize("key, value", [
    ("luminosity_uncertainty", 2.0),     # "2 %" given as 2: the reviewer's case
    ("efficiency_uncertainty", 1.5),
    ("luminosity_uncertainty", -0.1),
    ("efficiency", 1.2),
    ("efficiency", 0.0),
    ("luminosity", -5.0),
])
def test_the_api_refuses_what_a_config_refuses(h, tmp_path, key, value):
    assert _config_refuses(tmp_path, key, value)
    kw = {"luminosity": 10.0, key: value}
    with pytest.raises(FitError, match=f"{key} must be a number"):
        _limits(h, **kw)


def test_the_edges_of_the_config_ranges_are_accepted(h, tmp_path):
    # 100 % uncertainties and an efficiency of 1: inside the config's ranges, inside the API's
    for key, value in (("luminosity_uncertainty", 1.0), ("efficiency", 1.0)):
        assert not _config_refuses(tmp_path, key, value)
    r = _limits(h, luminosity=10.0, efficiency=1.0, luminosity_uncertainty=1.0)
    assert np.all(np.isfinite(r.expected))


def test_an_efficiency_without_a_luminosity_is_refused_not_dropped(h):
    # it used to give the same event limits as efficiency=1, without a word
    with pytest.raises(FitError, match="efficiency=0.5 without luminosity=.*give luminosity="):
        _limits(h, efficiency=0.5)


def test_an_assumed_efficiency_is_said_and_the_numbers_follow_the_definition(h):
    """Without efficiency= the limit is on sigma x B x eff with eff = 1 (notes, repr,
    assumptions say so); with efficiency=0.5 the limit is N / (L eff) exactly."""
    events = _limits(h)
    plain = _limits(h, luminosity=10.0)
    half = _limits(h, luminosity=10.0, efficiency=0.5)
    # sigma x B = N / (L eff): 1e-4 relative (the bisection's tolerance on each limit)
    np.testing.assert_allclose(plain.observed, events.observed / 10.0, rtol=1e-4)
    np.testing.assert_allclose(half.observed, events.observed / (10.0 * 0.5), rtol=1e-4)
    np.testing.assert_allclose(half.expected, events.expected / 5.0, rtol=1e-4)
    assert any("efficiency not given: 1 assumed" in n for n in plain.notes)
    assert "sigma x B x efficiency" in repr(plain)
    assert plain.assumptions.get("efficiency_assumed") is True
    assert type(plain).from_dict(plain.to_dict()).assumptions.get("efficiency_assumed")
    assert not any("efficiency not given" in n for n in half.notes)
    assert "sigma x B [fb]" in repr(half) and "efficiency_assumed" not in half.assumptions
