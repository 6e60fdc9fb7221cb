"""Fixtures of the tool-health tests: the demo fab's warehouse (built once per session) and its weekly review."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.health.demo_warehouse import build_demo_warehouse


@pytest.fixture(scope="session")
def demo_fab(tmp_path_factory):
    """(warehouse path, simulated demo data) of the 27-day demo fab with the tool-health test plan evaluated."""
    path = tmp_path_factory.mktemp("demo") / "demo.duckdb"
    data = build_demo_warehouse(path)
    return path, data


@pytest.fixture(scope="session")
def demo_health(demo_fab):
    from warehouse.health import read_weekly_health

    return read_weekly_health(demo_fab[0])


@pytest.fixture(scope="session")
def demo_report(demo_health, tmp_path_factory) -> Path:
    from dashboard.report import render_weekly_report

    path = tmp_path_factory.mktemp("report") / "weekly.html"
    path.write_text(render_weekly_report(demo_health), encoding="utf-8")
    return path
