"""A real result to encode: the example request (examples/request.json) on three tiny-demo communities."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from service.encode import RunResult
from service.pipeline import run
from service.schemas import IndicatorRequest, validate_request
from service.settings import Settings
from service.store import open_store

EXAMPLE_REQUEST = Path(__file__).resolve().parents[2] / "examples" / "request.json"


def example_body(communities: dict[str, Any], count: int = 3, **changes: Any) -> dict[str, Any]:
    """The example request on the first ``count`` communities, with ``changes`` to its fields."""
    features = {**communities, "features": communities["features"][:count]}
    return {**json.loads(EXAMPLE_REQUEST.read_text(encoding="utf-8")), "features": features, **changes}


def compute(tiny_demo: Path, body: dict[str, Any], data_dir: Path) -> RunResult:
    """Run a request body on the tiny demo with local threads."""
    request = validate_request(IndicatorRequest, body)
    return run(request, open_store(tiny_demo), Settings(data_dir=data_dir, threads=2))


@pytest.fixture(scope="module")
def example_result(
    tiny_demo: Path, tiny_communities: dict, tmp_path_factory: pytest.TempPathFactory
) -> RunResult:
    """The example request's result on three communities (every kind of column: lags, pairs, sequences,
    spells, SPEI's category)."""
    return compute(tiny_demo, example_body(tiny_communities), tmp_path_factory.mktemp("data"))
