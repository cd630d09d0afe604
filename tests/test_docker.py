"""docker/Dockerfile and docker/compose.yaml, checked without a Docker engine (none runs where tests run).

What is checked: both files parse; every wxshock command they run parses with the CLI's own parser
(service.cli.build_parser) and every dask command with distributed's own command-line definitions; ports,
data directory, scheduler address and health check agree with service.settings.Settings; the health check's
own command, run against a real server, passes. Not checked: that the image builds and the containers start.
"""

from __future__ import annotations

import copy
import json
import shlex
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest
import yaml

from service.cli import build_parser
from service.settings import Settings

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


def test_base_is_a_slim_python_matching_the_package(dockerfile: list[Instruction]) -> None:
    base = _one(dockerfile, "FROM").words()[0]
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


def test_installs_the_package_from_the_copied_repository(dockerfile: list[Instruction]) -> None:
    copied = [Path(w) for i in dockerfile if i.keyword == "COPY" for w in i.words()[:-1]]
    for source in copied:
        assert (REPO / source).exists(), f"COPY {source}: not in the repository"
    assert Path("pyproject.toml") in copied and Path("service") in copied
    installs = [i.text for i in dockerfile if i.keyword == "RUN" and "pip install" in i.text]
    assert any(shlex.split(t.split("&&")[0])[-1] == "." for t in installs)
    # service.demo finds its inputs beside the package directory: they must be copied there, and the
    # package must run from the copy (an editable install), not from a copy in site-packages.
    import service.demo

    workdir = Path(_one(dockerfile, "WORKDIR").words()[0])
    inputs = Path(service.demo.DEMO_INPUTS).resolve().relative_to(REPO)
    destinations = {
        (workdir / i.words()[-1]).resolve(): Path(i.words()[0]) for i in dockerfile if i.keyword == "COPY"
    }
    assert destinations.get((workdir / inputs).resolve()) == inputs
    assert any(" -e ." in f" {t.split('&&')[0].strip()}" for t in installs)
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
    from tests._support_cluster import free_port

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


def test_scheduler_health_check_uses_its_own_port(compose: dict) -> None:
    scheduler = compose["services"]["scheduler"]
    port = _dask_command(scheduler["command"])["port"]
    assert f"{port}" in " ".join(scheduler["healthcheck"]["test"]) and scheduler["expose"] == [str(port)]


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
