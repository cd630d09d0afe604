"""GeoJSON communities in, checked and reprojected; exact cell-overlap weights as one sparse matrix.

Two steps. :func:`parse_features` (checks.py) reads a GeoJSON Feature or FeatureCollection (a plain dict),
checks every ring, coordinate and id, and turns survey-cluster Points into buffered circles drawn in a local
equal-area frame. :func:`compute_weights` (weights.py) puts the features on a store's grid: the weight of a
cell is the area (km2) of feature intersected with cell, times a weight layer when one is given, on cells
with data only. planes.py holds the equal-area frames and cell areas; antimeridian.py the 180th meridian.
"""

from __future__ import annotations

from service.geometry.checks import (
    FAULT_CODES,
    INVALID_MODES,
    MAX_BUFFER_M,
    Feature,
    ParsedFeatures,
    SkippedFeature,
    parse_features,
    request_crs,
)
from service.geometry.planes import (
    BUFFER_VERTICES,
    MAX_SEGMENT_DEGREES,
    authalic_y,
    buffer_circle,
    buffer_circles,
    cell_areas_km2,
)
from service.geometry.weights import (
    BBOX_CELLS_FACTOR,
    CANDIDATES_PER_PASS,
    WEIGHTINGS,
    WEIGHTS_CACHE,
    Weights,
    compute_weights,
    weights_key,
)

__all__ = [
    "BBOX_CELLS_FACTOR",
    "BUFFER_VERTICES",
    "CANDIDATES_PER_PASS",
    "FAULT_CODES",
    "INVALID_MODES",
    "MAX_BUFFER_M",
    "MAX_SEGMENT_DEGREES",
    "WEIGHTINGS",
    "WEIGHTS_CACHE",
    "Feature",
    "ParsedFeatures",
    "SkippedFeature",
    "Weights",
    "authalic_y",
    "buffer_circle",
    "buffer_circles",
    "cell_areas_km2",
    "compute_weights",
    "parse_features",
    "request_crs",
    "weights_key",
]
