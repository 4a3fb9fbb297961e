"""Shared fixtures (keep this file small; add fixtures with a minimal edit)."""

from __future__ import annotations

import signal
from pathlib import Path

import pytest

REPO_DIR = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def demo_dir() -> Path:
    """The committed demo data set (demo_data/: events_*.parquet and truth.json)."""
    return REPO_DIR / "demo_data"


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory) -> Path:
    """A 20 000-event demo set (default seed) in 2 files with 3000-event row groups."""
    from peaksift.simulate import write_demo

    out = tmp_path_factory.mktemp("small_demo")
    write_demo(out, n_events=20_000, files=2, row_group_events=3000)
    return out


@pytest.fixture(scope="session")
def demo_nll():
    """``demo_nll(fit_dict)`` -> the demo model's NLL written in the tests: the extended binned
    Poisson NLL in its saturated form (Baker and Cousins, Nucl. Instrum. Meth. 221 (1984) 437,
    eq. 11) of a Gaussian (scipy.stats.norm.cdf bin integrals) plus a power law m^-k, each
    normalised on the window, on the bins of a ``FitResult.to_dict()``, as a function of
    mass, sigma, signal_yield, power, background_yield."""
    import numpy as np
    from scipy import stats

    def build(fit_dict):
        e = np.array(fit_dict["bins"]["edges"])
        n = np.array(fit_dict["bins"]["observed"])

        def nll(mass, sigma, signal_yield, power, background_yield):
            g = stats.norm.cdf(e, mass, sigma)
            p = e ** (1.0 - power)
            mu = (signal_yield * np.diff(g) / (g[-1] - g[0])
                  + background_yield * np.diff(p) / (p[-1] - p[0]))
            if np.any(mu <= 0):
                return 1e30
            return float(np.sum(mu - n + np.where(n > 0, n * np.log(np.where(n > 0, n, 1) / mu),
                                                  0.0)))
        return nll
    return build


@pytest.fixture
def python_ctrl_c():
    """Python's own Ctrl-C handler while each test runs: a test session started as a
    background job inherits SIGINT ignored (POSIX sh(1), "Asynchronous Lists"), which
    Python and peaksift then leave ignored."""
    old = signal.signal(signal.SIGINT, signal.default_int_handler)
    yield
    signal.signal(signal.SIGINT, old)
