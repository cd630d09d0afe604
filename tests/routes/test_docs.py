"""/docs and /redoc: the API documentation renders its operations in Chromium with the network closed."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service.routes.docs import ASSETS
from tests import _support_server as server_support
from tests._support_tools import OFFLINE_FLAGS, Browser, WebDriver, chromium  # noqa: F401 - fixture

live_server = server_support.live_server


def _operations(live: server_support.LiveServer) -> list[str]:
    with live.client() as client:
        schema = client.get("/openapi.json").json()
    return [op["operationId"] for path in schema["paths"].values() for op in path.values()]


def test_the_docs_pages_load_nothing_from_elsewhere(live_server: server_support.LiveServer) -> None:
    with live_server.client() as client:
        pages = {path: client.get(path) for path in ("/docs", "/redoc")}
        assets = {name: client.get(f"/docs/assets/{name}") for name in ASSETS}
        elsewhere = client.get("/docs/assets/..%2F..%2Fapp.py")
    for path, page in pages.items():
        assert page.status_code == 200 and page.headers["content-type"].startswith("text/html"), path
        sources = re.findall(r'(?:src|href)="([^"]+)"', page.text)
        assert sources and all(s.startswith("/docs/assets/") for s in sources), (path, sources)
        assert not re.search(r"https?://(?!127\.0\.0\.1)", page.text), path
        assert "default-src 'self'" in page.headers["content-security-policy"], path
    for name, asset in assets.items():
        assert asset.status_code == 200 and asset.headers["content-type"].startswith(ASSETS[name]), name
        assert len(asset.content) > 1000, name
    assert elsewhere.status_code == 404


@pytest.mark.browser
@pytest.mark.parametrize(
    ("path", "operation_selector"),
    [
        ("/docs", ".opblock"),  # Swagger UI: one block per operation
        ("/redoc", "[data-section-id^='operation/']"),  # ReDoc: one section per operation
    ],
)
def test_the_docs_render_every_operation_offline(
    live_server: server_support.LiveServer,
    chromium: Browser,  # noqa: F811
    tmp_path: Path,
    path: str,
    operation_selector: str,
) -> None:
    operations = _operations(live_server)
    driver = WebDriver(chromium, extra_args=OFFLINE_FLAGS)
    try:
        # The network is closed: a host name other than the loopback's does not resolve.
        with pytest.raises(RuntimeError, match="ERR_NAME_NOT_RESOLVED"):
            driver.get("http://example.org/")
        driver.get(live_server.base_url + path)
        shown = driver.wait_for(
            f'document.querySelectorAll("{operation_selector}").length >= {len(operations)} && '
            f'document.querySelectorAll("{operation_selector}").length',
            timeout=60,
        )
        assert shown == len(operations)
        text = driver.execute("return document.body.innerText;")
        assert "wxshock" in text and "/v1/indicators" in text
        # Everything that arrived came from this server; ReDoc's attempt at its makers' logo on their CDN is
        # stopped by the page's Content-Security-Policy (and could not resolve anyway).
        loaded = driver.execute(
            "return performance.getEntriesByType('resource').map(e => [e.name, e.responseStatus, e.transferSize]);"
        )
        arrived = [url for url, status, size in loaded if status or size]
        assert arrived and all(url.startswith(live_server.base_url) for url in arrived), loaded
        (tmp_path / f"docs{path.replace('/', '-')}.png").write_bytes(driver.screenshot())
    finally:
        driver.close()
