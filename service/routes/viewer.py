"""The single-page viewer at /: pick a community, a baseline and lags; see its table and series plot.

Plain HTML and JavaScript served from service/static (no CDN, no map tiles); the page calls the same /v1
routes as any client. The demo communities come from the communities.geojson beside a dataset's store.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

from fastapi import APIRouter, Depends, HTTPException, Query
from fastapi.responses import FileResponse

from service.errors import UnknownDatasetError
from service.routes.deps import Registry, require_token

STATIC = Path(__file__).resolve().parent.parent / "static"
ASSETS = {"viewer.js": "text/javascript", "viewer.css": "text/css"}
COMMUNITIES_FILE = "communities.geojson"

router = APIRouter(include_in_schema=False)


@router.get("/")
def viewer_page() -> FileResponse:
    """The viewer page."""
    return FileResponse(STATIC / "index.html", media_type="text/html", headers={"Cache-Control": "no-cache"})


@router.get("/viewer/{asset}")
def viewer_asset(asset: str) -> FileResponse:
    """The page's script and style sheet (only those two names; nothing else of the disk is reachable)."""
    if asset not in ASSETS:
        raise HTTPException(status_code=404, detail=f"no viewer asset {asset!r}")
    return FileResponse(STATIC / asset, media_type=ASSETS[asset], headers={"Cache-Control": "no-cache"})


def communities_path(location: str) -> Path | None:
    """The communities.geojson beside a local store directory, when there is one."""
    if "://" in str(location):
        return None
    path = Path(location).resolve().parent / COMMUNITIES_FILE
    return path if path.is_file() else None


@router.get("/viewer/data/communities", dependencies=[Depends(require_token)])
def viewer_communities(
    registry: Registry, dataset: Annotated[str | None, Query(max_length=200)] = None
) -> FileResponse:
    """The communities (GeoJSON) that come with a dataset, such as the demo's invented villages."""
    store = registry.get_dataset(dataset)
    path = communities_path(store.location)
    if path is None:
        raise UnknownDatasetError(
            f"dataset {store.name!r} comes with no {COMMUNITIES_FILE}; the viewer lists communities only for "
            "datasets that have one beside their store",
            field="dataset",
        )
    return FileResponse(path, media_type="application/geo+json", headers={"Cache-Control": "no-cache"})
