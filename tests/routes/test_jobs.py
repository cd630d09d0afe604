"""service.routes.jobs: the batch job lifecycle over HTTP: submit, follow, fetch, cancel, idempotency."""

from __future__ import annotations

import copy
import time
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.settings import Settings
from tests import _support_server as server_support

live_server = server_support.live_server

INDICATORS = ["prcp_total", "tmean", {"name": "gdd", "base": 10, "cap": 30}]


def _body(communities: dict[str, Any], n: int = 3, **fields: Any) -> dict[str, Any]:
    """An indicator request for n demo communities (repeated under new ids when n exceeds them)."""
    base = communities["features"]
    features = []
    for i in range(n):
        feature = copy.deepcopy(base[i % len(base)])
        feature["id"] = f"{feature['id']}-{i}" if n > len(base) else feature["id"]
        features.append(feature)
    return {
        "features": {"type": "FeatureCollection", "features": features},
        "indicators": INDICATORS,
        **fields,
    }


def _follow(client: httpx.Client, location: str, until: set[str], timeout: float = 90.0) -> dict[str, Any]:
    """Poll a job until its state is in ``until``."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        status = client.get(location).json()
        if status["state"] in until:
            return status
        time.sleep(0.05)
    raise AssertionError(f"{location} never reached {until}")


def _problem(response: httpx.Response, status: int) -> dict[str, Any]:
    """The problem document of an error response, checked for status and media type."""
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == "application/problem+json"
    return response.json()


def test_a_job_is_accepted_followed_and_its_result_equals_the_on_demand_answer(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _body(tiny_communities, 3, lags=[0, 1])
    with live_server.client() as client:
        response = client.post("/v1/jobs", json=body, params={"format": "csv"})
        assert response.status_code == 202, response.text
        location = response.headers["Location"]
        accepted = response.json()
        assert location == f"/v1/jobs/{accepted['id']}" == accepted["links"]["self"]
        assert (
            accepted["state"] == "queued" and accepted["features_total"] == 3 and accepted["format"] == "csv"
        )
        done = _follow(client, location, {"succeeded", "failed"})
        assert done["state"] == "succeeded", done
        assert done["features_done"] == 3 and done["progress"] == 1.0 and done["seconds_left"] == 0.0
        assert done["started_at"] >= done["created_at"] and done["finished_at"] >= done["started_at"]
        result = client.get(done["links"]["result"])
        on_demand = client.post("/v1/indicators", json=body, params={"format": "csv"})
    assert result.status_code == 200 and result.headers["content-type"].startswith("text/csv")
    assert result.content == on_demand.content
    assert result.headers["X-Wxshock-Request-Hash"] == on_demand.headers["X-Wxshock-Request-Hash"]
    assert 'filename="wxshock-' in result.headers["content-disposition"]


def test_a_queued_or_running_job_can_be_cancelled_and_has_no_result(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    with live_server.client() as client:
        response = client.post("/v1/jobs", json=_body(tiny_communities, 150))
        assert response.status_code == 202
        location = response.headers["Location"]
        early = _problem(client.get(location + "/result"), 409)
        assert (
            early["type"].endswith("/job-state")
            and "its result is served once it has succeeded" in early["detail"]
        )
        cancelled = client.delete(location)
        assert cancelled.status_code == 200 and cancelled.json()["state"] == "cancelled"
        time.sleep(0.3)
        assert client.get(location).json()["state"] == "cancelled"
        assert client.delete(location).json()["state"] == "cancelled"  # again: harmless
        _problem(client.get(location + "/result"), 409)


def test_a_repeated_idempotency_key_returns_the_same_job(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _body(tiny_communities, 2)
    headers = {"Idempotency-Key": "wave-2-upload-7"}
    with live_server.client() as client:
        first = client.post("/v1/jobs", json=body, headers=headers)
        again = client.post("/v1/jobs", json=body, headers=headers)
        assert first.status_code == again.status_code == 202
        assert again.json()["id"] == first.json()["id"]
        assert again.headers["Location"] == first.headers["Location"]
        assert again.headers["Idempotent-Replayed"] == "true"
        other = _problem(client.post("/v1/jobs", json=_body(tiny_communities, 4), headers=headers), 422)
        assert (
            "already used for a different request" in other["detail"] and other["field"] == "Idempotency-Key"
        )
        without_key = client.post("/v1/jobs", json=body)
        assert without_key.json()["id"] != first.json()["id"]
        done = _follow(client, first.headers["Location"], {"succeeded", "failed"})
        assert done["state"] == "succeeded"
        finished = _problem(client.delete(first.headers["Location"]), 409)
        assert "already succeeded" in finished["detail"]
        refused = _problem(client.get(done["links"]["result"], headers={"Accept": "text/csv"}), 406)
        assert "parquet" in refused["detail"]


@pytest.mark.parametrize("path", ["/v1/jobs/0123456789abcdef", "/v1/jobs/nothing/result"])
def test_an_unknown_job_is_a_404_problem(live_server: server_support.LiveServer, path: str) -> None:
    with live_server.client() as client:
        problem = _problem(client.get(path), 404)
    assert problem["type"].endswith("/unknown-job") and "never submitted" in problem["detail"]


def test_a_request_the_run_would_refuse_is_refused_at_submission(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    with live_server.client() as client:
        before = client.get("/ready").json()["jobs_queued"]
        problem = _problem(
            client.post("/v1/jobs", json=_body(tiny_communities, 2, baseline={"start": 1900, "end": 1910})),
            422,
        )
        assert problem["type"].endswith("/out-of-range") and "1900-1910" in problem["detail"]
        unknown = _problem(client.post("/v1/jobs", json=_body(tiny_communities, 1, dataset="elsewhere")), 404)
        assert unknown["type"].endswith("/unknown-dataset")
        assert client.get("/ready").json()["jobs_queued"] <= before


def _squares_on_data(store_path: Path, count: int) -> dict[str, Any]:
    """``count`` small square communities, each inside a grid cell that has data."""
    import numpy as np

    from service.store import open_store

    store = open_store(store_path)
    rows, cols = np.nonzero(store.data_mask())
    x, y = store.grid.x, store.grid.y
    half_x, half_y = abs(float(x[1] - x[0])) / 4, abs(float(y[1] - y[0])) / 4
    features = []
    for i in range(count):
        cx, cy = float(x[cols[i % len(cols)]]), float(y[rows[i % len(rows)]])
        ring = [[cx - half_x, cy - half_y], [cx + half_x, cy - half_y], [cx + half_x, cy + half_y],
                [cx - half_x, cy + half_y], [cx - half_x, cy - half_y]]  # fmt: skip
        features.append({"type": "Feature", "id": f"hh-{i:05d}", "properties": {}, "geometry": {
            "type": "Polygon", "coordinates": [ring]}})  # fmt: skip
    return {"type": "FeatureCollection", "features": features}


@pytest.mark.slow
def test_a_job_of_20000_features_is_accepted_followed_and_cancelled(tiny_demo: Path, tmp_path: Path) -> None:
    body = {"features": _squares_on_data(tiny_demo, 20_000), "indicators": INDICATORS}
    settings = Settings(stores=[str(tiny_demo)], data_dir=tmp_path)
    with server_support.thread_server(settings) as server, server.client(timeout=120) as client:
        response = client.post("/v1/jobs", json=body)
        assert response.status_code == 202, response.text[:500]
        accepted = response.json()
        assert accepted["features_total"] == 20_000
        status = client.get(response.headers["Location"]).json()
        assert status["state"] in ("queued", "running") and status["features_done"] < 20_000
        assert client.get("/health").status_code == 200
        cancelled = client.delete(response.headers["Location"]).json()
        assert cancelled["state"] == "cancelled"


# --- owners (issue 12, finding 2) -----------------------------------------------------------------------------

ALICE, BOB, LEAD, PLAIN = (
    "alice-token-0123456789",
    "bob-token-0123456789x",
    "lead-token-0123456789",
    "plain-token-012345678",
)


@pytest.fixture(scope="module")
def shared_server(tiny_demo: Path, tmp_path_factory: pytest.TempPathFactory):
    """A group server: named tokens for alice and bob, an admin, and one plain token."""
    import hashlib

    data_dir = tmp_path_factory.mktemp("shared")
    token_file = data_dir / "tokens"

    def digest(token: str) -> str:
        return hashlib.sha256(token.encode()).hexdigest()

    token_file.write_text(
        f"# the group's tokens\n{digest(ALICE)} alice\n{digest(BOB)} bob  # a student\n{digest(LEAD)} lead admin\n",
        encoding="utf-8",
    )
    settings = Settings(stores=[str(tiny_demo)], data_dir=data_dir, tokens=[PLAIN], token_file=token_file)
    with server_support.thread_server(settings) as server:
        yield server


def test_a_job_is_seen_fetched_and_cancelled_only_by_its_owner_or_an_admin(
    shared_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    # The attack: with several tokens, any holder read another's job status and result and cancelled it.
    with shared_server.client(token=ALICE) as alice, shared_server.client(token=BOB) as bob:
        submitted = alice.post("/v1/jobs", json=_body(tiny_communities, 2))
        assert submitted.status_code == 202 and submitted.json()["owner"] == "alice"
        location = submitted.headers["Location"]
        done = _follow(alice, location, {"succeeded", "failed"})
        assert done["state"] == "succeeded"
        for method, path in [("GET", location), ("GET", location + "/result"), ("DELETE", location)]:
            refused = _problem(bob.request(method, path), 404)
            assert refused["type"].endswith("/unknown-job") and "of yours" in refused["detail"]
        assert bob.get("/v1/jobs").json()["jobs"] == []
        assert [j["id"] for j in alice.get("/v1/jobs").json()["jobs"]] == [done["id"]]
    with shared_server.client(token=LEAD) as lead:
        assert lead.get(location).json()["owner"] == "alice"
        assert lead.get(location + "/result").status_code == 200
        assert done["id"] in [j["id"] for j in lead.get("/v1/jobs").json()["jobs"]]


def test_idempotency_keys_are_scoped_per_owner_and_never_echo_another_job(
    shared_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    # The attack: reusing someone else's Idempotency-Key returned their job; with another body the 422 named it.
    key = {"Idempotency-Key": "wave-7-upload"}
    with shared_server.client(token=ALICE) as alice, shared_server.client(token=BOB) as bob:
        mine = alice.post("/v1/jobs", json=_body(tiny_communities, 2), headers=key)
        theirs = bob.post("/v1/jobs", json=_body(tiny_communities, 2), headers=key)
        assert mine.status_code == theirs.status_code == 202
        assert theirs.json()["id"] != mine.json()["id"] and "Idempotent-Replayed" not in theirs.headers
        other_body = bob.post("/v1/jobs", json=_body(tiny_communities, 3), headers=key)
        problem = _problem(other_body, 422)
        assert mine.json()["id"] not in other_body.text and theirs.json()["id"] in problem["detail"]
        again = alice.post("/v1/jobs", json=_body(tiny_communities, 2), headers=key)
        assert again.json()["id"] == mine.json()["id"] and again.headers["Idempotent-Replayed"] == "true"


def test_a_plain_token_owns_its_jobs_under_a_name_made_from_its_digest(
    shared_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    import hashlib

    with shared_server.client(token=PLAIN) as plain:
        status = plain.post("/v1/jobs", json=_body(tiny_communities, 1)).json()
    owner = "token-" + hashlib.sha256(PLAIN.encode()).hexdigest()[:8]
    assert status["owner"] == owner and PLAIN not in str(status)
    with shared_server.client(token=PLAIN) as plain:
        listed = plain.get("/v1/jobs", params={"limit": 5}).json()["jobs"]
    assert {j["owner"] for j in listed} == {owner}


# --- per-feature faults: invalid_features (issue 12, findings 4 and 5) ----------------------------------------


def _skip_api() -> bool:
    """Whether service.geometry can skip bad features (i11-geometry's invalid='skip')."""
    import inspect

    from service.geometry import parse_features

    return "invalid" in inspect.signature(parse_features).parameters


needs_skip = pytest.mark.skipif(
    not _skip_api(), reason="service.geometry has no invalid='skip' yet (i11-geometry)"
)


def _with_bad(communities: dict[str, Any], n: int = 4) -> dict[str, Any]:
    """n demo communities, the second moved off the grid and the fourth with its coordinates swapped."""
    body = _body(communities, n)
    features = body["features"]["features"]
    features[1] = {**features[1], "geometry": {"type": "Polygon", "coordinates": [
        [[10.0, 10.0], [10.05, 10.0], [10.05, 10.05], [10.0, 10.05], [10.0, 10.0]]]}}  # fmt: skip
    ring = features[3]["geometry"]["coordinates"][0]
    if features[3]["geometry"]["type"] == "Polygon":
        features[3] = {
            **features[3],
            "geometry": {"type": "Polygon", "coordinates": [[[y, x] for x, y in ring]]},
        }
    return body


def test_on_demand_one_422_lists_every_bad_feature(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _with_bad(tiny_communities)
    with live_server.client() as client:
        problem = _problem(client.post("/v1/indicators", json=body), 422)
    bad = {body["features"]["features"][1]["id"], body["features"]["features"][3]["id"]}
    assert {e["feature_id"] for e in problem["errors"]} == bad, problem


@needs_skip
def test_a_job_skips_bad_features_keeps_their_rows_and_lists_them(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _with_bad(tiny_communities)
    ids = [f["id"] for f in body["features"]["features"]]
    with live_server.client() as client:
        accepted = client.post("/v1/jobs", json=body, params={"format": "json"})
        assert accepted.status_code == 202, accepted.text
        status = accepted.json()
        assert status["features_skipped"] == 2 and {s["feature_id"] for s in status["skipped"]} == {
            ids[1],
            ids[3],
        }
        assert all(s["code"] and s["reason"] and s["pointer"] for s in status["skipped"])
        done = _follow(client, accepted.headers["Location"], {"succeeded", "failed"})
        assert done["state"] == "succeeded", done
        document = client.get(done["links"]["result"]).json()
        good = client.post(
            "/v1/indicators",
            json={
                **body,
                "features": {
                    **body["features"],
                    "features": [body["features"]["features"][i] for i in (0, 2)],
                },
            },
            params={"format": "json"},
        ).json()
    rows = document["rows"]
    assert [r["feature_id"] for r in rows[:: len(rows) // 4]] == ids  # every feature keeps its rows, in order
    skipped_rows = [r for r in rows if r["feature_id"] in (ids[1], ids[3])]
    assert skipped_rows and all(r["prcp_total"] is None and r["tmean_z"] is None for r in skipped_rows)
    kept = [r for r in rows if r["feature_id"] in (ids[0], ids[2])]
    assert kept == good["rows"]  # the other features' rows are unchanged
    listed = document["provenance"]["request"]["features"]["skipped"]
    assert {e["feature_id"] for e in listed} == {ids[1], ids[3]}
    codes = {
        (w["feature_id"], w.get("code")) for w in document["warnings"] if w["feature_id"] in (ids[1], ids[3])
    }
    assert codes == {(ids[1], "feature_skipped"), (ids[3], "feature_skipped")}


def test_a_job_in_which_no_feature_can_be_computed_is_refused(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = _with_bad(tiny_communities)
    body["features"]["features"] = body["features"]["features"][1:2]
    with live_server.client() as client:
        problem = _problem(client.post("/v1/jobs", json=body), 422)
    assert problem.get("feature_id") == body["features"]["features"][0]["id"]


def test_a_job_asking_to_fail_on_bad_features_is_refused_at_submission(
    live_server: server_support.LiveServer, tiny_communities: dict
) -> None:
    body = {**_with_bad(tiny_communities), "invalid_features": "fail"}
    with live_server.client() as client:
        before = client.get("/ready").json()["jobs_queued"]
        problem = _problem(client.post("/v1/jobs", json=body), 422)
        assert len(problem["errors"]) == 2
        assert client.get("/ready").json()["jobs_queued"] <= before
