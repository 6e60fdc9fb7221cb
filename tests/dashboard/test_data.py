"""dashboard/data.py: where the warehouse path comes from, and that only named read functions can be run."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from dashboard import data


def test_db_path_prefers_the_db_argument_after_the_script(monkeypatch, tmp_path):
    monkeypatch.setenv("LOTLINE_DB", str(tmp_path / "env.duckdb"))
    monkeypatch.setattr(sys, "argv", ["app.py", "--db", str(tmp_path / "arg.duckdb")])
    assert data.db_path() == tmp_path / "arg.duckdb"
    monkeypatch.setattr(sys, "argv", ["app.py", f"--db={tmp_path / 'eq.duckdb'}"])
    assert data.db_path() == tmp_path / "eq.duckdb"


def test_db_path_falls_back_to_env_then_default(monkeypatch, tmp_path):
    monkeypatch.setattr(sys, "argv", ["app.py"])
    monkeypatch.setenv("LOTLINE_DB", str(tmp_path / "env.duckdb"))
    assert data.db_path() == tmp_path / "env.duckdb"
    monkeypatch.delenv("LOTLINE_DB")
    assert data.db_path() == Path("lotline.duckdb")


@pytest.mark.parametrize("name", ["_frame", "no_such_query", "__import__", "Con"])
def test_load_refuses_anything_but_a_named_read_function(name):
    with pytest.raises(AttributeError, match="has no read function"):
        data.load({"x": (name, {})})


def test_load_batch_equals_the_queries_on_the_fixture(fixture_db, monkeypatch):
    from tests.dashboard.helpers import query

    monkeypatch.setattr(sys, "argv", ["app.py"])
    got = data.load({"sev": ("open_excursions_by_severity", {}), "log": ("ingest_log", {"status": "failed"})})
    assert got["sev"].equals(query(fixture_db, "open_excursions_by_severity"))
    assert got["log"]["file_id"].to_list() == [3]
