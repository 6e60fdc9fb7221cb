"""Suite-wide fixtures: isolate environment variables and the working directory."""

import os

import pytest
from hypothesis import settings


@pytest.fixture(autouse=True)
def _clean_environ(monkeypatch, tmp_path_factory):
    # A developer's LOTLINE_DB must never leak into a test (httpx-style clean environ).
    monkeypatch.delenv("LOTLINE_DB", raising=False)
    yield


# CI (CI=true) runs the property tests on a fixed sequence of examples, so a landing never depends on which
# random examples a run happened to draw; local runs keep exploring new ones.
if os.environ.get("CI"):
    settings.register_profile("ci", derandomize=True, deadline=None)
    settings.load_profile("ci")
