"""`lotline serve` and the server start helper: localhost by default, no usage statistics, headless."""

from __future__ import annotations

import importlib.util
from pathlib import Path

from click.testing import CliRunner

from dashboard import server

ROOT = Path(__file__).resolve().parents[2]


def _cli():
    spec = importlib.util.spec_from_file_location("lotline_cli", ROOT / "lotline.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.cli


def _option(cmd: list[str], name: str) -> str:
    return cmd[cmd.index(name) + 1]


def test_streamlit_command_binds_localhost_headless_without_usage_statistics(tmp_path):
    cmd = server.streamlit_command(tmp_path / "wh.duckdb")
    assert _option(cmd, "--server.address") == "127.0.0.1"
    assert _option(cmd, "--server.port") == "8501"
    assert _option(cmd, "--server.headless") == "true"
    assert _option(cmd, "--browser.gatherUsageStats") == "false"
    assert cmd[cmd.index("--") + 1 :] == ["--db", str((tmp_path / "wh.duckdb").resolve())]
    assert Path(cmd[cmd.index("run") + 1]) == ROOT / "dashboard" / "app.py"


def test_child_environment_names_the_warehouse_and_only_a_configured_header(tmp_path, monkeypatch):
    monkeypatch.setenv(server.ENV_USER_HEADER, "X-Leaked")
    env = server.child_environment(tmp_path / "wh.duckdb")
    assert env["LOTLINE_DB"] == str((tmp_path / "wh.duckdb").resolve())
    assert server.ENV_USER_HEADER not in env  # a header is trusted only when the operator names it
    env = server.child_environment(tmp_path / "wh.duckdb", user_header="X-Forwarded-User")
    assert env[server.ENV_USER_HEADER] == "X-Forwarded-User"


def test_free_port_is_bindable_on_localhost():
    import socket

    port = server.free_port()
    with socket.socket() as s:
        s.bind(("127.0.0.1", port))


def test_serve_command_on_a_missing_warehouse_exits_1_with_the_fix(tmp_path):
    result = CliRunner().invoke(_cli(), ["serve", "--db", str(tmp_path / "none.duckdb")])
    assert result.exit_code == 1
    assert "warehouse not found" in result.output and "Fix:" in result.output


def test_serve_command_help_defaults_to_localhost():
    result = CliRunner().invoke(_cli(), ["serve", "--help"])
    assert result.exit_code == 0
    assert "127.0.0.1" in result.output and "Example: lotline serve" in result.output
