"""docker/Dockerfile and docker/compose.yaml: read as files, then built and run for real in a Docker engine.

Without an engine: both files parse; every wxshock command they run parses with the CLI's own parser
(service.cli.build_parser) and every dask command with distributed's own command-line definitions; ports,
data directory, scheduler address and health checks agree with service.settings.Settings; the health check's
own command, run against a real server, passes.

With an engine (marked ``container``; tests/_support_docker.py starts Debian's dockerd and stops it): the image
is built once on a local Debian base; the container answers /health, turns healthy and runs as uid 10001; an
on-demand request and a job give what the host gives; the data volume outlives the container; then Debian's
docker-compose runs docker/compose.yaml (API, scheduler, two workers) and a job goes through the cluster.
Cost on 2 cores: about 3 minutes with the engine's cache from an earlier run, up to 8 on a new machine
(debootstrap about 2 minutes, the image's dependencies about 2).
"""

from __future__ import annotations

import ast
import copy
import io
import json
import os
import re
import shlex
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pyarrow.parquet as pq
import pytest
import yaml

from service.cli import build_parser
from service.settings import Settings
from tests._support_docker import Engine, docker_engine, wait_http, wxshock_image  # noqa: F401 - fixtures
from tests._support_server import free_port, live_server  # noqa: F401 - fixture

REPO = Path(__file__).resolve().parents[1]
DOCKERFILE = REPO / "docker" / "Dockerfile"
COMPOSE = REPO / "docker" / "compose.yaml"

# Instructions of the Dockerfile reference (docs.docker.com/reference/dockerfile/).
KNOWN_INSTRUCTIONS = {
    "FROM", "RUN", "CMD", "LABEL", "EXPOSE", "ENV", "ADD", "COPY", "ENTRYPOINT", "VOLUME", "USER", "WORKDIR",
    "ARG", "ONBUILD", "STOPSIGNAL", "HEALTHCHECK", "SHELL",
}  # fmt: skip


@dataclass(frozen=True)
class Instruction:
    """One Dockerfile instruction: keyword, leading --flags, and arguments (JSON exec form when given so)."""

    keyword: str
    flags: dict[str, str]
    text: str
    exec_form: list[str] | None
    line: int

    def words(self) -> list[str]:
        """The arguments as a word list: the exec form, else shell words."""
        return self.exec_form if self.exec_form is not None else shlex.split(self.text)


def parse_dockerfile(text: str) -> list[Instruction]:
    """Dockerfile instructions: comments dropped, backslash continuations joined, JSON arrays decoded."""
    instructions: list[Instruction] = []
    pending: list[str] = []
    start = 0
    for number, raw in enumerate(text.splitlines(), start=1):
        stripped = raw.strip()
        if not pending and (not stripped or stripped.startswith("#")):
            continue
        if pending and stripped.startswith("#"):
            continue  # comment lines inside a continuation are removed by the builder
        if not pending:
            start = number
        if stripped.endswith("\\"):
            pending.append(stripped[:-1].strip())
            continue
        pending.append(stripped)
        instructions.append(_instruction(" ".join(p for p in pending if p), start))
        pending = []
    if pending:
        raise ValueError(f"line {start}: the last instruction ends in a continuation backslash")
    return instructions


def _instruction(line: str, number: int) -> Instruction:
    """Split one logical line into keyword, --flags and arguments."""
    keyword, _, rest = line.partition(" ")
    keyword = keyword.upper()
    if keyword not in KNOWN_INSTRUCTIONS:
        raise ValueError(f"line {number}: unknown instruction {keyword!r}")
    flags: dict[str, str] = {}
    rest = rest.strip()
    while rest.startswith("--"):
        flag, _, rest = rest.partition(" ")
        name, _, value = flag[2:].partition("=")
        flags[name] = value
        rest = rest.strip()
    if keyword == "HEALTHCHECK":
        # HEALTHCHECK [flags] CMD <command> | NONE: the command is an instruction of its own kind.
        sub, _, rest = rest.partition(" ")
        if sub.upper() != "CMD":
            raise ValueError(f"line {number}: HEALTHCHECK must be followed by CMD, got {sub!r}")
        rest = rest.strip()
    exec_form = None
    if rest.startswith("["):
        exec_form = json.loads(rest)  # a malformed array would silently become a shell command in Docker
        if not all(isinstance(word, str) for word in exec_form):
            raise ValueError(f"line {number}: exec form must be a JSON array of strings: {rest}")
    return Instruction(keyword, flags, rest, exec_form, number)


# --- the parser itself ----------------------------------------------------------------------------------------


def test_parser_joins_continuations_and_reads_exec_form() -> None:
    text = 'FROM a:b\n# note\nRUN one \\\n    && two\nHEALTHCHECK --interval=5s CMD ["x", "-y"]\nCMD ["p", "q"]\n'
    parsed = parse_dockerfile(text)
    assert [i.keyword for i in parsed] == ["FROM", "RUN", "HEALTHCHECK", "CMD"]
    assert parsed[1].text == "one && two" and parsed[1].line == 3
    assert parsed[2].flags == {"interval": "5s"} and parsed[2].exec_form == ["x", "-y"]
    assert parsed[3].words() == ["p", "q"]


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("FORM python:3.11\n", "unknown instruction 'FORM'"),
        ("FROM a\nRUN x \\\n", "continuation backslash"),
        ('FROM a\nCMD ["a", 1]\n', "JSON array of strings"),
        ("FROM a\nHEALTHCHECK --interval=1s echo\n", "followed by CMD"),
    ],
)
def test_parser_rejects_broken_files(text: str, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        parse_dockerfile(text)


# --- the Dockerfile ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def dockerfile() -> list[Instruction]:
    return parse_dockerfile(DOCKERFILE.read_text(encoding="utf-8"))


def _one(instructions: list[Instruction], keyword: str) -> Instruction:
    found = [i for i in instructions if i.keyword == keyword]
    assert len(found) == 1, f"expected one {keyword}, found {len(found)}"
    return found[0]


def _env(instructions: list[Instruction]) -> dict[str, str]:
    """ENV key=value pairs (the only ENV form the Dockerfile uses)."""
    env: dict[str, str] = {}
    for instruction in instructions:
        if instruction.keyword == "ENV":
            for word in instruction.words():
                key, sep, value = word.partition("=")
                assert sep, f"line {instruction.line}: ENV {word!r} is not key=value"
                env[key] = value
    return env


def test_base_is_an_argument_defaulting_to_a_slim_python(dockerfile: list[Instruction]) -> None:
    stages = [i.words() for i in dockerfile if i.keyword == "FROM"]
    assert stages == [["${BASE}", "AS", "requirements"], ["${BASE}"]]  # the last stage is the image
    first = dockerfile[0]
    assert first.keyword == "ARG"  # an ARG before FROM is what FROM may use
    name, _, base = first.words()[0].partition("=")
    assert name == "BASE"
    assert base.startswith("python:") and base.endswith("-slim")
    version = tuple(int(p) for p in base.removeprefix("python:").removesuffix("-slim").split("."))
    assert version >= (3, 11)  # pyproject: requires-python >= 3.11


def test_runs_as_a_non_root_user_after_installing(dockerfile: list[Instruction]) -> None:
    keywords = [i.keyword for i in dockerfile]
    user = _one(dockerfile, "USER").words()[0]
    assert user not in ("root", "0") and not user.startswith("0:")
    last_run = max(i for i, k in enumerate(keywords) if k == "RUN")
    assert keywords.index("USER") > last_run  # nothing after USER runs as root
    useradd = next(i.text for i in dockerfile if i.keyword == "RUN" and "useradd" in i.text)
    assert f" {user}" in useradd.split("&&")[-1]


def test_installs_the_package_as_a_wheel_into_a_venv(dockerfile: list[Instruction]) -> None:
    copied = [
        Path(w) for i in dockerfile if i.keyword == "COPY" and "from" not in i.flags for w in i.words()[:-1]
    ]
    for source in copied:
        assert (REPO / source).exists(), f"COPY {source}: not in the repository"
    assert {Path("pyproject.toml"), Path("MANIFEST.in"), Path("service")} <= set(copied)
    env = _env(dockerfile)
    venv = env["VIRTUAL_ENV"]
    assert env["PATH"].startswith(f"{venv}/bin:")
    runs = [i.text for i in dockerfile if i.keyword == "RUN"]
    assert any(f"python3 -m venv {venv}" in t for t in runs)
    installs = [t for t in runs if "pip install" in t]
    assert not any(" -e " in t or "--editable" in t for t in installs)  # not run from a source tree
    assert any("rm -rf /tmp/wxshock" in t for t in installs)  # the source is gone from the image
    ignored = (REPO / "docker" / "Dockerfile.dockerignore").read_text(encoding="utf-8").split()
    for source in copied:  # the ignore file lets through everything COPY needs
        assert f"!{source}" in ignored or f"!{source}/" in ignored


def test_data_directory_is_the_volume_and_the_settings_default(dockerfile: list[Instruction]) -> None:
    env = _env(dockerfile)
    volumes = _one(dockerfile, "VOLUME").words()
    assert env["WXSHOCK_DATA_DIR"] in volumes
    settings = Settings(data_dir=env["WXSHOCK_DATA_DIR"], port=int(env["WXSHOCK_PORT"]))
    assert str(settings.data_dir) == env["WXSHOCK_DATA_DIR"]


def test_command_is_wxshock_serve_on_all_interfaces(dockerfile: list[Instruction]) -> None:
    words = _one(dockerfile, "CMD").exec_form
    assert words is not None, "CMD should use the exec form so that wxshock gets the signals"
    assert words[0] == "wxshock"
    args = build_parser().parse_args(words[1:])
    assert args.command == "serve" and args.host == "0.0.0.0"


def test_port_exposed_is_the_one_served_and_checked(dockerfile: list[Instruction]) -> None:
    env = _env(dockerfile)
    exposed = [int(w.split("/")[0]) for w in _one(dockerfile, "EXPOSE").words()]
    default_port = Settings.model_fields["port"].default
    assert exposed == [default_port] and int(env["WXSHOCK_PORT"]) == default_port
    check = _one(dockerfile, "HEALTHCHECK")
    assert {"interval", "timeout", "start-period", "retries"} <= set(check.flags)
    assert check.exec_form is not None and "/health" in check.text and "WXSHOCK_PORT" in check.text


def test_health_check_command_passes_against_a_live_health_route(tmp_path: Path) -> None:
    """Run the HEALTHCHECK command itself against a stand-in /health on a free port: exit 0; 1 when down."""
    check = _one(parse_dockerfile(DOCKERFILE.read_text(encoding="utf-8")), "HEALTHCHECK").exec_form
    assert check is not None and check[0] == "python"
    port = free_port()
    server = subprocess.Popen(
        [sys.executable, "-c", _HEALTH_STAND_IN, str(port)], stdout=subprocess.PIPE, stderr=subprocess.STDOUT
    )
    try:
        assert server.stdout is not None and server.stdout.readline().strip() == b"listening"
        env = {"WXSHOCK_PORT": str(port), "PATH": "/usr/bin:/bin"}
        ok = subprocess.run([sys.executable, *check[1:]], env=env, capture_output=True, timeout=20)
        assert ok.returncode == 0, ok.stderr.decode()
    finally:
        server.kill()
        server.wait(timeout=10)
    down = subprocess.run([sys.executable, *check[1:]], env=env, capture_output=True, timeout=20)
    assert down.returncode != 0


# A /health that answers 200 like the app's liveness route; the app's own route is tested in its issue.
_HEALTH_STAND_IN = """
import http.server, sys
class H(http.server.BaseHTTPRequestHandler):
    def do_GET(self):
        self.send_response(200 if self.path == "/health" else 404)
        self.send_header("Content-Type", "application/json"); self.end_headers()
        self.wfile.write(b'{"status": "ok"}')
    def log_message(self, *args):
        pass
server = http.server.HTTPServer(("127.0.0.1", int(sys.argv[1])), H)
print("listening", flush=True)
server.serve_forever()
"""


# --- compose.yaml -----------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def compose() -> dict:
    return yaml.safe_load(COMPOSE.read_text(encoding="utf-8"))


def _dask_command(words: list[str]) -> dict:
    """Parse a ``dask scheduler|worker`` command line with distributed's own click definitions."""
    from distributed.cli import dask_scheduler, dask_worker

    assert words[0] == "dask", words
    command = {"scheduler": dask_scheduler.main, "worker": dask_worker.main}[words[1]]
    context = command.make_context(f"dask {words[1]}", list(words[2:]))  # raises on an unknown option
    return context.params


def test_compose_has_the_api_a_scheduler_and_two_workers_from_one_image(compose: dict) -> None:
    services = compose["services"]
    workers = [name for name, s in services.items() if s["command"][:2] == ["dask", "worker"]]
    assert len(workers) == 2
    assert {"api", "scheduler"} <= set(services)
    images = {s["image"] for s in services.values()}
    assert len(images) == 1  # scheduler and workers unpickle the API's tasks: same package, same versions
    for service in services.values():
        assert service["build"]["dockerfile"] == "docker/Dockerfile"
        assert (COMPOSE.parent / service["build"]["context"] / service["build"]["dockerfile"]).exists()


def test_every_command_exists_with_those_flags(compose: dict) -> None:
    parser = build_parser()
    for name, service in compose["services"].items():
        words = service["command"]
        if words[0] == "wxshock":
            try:
                parser.parse_args(words[1:])
            except SystemExit:
                pytest.fail(f"service {name}: {words!r} is not a valid wxshock command")
        else:
            _dask_command(words)


def test_api_points_at_the_scheduler_and_agrees_with_settings(compose: dict) -> None:
    services = compose["services"]
    api = services["api"]
    scheduler = _dask_command(services["scheduler"]["command"])
    assert api["environment"]["WXSHOCK_SCHEDULER"] == f"tcp://scheduler:{scheduler['port']}"
    for name, service in services.items():
        if service["command"][:2] == ["dask", "worker"]:
            assert (
                _dask_command(service["command"])["scheduler"] == api["environment"]["WXSHOCK_SCHEDULER"]
            ), name
    settings = Settings(**{k.removeprefix("WXSHOCK_").lower(): v for k, v in api["environment"].items()})
    args = build_parser().parse_args(api["command"][1:])
    assert settings.scheduler == "tcp://scheduler:8786"
    assert int(args.port) == settings.port == Settings.model_fields["port"].default
    published = [p.rsplit(":", 1)[-1] for p in api["ports"]]
    assert published == [str(settings.port)]
    assert all(p.startswith("127.0.0.1:") for p in api["ports"])  # loopback unless the operator opens it
    assert str(settings.data_dir) == args.data_dir


def test_stores_and_results_are_on_one_shared_volume(compose: dict) -> None:
    services = compose["services"]
    data_dir = services["api"]["environment"]["WXSHOCK_DATA_DIR"]
    api_mounts = {m.split(":")[0]: m.split(":")[1] for m in services["api"]["volumes"]}
    (volume,) = [name for name, target in api_mounts.items() if target == data_dir]
    assert volume in compose["volumes"]
    for name, service in services.items():
        if service["command"][:2] == ["dask", "worker"]:
            assert f"{volume}:{data_dir}:ro" in service["volumes"], name


def test_dask_health_checks_ask_each_process_its_own_http_port(compose: dict) -> None:
    """Scheduler and workers: dask's /health on the HTTP port each one's command fixes."""
    for name, service in compose["services"].items():
        if service["command"][0] != "dask":
            continue
        params = _dask_command(service["command"])
        port = params["dashboard_address"].rsplit(":", 1)[-1]
        assert port.isdigit() and port != "0", name
        check = service["healthcheck"]["test"]
        assert check[:3] == ["CMD", "python", "-c"], name
        assert f"'http://127.0.0.1:{port}/health'" in check[3], name
    scheduler = compose["services"]["scheduler"]
    assert scheduler["expose"] == [str(_dask_command(scheduler["command"])["port"])]


def test_settings_file_is_named_from_the_environment_with_an_empty_default(compose: dict) -> None:
    """Users' WXSHOCK_* settings come from a file of their own (WXSHOCK_ENV_FILE); the default file holds none."""
    for name in ("api", "worker-1", "worker-2"):
        (entry,) = compose["services"][name]["env_file"]
        assert isinstance(entry, str), "docker-compose 1.29 reads only the plain-path form of env_file"
        match = re.fullmatch(r"\$\{WXSHOCK_ENV_FILE:-(.+)\}", entry)
        assert match, entry
        default = COMPOSE.parent / match.group(1)
        lines = default.read_text(encoding="utf-8").splitlines()
        assert all(not line.strip() or line.startswith("#") for line in lines)
    assert "name" not in compose  # a top-level name is newer syntax than docker-compose 1.29 reads


def test_dask_settings_file_is_installed_where_dask_reads_it(dockerfile: list[Instruction]) -> None:
    import dask
    from distributed.nanny import _get_env_variables

    copies = {i.words()[-1]: i.words()[0] for i in dockerfile if i.keyword == "COPY"}
    assert copies.get("/etc/dask/dask.yaml") == "docker/dask.yaml"
    assert "/etc/dask" in dask.config.paths  # one of the places dask looks for settings by default
    from_file = dask.config.collect(paths=[str(REPO / "docker" / "dask.yaml")], env={})
    merged = dask.config.update(copy.deepcopy(dask.config.config), from_file)  # the file over the defaults
    with dask.config.set(merged):
        assert dask.config.get("distributed.scheduler.allowed-failures") == 3
        environment = _get_env_variables("distributed.nanny.pre-spawn-environ")
    assert "MALLOC_TRIM_THRESHOLD_" not in environment  # see docker/dask.yaml for why
    assert environment.get("OMP_NUM_THREADS") == "1"  # distributed's other defaults stay


# --- the image and the cluster, built and run for real ----------------------------------------------------------

CONTAINER_REQUEST = {
    "years": {"start": 1991, "end": 2000},
    "baseline": {"start": 1981, "end": 1990},
    "indicators": ["prcp_total", "tmean", "cdd", {"name": "gdd", "base": 10, "cap": 30}],
    "lags": [0, 1],
}


@dataclass
class Served:
    """The image serving the host's tiny demo: its URL, how to replace the container, and its engine."""

    engine: Engine
    image: str
    name: str
    url: str
    run_args: list[str]

    def start(self) -> None:
        """Run a new container of the image under the fixed name and wait until it is ready."""
        self.engine.docker("run", "--detach", "--name", self.name, *self.run_args, self.image)
        wait_http(f"{self.url}/ready", 120, what="the container", logs=self.logs)

    def remove(self) -> None:
        """Remove the container (the volume stays)."""
        self.engine.docker("rm", "--force", self.name, check=False)

    def logs(self) -> str:
        """The container's output (for failure messages)."""
        done = self.engine.docker("logs", "--tail", "40", self.name, check=False)
        return done.stdout + done.stderr


@pytest.fixture(scope="module")
def served(docker_engine: Engine, wxshock_image: str, tiny_demo: Path) -> Iterator[Served]:  # noqa: F811
    """The image with the image's own command, on a network and volume of its own, the tiny demo mounted."""
    suffix = f"{os.getpid()}"
    network, volume = f"wxshock-test-net-{suffix}", f"wxshock-test-data-{suffix}"
    docker_engine.docker("network", "create", network)
    docker_engine.docker("volume", "create", volume)
    port = free_port()
    served = Served(
        engine=docker_engine,
        image=wxshock_image,
        name=f"wxshock-test-{suffix}",
        url=f"http://127.0.0.1:{port}",
        run_args=[
            "--network", network, "--publish", f"127.0.0.1:{port}:8000",
            "--volume", f"{volume}:/data",
            "--volume", f"{tiny_demo}:/stores/demo.zarr:ro", "--env", "WXSHOCK_STORES=/stores/demo.zarr",
            # The image checks every 30 s; the test asks every 2 s so that it turns healthy quickly.
            "--health-interval", "2s",
        ],
    )  # fmt: skip
    try:
        served.start()
        yield served
    finally:
        served.remove()
        docker_engine.docker("volume", "rm", volume, check=False)
        docker_engine.docker("network", "rm", network, check=False)


@pytest.fixture(scope="module")
def container_body(tiny_communities: dict) -> dict:
    """The request the container and the host both answer: four tiny-demo communities."""
    return dict(
        CONTAINER_REQUEST,
        features={"type": "FeatureCollection", "features": tiny_communities["features"][:4]},
    )


def _run_job(base_url: str, body: dict, fmt: str) -> tuple[str, bytes]:
    """Submit a job, wait for it (at most 120 s) and return its id and result bytes."""
    with httpx.Client(base_url=base_url, timeout=60) as http:
        submitted = http.post(
            "/v1/jobs", json=body, params={"format": fmt}, headers={"Idempotency-Key": uuid.uuid4().hex}
        )
        assert submitted.status_code == 202, submitted.text
        job_id = submitted.json()["id"]
        deadline = time.monotonic() + 120
        while (state := http.get(f"/v1/jobs/{job_id}").json()["state"]) not in (
            "succeeded",
            "failed",
            "cancelled",
        ):
            assert time.monotonic() < deadline, f"job {job_id} still {state} after 120 s"
            time.sleep(0.3)
        assert state == "succeeded", http.get(f"/v1/jobs/{job_id}").json()
        result = http.get(f"/v1/jobs/{job_id}/result")
        assert result.status_code == 200
        return job_id, result.content


def _provenance_headers(response: httpx.Response) -> dict[str, str]:
    """The X-Wxshock-* headers of an answer."""
    return {k.lower(): v for k, v in response.headers.items() if k.lower().startswith("x-wxshock-")}


@pytest.mark.container
@pytest.mark.timeout(1800)  # the first one builds the image: minutes more when the machine is busy
def test_container_is_healthy_and_runs_as_uid_10001(served: Served) -> None:
    assert httpx.get(f"{served.url}/health", timeout=10).json()["status"] == "ok"
    deadline = time.monotonic() + 60
    while (
        health := served.engine.inspect("container", served.name)["State"]["Health"]["Status"]
    ) != "healthy":
        assert health == "starting" and time.monotonic() < deadline, f"health {health}\n{served.logs()}"
        time.sleep(1)
    state = served.engine.inspect("container", served.name)["State"]
    # The server process itself, seen from the host: real, effective, saved and file-system uid all 10001.
    status = Path(f"/proc/{state['Pid']}/status").read_text()
    uids = next(line for line in status.splitlines() if line.startswith("Uid:")).split()[1:]
    assert uids == ["10001"] * 4
    assert "wxshock" in Path(f"/proc/{state['Pid']}/cmdline").read_bytes().decode(errors="replace")
    # The package runs from the virtual environment, without the source tree the build copied in.
    where = served.engine.docker(
        "exec", served.name, "python", "-c",
        "import os, service, service.demo; print(service.__file__, os.path.exists('/tmp/wxshock'), "
        "os.path.isfile(os.path.join(service.demo.DEMO_INPUTS, 'world.json')))",
    ).stdout.split()  # fmt: skip
    assert where[0].startswith("/opt/wxshock/venv/lib/") and where[1:] == ["False", "True"]


@pytest.mark.container
@pytest.mark.timeout(1800)  # the first one builds the image: minutes more when the machine is busy
def test_on_demand_answers_equal_the_hosts(served: Served, container_body: dict, live_server) -> None:  # noqa: F811
    for fmt in ("json", "csv", "parquet"):
        inside = httpx.post(
            f"{served.url}/v1/indicators", params={"format": fmt}, json=container_body, timeout=120
        )
        outside = httpx.post(
            f"{live_server.base_url}/v1/indicators", params={"format": fmt}, json=container_body, timeout=120
        )
        assert inside.status_code == outside.status_code == 200, inside.text[:500]
        if fmt != "parquet":
            assert inside.content == outside.content, fmt
            assert _provenance_headers(inside) == _provenance_headers(outside), fmt
            continue
        # Parquet: the same table and the same wxshock metadata; the writer's own metadata names its versions.
        tables = [pq.read_table(io.BytesIO(r.content)) for r in (inside, outside)]
        assert tables[0].equals(tables[1])
        ours = [
            {k: v for k, v in (t.schema.metadata or {}).items() if k.startswith(b"wxshock")} for t in tables
        ]
        assert ours[0] and ours[0] == ours[1]


@pytest.mark.container
@pytest.mark.timeout(1800)  # the first one builds the image: minutes more when the machine is busy
def test_job_and_its_result_outlive_the_container(
    served: Served,
    container_body: dict,
    live_server,  # noqa: F811
) -> None:
    """A job's result equals the host's, and the data volume keeps it when the container is replaced."""
    job_id, inside = _run_job(served.url, container_body, "csv")
    _, outside = _run_job(live_server.base_url, container_body, "csv")
    assert inside == outside
    before = served.engine.inspect("container", served.name)["Id"]
    served.remove()
    served.start()  # a new container of the image on the same volume
    assert served.engine.inspect("container", served.name)["Id"] != before
    status = httpx.get(f"{served.url}/v1/jobs/{job_id}", timeout=30)
    assert status.status_code == 200 and status.json()["state"] == "succeeded"
    assert httpx.get(f"{served.url}/v1/jobs/{job_id}/result", timeout=30).content == inside


_EXECUTED = """
from distributed import Client
with Client("tcp://scheduler:8786", timeout=20) as client:
    print(sorted(client.run(lambda dask_worker: (dask_worker.name, dask_worker.state.executed_count)).values()))
"""


@pytest.mark.container
@pytest.mark.timeout(1800)  # the first one builds the image: minutes more when the machine is busy
def test_compose_cluster_runs_a_job(
    docker_engine: Engine,  # noqa: F811
    wxshock_image: str,  # noqa: F811
    tmp_path: Path,
    tiny_demo: Path,
    container_body: dict,
    live_server,  # noqa: F811
) -> None:
    """docker/compose.yaml under Debian's docker-compose: API, scheduler, two workers; a job through the cluster."""
    project = f"wxshock-test-{os.getpid()}"
    settings = tmp_path / "test.env"
    settings.write_text("WXSHOCK_DEMO_SIZE=tiny\n", encoding="utf-8")
    port = free_port()
    env = {"WXSHOCK_ENV_FILE": str(settings), "WXSHOCK_HOST_PORT": str(port)}
    config = yaml.safe_load(docker_engine.compose(project, "config", env=env).stdout)
    for service in config["services"].values():  # what compose would build is what the test built
        assert service["image"] == wxshock_image
        assert (
            Path(service["build"]["context"]) == REPO
            and service["build"]["dockerfile"] == "docker/Dockerfile"
        )
    assert config["services"]["api"]["ports"][0].startswith(f"127.0.0.1:{port}:8000")
    assert config["services"]["api"]["environment"]["WXSHOCK_DEMO_SIZE"] == "tiny"

    def logs() -> str:
        return docker_engine.compose(project, "logs", "--tail", "30", check=False).stdout

    try:
        # The data volume, as compose names and labels it, seeded with the host's tiny demo: the API serves it
        # as its demo dataset instead of building one (a minute of the test's 2 cores).
        volume = f"{project}_wxshock-data"
        labels = {"com.docker.compose.project": project, "com.docker.compose.volume": "wxshock-data",
                  "com.docker.compose.version": "1.29.2"}  # fmt: skip
        docker_engine.docker("volume", "create", *(f"--label={k}={v}" for k, v in labels.items()), volume)
        docker_engine.docker(
            "run", "--rm", "--volume", f"{volume}:/data", "--volume", f"{tiny_demo}:/seed/demo.zarr:ro",
            "--volume", f"{tiny_demo.parent / 'communities.geojson'}:/seed/communities.geojson:ro",
            wxshock_image, "cp", "-r", "/seed/demo.zarr", "/seed/communities.geojson", "/data/",
        )  # fmt: skip
        started = time.monotonic()
        docker_engine.compose(project, "up", "--detach", "--no-build", env=env)
        docker_engine.timings["compose_up_s"] = time.monotonic() - started
        wait_http(f"http://127.0.0.1:{port}/ready", 240, what="the compose API", logs=logs)
        docker_engine.timings["compose_ready_s"] = time.monotonic() - started
        api = f"{project}_api_1"
        workers = [f"{project}_worker-1_1", f"{project}_worker-2_1"]
        deadline = time.monotonic() + 90
        while any(
            docker_engine.inspect("container", w)["State"]["Health"]["Status"] != "healthy" for w in workers
        ):
            assert time.monotonic() < deadline, f"workers not healthy within 90 s\n{logs()}"
            time.sleep(1)
        executed = ast.literal_eval(
            docker_engine.docker("exec", api, "python", "-c", _EXECUTED).stdout.strip()
        )
        assert [name for name, _ in executed] == ["worker-1", "worker-2"]
        _, inside = _run_job(f"http://127.0.0.1:{port}", container_body, "csv")
        after = ast.literal_eval(docker_engine.docker("exec", api, "python", "-c", _EXECUTED).stdout.strip())
        assert sum(n for _, n in after) > sum(n for _, n in executed), (
            "the workers ran none of the job's tasks"
        )
        _, outside = _run_job(live_server.base_url, container_body, "csv")
        assert inside == outside
    finally:
        started = time.monotonic()
        docker_engine.compose(project, "down", "--volumes", "--remove-orphans", env=env, check=False)
        docker_engine.timings["compose_down_s"] = time.monotonic() - started
    label = f"label=com.docker.compose.project={project}"
    for kind in ("container", "network", "volume"):
        listed = docker_engine.docker(
            kind, "ls", *(["--all"] if kind == "container" else []), "--quiet", "--filter", label
        )
        assert listed.stdout.strip() == "", f"compose down left {kind}s behind"
