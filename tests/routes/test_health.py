"""service.routes.health: liveness and readiness on a live server."""

from __future__ import annotations

from service import __version__
from tests import _support_server as server_support

live_server = server_support.live_server


def test_health_answers_with_the_version(live_server: server_support.LiveServer) -> None:
    with live_server.client() as client:
        response = client.get("/health")
    assert response.status_code == 200
    assert response.json() == {"status": "ok", "version": __version__}


def test_ready_names_the_datasets_and_the_job_worker(live_server: server_support.LiveServer) -> None:
    with live_server.client() as client:
        response = client.get("/ready")
    assert response.status_code == 200
    body = response.json()
    assert body["status"] == "ready" and body["datasets"] == ["demo"] and body["job_worker"] == "alive"
    assert body["jobs_queued"] >= 0 and body["jobs_running"] >= 0
