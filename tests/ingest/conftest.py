"""Fixtures for ingest tests: a real warehouse file in tmp_path and case files copied from tests/data."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from ingest_cases import DATA


@pytest.fixture
def db(tmp_path: Path) -> Path:
    return tmp_path / "wh.duckdb"


@pytest.fixture
def write(tmp_path: Path):
    """Write bytes (or text as UTF-8) to tmp_path/drop/<name> and return the path."""

    def _write(name: str, content: bytes | str) -> Path:
        p = tmp_path / "drop" / name
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
        return p

    return _write


@pytest.fixture
def case(tmp_path: Path):
    """Copy a case file from tests/data into tmp_path/cases and return the copy."""

    def _case(rel: str) -> Path:
        dst = tmp_path / "cases" / rel
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(DATA / rel, dst)
        return dst

    return _case
