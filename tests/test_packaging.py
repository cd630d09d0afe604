"""The package as users install it: the wheel's contents, a plain (non-editable) install, the light client.

Cost (2 cores, quiet machine): the isolated wheel build about 15 s; the plain install about 10 s (its
dependencies are this machine's own, seen through --system-site-packages) and its demo and computation 10 s;
the light client's fresh environment about 20 s (its wheels, pinned to this machine's versions, come from the
tests' wheelhouse in ~/.cache/wxshock-tests, which pip fills from the package index once per machine).
"""

from __future__ import annotations

import email.parser
import json
import subprocess
import zipfile
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest
from packaging.requirements import Requirement

from service.client import Client, submit_files
from service.pipeline import compute_to_file
from service.settings import Settings
from tests._support_packaging import (
    REPO,
    SERVER_STACK,
    build_wheel,
    clean_env,
    fill_wheelhouse,
    host_pins,
    installed,
    make_venv,
    normalized,
    package_files,
    pip_install,
    requirements,
)
from tests._support_server import live_server  # noqa: F401 - fixture

pytestmark = pytest.mark.packaging

REQUEST = {
    "years": {"start": 1991, "end": 2000},
    "baseline": {"start": 1981, "end": 1990},
    "indicators": ["prcp_total", "tmean", "cdd"],
    "lags": [0, 1],
}


@pytest.fixture(scope="module")
def wheel(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The wheel of the current source tree."""
    return build_wheel(tmp_path_factory.mktemp("wheel"))


@pytest.fixture(scope="module")
def pins(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A constraints file of this machine's installed versions."""
    path = tmp_path_factory.mktemp("pins") / "constraints.txt"
    path.write_text("\n".join(host_pins()) + "\n", encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def request_file(tmp_path_factory: pytest.TempPathFactory, tiny_communities: dict) -> Path:
    """A request over the first four tiny-demo communities."""
    body = dict(REQUEST, features={"type": "FeatureCollection", "features": tiny_communities["features"][:4]})
    path = tmp_path_factory.mktemp("request") / "request.json"
    path.write_text(json.dumps(body), encoding="utf-8")
    return path


def _metadata(wheel: Path) -> email.message.Message:
    """The wheel's METADATA as a message (Requires-Dist, Provides-Extra, ...)."""
    with zipfile.ZipFile(wheel) as archive:
        name = next(n for n in archive.namelist() if n.endswith(".dist-info/METADATA"))
        return email.parser.Parser().parsestr(archive.read(name).decode("utf-8"))


def test_wheel_holds_every_file_of_the_package(wheel: Path) -> None:
    with zipfile.ZipFile(wheel) as archive:
        names = {n for n in archive.namelist() if not n.startswith("wxshock-")}
    expected = package_files(REPO)
    assert expected - names == set(), "files of service/ missing from the wheel"
    assert names - expected == set(), "files in the wheel that the source tree does not have"
    # The demo world's inputs and the viewer are data, not modules: they travel only as package data.
    assert {"service/demo_store/world.json", "service/demo_store/communities.json"} <= names
    assert "service/static/index.html" in names


def test_base_install_is_the_light_client_and_the_stack_an_extra(wheel: Path) -> None:
    metadata = _metadata(wheel)
    requires = [Requirement(line) for line in metadata.get_all("Requires-Dist") or []]

    def names(extra: str | None) -> set[str]:
        """Requirements without a marker (None), or those of one extra."""
        if extra is None:
            return {normalized(r.name) for r in requires if r.marker is None}
        return {normalized(r.name) for r in requires if r.marker and r.marker.evaluate({"extra": extra})}

    assert names(None) == {"httpx", "pandas", "pyarrow", "pydantic", "tqdm"}
    assert set(SERVER_STACK) <= names("service")
    test = [r for r in requires if r.marker is not None and r.marker.evaluate({"extra": "test"})]
    assert any(
        r.name == "wxshock" and r.extras == {"service"} for r in test
    )  # the test install brings the stack
    assert {"service", "test", "geo"} <= set(metadata.get_all("Provides-Extra") or [])


def test_plain_install_runs_help_and_a_computation(
    wheel: Path, tmp_path: Path, tiny_demo: Path, request_file: Path
) -> None:
    """A non-editable install, run from outside the source tree: --help, the demo, one computation."""
    python = make_venv(tmp_path / "venv", system_site_packages=True)
    # --no-index: every dependency must already be here, so that the machine's own versions are the ones used.
    done = pip_install(python, "--no-index", "--no-deps", "--force-reinstall", str(wheel))
    assert done.returncode == 0, done.stderr[-3000:]
    bin_dir = python.parent
    env = clean_env()
    work = tmp_path / "work"
    work.mkdir()

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(args, cwd=work, env=env, capture_output=True, text=True, timeout=600)

    where = run(
        str(python),
        "-c",
        "import service, service.demo; print(service.__file__); print(service.demo.DEMO_INPUTS)",
    )
    assert where.returncode == 0, where.stderr
    module, inputs = where.stdout.split()
    venv = (tmp_path / "venv").resolve()
    assert Path(module).resolve().is_relative_to(venv), f"service was imported from {module}, not the install"
    assert Path(inputs).resolve().is_relative_to(venv) and (Path(inputs) / "world.json").is_file()
    # Every requirement of the base install and of the service extra is met by what the venv sees.
    check = run(str(python), "-c", _REQUIREMENTS_MET)
    assert check.returncode == 0, check.stdout + check.stderr

    helped = run(str(bin_dir / "wxshock"), "--help")
    assert helped.returncode == 0 and "submit" in helped.stdout and "serve" in helped.stdout
    built = run(str(bin_dir / "wxshock"), "demo", str(work / "demo.zarr"), "--size", "tiny", "--quiet")
    assert built.returncode == 0, built.stderr
    out = work / "table.json"
    computed = run(
        str(bin_dir / "wxshock"), "compute", "--store", str(work / "demo.zarr"),
        "--request", str(request_file), "--out", str(out), "--quiet",
    )  # fmt: skip
    assert computed.returncode == 0, computed.stderr
    # The same request through this source tree on the session's tiny demo: the same bytes (the demo world is
    # generated from the packaged inputs with fixed seeds, so both stores hold the same values).
    host_out = tmp_path / "host.json"
    compute_to_file(
        store_location=str(tiny_demo),
        request_path=request_file,
        features_path=None,
        out_path=host_out,
        settings=Settings(data_dir=tmp_path / "host-data"),
        progress=False,
    )
    assert out.read_bytes() == host_out.read_bytes()


# Run inside the plain install: each requirement of wxshock (base and service extra) installed and in range.
_REQUIREMENTS_MET = """
import importlib.metadata as m
from packaging.requirements import Requirement
bad = []
for line in m.requires("wxshock"):
    req = Requirement(line)
    if req.marker is not None and not req.marker.evaluate({"extra": "service"}):
        continue
    try:
        version = m.version(req.name)
    except m.PackageNotFoundError:
        bad.append(f"{req.name}: not installed")
        continue
    if version not in req.specifier:
        bad.append(f"{req.name} {version} outside {req.specifier}")
print("\\n".join(bad))
raise SystemExit(1 if bad else 0)
"""


def test_light_client_installs_and_works_without_the_server_stack(
    wheel: Path,
    pins: Path,
    tmp_path: Path,
    request_file: Path,
    tiny_communities: dict,
    live_server,  # noqa: F811
) -> None:
    """The base install in a fresh environment: no server stack; `wxshock submit` and Client work as on the host."""
    python = make_venv(tmp_path / "light", system_site_packages=False)
    wheels = fill_wheelhouse(
        requirements(extras=()), host_pins()
    )  # pip downloads each wheel once per machine
    done = pip_install(
        python, "--no-index", "--find-links", str(wheels), "--constraint", str(pins), str(wheel)
    )
    assert done.returncode == 0, done.stderr[-3000:]
    present = installed(python)
    assert "wxshock" in present
    assert present.isdisjoint(SERVER_STACK), (
        f"the light install brought {sorted(present & set(SERVER_STACK))}"
    )
    env = clean_env()
    wxshock = str(python.parent / "wxshock")

    def run(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run(args, cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)

    # A server command says what to install, rather than a traceback.
    served = run(wxshock, "serve", "--data-dir", str(tmp_path / "data"))
    assert served.returncode == 2
    assert "pip install 'wxshock[service]'" in served.stderr and "Traceback" not in served.stderr

    # `wxshock submit` from the light install writes the server's bytes, as the host's client does.
    out = tmp_path / "light.csv"
    submitted = run(
        wxshock,
        "submit",
        "--server",
        live_server.base_url,
        "--request",
        str(request_file),
        "--out",
        str(out),
        "--quiet",
    )
    assert submitted.returncode == 0, submitted.stderr
    host_out = tmp_path / "host.csv"
    submit_files(
        server=live_server.base_url,
        request_path=request_file,
        features_path=None,
        out_path=host_out,
        progress=False,
    )
    assert out.read_bytes() == host_out.read_bytes()
    sidecar = ".provenance.json"
    assert (tmp_path / f"light.csv{sidecar}").read_bytes() == (tmp_path / f"host.csv{sidecar}").read_bytes()

    # The Python client: a table with its provenance, equal to the host client's.
    features = {"type": "FeatureCollection", "features": tiny_communities["features"][:4]}
    (tmp_path / "features.json").write_text(json.dumps(features), encoding="utf-8")
    script = (
        "import json, sys; from service.client import Client\n"
        "with Client(sys.argv[1]) as c:\n"
        f"    t = c.indicators(json.load(open('features.json')), progress=False, **{REQUEST!r})\n"
        "t.to_parquet('light.parquet'); json.dump(t.attrs, open('light-attrs.json', 'w'))\n"
    )
    used = run(str(python), "-c", script, live_server.base_url)
    assert used.returncode == 0, used.stderr
    with Client(live_server.base_url) as client:
        reference = client.indicators(features, progress=False, **REQUEST)
    light = pq.read_table(tmp_path / "light.parquet").to_pandas()
    pd.testing.assert_frame_equal(light, reference)
    assert json.loads((tmp_path / "light-attrs.json").read_text()) == json.loads(json.dumps(reference.attrs))
