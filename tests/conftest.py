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
