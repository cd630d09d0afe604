"""Fixtures shared by the whole suite."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

# Tests never read the developer's own data directory or environment settings by accident.
for _name in list(os.environ):
    if _name.startswith("WXSHOCK_"):
        del os.environ[_name]


@pytest.fixture(scope="session")
def tiny_demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The tiny demo store, built once per test session; communities.geojson lies beside it."""
    from service.demo import build_demo

    path = tmp_path_factory.mktemp("tiny-demo") / "demo.zarr"
    build_demo(path, size="tiny", progress=False)
    return path


@pytest.fixture(scope="session")
def tiny_communities(tiny_demo: Path) -> dict:
    """The tiny demo's communities as a GeoJSON FeatureCollection dict."""
    import json

    return json.loads((tiny_demo.parent / "communities.geojson").read_text(encoding="utf-8"))


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter) -> None:
    """How long the container tests' slow steps took, when they ran (tests/_support_docker.py)."""
    import sys

    support = sys.modules.get("tests._support_docker")  # imported only where container tests were collected
    if support is not None and support.TIMINGS:
        steps = ", ".join(
            f"{name.removesuffix('_s')} {seconds:.0f} s" for name, seconds in support.TIMINGS.items()
        )
        terminalreporter.write_line(f"container steps: {steps}")
