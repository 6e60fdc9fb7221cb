"""Fixtures of the dashboard tests: one fixture warehouse per session, the app's path, and env isolation."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from tests.dashboard.fixture_warehouse import build_fixture_warehouse

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
APP = ROOT / "dashboard" / "app.py"
ARTIFACTS = ROOT / "test-artifacts" / "screenshots"


@pytest.fixture(scope="session")
def fixture_db_master(tmp_path_factory) -> Path:
    return build_fixture_warehouse(tmp_path_factory.mktemp("wh") / "fixture.duckdb")


@pytest.fixture()
def fixture_db(fixture_db_master, tmp_path, monkeypatch) -> Path:
    """A private copy of the fixture warehouse, named in LOTLINE_DB for the app under test."""
    path = tmp_path / "fixture.duckdb"
    shutil.copyfile(fixture_db_master, path)
    monkeypatch.setenv("LOTLINE_DB", str(path))
    return path
