"""The hostile-input corpus (tests/data/hostile/cases.jsonl) through every POST route, on demand and as a job.

Each case is data: a change to a valid request (JSON pointers set to values, some made by the generators
below) or raw body bytes, the problem document POST /v1/indicators must answer with, and its level:
'body' and 'request' faults are refused at job submission exactly as on demand; 'feature' faults are
per-feature (a job skips them, so a one-feature job is refused because no feature is left); 'limit' cases
say what a job answers. Every route answers every case without a 5xx, with a problem document that points
at the fault. See tests/data/hostile/README.md for the format.
"""

from __future__ import annotations

import copy
import json
import math
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.settings import Settings
from tests import _support_server as server_support

CASES_PATH = Path(__file__).parent / "data" / "hostile" / "cases.jsonl"
CASES: list[dict[str, Any]] = [
    json.loads(line) for line in CASES_PATH.read_text(encoding="utf-8").splitlines() if line.strip()
]
PROBLEM = "application/problem+json"
INDICATORS = ["prcp_total", "tmean", {"name": "gdd", "base": 10, "cap": 30}]
LIMITS = {
    "max_body_bytes": 400_000,
    "max_features_on_demand": 5,
    "max_vertices_per_feature": 300,
    "max_years_per_request": 30,
    "max_cells_per_feature": 40,  # the town of the corpus covers 6 cells of 0.025 degrees
}
SERIES_FIELDS = {
    "dataset",
    "features",
    "id_property",
    "crs",
    "weighting",
    "repair",
    "invalid_features",
    "years",
}


@pytest.fixture(scope="module")
def hostile_server(
    tiny_demo: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[server_support.LiveServer]:
    """A server over the tiny demo with small limits."""
    settings = Settings(
        stores=[str(tiny_demo)], data_dir=tmp_path_factory.mktemp("hostile"), min_free_bytes=0, **LIMITS
    )
    with server_support.thread_server(settings) as server:
        yield server


@pytest.fixture(scope="module")
def town(tiny_communities: dict) -> dict[str, Any]:
    """One small demo community (a town polygon)."""
    return next(f for f in tiny_communities["features"] if f["properties"]["kind"] == "town")


def base_request(town: dict[str, Any]) -> dict[str, Any]:
    """The valid request every case changes."""
    return {
        "dataset": "demo",
        "features": {"type": "FeatureCollection", "features": [copy.deepcopy(town)]},
        "years": {"start": 2000, "end": 2005},
        "baseline": {"start": 1980, "end": 1989},
        "indicators": copy.deepcopy(INDICATORS),
    }


def _square(x: float, y: float, size: float) -> dict[str, Any]:
    """A closed square polygon with its south-west corner at (x, y)."""
    ring = [[x, y], [x + size, y], [x + size, y + size], [x, y + size], [x, y]]
    return {"type": "Polygon", "coordinates": [ring]}


def generated(spec: Any, town: dict[str, Any]) -> Any:
    """A value of the corpus: plain JSON, or a generator object ({"$repeat"}, {"$geometry"}, {"$features"})."""
    if not isinstance(spec, dict):
        return spec
    if "$repeat" in spec:
        return spec["$repeat"] * spec["times"]
    ring = town["geometry"]["coordinates"][0]
    if spec.get("$geometry") == "swapped":
        return {"type": "Polygon", "coordinates": [[[y, x] for x, y in ring]]}
    if spec.get("$geometry") == "open-ring":
        return {"type": "Polygon", "coordinates": [ring[:-1]]}
    if spec.get("$geometry") == "as-text":
        return {"type": "Polygon", "coordinates": [[[str(x), str(y)] for x, y in ring]]}
    if spec.get("$geometry") == "square":
        return _square(*spec["at"], spec.get("size", 0.05))
    if spec.get("$geometry") == "circle":
        n = spec["n"]
        points = [
            [-39.5 + 0.05 * math.cos(2 * math.pi * i / n), 14.5 + 0.05 * math.sin(2 * math.pi * i / n)]
            for i in range(n)
        ]
        return {"type": "Polygon", "coordinates": [[*points, points[0]]]}
    if spec.get("$features") == "town-twice":
        return {"type": "FeatureCollection", "features": [copy.deepcopy(town), copy.deepcopy(town)]}
    if spec.get("$features") == "many":
        features = [dict(copy.deepcopy(town), id=f"t-{i}") for i in range(spec["n"])]
        return {"type": "FeatureCollection", "features": features}
    return spec


def _set(body: dict[str, Any], pointer: str, value: Any) -> None:
    """Set the value at an RFC 6901 pointer, making objects on the way (list items by index)."""
    parts = [p.replace("~1", "/").replace("~0", "~") for p in pointer.split("/")[1:]]
    target: Any = body
    for part in parts[:-1]:
        if isinstance(target, list):
            target = target[int(part)]
        else:
            target = target.setdefault(part, {})
    if isinstance(target, list):
        target[int(parts[-1])] = value
    else:
        target[parts[-1]] = value


def case_body(case: dict[str, Any], town: dict[str, Any], *, series: bool = False) -> bytes:
    """The bytes a case sends (to /v1/series, the base request holds only the series fields)."""
    if "raw" in case:
        out = bytearray()
        for part in case["raw"]:
            if isinstance(part, list):
                out += part[0].encode() * part[1]
            elif isinstance(part, dict):
                out += bytes.fromhex(part["hex"])
            else:
                out += part.replace("{TOWN}", json.dumps(town)).encode("utf-8")
        return bytes(out)
    body = base_request(town)
    if series:
        body = {k: v for k, v in body.items() if k in SERIES_FIELDS}
    for pointer, value in case.get("set", {}).items():
        _set(body, pointer, generated(value, town))
    for pointer in case.get("drop", []):
        body.pop(pointer.lstrip("/"), None)  # a top-level field left out (events refuse 'years')
    text = json.dumps(body)
    for old, new in case.get("text_replace", []):
        text = text.replace(old, new)
    return text.encode("utf-8")


def post(client: httpx.Client, path: str, case: dict[str, Any], body: bytes) -> httpx.Response:
    """POST a case's body with its content type (JSON unless the case says otherwise)."""
    content_type = case.get("content_type", "application/json")
    headers = {"Content-Type": content_type} if content_type else {}
    return client.post(path, content=body, headers=headers)


def check_problem(response: httpx.Response, route: str, name: str) -> dict[str, Any] | None:
    """No 5xx; an error is a problem document that says where the fault is."""
    assert response.status_code < 500, f"{route} {name}: {response.status_code} {response.text[:300]}"
    if response.status_code < 400:
        return None
    assert response.headers["content-type"] == PROBLEM, (route, name)
    problem = response.json()
    assert problem["status"] == response.status_code and problem["title"] and len(problem["detail"]) > 20
    assert len(response.content) < 20_000, f"{route} {name}: the problem document echoes too much"
    if response.status_code in (413, 422) or problem["type"].endswith("/unknown-dataset"):
        assert any(k in problem for k in ("pointer", "feature_id", "limit")), (route, name, problem)
    return problem


def check_expected(problem: dict[str, Any] | None, expect: dict[str, Any], name: str) -> None:
    """The problem document is the one the case expects."""
    assert problem is not None, f"{name}: accepted"
    assert problem["type"] == f"tag:wxshock,2026:problem/{expect['slug']}", (name, problem)
    for key in ("pointer", "feature_id", "limit"):
        if key not in expect:
            continue
        if expect[key] is True:
            assert problem.get(key), (name, key, problem)
        else:
            assert problem.get(key) == expect[key], (name, key, problem)
    if expect["slug"] == "validation-failed":
        assert problem["errors"] and all("pointer" in e and e["message"] for e in problem["errors"])


def _params() -> list[Any]:
    """The cases as pytest parameters; a case another branch fixes is expected to fail until it lands."""
    params = []
    for case in CASES:
        marks = [pytest.mark.xfail(reason=case["pending"], strict=False)] if "pending" in case else []
        params.append(pytest.param(case, id=case["name"], marks=marks))
    return params


def test_the_corpus_is_large_and_each_case_is_named_once() -> None:
    names = [c["name"] for c in CASES]
    assert len(CASES) >= 150 and len(set(names)) == len(names)
    assert {c["level"] for c in CASES} == {"body", "request", "feature", "limit"}


def _fields_attacked() -> set[str]:
    """The top-level request fields that some case sets, drops or writes in its raw body."""
    from service.schemas import IndicatorRequest

    hit: set[str] = set()
    for case in CASES:
        hit |= {p.split("/")[1] for p in [*case.get("set", {}), *case.get("drop", [])]}
        texts = [p for p in case.get("raw", []) if isinstance(p, str)] + [
            o for o, _ in case.get("text_replace", [])
        ]
        hit |= {f for f in IndicatorRequest.model_fields for t in texts if f'"{f}"' in t}
    return hit


def test_every_request_field_is_attacked_by_some_case() -> None:
    # A field added to the request (as events, windows, variants, lag_values, aggregation, partial_seasons
    # and invalid_features were) needs cases of its own here, so that a job's submission is shown to refuse
    # its faults as the on-demand route does.
    from service.schemas import IndicatorRequest

    assert set(IndicatorRequest.model_fields) - _fields_attacked() == set()


def test_the_base_request_is_served_by_every_route(
    hostile_server: server_support.LiveServer, town: dict[str, Any]
) -> None:
    body = json.dumps(base_request(town)).encode()
    series = json.dumps({k: v for k, v in base_request(town).items() if k in SERIES_FIELDS}).encode()
    with hostile_server.client() as client:
        for path, content in [("/v1/indicators", body), ("/v1/series", series), ("/v1/plots/series", body),
                              ("/v1/plots/map", body)]:  # fmt: skip
            response = client.post(path, content=content, headers={"Content-Type": "application/json"})
            assert response.status_code == 200, (path, response.text[:300])
        assert (
            client.post("/v1/jobs", content=body, headers={"Content-Type": "application/json"}).status_code
            == 202
        )


@pytest.mark.parametrize("case", _params())
def test_a_hostile_case_is_refused_by_every_route_without_a_server_error(
    hostile_server: server_support.LiveServer, town: dict[str, Any], case: dict[str, Any]
) -> None:
    name, expect = case["name"], case["expect"]
    body = case_body(case, town)
    with hostile_server.client() as client:
        on_demand = post(client, "/v1/indicators", case, body)
        problem = check_problem(on_demand, "/v1/indicators", name)
        assert on_demand.status_code == expect["status"], (name, on_demand.text[:300])
        check_expected(problem, expect, name)
        # The same request as a job: refused at submission exactly as on demand, unless the fault is one
        # feature's (a job skips it; with no feature left the job is refused) or a limit of its own.
        submitted = post(client, "/v1/jobs", case, body)
        job_problem = check_problem(submitted, "/v1/jobs", name)
        job_expect = {**expect, **case.get("job", {})}
        if case["level"] == "feature":
            assert submitted.status_code == 422 and job_problem is not None, (name, submitted.text[:300])
            assert job_problem.get("feature_id") or job_problem.get("pointer"), (name, job_problem)
        else:
            assert submitted.status_code == job_expect["status"], (name, submitted.text[:300])
            if job_expect["status"] >= 400:
                assert job_problem is not None and job_problem["type"] == problem["type"], (name, job_problem)
        for path in ("/v1/plots/series", "/v1/plots/map"):
            check_problem(post(client, path, case, body), path, name)
        series = case_body(case, town, series=True)
        check_problem(post(client, "/v1/series", case, series), "/v1/series", name)
