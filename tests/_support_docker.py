"""A Docker engine of the tests' own, a Debian base image made with debootstrap, and the wxshock image built on it.

The registry's base images cannot be pulled here, so the base is made locally: debootstrap lays out Debian
bookworm with python3 and python3-venv (once per machine: the tree is kept as a tar file in the cache), and
``docker import`` turns it into an image that carries this machine's CA bundle, so that pip inside a build
reaches the package index as the host's pip does. The image is then built from docker/Dockerfile with
``--build-arg BASE=`` that base, the host's installed versions as pins, and the wheels from the tests'
wheelhouse (tests/_support_packaging.py), served on the loopback: the host's pip fetches each wheel once per
machine, and a rebuild of the dependency layer costs the install only.

The engine is Debian's ``dockerd`` (package docker.io), started by the session fixture on a socket and state
directories of its own, with no default bridge and no iptables rules: builds use the host's network, and
containers talk over networks the tests create (published ports go through docker-proxy on 127.0.0.1). Its
image store is kept in the cache between runs, so the base image and the dependency layer of the image are
reused; a second test session that finds the cache in use gets a fresh store of its own. At the end every
container, network and volume is removed and the engine is stopped.

Usage::

    from tests._support_docker import docker_engine, wxshock_image   # session fixtures by import
"""

from __future__ import annotations

import contextlib
import fcntl
import functools
import hashlib
import http.server
import json
import os
import re
import shutil
import signal
import subprocess
import tarfile
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import pytest

from service import __version__
from tests._support_packaging import CACHE, REPO, clean_env, fill_wheelhouse, host_pins, requirements
from tests._support_tools import apt_install

DOCKERD = "/usr/sbin/dockerd"
DOCKER = "/usr/bin/docker"  # Debian's client, the same release as its engine (a newer client may lie on PATH)
COMPOSE = "/usr/bin/docker-compose"  # Debian's docker-compose 1.29
PACKAGES = ("docker.io", "docker-compose", "debootstrap")
# A loopback address of the tests' own for the wheelhouse server (see serve_wheelhouse).
WHEELHOUSE_ADDRESS = ("127.14.0.14", 8014)
BASE_TAG = "wxshock-test-base:bookworm"
BASE_TAR = "bookworm-python3.tar"
CA_LABEL = "org.wxshock.ca-sha256"
HOST_CA = Path("/etc/ssl/certs/ca-certificates.crt")
IMAGE_TAG = f"wxshock:{__version__}"  # the name docker/compose.yaml runs
DEFAULT_MIRROR = "http://deb.debian.org/debian"
# Seconds each slow step took in this session (debootstrap, import, build, compose): printed in the summary.
TIMINGS: dict[str, float] = {}


@dataclass
class Engine:
    """A running dockerd of the tests: its client environment, log, and how long each step took."""

    env: dict[str, str]
    run_dir: Path
    data_root: Path
    log: Path
    process: subprocess.Popen[bytes] | None = None
    timings: dict[str, float] = field(default_factory=lambda: TIMINGS)

    def docker(
        self, *args: str, timeout: float = 120, check: bool = True
    ) -> subprocess.CompletedProcess[str]:
        """Run the docker client against this engine; on failure raise with its output."""
        done = subprocess.run(
            [DOCKER, *args],
            env=self.env,
            capture_output=True,
            text=True,
            timeout=timeout,
        )
        if check and done.returncode != 0:
            raise RuntimeError(
                f"docker {' '.join(args[:3])} ... failed ({done.returncode}):\n{done.stderr[-4000:]}"
            )
        return done

    def compose(
        self,
        project: str,
        *args: str,
        env: dict[str, str] | None = None,
        timeout: float = 300,
        check: bool = True,
    ) -> subprocess.CompletedProcess[str]:
        """Run Debian's docker-compose on docker/compose.yaml (the users' file) as project ``project``."""
        done = subprocess.run(
            [COMPOSE, "--no-ansi", "-p", project, "-f", str(REPO / "docker" / "compose.yaml"), *args],
            env={**self.env, **(env or {})},
            capture_output=True,
            text=True,
            timeout=timeout,
        )
        if check and done.returncode != 0:
            raise RuntimeError(
                f"docker-compose {' '.join(args[:2])} failed ({done.returncode}):\n{done.stderr[-4000:]}"
            )
        return done

    def inspect(self, kind: str, name: str) -> dict:
        """``docker <kind> inspect`` as a dict."""
        return json.loads(self.docker(kind, "inspect", name).stdout)[0]

    def log_tail(self, lines: int = 30) -> str:
        """The last lines of dockerd's log."""
        if not self.log.exists():
            return ""
        return "\n".join(self.log.read_text(errors="replace").splitlines()[-lines:])


def _tools_missing() -> list[str]:
    """The engine, compose and debootstrap programs not installed yet."""
    programs = (DOCKERD, DOCKER, COMPOSE, "/usr/sbin/debootstrap")
    return [p for p in programs if not Path(p).exists()]


def _stop_leftover_engine(data_root: Path) -> None:
    """Stop a dockerd that an earlier, killed test session started on this data root (its pid is recorded)."""
    record = data_root.parent / "engine.pid"
    try:
        pid = int(record.read_text())
        cmdline = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except (OSError, ValueError):
        return
    if "dockerd" in cmdline and str(data_root) in cmdline:
        os.kill(pid, signal.SIGTERM)
        for _ in range(300):
            if not Path(f"/proc/{pid}").exists():
                break
            time.sleep(0.1)


def _processes_under(path: Path) -> list[int]:
    """Pids whose command line names ``path`` (dockerd's containerd and shims live under its run directory)."""
    found = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                if str(path) in (entry / "cmdline").read_bytes().replace(b"\0", b" ").decode(
                    errors="replace"
                ):
                    found.append(int(entry.name))
            except OSError:
                continue
    return [pid for pid in found if pid != os.getpid()]


def _unmount_under(*paths: Path) -> None:
    """Lazily unmount whatever an engine left mounted below ``paths`` (deepest first)."""
    mounts = [line.split()[1] for line in Path("/proc/mounts").read_text().splitlines()]
    for mount in sorted(mounts, key=len, reverse=True):
        if any(mount.startswith(str(p) + "/") or mount == str(p) for p in paths):
            subprocess.run(["umount", "-l", mount], capture_output=True, timeout=30)


def start_engine(data_root: Path, run_dir: Path) -> Engine:
    """Start dockerd on its own socket, state and data directories; wait until it answers."""
    run_dir.mkdir(parents=True, exist_ok=True)
    data_root.mkdir(parents=True, exist_ok=True)
    socket = run_dir / "docker.sock"
    log = run_dir / "dockerd.log"
    config = run_dir / "client-config"  # the client's own config: no credential helpers, no user settings
    config.mkdir()
    env = clean_env(
        DOCKER_HOST=f"unix://{socket}",
        DOCKER_BUILDKIT="1",
        DOCKER_CONFIG=str(config),
        PATH="/usr/sbin:/usr/bin:/sbin:/bin",
    )
    args = [
        DOCKERD,
        f"--data-root={data_root}",
        f"--exec-root={run_dir / 'exec'}",
        f"--pidfile={run_dir / 'docker.pid'}",
        f"--host=unix://{socket}",
        "--bridge=none",  # no default bridge: containers join networks the tests create
        "--iptables=false",  # no rules in the host's tables; docker-proxy publishes ports on 127.0.0.1
        "--log-level=warn",
    ]
    with open(log, "ab") as out:
        process = subprocess.Popen(
            args, stdout=out, stderr=subprocess.STDOUT, env=env, start_new_session=True
        )
    (data_root.parent / "engine.pid").write_text(str(process.pid))
    engine = Engine(env=env, run_dir=run_dir, data_root=data_root, log=log, process=process)
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"dockerd exited with {process.returncode}:\n{engine.log_tail()}")
        if (
            engine.docker("version", "--format", "{{.Server.Version}}", check=False, timeout=20).returncode
            == 0
        ):
            return engine
        time.sleep(0.5)
    stop_engine(engine)
    raise RuntimeError(f"dockerd did not answer within 90 s:\n{engine.log_tail()}")


def stop_engine(engine: Engine) -> list[str]:
    """Remove every container, network and volume, stop dockerd and its helpers; return what was still left."""
    leftovers: list[str] = []
    process = engine.process
    if process is not None and process.poll() is None:
        ids = engine.docker("ps", "-aq", check=False).stdout.split()
        if ids:
            engine.docker("rm", "-f", "-v", *ids, check=False, timeout=120)
        engine.docker("network", "prune", "-f", check=False)
        engine.docker("volume", "prune", "-f", check=False)
        engine.docker("image", "prune", "-f", check=False)  # images the tag moved away from
        if engine.docker("ps", "-aq", check=False).stdout.split():
            leftovers.append("containers")
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(60)
        except subprocess.TimeoutExpired:
            leftovers.append("dockerd did not stop on SIGTERM")
            process.kill()
            process.wait(30)
    for pid in _processes_under(engine.run_dir):
        leftovers.append(f"process {pid}")
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    _unmount_under(engine.run_dir, engine.data_root)
    shutil.rmtree(engine.run_dir, ignore_errors=True)
    return leftovers


def _mirror() -> str:
    """The Debian mirror this machine's apt uses (its sources), else deb.debian.org."""
    sources = [Path("/etc/apt/sources.list"), *sorted(Path("/etc/apt/sources.list.d").glob("*"))]
    for source in sources:
        try:
            text = source.read_text()
        except OSError:
            continue
        for block in re.split(r"\n\s*\n", text):  # deb822 stanzas, or one-line entries
            uris = re.search(r"^URIs:\s*(\S+)", block, re.M)
            if uris and re.search(r"^Suites:.*\bbookworm\b", block, re.M) and "security" not in uris.group(1):
                return uris.group(1)
            for line in block.splitlines():
                match = re.match(r"deb\s+(?:\[[^]]*\]\s+)?(\S+)\s+bookworm\s", line)
                if match and "security" not in match.group(1):
                    return match.group(1)
    return DEFAULT_MIRROR


def debootstrap_tar(cache: Path) -> Path:
    """Debian bookworm (minbase) with python3 and python3-venv as a tar file, made once and kept in ``cache``."""
    tar_path = cache / BASE_TAR
    if tar_path.is_file():
        return tar_path
    root = Path(tempfile.mkdtemp(prefix="bookworm-", dir=cache))
    try:
        subprocess.run(
            ["debootstrap", "--variant=minbase", "--include=python3-venv", "bookworm", str(root), _mirror()],
            check=True,
            capture_output=True,
            timeout=1200,
        )
        partial = tar_path.with_suffix(".part")
        subprocess.run(
            ["tar", "-C", str(root), "--exclude=./var/cache/apt/archives/*.deb",
             "--exclude=./var/lib/apt/lists/*_Packages", "-cf", str(partial), "."],
            check=True, capture_output=True, timeout=600,
        )  # fmt: skip
        partial.rename(tar_path)
    except subprocess.CalledProcessError as exc:
        raise RuntimeError(
            f"{exc.cmd[0]} failed:\n{(exc.stderr or b'').decode(errors='replace')[-3000:]}"
        ) from None
    finally:
        _unmount_under(root)  # debootstrap mounts proc and sys inside the tree
        shutil.rmtree(root, ignore_errors=True)
    return tar_path


def base_image(engine: Engine) -> str:
    """The local base image (debootstrap's tree with this machine's CA bundle), imported when missing or stale."""
    ca_hash = hashlib.sha256(HOST_CA.read_bytes()).hexdigest()
    label = engine.docker(
        "image", "inspect", "--format", f'{{{{ index .Config.Labels "{CA_LABEL}" }}}}', BASE_TAG, check=False
    )
    if label.returncode == 0 and label.stdout.strip() == ca_hash:
        return BASE_TAG
    started = time.monotonic()
    tar_path = debootstrap_tar(CACHE)
    engine.timings["debootstrap_s"] = time.monotonic() - started
    started = time.monotonic()
    changes = [
        "ENV PATH=/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin",
        "ENV LANG=C.UTF-8",
        f"ENV PIP_CERT={HOST_CA}",  # pip (its own certifi otherwise) and Python's ssl trust the host's bundle
        f"ENV SSL_CERT_FILE={HOST_CA}",
        f"LABEL {CA_LABEL}={ca_hash}",
    ]
    command = [DOCKER, "import", *(a for c in changes for a in ("--change", c)), "-", BASE_TAG]
    with subprocess.Popen(
        command, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=engine.env
    ) as importer:
        assert importer.stdin is not None
        ca_member = "etc/ssl/certs/ca-certificates.crt"
        with tarfile.open(tar_path) as source, tarfile.open(fileobj=importer.stdin, mode="w|") as target:
            for member in source:
                if member.name.lstrip("./") == ca_member:
                    continue
                target.addfile(member, source.extractfile(member) if member.isreg() else None)
            info = target.gettarinfo(str(HOST_CA), arcname=f"./{ca_member}")
            info.uid = info.gid = 0
            info.uname = info.gname = "root"
            info.mode = 0o644
            with open(HOST_CA, "rb") as bundle:
                target.addfile(info, bundle)
        importer.stdin.close()
        assert importer.stdout is not None and importer.stderr is not None
        importer.stdout.read()  # the new image's id
        error = importer.stderr.read()
        importer.wait(600)
    if importer.returncode != 0:
        raise RuntimeError(f"docker import failed: {error.decode(errors='replace')[-2000:]}")
    engine.timings["import_s"] = time.monotonic() - started
    return BASE_TAG


@contextlib.contextmanager
def serve_wheelhouse(directory: Path) -> Iterator[str]:
    """The wheelhouse as a find-links page over HTTP on the loopback, for pip inside the build.

    The address stays the same from run to run (a loopback address of its own), because the URL is a build
    argument of the dependency layer: a new port each time would rebuild that layer every time.
    """
    handler = functools.partial(_QuietFiles, directory=str(directory))
    try:
        server = http.server.ThreadingHTTPServer(WHEELHOUSE_ADDRESS, handler)
    except OSError:  # taken (another session builds right now): any free port, at the cost of the layer cache
        server = http.server.ThreadingHTTPServer((WHEELHOUSE_ADDRESS[0], 0), handler)
    thread = threading.Thread(target=server.serve_forever, name="wheelhouse", daemon=True)
    thread.start()
    try:
        host, port = server.server_address[:2]
        yield f"http://{host}:{port}/"
    finally:
        server.shutdown()
        server.server_close()
        thread.join(10)


class _QuietFiles(http.server.SimpleHTTPRequestHandler):
    """Static files without a log line per request."""

    def log_message(self, format: str, *args: object) -> None:  # noqa: A002 - the base class's name
        """Say nothing."""


def build_image(engine: Engine, base: str, tag: str = IMAGE_TAG) -> str:
    """docker/Dockerfile built from the repository on ``base``, pinned to the host's versions.

    pip inside the build takes every wheel from the tests' wheelhouse (filled from the package index once per
    machine), not from the index: a rebuild of the dependency layer then costs the install, not the download.
    """
    pins = host_pins()
    started = time.monotonic()
    wheels = fill_wheelhouse(requirements(build=True), pins)
    engine.timings["wheelhouse_s"] = time.monotonic() - started
    started = time.monotonic()
    log = CACHE / "last-build.log"  # written as the build goes: which steps ran, which came from the cache
    with serve_wheelhouse(wheels) as url, open(log, "w") as out:
        done = subprocess.run(
            [DOCKER, "build", "--progress=plain", "--network", "host", "--file", str(REPO / "docker" / "Dockerfile"),
             "--build-arg", f"BASE={base}", "--build-arg", "CONSTRAINTS=" + " ".join(pins),
             "--build-arg", "PIP_NO_INDEX=1", "--build-arg", f"PIP_FIND_LINKS={url}",
             "--tag", tag, str(REPO)],
            env=engine.env, stdout=out, stderr=subprocess.STDOUT, timeout=1500,
        )  # fmt: skip
    if done.returncode != 0:
        tail = "\n".join(log.read_text(errors="replace").splitlines()[-60:])
        raise RuntimeError(f"docker build failed ({done.returncode}); the end of {log}:\n{tail}")
    engine.timings["build_s"] = time.monotonic() - started
    return tag


@pytest.fixture(scope="session")
def docker_engine(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Engine]:
    """The tests' own dockerd (Debian's docker.io, installed when missing), stopped with all it ran at the end."""
    if _tools_missing():
        reason = apt_install(PACKAGES)
        if reason is not None or _tools_missing():
            pytest.skip(
                f"Docker engine, docker-compose and debootstrap cannot be installed: {reason or _tools_missing()}"
            )
    CACHE.mkdir(parents=True, exist_ok=True)
    lock = open(CACHE / "engine.lock", "w")  # noqa: SIM115 - held for the whole session
    try:
        fcntl.flock(lock, fcntl.LOCK_EX | fcntl.LOCK_NB)
        data_root = CACHE / "engine"  # kept: base image and dependency layers are reused by the next run
        _stop_leftover_engine(data_root)
    except BlockingIOError:  # another test session holds the cached engine: a store of this session's own
        data_root = tmp_path_factory.mktemp("engine") / "data"
    # A short path: unix socket names are limited to about 100 characters.
    run_dir = Path(tempfile.mkdtemp(prefix="wxd-", dir="/tmp"))
    engine = start_engine(data_root, run_dir)
    try:
        yield engine
    finally:
        leftovers = stop_engine(engine)
        if not data_root.is_relative_to(CACHE):
            shutil.rmtree(data_root, ignore_errors=True)
        (CACHE / "timings.json").write_text(json.dumps(engine.timings, indent=1))
        lock.close()
        assert not leftovers, f"the engine left {leftovers} behind"


@pytest.fixture(scope="session")
def wxshock_image(docker_engine: Engine) -> str:
    """The wxshock image of this source tree, built once per session on the local Debian base."""
    return build_image(docker_engine, base_image(docker_engine))


def wait_http(url: str, timeout: float, *, what: str, logs: Callable[[], str] = str) -> httpx.Response:
    """GET ``url`` until it answers 200; fail naming ``what``, with ``logs()``, when the time runs out."""
    deadline = time.monotonic() + timeout
    last = "no answer"
    while time.monotonic() < deadline:
        try:
            response = httpx.get(url, timeout=5)
            if response.status_code == 200:
                return response
            last = f"{response.status_code} {response.text[:200]}"
        except httpx.HTTPError as exc:
            last = repr(exc)
        time.sleep(0.5)
    raise AssertionError(f"{what} did not answer 200 at {url} within {timeout} s ({last})\n{logs()}")
