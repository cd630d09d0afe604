"""A second invented product for variants that name another dataset (tests of events and variants)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np


def write_west_product(path: Path) -> Path:
    """Another invented product over the western part of the demo region only, 0.5 degC warmer."""
    from service.demo import demo_dataset
    from service.store import write_store

    ds = demo_dataset("tiny").isel(x=slice(0, 24))
    ds = ds.assign(tmax=ds["tmax"] + np.float32(0.5), tmin=ds["tmin"] + np.float32(0.5))
    write_store(ds, path)
    return path


def _xs(value: Any) -> list[float]:
    """Every x (longitude) of GeoJSON coordinates."""
    if isinstance(value[0], int | float):
        return [float(value[0])]
    return [x for item in value for x in _xs(item)]


def west_communities(collection: dict, limit: float = -39.45, count: int = 3) -> dict:
    """The first ``count`` communities lying wholly west of ``limit`` (inside the western product's grid)."""
    inside = [f for f in collection["features"] if max(_xs(f["geometry"]["coordinates"])) < limit]
    return {**collection, "features": inside[:count]}


def easternmost_community(collection: dict) -> dict:
    """The community whose westernmost point lies farthest east (wholly outside the western product)."""
    return max(collection["features"], key=lambda f: min(_xs(f["geometry"]["coordinates"])))
