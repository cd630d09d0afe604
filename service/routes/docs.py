"""The API's documentation pages, /docs (Swagger UI) and /redoc (ReDoc), served without the internet.

FastAPI's own pages load their scripts from a CDN, so they stay blank on a network without one. Here the
same pages load the scripts and style sheets that the fastapi-offline package ships (Swagger UI 5 and
ReDoc 2 as files), served from /docs/assets/; nothing is fetched from anywhere but this server.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

from fastapi import APIRouter, HTTPException
from fastapi.openapi.docs import get_redoc_html, get_swagger_ui_html
from fastapi.responses import FileResponse, HTMLResponse

ASSET_PREFIX = "/docs/assets"
ASSETS = {
    "swagger-ui-bundle.js": "text/javascript",
    "swagger-ui.css": "text/css",
    "redoc.standalone.js": "text/javascript",
    "favicon.png": "image/png",
}
TITLE = "wxshock API"
# The pages may load from this server only (ReDoc would otherwise fetch its makers' logo from their CDN):
# inline scripts and styles are the pages' own set-up, blob: workers are ReDoc's search.
CONTENT_SECURITY_POLICY = (
    "default-src 'self'; script-src 'self' 'unsafe-inline' blob:; style-src 'self' 'unsafe-inline'; "
    "img-src 'self' data:; font-src 'self' data:; worker-src 'self' blob:; connect-src 'self'"
)

router = APIRouter(include_in_schema=False)


def assets_directory() -> Path:
    """Where the installed fastapi-offline package keeps its copies of the docs' scripts."""
    spec = importlib.util.find_spec("fastapi_offline")
    if spec is None or spec.origin is None:
        raise RuntimeError("the fastapi-offline package is not installed; the /docs assets come from it")
    return Path(spec.origin).resolve().parent / "static"


@router.get("/docs")
def swagger_page() -> HTMLResponse:
    """The interactive API documentation (Swagger UI)."""
    page = get_swagger_ui_html(
        openapi_url="/openapi.json",
        title=TITLE,
        swagger_js_url=f"{ASSET_PREFIX}/swagger-ui-bundle.js",
        swagger_css_url=f"{ASSET_PREFIX}/swagger-ui.css",
        swagger_favicon_url=f"{ASSET_PREFIX}/favicon.png",
    )
    page.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
    return page


@router.get("/redoc")
def redoc_page() -> HTMLResponse:
    """The API documentation as one reading page (ReDoc)."""
    page = get_redoc_html(
        openapi_url="/openapi.json",
        title=TITLE,
        redoc_js_url=f"{ASSET_PREFIX}/redoc.standalone.js",
        redoc_favicon_url=f"{ASSET_PREFIX}/favicon.png",
        with_google_fonts=False,
    )
    page.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
    return page


@router.get(ASSET_PREFIX + "/{name}")
def docs_asset(name: str) -> FileResponse:
    """One of the docs' scripts, style sheets or icon (only those names; nothing else of the disk)."""
    if name not in ASSETS:
        raise HTTPException(status_code=404, detail=f"no docs asset {name!r}")
    return FileResponse(
        assets_directory() / name, media_type=ASSETS[name], headers={"Cache-Control": "max-age=86400"}
    )
