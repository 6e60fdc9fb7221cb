"""Fixtures of the drill-down tests: a small planted-fault warehouse and a small demo-fab warehouse."""

from __future__ import annotations

import pytest

from tests.drilldown.demo_warehouse import build_demo_warehouse
from tests.drilldown.fixture_warehouse import build_fixture_warehouse


@pytest.fixture(scope="session")
def fixture_db(tmp_path_factory):
    """The planted-fault line of fixture_warehouse.py, evaluated once per session."""
    path = tmp_path_factory.mktemp("drilldown") / "fixture.duckdb"
    build_fixture_warehouse(path)
    return path


@pytest.fixture(scope="session")
def demo_db(tmp_path_factory):
    """A 25-day demo fab (seed 7) stored, planned and evaluated once per session; with its ground truth."""
    path = tmp_path_factory.mktemp("drilldown_demo") / "demo.duckdb"
    data = build_demo_warehouse(path)
    return path, data
