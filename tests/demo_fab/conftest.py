"""Fixtures: one small demo written to disk and one small simulation, shared by the demo_fab tests."""

from pathlib import Path

import pytest

from demo_fab import generate_demo
from demo_fab.config import DemoConfig
from demo_fab.generate import simulate

SMALL_DAYS = 10


@pytest.fixture(scope="session")
def small_demo(tmp_path_factory) -> Path:
    """A 10-day demo (seed 5) on disk: ``exports/`` and ``truth.json``."""
    out = tmp_path_factory.mktemp("demo") / "run"
    generate_demo(out, days=SMALL_DAYS, seed=5)
    return out


@pytest.fixture(scope="session")
def small_data():
    """The canonical frames of a 12-day simulation (seed 3)."""
    return simulate(DemoConfig(days=12, seed=3))
