"""Start the Streamlit dashboard as a child process and wait until it answers.

``lotline serve`` and ``lotline demo`` use :func:`start_server`; tests use it to serve a fixture warehouse.
The server binds 127.0.0.1 unless told otherwise: put an authenticating reverse proxy in front of it (see
docs/dashboard.md) before binding any other address.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from dataclasses import dataclass
from pathlib import Path

APP_PATH = Path(__file__).resolve().parent / "app.py"
DEFAULT_ADDRESS = "127.0.0.1"
DEFAULT_PORT = 8501
ENV_DB = "LOTLINE_DB"
ENV_USER_HEADER = "LOTLINE__DASHBOARD__USER_HEADER"
"""Name of a request header set by a trusted, authenticating reverse proxy that carries the user name."""


@dataclass
class Server:
    """A running dashboard: its child process and its base URL."""

    process: subprocess.Popen
    url: str

    def stop(self, timeout_s: float = 10.0) -> None:
        """Terminate the child process (and wait for it)."""
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=timeout_s)


def free_port(address: str = DEFAULT_ADDRESS) -> int:
    """A TCP port that is free on ``address`` right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((address, 0))
        return int(s.getsockname()[1])


def streamlit_command(
    db: str | os.PathLike[str], *, port: int = DEFAULT_PORT, address: str = DEFAULT_ADDRESS
) -> list[str]:
    """The ``streamlit run`` command line for the dashboard (headless, no usage statistics)."""
    return [
        sys.executable, "-m", "streamlit", "run", str(APP_PATH),
        "--server.headless", "true",
        "--server.address", address,
        "--server.port", str(port),
        "--server.fileWatcherType", "none",
        "--server.runOnSave", "false",
        "--browser.gatherUsageStats", "false",
        "--client.toolbarMode", "minimal",
        "--theme.base", "light",
        "--",
        "--db", str(Path(db).resolve()),
    ]  # fmt: skip


def child_environment(db: str | os.PathLike[str], *, user_header: str | None = None) -> dict[str, str]:
    """The environment of the server process: the warehouse path, and the trusted proxy header if given."""
    env = dict(os.environ)
    env[ENV_DB] = str(Path(db).resolve())
    if user_header:
        env[ENV_USER_HEADER] = user_header
    else:
        env.pop(ENV_USER_HEADER, None)
    return env


def wait_healthy(url: str, *, timeout_s: float = 30.0, process: subprocess.Popen | None = None) -> None:
    """Poll ``<url>/_stcore/health`` until it answers ``ok``; raise TimeoutError naming the URL otherwise."""
    deadline = time.monotonic() + timeout_s
    last = "no answer"
    while time.monotonic() < deadline:
        if process is not None and process.poll() is not None:
            raise RuntimeError(
                f"dashboard server exited with code {process.returncode} before it was healthy"
            )
        try:
            with urllib.request.urlopen(f"{url}/_stcore/health", timeout=2) as resp:
                body = resp.read().decode("utf-8", "replace").strip()
                if resp.status == 200 and body == "ok":
                    return
                last = f"HTTP {resp.status} {body!r}"
        except (urllib.error.URLError, ConnectionError, TimeoutError) as exc:
            last = str(exc)
        time.sleep(0.2)
    raise TimeoutError(f"dashboard at {url} was not healthy after {timeout_s:g} s (last: {last})")


def start_server(
    db: str | os.PathLike[str],
    *,
    port: int | None = DEFAULT_PORT,
    address: str = DEFAULT_ADDRESS,
    user_header: str | None = None,
    timeout_s: float = 30.0,
    log_path: str | os.PathLike[str] | None = None,
) -> Server:
    """Start the dashboard on ``address:port`` over the warehouse ``db``; return once it is healthy.

    ``port=None`` picks a free port. The server's output goes to ``log_path`` (default: discarded).

    Example:
        >>> server = start_server("demo_run/lotline.duckdb", port=None)  # doctest: +SKIP
        >>> server.url  # doctest: +SKIP
        'http://127.0.0.1:40123'
        >>> server.stop()  # doctest: +SKIP
    """
    if port is None:
        port = free_port(address)
    out = open(log_path, "ab") if log_path else subprocess.DEVNULL  # noqa: SIM115 - the child owns it
    try:
        process = subprocess.Popen(
            streamlit_command(db, port=port, address=address),
            env=child_environment(db, user_header=user_header),
            stdout=out,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
        )
    finally:
        if log_path:
            out.close()
    host = f"[{address}]" if ":" in address else address
    server = Server(process=process, url=f"http://{host}:{port}")
    try:
        wait_healthy(server.url, timeout_s=timeout_s, process=process)
    except BaseException:
        server.stop()
        raise
    return server


def run_server(
    db: str | os.PathLike[str],
    *,
    port: int = DEFAULT_PORT,
    address: str = DEFAULT_ADDRESS,
    user_header: str | None = None,
) -> int:
    """Run the dashboard in the foreground until it exits (or Ctrl-C); return its exit code."""
    process = subprocess.Popen(
        streamlit_command(db, port=port, address=address),
        env=child_environment(db, user_header=user_header),
    )
    try:
        return process.wait()
    except KeyboardInterrupt:
        process.terminate()
        return process.wait()
