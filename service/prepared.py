"""What a request's checks computed before any daily value is read: its features' weights and the features
skipped, kept so that a batch job's run reuses the weights computed when it was submitted."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

SKIPPED_CODE = "feature_skipped"


# Stands for a footprint that was not kept (a pickled Prepared): the weights hold what it gave, and a feature
# whose footprint is None stays one that was skipped.
SHAPE_NOT_KEPT = "shape not kept"


@dataclass
class Prepared:
    """A checked request's features and weights, and the features skipped.

    ``parsed`` is service.geometry's ParsedFeatures, ``weights`` what pipeline.features_and_weights returned,
    and ``skipped`` one dict per feature left out: index, feature_id, code, reason and pointer. Pickled (a
    job keeps it until its run) it leaves out the features' shapes, and writes the features as plain
    columns: 100,000 feature objects pickle in seconds, holding up every thread meanwhile.
    """

    parsed: Any
    weights: Any
    skipped: list[dict[str, Any]] = field(default_factory=list)
    invalid_features: str = "fail"
    # a request with variants: the weights and skipped features per (dataset, weighting) of its variants
    variant_weights: dict[str, tuple[Any, list[dict[str, Any]]]] = field(default_factory=dict)

    def __getstate__(self) -> dict[str, Any]:
        state = dict(self.__dict__)
        parsed = state.pop("parsed")
        features = parsed.features
        state["parsed_columns"] = {
            "crs": parsed.crs,
            "others": {k: v for k, v in parsed.__dict__.items() if k not in ("features", "crs")},
            "id": [f.id for f in features],
            "properties": [f.properties for f in features],
            "buffer_m": [f.buffer_m for f in features],
            "pointer": [f.pointer for f in features],
            "index": [f.index for f in features],
            "kept": [f.footprint is not None for f in features],
        }
        state["parsed_types"] = (type(parsed), type(features[0]) if features else None)
        return state

    def __setstate__(self, state: dict[str, Any]) -> None:
        columns = state.pop("parsed_columns")
        parsed_type, feature_type = state.pop("parsed_types")
        self.__dict__.update(state)
        features = [
            feature_type(
                id=i,
                geometry=None,
                properties=p,
                buffer_m=b,
                footprint=SHAPE_NOT_KEPT if kept else None,
                pointer=ptr,
                index=k,
            )
            for i, p, b, ptr, k, kept in zip(
                columns["id"],
                columns["properties"],
                columns["buffer_m"],
                columns["pointer"],
                columns["index"],
                columns["kept"],
                strict=True,
            )
        ]
        self.parsed = parsed_type(features=features, crs=columns["crs"], **columns["others"])


def skipped_entry(entry: Any) -> dict[str, Any]:
    """A skipped feature as a dict, from service.geometry's (index, feature_id, code, reason, pointer)."""
    if isinstance(entry, dict):
        values = entry
    elif isinstance(entry, tuple | list):
        values = dict(zip(("index", "feature_id", "code", "reason", "pointer"), entry, strict=False))
    else:
        values = {k: getattr(entry, k, None) for k in ("index", "feature_id", "code", "reason", "pointer")}
    return {
        "index": values.get("index"),
        "feature_id": values.get("feature_id"),
        "code": values.get("code"),
        "reason": values.get("reason"),
        "pointer": values.get("pointer"),
    }


def skipped_of(*results: Any) -> list[dict[str, Any]]:
    """The skipped features that parse and weight results report, in request order, each once."""
    entries: dict[Any, dict[str, Any]] = {}
    for result in results:
        for entry in _reported(result):
            item = skipped_entry(entry)
            entries.setdefault((item["index"], item["feature_id"]), item)
    return sorted(entries.values(), key=lambda e: (e["index"] is None, e["index"] or 0))


def _reported(result: Any) -> Iterable[Any]:
    """The skipped entries a result carries (attribute ``skipped``), or none."""
    skipped = getattr(result, "skipped", None)
    return skipped if isinstance(skipped, list | tuple) else ()


def skipped_warnings(skipped: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One feature_skipped warning per skipped feature (its values are null)."""
    from service.warning_codes import warning

    return [
        warning(SKIPPED_CODE, f"feature skipped ({e['code']}): {e['reason']}", feature_id=e["feature_id"])
        for e in skipped
    ]


def later_warnings(repaired: Iterable[str], skipped: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The warnings a run adds after its tables: one repaired_geometry per repaired feature id, then
    :func:`skipped_warnings`."""
    from service.warning_codes import warning

    return [
        warning("repaired_geometry", "invalid geometry was repaired (make_valid)", feature_id=feature_id)
        for feature_id in repaired
    ] + skipped_warnings(skipped)
