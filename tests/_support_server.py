"""A real wxshock server on 127.0.0.1 for tests: in a thread (quick) or as a `wxshock serve` subprocess.

Usage::

    from tests import _support_server as server_support
    live_server = server_support.live_server          # session fixture: the tiny demo behind a thread server

    def test_something(live_server):
        with live_server.client() as client:
            assert client.get("/health").status_code == 200

    with server_support.thread_server(Settings(stores=[str(path)], data_dir=tmp_path)) as server: ...
    server = server_support.start_process(stores=[path], data_dir=tmp_path, env={"WXSHOCK_JOB_WORKERS": "1"})
    ...; server.kill()  # SIGKILL; or server.stop() (SIGTERM, waits)

Every server listens on 127.0.0.1 on a free port; `start_process` writes the server's log to
``data_dir/server-<port>.log`` and shows its tail when the server fails to come up.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.settings import Settings

HOST = "127.0.0.1"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        return int(sock.getsockname()[1])


@dataclass
class LiveServer:
    """A running server: its base URL, data directory and (for a subprocess) the process and its log."""

    base_url: str
    data_dir: Path
    process: subprocess.Popen[bytes] | None = None
    log_path: Path | None = None
    token: str | None = None
    _stop: Any = field(default=None, repr=False)

    def client(self, *, token: str | None = None, timeout: float = 60.0, **kwargs: Any) -> httpx.Client:
        """An httpx client for this server (with the bearer token, when given or set on the server)."""
        token = token or self.token
        headers = dict(kwargs.pop("headers", {}))
        if token:
            headers["Authorization"] = f"Bearer {token}"
        return httpx.Client(base_url=self.base_url, timeout=timeout, headers=headers, **kwargs)

    def log_tail(self, lines: int = 40) -> str:
        """The last lines of the subprocess's log ('' for a thread server)."""
        if self.log_path is None or not self.log_path.exists():
            return ""
        return "\n".join(self.log_path.read_text(errors="replace").splitlines()[-lines:])

    def kill(self) -> None:
        """SIGKILL the subprocess (no clean-up of any kind runs) and wait for it to go."""
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(30)

    def stop(self, timeout: float = 30.0) -> None:
        """Stop the server gracefully (SIGTERM for a subprocess), killing it if it does not go in time."""
        if self._stop is not None:
            self._stop()
            self._stop = None
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout)
            except subprocess.TimeoutExpired:
                self.kill()


def wait_until_ready(server: LiveServer, timeout: float = 120.0) -> None:
    """Poll /ready until it answers 200; fail with the server's log when it dies or the time runs out."""
    deadline = time.monotonic() + timeout
    last = "no answer"
    while time.monotonic() < deadline:
        if server.process is not None and server.process.poll() is not None:
            raise RuntimeError(f"the server exited with {server.process.returncode}:\n{server.log_tail()}")
        try:
            response = httpx.get(server.base_url + "/ready", timeout=2.0)
            if response.status_code == 200:
                return
            last = f"{response.status_code} {response.text[:200]}"
        except httpx.HTTPError as exc:
            last = repr(exc)
        time.sleep(0.1)
    server.stop()
    raise RuntimeError(f"the server was not ready within {timeout} s ({last}):\n{server.log_tail()}")


def start_process(
    *,
    stores: Sequence[Path | str] = (),
    data_dir: Path,
    env: dict[str, str] | None = None,
    port: int | None = None,
    extra_args: Sequence[str] = (),
    timeout: float = 120.0,
) -> LiveServer:
    """Start `wxshock serve` as a subprocess on 127.0.0.1 and wait until it is ready."""
    port = port or free_port()
    data_dir.mkdir(parents=True, exist_ok=True)
    args = [sys.executable, "-m", "service.cli", "serve", "--host", HOST, "--port", str(port)]
    args += ["--data-dir", str(data_dir)]
    for store in stores:
        args += ["--store", str(store)]
    args += list(extra_args)
    environment = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_")}
    environment.update(env or {})
    log_path = data_dir / f"server-{port}.log"
    with open(log_path, "ab") as log:
        process = subprocess.Popen(args, stdout=log, stderr=subprocess.STDOUT, env=environment)
    server = LiveServer(f"http://{HOST}:{port}", data_dir, process=process, log_path=log_path)
    wait_until_ready(server, timeout)
    return server


@contextmanager
def thread_server(
    settings: Settings, *, timeout: float = 120.0, token: str | None = None
) -> Iterator[LiveServer]:
    """Run create_app(settings) under uvicorn in a thread of this process, on 127.0.0.1, for the block."""
    import uvicorn

    from service.app import create_app

    port = free_port()
    settings = settings.model_copy(update={"host": HOST, "port": port})
    config = uvicorn.Config(create_app(settings), host=HOST, port=port, log_level="warning", lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, name=f"uvicorn-{port}", daemon=True)

    def stop() -> None:
        server.should_exit = True
        thread.join(30)

    live = LiveServer(f"http://{HOST}:{port}", Path(settings.data_dir), token=token, _stop=stop)
    thread.start()
    try:
        wait_until_ready(live, timeout)
        yield live
    finally:
        live.stop()


@pytest.fixture(scope="session")
def live_server(tiny_demo: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveServer]:
    """A thread server over the tiny demo store (dataset 'demo'), auth off, default limits."""
    data_dir = tmp_path_factory.mktemp("live-server-data")
    with thread_server(Settings(stores=[str(tiny_demo)], data_dir=data_dir)) as server:
        yield server


def run_schemathesis(
    base_url: str, cwd: Path, *, path_option: tuple[str, str], seed: int, request_timeout_s: int
) -> str:
    """Fuzz a live server's OpenAPI with schemathesis (no 5xx, status, content type, response schema).

    ``path_option`` is ("--include-path-regex" or "--exclude-path-regex", REGEX). Fails the test when
    schemathesis is missing or finds a problem; returns its output for further checks.
    """
    import shutil

    executable = shutil.which("schemathesis") or shutil.which("st")
    if executable is None:
        pytest.fail("schemathesis is not installed; install the test extra (pip install -e '.[test]')")
    checks = "not_a_server_error,status_code_conformance,content_type_conformance,response_schema_conformance"
    result = subprocess.run(
        [
            executable, "run", f"{base_url}/openapi.json",
            "--checks", checks,
            "--max-examples", "5",
            *path_option,
            "--seed", str(seed),
            "--phases", "examples,coverage,fuzzing",
            "--workers", "1",
            "--request-timeout", str(request_timeout_s),
            "--generation-database", "none",
            "--suppress-health-check", "all",
            "--no-color",
        ],
        capture_output=True, text=True, timeout=240, cwd=cwd,
    )  # fmt: skip
    output = result.stdout + result.stderr
    assert result.returncode == 0, output[-6000:]
    return output
