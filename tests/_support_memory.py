"""A `wxshock serve` subprocess under its own memory cap, and what it used.

The cap is a cgroup made for the one process: cgroup v2 ``memory.max`` where the unified hierarchy offers the
memory controller, else a cgroup v1 memory group (``memory.limit_in_bytes``), else RLIMIT_DATA (heap and
private mappings). ``CappedServer.report()`` gives the cap's kind, the server's peak RSS (VmHWM), the group's
peak (page cache included) and whether the kernel killed anything for memory.

    server = start_capped(stores=[path], data_dir=tmp, cap_bytes=3 << 30)
    ...; server.stop(); print(server.report())
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tests import _support_server as server_support

CGROUP_ROOT = Path("/sys/fs/cgroup")


def _own_cgroup_v1_memory() -> Path | None:
    """This process's cgroup v1 memory directory, when it exists and takes children."""
    try:
        for line in Path("/proc/self/cgroup").read_text().splitlines():
            _, controllers, path = line.split(":", 2)
            if "memory" in controllers.split(","):
                directory = CGROUP_ROOT / "memory" / path.lstrip("/")
                return directory if (directory / "memory.limit_in_bytes").exists() else None
    except OSError:
        return None
    return None


def _own_cgroup_v2() -> Path | None:
    """This process's cgroup v2 directory, when its hierarchy offers the memory controller to children."""
    for base in (CGROUP_ROOT, CGROUP_ROOT / "unified"):
        try:
            if "memory" not in (base / "cgroup.controllers").read_text().split():
                continue
            line = next(x for x in Path("/proc/self/cgroup").read_text().splitlines() if x.startswith("0::"))
        except (OSError, StopIteration):
            continue
        directory = base / line[3:].lstrip("/")
        if "memory" in (directory / "cgroup.subtree_control").read_text().split():
            return directory
    return None


@dataclass
class MemoryCap:
    """A memory cap for one process: where it is (a cgroup directory) and how it was made."""

    kind: str  # "cgroup v2", "cgroup v1" or "RLIMIT_DATA"
    cap_bytes: int
    directory: Path | None = None

    @classmethod
    def make(cls, cap_bytes: int) -> MemoryCap:
        """A fresh cgroup with the cap (v2, else v1), else an rlimit to set in the child."""
        name = f"wxshock-{uuid.uuid4().hex[:8]}"
        v2 = _own_cgroup_v2()
        if v2 is not None:
            try:
                directory = v2 / name
                directory.mkdir()
                (directory / "memory.max").write_text(str(cap_bytes))
                (directory / "memory.swap.max").write_text("0")
                return cls("cgroup v2", cap_bytes, directory)
            except OSError:
                pass
        v1 = _own_cgroup_v1_memory()
        if v1 is not None:
            try:
                directory = v1 / name
                directory.mkdir()
                (directory / "memory.limit_in_bytes").write_text(str(cap_bytes))
                return cls("cgroup v1", cap_bytes, directory)
            except OSError:
                pass
        return cls("RLIMIT_DATA", cap_bytes)

    def enter(self) -> None:
        """Put the calling process (a child between fork and exec) under the cap."""
        if self.directory is not None:
            (self.directory / "cgroup.procs").write_text(str(os.getpid()))
        else:
            resource.setrlimit(resource.RLIMIT_DATA, (self.cap_bytes, self.cap_bytes))

    def peak_bytes(self) -> int | None:
        """The group's peak memory (RSS and page cache), where the kernel tells."""
        for name in ("memory.peak", "memory.max_usage_in_bytes"):
            path = self.directory / name if self.directory else None
            if path is not None and path.exists():
                return int(path.read_text().split()[0])
        return None

    def oom_kills(self) -> int | None:
        """How many processes the kernel killed in the group for want of memory."""
        if self.directory is None:
            return None
        for name in ("memory.events", "memory.oom_control"):
            path = self.directory / name
            if path.exists():
                for line in path.read_text().splitlines():
                    key, _, value = line.partition(" ")
                    if key == "oom_kill":
                        return int(value)
        return None

    def remove(self) -> None:
        """Remove the group (once its process has ended)."""
        if self.directory is not None:
            try:
                self.directory.rmdir()
            except OSError:
                pass


def peak_rss_bytes(pid: int) -> int | None:
    """A process's peak resident set size (VmHWM), while it runs."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


def rss_bytes(pid: int) -> int | None:
    """A process's resident set size now (VmRSS)."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    except OSError:
        return None
    return None


@dataclass
class CappedServer:
    """A live `wxshock serve` subprocess under a MemoryCap."""

    server: server_support.LiveServer
    cap: MemoryCap
    peak_rss: int = 0
    samples: list[int] = field(default_factory=list)

    @property
    def pid(self) -> int:
        """The server's process id."""
        assert self.server.process is not None
        return self.server.process.pid

    def sample(self) -> int | None:
        """Record the server's peak RSS so far (call now and then; it is lost once the process ends)."""
        peak = peak_rss_bytes(self.pid)
        if peak is not None:
            self.peak_rss = max(self.peak_rss, peak)
        now = rss_bytes(self.pid)
        if now is not None:
            self.samples.append(now)
        return peak

    def stop(self) -> None:
        """Stop the server (after a last sample) and remove its group."""
        self.sample()
        self.server.stop()
        self.cap.remove()

    def report(self) -> dict[str, Any]:
        """The cap, the peak RSS, the group's peak and the kills for memory."""
        return {
            "cap": self.cap.kind,
            "cap_bytes": self.cap.cap_bytes,
            "peak_rss_bytes": self.peak_rss,
            "group_peak_bytes": self.cap.peak_bytes(),
            "oom_kills": self.cap.oom_kills(),
            "alive": self.server.process is not None and self.server.process.poll() is None,
        }


def start_capped(
    *,
    stores: list[Path | str],
    data_dir: Path,
    cap_bytes: int,
    env: dict[str, str] | None = None,
    timeout: float = 300.0,
    cwd: Path | None = None,
) -> CappedServer:
    """Start `wxshock serve` on 127.0.0.1 under a memory cap of ``cap_bytes`` and wait until it is ready.

    ``cwd`` is the server's working directory: `python -m` puts it first on the import path, so give the
    checkout whose code should run (by default this one's, as the tests' own).
    """
    cap = MemoryCap.make(cap_bytes)
    port = server_support.free_port()
    data_dir.mkdir(parents=True, exist_ok=True)
    args = [sys.executable, "-m", "service.cli", "serve", "--host", server_support.HOST, "--port", str(port)]
    args += ["--data-dir", str(data_dir)]
    for store in stores:
        args += ["--store", str(store)]
    environment = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_")}
    environment.update(env or {})
    log_path = data_dir / f"server-{port}.log"
    with open(log_path, "ab") as log:
        process = subprocess.Popen(
            args, stdout=log, stderr=subprocess.STDOUT, env=environment, preexec_fn=cap.enter, cwd=cwd
        )
    live = server_support.LiveServer(
        f"http://{server_support.HOST}:{port}", data_dir, process=process, log_path=log_path
    )
    try:
        server_support.wait_until_ready(live, timeout)
    except BaseException:
        cap.remove()
        raise
    return CappedServer(live, cap)
