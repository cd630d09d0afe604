"""Session fixtures that start real servers on 127.0.0.1: a dask scheduler with two workers, and moto's S3.

The processes are the tools' own commands (``dask scheduler``, ``dask worker``, ``moto_server``) started as
subprocesses, each in its own process group so that a test can stop one worker outright (SIGKILL to its
nanny and worker process together) and teardown can stop everything, also when a test failed. Should pytest
itself die, the children get SIGKILL from the kernel (PR_SET_PDEATHSIG) and workers give up on a vanished
scheduler after ``--death-timeout``.

Import the fixtures into a test module: ``from tests._support_cluster import dask_cluster  # noqa: F401``.
Helpers used as dask tasks live here too; the scheduler and workers get the repository on PYTHONPATH so that
they import them (and ``service``) the way the test process does.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import secrets
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
DASK_CONFIG = REPO / "docker" / "dask.yaml"
HOST = "127.0.0.1"
START_TIMEOUT_S = 60.0
_PR_SET_PDEATHSIG = 1


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind((HOST, 0))
        return int(sock.getsockname()[1])


def _die_with_parent() -> None:
    """In the child before exec: new process group, and SIGKILL when the pytest process goes away."""
    os.setsid()
    with contextlib.suppress(OSError, AttributeError):
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(_PR_SET_PDEATHSIG, signal.SIGKILL)


def _spawn(argv: list[str], log_path: Path, cwd: Path) -> subprocess.Popen[bytes]:
    """Start a server command in its own process group, its output to a log file."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(REPO), env.get("PYTHONPATH", "")) if p)
    env["DASK_CONFIG"] = str(DASK_CONFIG)  # the scheduler's and workers' settings of the container image
    log = open(log_path, "ab")  # noqa: SIM115 - the child holds its own descriptor
    try:
        return subprocess.Popen(
            argv,
            stdout=log,
            stderr=subprocess.STDOUT,
            cwd=cwd,
            env=env,
            preexec_fn=_die_with_parent,
            close_fds=True,
        )
    finally:
        log.close()


def _stop_group(process: subprocess.Popen[bytes], grace_s: float = 5.0) -> None:
    """SIGTERM the process group, SIGKILL what is left after ``grace_s``; never raises."""
    if process.poll() is not None:
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.killpg(process.pid, signal.SIGKILL)  # children the leader left behind
        return
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, signal.SIGTERM)
    try:
        process.wait(timeout=grace_s)
    except subprocess.TimeoutExpired:
        pass
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, signal.SIGKILL)
    with contextlib.suppress(subprocess.TimeoutExpired):
        process.wait(timeout=grace_s)


def _wait_for_port(port: int, process: subprocess.Popen[bytes], log_path: Path) -> None:
    """Block until something accepts TCP connections on ``port``; fail with the log if the process exits."""
    deadline = time.monotonic() + START_TIMEOUT_S
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(
                f"{process.args!r} exited with {process.returncode}:\n{log_path.read_text()[-4000:]}"
            )
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
            sock.settimeout(0.5)
            if sock.connect_ex((HOST, port)) == 0:
                return
        time.sleep(0.1)
    raise RuntimeError(f"{process.args!r} did not listen on port {port} within {START_TIMEOUT_S:g} s")


# --- dask ---------------------------------------------------------------------------------------------------


@dataclass
class DaskProcesses:
    """One ``dask scheduler`` and named ``dask worker`` processes (one process, one thread each)."""

    root: Path
    port: int = field(default_factory=free_port)
    scheduler: subprocess.Popen[bytes] | None = None
    workers: dict[str, subprocess.Popen[bytes]] = field(default_factory=dict)

    @property
    def address(self) -> str:
        """The scheduler's address, as WXSHOCK_SCHEDULER would name it."""
        return f"tcp://{HOST}:{self.port}"

    def start_scheduler(self) -> None:
        """Start the scheduler and wait until it listens."""
        log_path = self.root / "scheduler.log"
        argv = [_dask(), "scheduler", "--host", HOST, "--port", str(self.port), "--no-dashboard"]
        self.scheduler = _spawn(argv, log_path, self.root)
        _wait_for_port(self.port, self.scheduler, log_path)

    def start_worker(self, name: str) -> None:
        """Start one worker (under its nanny) named ``name``; use wait_for_workers to see it join."""
        local_dir = self.root / f"{name}-space"
        local_dir.mkdir(exist_ok=True)
        argv = [
            _dask(), "worker", self.address, "--host", HOST, "--nworkers", "1", "--nthreads", "1",
            "--name", name, "--local-directory", str(local_dir), "--no-dashboard", "--death-timeout", "60",
            "--memory-limit", "4GiB", "--preload", "service.aggregate",
        ]  # fmt: skip
        self.workers[name] = _spawn(argv, self.root / f"{name}.log", self.root)

    def stop_worker(self, name: str) -> None:
        """Stop a worker outright: SIGKILL to its nanny and its worker process, no goodbye to the scheduler."""
        process = self.workers.pop(name)
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signal.SIGKILL)
        process.wait(timeout=10)

    def ensure_workers(self, names: tuple[str, ...] = ("worker-a", "worker-b")) -> None:
        """Start any of the named workers that is not running, and wait until all have joined."""
        for name in names:
            process = self.workers.get(name)
            if process is None or process.poll() is not None:
                self.start_worker(name)
        self.wait_for_workers(len(names))

    def wait_for_workers(self, count: int) -> None:
        """Block until exactly ``count`` workers are connected to the scheduler."""
        from distributed import Client

        deadline = time.monotonic() + START_TIMEOUT_S
        with Client(self.address, timeout=START_TIMEOUT_S, set_as_default=False) as client:
            while time.monotonic() < deadline:
                if len(client.scheduler_info(n_workers=-1)["workers"]) == count:
                    return
                time.sleep(0.2)
        raise RuntimeError(
            f"{count} workers did not join {self.address} within {START_TIMEOUT_S:g} s:\n{self.logs()}"
        )

    def logs(self) -> str:
        """Everything the scheduler and the workers wrote (for failure messages and secret checks)."""
        return "\n".join(
            f"== {p.name}\n{p.read_text(errors='replace')}" for p in sorted(self.root.glob("*.log"))
        )

    def stop_all(self) -> None:
        """Stop every worker, then the scheduler."""
        for process in self.workers.values():
            _stop_group(process)
        self.workers.clear()
        if self.scheduler is not None:
            _stop_group(self.scheduler)
            self.scheduler = None


def _dask() -> str:
    """The ``dask`` command of the running interpreter's environment."""
    candidate = Path(sys.executable).with_name("dask")
    return str(candidate) if candidate.exists() else "dask"


# A fixture function imported into two test modules is two fixtures to pytest, each with its own session
# instance; these keep one running server per kind and stop it when the last of its fixtures is torn down.
_SHARED: dict[str, list[Any]] = {}


@contextlib.contextmanager
def _shared(kind: str, start: Callable[[], tuple[Any, Callable[[], None]]]) -> Iterator[Any]:
    """The running server of ``kind`` (started by ``start`` -> (server, stop) on first use), reference-counted."""
    entry = _SHARED.get(kind)
    if entry is None:
        server, stop = start()
        entry = _SHARED[kind] = [server, 0, stop]
    entry[1] += 1
    try:
        yield entry[0]
    finally:
        entry[1] -= 1
        if entry[1] == 0:
            del _SHARED[kind]
            entry[2]()


def _start_dask(root: Path) -> tuple[DaskProcesses, Callable[[], None]]:
    """Start the scheduler and two workers; stop whatever started when that fails."""
    from service import cluster

    processes = DaskProcesses(root=root)

    def stop() -> None:
        cluster.close_clients()
        processes.stop_all()

    try:
        processes.start_scheduler()
        processes.ensure_workers()
    except BaseException:
        stop()
        raise
    return processes, stop


@pytest.fixture(scope="session")
def dask_cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[DaskProcesses]:
    """A real dask scheduler with two single-threaded workers on 127.0.0.1, stopped at the end."""
    with _shared("dask", lambda: _start_dask(tmp_path_factory.mktemp("dask-cluster"))) as processes:
        yield processes


# --- S3 (moto) --------------------------------------------------------------------------------------------------


@dataclass
class S3Server:
    """A moto S3 server on 127.0.0.1 with credentials of this test session's own."""

    endpoint_url: str
    access_key_id: str
    secret_access_key: str
    region: str
    bucket: str
    process: subprocess.Popen[bytes]
    log_path: Path

    def storage_options(self) -> dict[str, object]:
        """fsspec/s3fs options that reach this server."""
        return {
            "key": self.access_key_id,
            "secret": self.secret_access_key,
            "client_kwargs": {"endpoint_url": self.endpoint_url, "region_name": self.region},
        }

    def settings_env(self) -> dict[str, str]:
        """The WXSHOCK_S3_* settings that point the service at this server."""
        return {
            "s3_endpoint_url": self.endpoint_url,
            "s3_access_key_id": self.access_key_id,
            "s3_secret_access_key": self.secret_access_key,
            "s3_region": self.region,
        }


def _start_moto(root: Path) -> tuple[S3Server, Callable[[], None]]:
    """Start moto's S3 server on a free port and create the bucket; stop it when that fails."""
    port = free_port()
    log_path = root / "moto.log"
    moto = Path(sys.executable).with_name("moto_server")
    argv = [str(moto), "-H", HOST, "-p", str(port)] if moto.exists() else [
        sys.executable, "-m", "moto.server", "-H", HOST, "-p", str(port),
    ]  # fmt: skip
    process = _spawn(argv, log_path, root)
    try:
        _wait_for_port(port, process, log_path)
        server = S3Server(
            endpoint_url=f"http://{HOST}:{port}",
            access_key_id="wxshock-test-" + secrets.token_hex(4),
            secret_access_key="wxs-secret-" + secrets.token_hex(16),
            region="us-east-1",
            bucket="wxshock-stores",
            process=process,
            log_path=log_path,
        )
        # us-east-1 takes no location constraint, which s3fs's mkdir would send; boto3 comes with moto.
        import boto3

        boto3.client(
            "s3",
            endpoint_url=server.endpoint_url,
            aws_access_key_id=server.access_key_id,
            aws_secret_access_key=server.secret_access_key,
            region_name=server.region,
        ).create_bucket(Bucket=server.bucket)
    except BaseException:
        _stop_group(process)
        raise
    return server, lambda: _stop_group(process)


@pytest.fixture(scope="session")
def s3_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[S3Server]:
    """moto's S3 server mode on a free port with one empty bucket, stopped at the end."""
    with _shared("moto", lambda: _start_moto(tmp_path_factory.mktemp("moto"))) as server:
        yield server


# --- task functions (the workers import them from here) ----------------------------------------------------------


def slow_block(block: np.ndarray, seconds: float) -> np.ndarray:
    """Sleep, then a deterministic float transform of the block (a stand-in for a chunk read)."""
    time.sleep(seconds)
    return np.sin(block) * 3.0 + np.sqrt(np.abs(block))


def process_id_block(block: np.ndarray) -> np.ndarray:
    """The id of the process that ran this task, in a (1, 1) block."""
    return np.full((1, 1), os.getpid(), dtype=np.int64)


def thread_id_block(block: np.ndarray) -> np.ndarray:
    """The id of the thread that ran this task, in a (1, 1) block."""
    import threading

    return np.full((1, 1), threading.get_ident(), dtype=np.int64)


def exit_worker_block(block: np.ndarray) -> np.ndarray:
    """Take the worker process down, as a task that exhausts its memory would (not for dask's empty meta)."""
    if block.size:
        os._exit(13)
    return block
