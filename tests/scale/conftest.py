"""A small demo fab warehouse exported to a lake, shared by the scale-out tests (built once per session)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

DEMO_DAYS = 8
"""Enough days for most demo series to complete their 25-point baseline, so run rules, EWMA and CUSUM fire."""


@dataclass(frozen=True)
class DemoLake:
    db: Path
    lake: Path
    signals: int  # signals the local engine found in the demo run


@pytest.fixture(scope="session")
def demo_lake(tmp_path_factory) -> DemoLake:
    from demo_fab.pipeline import run_demo
    from warehouse.lake import export_lake

    root = tmp_path_factory.mktemp("demo_lake")
    run = run_demo(root / "fab", days=DEMO_DAYS)
    lake = root / "lake"
    export_lake(run.db, lake)
    return DemoLake(db=run.db, lake=lake, signals=run.signals)
