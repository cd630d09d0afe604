"""Outside tools the tests drive: R (Rscript with the R client's packages) and headless Chromium with chromedriver.

Each session fixture finds the tool, or installs it from Debian's packages when it is missing (apt-get update
once per session, then apt-get install), and skips with the reason only when it cannot be installed (not
root, no apt-get, no network to the mirror). ``WebDriver`` speaks the W3C WebDriver protocol to chromedriver
over plain HTTP (httpx), so no browser-automation package is needed.

Usage::

    from tests._support_tools import chromium, rscript, WebDriver   # fixtures by import
"""

from __future__ import annotations

import base64
import os
import shutil
import subprocess
import tempfile
import threading
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import pytest

# R and what the R client (clients/r) needs to install, check and test: Debian's packages only.
R_PACKAGES = (
    "r-base-core",
    "r-cran-httr2",
    "r-cran-jsonlite",
    "r-cran-sf",
    "r-cran-tibble",
    "r-cran-haven",
    "r-cran-testthat",
)
R_LIBRARIES = ("httr2", "jsonlite", "sf", "tibble", "haven", "testthat")
BROWSER_PACKAGES = ("chromium", "chromium-driver")
CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
)
APT_TIMEOUT_S = 1200

_apt_lock = threading.Lock()
_apt_updated: list[bool] = []


def apt_install(packages: Sequence[str]) -> str | None:
    """Install Debian packages (apt-get update first, once per session); None on success, else why not."""
    if shutil.which("apt-get") is None:
        return "apt-get is not available on this machine"
    if os.geteuid() != 0:
        return "installing Debian packages needs root, and the tests do not run as root"
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    with _apt_lock:
        if not _apt_updated:
            update = subprocess.run(
                ["apt-get", "update"], capture_output=True, text=True, env=env, timeout=APT_TIMEOUT_S
            )
            if update.returncode != 0:
                return f"apt-get update failed: {update.stderr.strip()[-300:]}"
            _apt_updated.append(True)
        install = subprocess.run(
            ["apt-get", "install", "-y", "--no-install-recommends", *packages],
            capture_output=True,
            text=True,
            env=env,
            timeout=APT_TIMEOUT_S,
        )
    if install.returncode != 0:
        return f"apt-get install {' '.join(packages)} failed: {install.stderr.strip()[-300:]}"
    return None


def _r_ready(rscript: str) -> bool:
    """Rscript runs and finds every package of R_LIBRARIES."""
    wanted = ", ".join(f'"{name}"' for name in R_LIBRARIES)
    probe = subprocess.run(
        [rscript, "-e", f"stopifnot(all(vapply(c({wanted}), requireNamespace, TRUE, quietly = TRUE)))"],
        capture_output=True,
        timeout=120,
    )
    return probe.returncode == 0


@pytest.fixture(scope="session")
def rscript() -> str:
    """Path of Rscript with the R client's packages loadable, installed from Debian when missing."""
    found = shutil.which("Rscript")
    if found and _r_ready(found):
        return found
    reason = apt_install(R_PACKAGES)
    found = shutil.which("Rscript")
    if reason is not None or not found or not _r_ready(found):
        pytest.skip(
            f"R with {', '.join(R_LIBRARIES)} cannot be installed: "
            f"{reason or 'Rscript still fails to load them'}"
        )
    return found


@dataclass(frozen=True)
class Browser:
    """Paths of headless Chromium and its chromedriver."""

    chromium: str
    chromedriver: str

    def screenshot(
        self, url: str, out: Path, *, size: tuple[int, int] = (1280, 900), wait_ms: int = 15000
    ) -> Path:
        """A one-shot `chromium --headless --screenshot` of ``url`` after ``wait_ms`` of page time."""
        with tempfile.TemporaryDirectory(prefix="wxshock-chromium-") as profile:
            subprocess.run(
                [
                    self.chromium,
                    *CHROMIUM_FLAGS,
                    f"--user-data-dir={profile}",
                    f"--window-size={size[0]},{size[1]}",
                    f"--virtual-time-budget={wait_ms}",
                    f"--screenshot={out}",
                    url,
                ],
                capture_output=True,
                timeout=120,
                check=True,
            )
        return out


@pytest.fixture(scope="session")
def chromium() -> Browser:
    """Headless Chromium and chromedriver, installed from Debian when missing."""
    paths = shutil.which("chromium"), shutil.which("chromedriver")
    if not all(paths):
        reason = apt_install(BROWSER_PACKAGES)
        paths = shutil.which("chromium"), shutil.which("chromedriver")
        if not all(paths):
            pytest.skip(
                f"Chromium and chromedriver cannot be installed: {reason or 'not found after install'}"
            )
    return Browser(chromium=str(paths[0]), chromedriver=str(paths[1]))


# Chromium with the network closed: every host name fails to resolve except this machine's loopback
# addresses, so a page that needs anything from the internet shows it.
OFFLINE_FLAGS = ("--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1, EXCLUDE localhost",)


# --- a minimal W3C WebDriver client -------------------------------------------------------------------------

ELEMENT = "element-6066-11e4-a52e-4f735466cecf"  # the W3C WebDriver web element identifier


class WebDriver:
    """One headless Chromium session driven through chromedriver on 127.0.0.1 (W3C protocol, JSON over HTTP)."""

    def __init__(
        self, browser: Browser, *, size: tuple[int, int] = (1280, 1000), extra_args: Sequence[str] = ()
    ) -> None:
        from tests._support_server import free_port

        self.port = free_port()
        self._profile = tempfile.TemporaryDirectory(prefix="wxshock-chromium-")
        self._process = subprocess.Popen(
            [browser.chromedriver, f"--port={self.port}", "--allowed-ips=127.0.0.1"],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        self._http = httpx.Client(base_url=f"http://127.0.0.1:{self.port}", timeout=60.0)
        self._wait_for_driver()
        args = [
            *CHROMIUM_FLAGS,
            f"--user-data-dir={self._profile.name}",
            f"--window-size={size[0]},{size[1]}",
            *extra_args,
        ]
        capabilities = {
            "capabilities": {
                "alwaysMatch": {
                    "browserName": "chrome",
                    "goog:chromeOptions": {"binary": browser.chromium, "args": args},
                }
            }
        }
        self.session = self._send("POST", "/session", capabilities)["sessionId"]

    def _wait_for_driver(self, timeout: float = 20.0) -> None:
        """Wait until chromedriver answers /status."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                if self._http.get("/status").status_code == 200:
                    return
            except httpx.HTTPError:
                time.sleep(0.1)
        raise RuntimeError("chromedriver did not start")

    def _send(self, method: str, path: str, payload: dict[str, Any] | None = None) -> Any:
        """One WebDriver command; raises with the driver's message on error."""
        response = self._http.request(method, path, json=payload if payload is not None else None)
        value = response.json().get("value")
        if response.status_code >= 400:
            raise RuntimeError(f"WebDriver {method} {path}: {value}")
        return value

    def command(self, method: str, path: str, payload: dict[str, Any] | None = None) -> Any:
        """A command within the session."""
        return self._send(method, f"/session/{self.session}{path}", payload)

    def get(self, url: str) -> None:
        """Open a page."""
        self.command("POST", "/url", {"url": url})

    def find(self, css: str) -> str:
        """The element id of the first match of a CSS selector."""
        return self.command("POST", "/element", {"using": "css selector", "value": css})[ELEMENT]

    def execute(self, script: str, *args: Any) -> Any:
        """Run JavaScript in the page and return its value."""
        return self.command("POST", "/execute/sync", {"script": script, "args": list(args)})

    def click(self, css: str) -> None:
        """Click the first element matching ``css``."""
        self.command("POST", f"/element/{self.find(css)}/click", {})

    def type(self, css: str, text: str) -> None:
        """Clear an input and type ``text`` into it."""
        element = self.find(css)
        self.command("POST", f"/element/{element}/clear", {})
        self.command("POST", f"/element/{element}/value", {"text": text})

    def wait_for(self, script: str, timeout: float = 60.0) -> Any:
        """Poll a JavaScript expression until it is truthy; return its value."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            value = self.execute(f"return ({script});")
            if value:
                return value
            time.sleep(0.2)
        raise TimeoutError(f"the page never satisfied {script!r}")

    def screenshot(self) -> bytes:
        """A PNG of the current viewport."""
        return base64.b64decode(self.command("GET", "/screenshot"))

    def close(self) -> None:
        """End the session and stop chromedriver."""
        try:
            self._send("DELETE", f"/session/{self.session}")
        except (RuntimeError, httpx.HTTPError):
            pass
        self._http.close()
        self._process.terminate()
        try:
            self._process.wait(10)
        except subprocess.TimeoutExpired:
            self._process.kill()
        self._profile.cleanup()


@pytest.fixture
def webdriver(chromium: Browser) -> Iterator[WebDriver]:
    """A fresh headless Chromium session for one test."""
    driver = WebDriver(chromium)
    try:
        yield driver
    finally:
        driver.close()
