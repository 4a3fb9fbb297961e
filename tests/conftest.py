"""Shared fixtures (keep this file small; add fixtures with a minimal edit)."""

from __future__ import annotations

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
