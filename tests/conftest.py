"""Suite-wide fixtures: isolate environment variables and the working directory."""

import pytest


@pytest.fixture(autouse=True)
def _clean_environ(monkeypatch, tmp_path_factory):
    # A developer's LOTLINE_DB must never leak into a test (httpx-style clean environ).
    monkeypatch.delenv("LOTLINE_DB", raising=False)
    yield
