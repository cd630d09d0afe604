"""The package as users install it: a wheel built from the source tree, fresh virtual environments, host pins.

Usage::

    from tests._support_packaging import build_wheel, host_pins, make_venv, pip_install, clean_env

``host_pins`` are the versions installed on this machine of what wxshock needs; installs into a fresh environment (and the container
image) are constrained to them, so that pip takes wheels it already has in its cache and results compare byte
for byte with the host's.
"""

from __future__ import annotations

import fcntl
import importlib.metadata
import os
import re
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

from packaging.requirements import Requirement

REPO = Path(__file__).resolve().parents[1]
# Kept between test sessions on this machine: the wheelhouse below, the container tests' engine and base image.
CACHE = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "wxshock-tests"
WHEELHOUSE = CACHE / "wheels"
# What a wheel is built from: pyproject.toml names README.md as the readme, MANIFEST.in grafts the data files.
PACKAGE_SOURCES = ("pyproject.toml", "README.md", "MANIFEST.in", "service")
# Distributions of the service extra that the light client install must not bring (pyproject.toml).
SERVER_STACK = (
    "dask", "distributed", "zarr", "xarray", "netcdf4", "matplotlib", "s3fs", "fastapi", "uvicorn", "scipy",
    "pyproj", "shapely", "numcodecs", "cftime", "pydantic-settings", "antimeridian", "pint", "cf-xarray", "rasterio",
    "rioxarray",
)  # fmt: skip
PIP_TIMEOUT_S = 900


def normalized(name: str) -> str:
    """A distribution name in PEP 503 normal form (lower case, runs of -_. as one -)."""
    return re.sub(r"[-_.]+", "-", name).lower()


def host_pins(extras: tuple[str, ...] = ("service",)) -> list[str]:
    """``name==version`` as installed here of every distribution that wxshock (with ``extras``) needs.

    Walks pyproject.toml's requirements and, through the installed metadata, theirs in turn, so the pins change
    only when one of those does (not when someone installs an unrelated package on the machine).
    """
    pending = [Requirement(line) for line in requirements(extras, build=True)]
    pins: dict[str, str] = {}
    while pending:
        requirement = pending.pop()
        name = normalized(requirement.name)
        if name == "wxshock" or name in pins:
            continue
        try:
            dist = importlib.metadata.distribution(name)
        except importlib.metadata.PackageNotFoundError:
            continue  # not installed here (e.g. a platform-specific dependency): pip resolves it freely
        if "+" not in dist.version:  # a local build has no counterpart on the index
            pins[name] = f"{name}=={dist.version}"
        for line in dist.requires or []:
            needed = Requirement(line)
            wanted = requirement.extras or {""}
            if needed.marker is None or any(needed.marker.evaluate({"extra": e}) for e in wanted):
                pending.append(needed)
    return sorted(pins.values())


def requirements(extras: tuple[str, ...] = ("service",), *, build: bool = False) -> list[str]:
    """pyproject.toml's requirement lines: the base install, the extras, and (``build``) what builds the wheel."""
    document = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    project = document["project"]
    lines = list(project["dependencies"])
    for extra in extras:
        lines += project["optional-dependencies"][extra]
    if build:
        lines += [*document["build-system"]["requires"], "wheel"]
    return lines


def fill_wheelhouse(lines: list[str], pins: list[str]) -> Path:
    """The wheels of ``lines`` at the pinned versions, with theirs, in the wheelhouse; only missing ones fetched.

    Fresh environments and the image's build install from it (``--no-index --find-links``), so a run
    downloads each wheel once per machine rather than once per install.
    """
    WHEELHOUSE.mkdir(parents=True, exist_ok=True)
    constraints = WHEELHOUSE.parent / f"pins-{os.getpid()}.txt"
    constraints.write_text("\n".join(pins) + "\n", encoding="utf-8")
    base = [sys.executable, "-m", "pip", "download", "--quiet", "--only-binary=:all:", "--dest", str(WHEELHOUSE),
            "--find-links", str(WHEELHOUSE), "--constraint", str(constraints), *lines]  # fmt: skip
    try:
        with open(WHEELHOUSE.parent / "wheels.lock", "w") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)  # one session fills it at a time
            local = subprocess.run(
                [*base, "--no-index"], capture_output=True, text=True, timeout=PIP_TIMEOUT_S
            )
            if local.returncode != 0:  # something is missing: the package index brings it
                fetched = subprocess.run(
                    base, capture_output=True, text=True, timeout=PIP_TIMEOUT_S, env=clean_env()
                )
                if fetched.returncode != 0:
                    raise RuntimeError(f"pip download failed:\n{fetched.stderr[-3000:]}")
    finally:
        constraints.unlink(missing_ok=True)
    return WHEELHOUSE


def package_files(root: Path) -> set[str]:
    """Every file of the package under ``root``/service, as wheel paths (caches left out)."""
    return {
        path.relative_to(root).as_posix()
        for path in (root / "service").rglob("*")
        if path.is_file() and "__pycache__" not in path.parts and path.suffix not in (".pyc", ".pyo")
    }


def build_wheel(out_dir: Path) -> Path:
    """The wheel of a clean copy of the source tree, built as `pip install .` builds it (isolated build)."""
    source = out_dir / "source"
    for name in PACKAGE_SOURCES:
        if (REPO / name).is_dir():
            shutil.copytree(
                REPO / name, source / name, ignore=shutil.ignore_patterns("__pycache__", "*.py[co]")
            )
        else:
            source.mkdir(parents=True, exist_ok=True)
            shutil.copy2(REPO / name, source / name)
    dist = out_dir / "dist"
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--wheel-dir", str(dist), str(source)],
        check=True,
        capture_output=True,
        timeout=PIP_TIMEOUT_S,
    )
    (wheel,) = dist.glob("wxshock-*.whl")
    return wheel


def make_venv(path: Path, *, system_site_packages: bool) -> Path:
    """A new virtual environment without pip of its own (this interpreter's pip installs into it); its python."""
    args = [sys.executable, "-m", "venv", "--without-pip", str(path)]
    if system_site_packages:
        args.insert(4, "--system-site-packages")
    subprocess.run(args, check=True, capture_output=True, timeout=120)
    return path / "bin" / "python"


def pip_install(python: Path, *args: str) -> subprocess.CompletedProcess[str]:
    """``pip install`` into the environment of ``python`` (pip's --python), without byte-compiling."""
    return subprocess.run(
        [sys.executable, "-m", "pip", "--python", str(python), "install", "--no-compile", "--quiet", *args],
        capture_output=True,
        text=True,
        timeout=PIP_TIMEOUT_S,
        env=clean_env(),
    )


def clean_env(**extra: str) -> dict[str, str]:
    """This environment without WXSHOCK_* settings, PYTHONPATH or an active venv: what a new shell would have."""
    drop = ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")
    env = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_") and k not in drop}
    env.update(extra)
    return env


def installed(python: Path) -> set[str]:
    """Normalized names of the distributions that ``python`` sees."""
    script = "import importlib.metadata as m; print('\\n'.join(d.metadata['Name'] or '' for d in m.distributions()))"
    listed = subprocess.run(
        [str(python), "-c", script], capture_output=True, text=True, check=True, timeout=60
    )
    return {normalized(name) for name in listed.stdout.split() if name}
