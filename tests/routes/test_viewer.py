"""The viewer at /: served without anything from the internet, and driven end to end in headless Chromium."""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np
import pytest
from matplotlib.colors import to_rgb
from PIL import Image

from service.plots import NEUTRAL
from service.routes.viewer import STATIC
from tests._support_server import live_server  # noqa: F401 - fixture
from tests._support_tools import Browser, WebDriver, chromium, webdriver  # noqa: F401 - fixtures


def test_the_page_and_its_assets_are_served(live_server) -> None:  # noqa: F811
    with live_server.client() as http:
        page = http.get("/")
        script = http.get("/viewer/viewer.js")
        style = http.get("/viewer/viewer.css")
        elsewhere = http.get("/viewer/..%2Fsettings.py")
        communities = http.get("/viewer/data/communities", params={"dataset": "demo"})
        unknown = http.get("/viewer/data/communities", params={"dataset": "elsewhere"})
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    assert '<script src="/viewer/viewer.js">' in page.text
    assert script.headers["content-type"].startswith("text/javascript")
    assert style.headers["content-type"].startswith("text/css")
    assert elsewhere.status_code == 404
    assert communities.status_code == 200
    assert communities.headers["content-type"].startswith("application/geo+json")
    assert len(communities.json()["features"]) == 62
    assert unknown.status_code == 404 and unknown.headers["content-type"] == "application/problem+json"


def test_nothing_comes_from_the_internet() -> None:
    # No CDN, no web fonts, no map tiles: the only URL in the assets is the SVG namespace name (never fetched).
    for name in ("index.html", "viewer.js", "viewer.css"):
        text = (STATIC / name).read_text(encoding="utf-8")
        urls = set(re.findall(r"(?:https?:)?//[a-z0-9.-]+\.[a-z]{2,}[^\s\"')]*", text))
        assert urls <= {"http://www.w3.org/2000/svg"}, (name, urls)


def _pixels(png: bytes) -> np.ndarray:
    """A PNG as an (height, width, 3) float array in 0..1."""
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"), dtype=float) / 255.0


@pytest.mark.browser
def test_pick_a_community_baseline_and_lags_and_see_table_and_plot(
    live_server,  # noqa: F811
    webdriver: WebDriver,  # noqa: F811
) -> None:
    driver = webdriver
    driver.get(live_server.base_url + "/")
    driver.wait_for("document.body.dataset.state === 'idle'")
    assert driver.execute("return document.querySelectorAll('#community option').length;") == 62
    assert driver.execute("return document.querySelectorAll('#outlines .community').length;") == 62
    # Pick community qu-004 by clicking its outline, as a user would.
    driver.click('#outlines .community[data-id="qu-004"]')
    assert driver.execute("return document.getElementById('community').value;") == "qu-004"
    driver.type("#baseline-start", "1981")
    driver.type("#baseline-end", "1990")
    driver.type("#lags", "0, 2")
    driver.click("#show")
    driver.wait_for("document.body.dataset.state === 'ready' || document.body.dataset.state === 'error'")
    assert driver.execute("return document.body.dataset.state;") == "ready", driver.execute(
        "return document.getElementById('problem').textContent;"
    )
    columns = driver.execute("return [...document.querySelectorAll('#table th')].map(th => th.textContent);")
    assert {"feature_id", "year", "prcp_total_z", "tmean_z_lag2", "dry_hot_run"} <= set(columns)
    years = driver.execute(
        "return [...document.querySelectorAll('#table tbody tr')].map(r => r.cells[1].textContent);"
    )
    assert years[0] == "1977" and years[-1] == "2022" and len(years) == 46  # lag 2 from data starting 1975
    ids = set(
        driver.execute(
            "return [...document.querySelectorAll('#table tbody tr')].map(r => r.cells[0].textContent);"
        )
    )
    assert ids == {"qu-004"}
    plot = driver.execute(
        "const img = document.getElementById('series'); const r = img.getBoundingClientRect();"
        "return {w: img.naturalWidth, h: img.naturalHeight, x: r.left, y: r.top, cw: r.width, ch: r.height};"
    )
    assert (plot["w"], plot["h"]) == (1000, 640)
    assert "fingerprint sha256:" in driver.execute(
        "return document.getElementById('provenance').textContent;"
    )
    # The result's warnings (values left empty, and why) are listed, one item each.
    listed = driver.execute(
        "return [...document.querySelectorAll('#warnings li')].map(li => li.textContent);"
    )
    status = driver.execute("return document.getElementById('status').textContent;")
    if listed:
        assert f"{len(listed)} value(s) left empty" in status and all(item.strip() for item in listed)
    else:
        assert "left empty" not in status

    # The screenshot holds the picture where the page put it: near-normal bars and coloured class bands.
    shot = _pixels(driver.screenshot())
    ratio = driver.execute("return window.devicePixelRatio;")
    top, left = int(plot["y"] * ratio), int(plot["x"] * ratio)
    bottom, right = int((plot["y"] + plot["ch"]) * ratio), int((plot["x"] + plot["cw"]) * ratio)
    region = shot[top : min(bottom, shot.shape[0]), left:right]
    assert region.size > 0
    neutral = np.asarray(to_rgb(NEUTRAL))
    near_normal_bars = (np.abs(region - neutral) <= 0.02).all(axis=2).sum()
    assert near_normal_bars > 500
    outside = shot[:, : max(left - 10, 1)]  # the controls column: no bar of the picture there
    assert (np.abs(outside - neutral) <= 0.02).all(axis=2).sum() < near_normal_bars / 3
    assert len(np.unique((shot * 255).astype(np.uint8).reshape(-1, 3), axis=0)) > 200  # not a blank page


@pytest.mark.browser
def test_a_refused_request_shows_the_problem(live_server, webdriver: WebDriver) -> None:  # noqa: F811
    driver = webdriver
    driver.get(live_server.base_url + "/?community=qu-002&baseline=1900-1910&lags=0")
    driver.wait_for("document.body.dataset.state === 'error'")
    problem = driver.execute("return document.getElementById('problem').textContent;")
    assert "(422)" in problem and "1900-1910" in problem
    driver.type("#lags", "0, -1")
    driver.click("#show")
    driver.wait_for("document.getElementById('problem').textContent.includes('/lags')")


@pytest.mark.browser
def test_a_link_carries_the_choice_into_a_one_shot_screenshot(
    live_server,  # noqa: F811
    chromium: Browser,  # noqa: F811
    tmp_path: Path,
) -> None:
    # `chromium --headless --screenshot` of a link that names the community, baseline and lags: the page
    # computes on its own, and the shot shows the picture's bars and the table's shaded z cells.
    shot = chromium.screenshot(
        live_server.base_url + "/?community=qu-003&baseline=1981-1990&lags=0,1", tmp_path / "link.png"
    )
    pixels = _pixels(shot.read_bytes())
    assert pixels.shape[:2] == (900, 1280)
    neutral_bars = (np.abs(pixels - np.asarray(to_rgb(NEUTRAL))) <= 0.02).all(axis=2)
    assert neutral_bars.sum() > 500
    columns = np.nonzero(neutral_bars)[1]
    assert (columns > 330).mean() > 0.9  # in the results column, right of the controls
