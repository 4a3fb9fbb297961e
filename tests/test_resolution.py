"""Resolution: explicit forms, one check of a relative resolution, no guessing of bare numbers."""

from __future__ import annotations

import dataclasses
import math
import time

import numpy as np
import pytest
from scipy import interpolate

import peaksift
from peaksift import MassHistogram, Resolution, scan, upper_limits
from peaksift.config import load_config
from peaksift.errors import ConfigError, FitError, PeaksiftError
from peaksift.resolution import MIN_SIGMA_PER_BIN, check_resolved, resolution_from

WINDOW = (100.0, 400.0)


def _spectrum(seed: int = 5, n_bkg: int = 20_000) -> MassHistogram:
    rng = np.random.default_rng(seed)
    return MassHistogram(bins=300, range=WINDOW).fill(WINDOW[0] + rng.exponential(90.0, n_bkg))


def _config(resolution: dict, **spectrum) -> dict:
    return {"input": {"files": "x.parquet"},
            "spectrum": {"window": [110.0, 200.0], **spectrum},
            "model": {"resolution": resolution}}


def test_forms_give_sigma_in_gev():
    """sigma = r m for a relative resolution, a constant for an absolute one, and linear
    interpolation for a table (scipy.interpolate.interp1d, kind="linear", as the reference)."""
    m = np.array([150.0, 250.0, 350.0])
    np.testing.assert_allclose(Resolution.relative(0.01).sigma(m), [1.5, 2.5, 3.5], rtol=1e-15)
    np.testing.assert_array_equal(Resolution.absolute(2.0).sigma(m), [2.0, 2.0, 2.0])
    tm, ts = [100.0, 220.0, 400.0], [1.0, 3.4, 4.0]
    ref = interpolate.interp1d(tm, ts, kind="linear")(m)
    np.testing.assert_allclose(Resolution.table(tm, ts).sigma(m), ref, rtol=1e-14)
    np.testing.assert_allclose(Resolution.table(list(zip(tm, ts))).sigma(m), ref, rtol=1e-14)
    np.testing.assert_allclose(Resolution.table({"mass": tm, "sigma": ts}).sigma(m), ref,
                               rtol=1e-14)
    # a callable of one float is called mass by mass
    np.testing.assert_allclose(Resolution.function(lambda x: 0.5 * math.sqrt(x)).sigma(m),
                               0.5 * np.sqrt(m), rtol=1e-15)
    assert isinstance(Resolution.relative(0.01).sigma(200.0), float)
    # the keyword forms of scan / upper_limits
    assert resolution_from(relative=0.01) == Resolution.relative(0.01)
    assert resolution_from(absolute=2.0) == Resolution.absolute(2.0)
    assert resolution_from((tm, ts)) == Resolution.table(tm, ts)
    assert resolution_from(Resolution.absolute(2.0)) == Resolution.absolute(2.0)


def test_value_type():
    r = Resolution.table([(90.0, 0.99), (150.0, 1.98)])
    assert r == Resolution.table([90.0, 150.0], [0.99, 1.98]) and hash(r) == hash(
        Resolution.table([90.0, 150.0], [0.99, 1.98]))
    assert r != Resolution.absolute(1.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        r.kind = "absolute"  # type: ignore[misc]
    assert repr(Resolution.relative(0.02)) == "Resolution.relative(0.02)"
    assert Resolution.relative(0.02).describe() == "sigma = 2% of m"
    assert Resolution.absolute(2.0).to_dict() == {"kind": "absolute", "absolute": 2.0}
    assert r.to_dict() == {"kind": "table", "table": [[90.0, 0.99], [150.0, 1.98]]}
    assert r.mass_range == (90.0, 150.0) and Resolution.absolute(1.0).mass_range is None
    assert peaksift.Resolution is Resolution and "Resolution" in peaksift.__all__
    # direct construction is checked like the named constructors
    with pytest.raises(FitError, match="relative resolution"):
        Resolution("relative", value=3.0)
    with pytest.raises(FitError, match="kind must be one of"):
        Resolution("percent", value=1.0)


@pytest.mark.parametrize("call", [scan, upper_limits])
def test_bare_number_is_refused_with_the_two_readings(call):
    """The issue's case: resolution=2.0 meant 2 GeV but was read as sigma/m = 2."""
    h = _spectrum()
    with pytest.raises(FitError) as info:
        call(h, "gaussian", "exponential", [250.0], resolution=2.0)
    msg = str(info.value)
    assert "relative_resolution=2.0" in msg and "absolute_resolution=2.0" in msg
    with pytest.raises(FitError, match="exactly one of"):
        call(h, "gaussian", "exponential", [250.0], relative_resolution=0.01,
             absolute_resolution=2.0)
    with pytest.raises(FitError, match="exactly one of"):
        call(h, "gaussian", "exponential", [250.0])


@pytest.mark.parametrize("bad", [2.0, 1.0000001, 0.0, -0.01, math.nan, math.inf])
def test_relative_resolution_has_one_check_in_the_api_and_the_config(bad):
    """A relative resolution must satisfy 0 < r <= 1: the API and the config refuse the same
    values with the same words (one check, peaksift.resolution.relative_problem)."""
    with pytest.raises(FitError) as api:
        scan(_spectrum(), "gaussian", "exponential", [250.0], relative_resolution=bad)
    with pytest.raises(ConfigError) as cfg:
        load_config(_config({"relative": bad}))
    api_text = str(api.value).split("relative resolution", 1)[1]
    cfg_text = str(cfg.value).split("model.resolution.relative", 1)[1]
    assert api_text == cfg_text
    assert "<= 1" in cfg_text
    # 1.0 itself passes the relative check; a sigma equal to the mass is then refused by
    # the separate rule that the peak must fit in the window (half its width at most)
    with pytest.raises(ConfigError) as edge:
        load_config(_config({"relative": 1.0}))
    assert "<= 1" not in str(edge.value) and "more than 0.5 of the" in str(edge.value)


def test_absolute_resolution_is_in_gev():
    """absolute_resolution=2.5 is sigma = 2.5 GeV: at 250 GeV the scan equals the one with
    sigma/m = 0.01 (0.01 x 250 = 2.5) to rounding."""
    h = _spectrum()
    a = scan(h, "gaussian", "exponential", [180.0, 250.0], absolute_resolution=2.5, refit=False)
    r = scan(h, "gaussian", "exponential", [250.0], relative_resolution=0.01, refit=False)
    np.testing.assert_array_equal(a.sigma, [2.5, 2.5])
    assert a.q0[1] == pytest.approx(r.q0[0], rel=1e-12, abs=1e-12)


def test_sigma_far_below_the_bin_width_is_refused_quickly():
    """An absolute resolution of 1e-9 GeV (1 GeV bins) is refused in well under a second,
    in the API, the config, and with arrays of masses (finest automatic binning)."""
    h = _spectrum()
    t0 = time.perf_counter()
    with pytest.raises(FitError, match=r"below 0\.01 of the 1 GeV bin"):
        scan(h, "gaussian", "exponential", 21, absolute_resolution=1e-9)
    with pytest.raises(FitError, match="inside one bin"):
        upper_limits(h, "gaussian", "exponential", [250.0], absolute_resolution=1e-9)
    x = WINDOW[0] + np.random.default_rng(1).exponential(90.0, 5000)
    with pytest.raises(FitError, match="or use finer bins"):
        scan(x, "gaussian", "exponential", 21, absolute_resolution=1e-9, window=WINDOW)
    with pytest.raises(ConfigError, match="model.resolution.*inside one bin"):
        load_config(_config({"absolute": 1e-9}))
    assert time.perf_counter() - t0 < 30.0  # generous for a loaded 2-core machine
    # just above the threshold the resolution is accepted, just below it is not
    edges = np.linspace(0.0, 1.0, 11)
    ok = check_resolved(Resolution.absolute(MIN_SIGMA_PER_BIN * 0.1 * 1.001), [0.55], edges)
    assert ok.tolist() == [MIN_SIGMA_PER_BIN * 0.1 * 1.001]
    with pytest.raises(FitError, match="inside one bin"):
        check_resolved(Resolution.absolute(MIN_SIGMA_PER_BIN * 0.1 * 0.999), [0.55], edges)


def test_default_grid_of_the_search_is_bounded():
    """The search's default hypotheses half a sigma apart: a resolution just above the
    refusal threshold on the finest allowed binning would give ~2e7 of them; refused when
    the config is loaded, naming the key."""
    with pytest.raises(ConfigError, match=r"model.resolution.absolute .*scan.step or "
                                          r"scan.points.*1.8e\+07 mass hypotheses"):
        load_config(_config({"absolute": 1.0e-5}, bins=100_000))  # bins of 0.9 MeV


def test_tables_are_not_extrapolated():
    h = _spectrum()
    with pytest.raises(FitError, match="outside the resolution table"):
        scan(h, "gaussian", "exponential", [150.0, 350.0],
             resolution=([200.0, 300.0], [2.0, 3.0]))
    with pytest.raises(ConfigError, match=r"table covers 120-200 GeV but spectrum.window is "
                                          r"\[110, 200\]"):
        load_config(_config({"table": [[120.0, 1.4], [200.0, 2.8]]}))
    cfg = load_config(_config({"table": [[100.0, 1.0], [200.0, 3.0]]}))
    assert cfg.model.resolution.resolution == Resolution.table([100.0, 200.0], [1.0, 3.0])


def test_bad_functions_and_tables_are_peaksift_errors():
    with pytest.raises(FitError, match="gave sigma = -1.0 at m = 1 GeV"):
        Resolution.function(lambda m: -np.asarray(m)).sigma([1.0, 2.0])
    with pytest.raises(FitError, match="increase strictly"):
        Resolution.table([100.0, 100.0], [1.0, 2.0])
    with pytest.raises(FitError, match="every sigma must be > 0"):
        Resolution.table([100.0, 200.0], [1.0, 0.0])
    with pytest.raises(PeaksiftError, match="must be a peaksift.Resolution"):
        resolution_from(object())
    with pytest.raises(FitError, match="absolute resolution must be a finite width > 0"):
        Resolution.absolute(0.0)


def _sigma_of_m(m):
    return 0.5 + 0.004 * m


@pytest.mark.parametrize("res", [Resolution.relative(0.012), Resolution.absolute(2.5),
                                 Resolution.table([(100.0, 1.0), (150.0, 1.6), (200.0, 2.4)]),
                                 Resolution.function(_sigma_of_m)],
                         ids=["relative", "absolute", "table", "function"])
def test_from_dict_gives_every_kind_back(res):
    """from_dict(to_dict()) == the resolution, through JSON; sigma(m) the same at three
    masses (the function kind needs its callable: code is not stored)."""
    import json

    d = json.loads(json.dumps(res.to_dict()))
    extra = {"function": _sigma_of_m} if res.kind == "function" else {}
    back = Resolution.from_dict(d, **extra)
    assert back == res
    m = np.array([110.0, 150.0, 190.0])
    assert np.array_equal(back.sigma(m), res.sigma(m))
    if res.kind == "function":
        with pytest.raises(FitError, match="stored by name only"):
            Resolution.from_dict(d)
        with pytest.raises(FitError, match="the stored one"):
            Resolution.from_dict(d, function=abs)
    with pytest.raises(FitError, match="not a resolution"):
        Resolution.from_dict({"kind": "relative"})
