"""What a request's checks computed before any daily value is read: its features' weights and the features
skipped, kept so that a batch job's run reuses the weights computed when it was submitted."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Any

SKIPPED_CODE = "feature_skipped"


@dataclass
class Prepared:
    """A checked request's features (without their shapes) and weights, and the features skipped.

    ``parsed`` is service.geometry's ParsedFeatures with geometries and footprints dropped (the run needs
    only ids, properties and the repaired list), ``weights`` what pipeline.features_and_weights returned,
    and ``skipped`` one dict per feature left out: index, feature_id, code, reason and pointer.
    """

    parsed: Any
    weights: Any
    skipped: list[dict[str, Any]] = field(default_factory=list)
    invalid_features: str = "fail"


def without_shapes(parsed: Any) -> Any:
    """ParsedFeatures without geometries and footprints (small to keep; the weights already hold them)."""
    features = [
        replace(f, geometry=None, footprint=None) if hasattr(f, "footprint") else f for f in parsed.features
    ]
    return replace(parsed, features=features)


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
