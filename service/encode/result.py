"""What every encoder starts from: the computed table, its provenance and warnings, made byte-stable."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

FLOAT_DECIMALS = 6


@dataclass
class RunResult:
    """A computed table with what produced it and the values it left null, and why."""

    frame: pd.DataFrame
    provenance: dict[str, Any]
    warnings: list[dict[str, Any]] = field(default_factory=list)


def stable_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The table with floats rounded to FLOAT_DECIMALS so that equal results give equal bytes."""
    out = frame.copy()
    for column in out.columns:
        if pd.api.types.is_float_dtype(out[column].dtype):
            out[column] = out[column].round(FLOAT_DECIMALS)
    return out


def json_value(value: Any) -> Any:
    """A JSON-ready scalar: NaN and pandas' missing markers become None, numpy scalars become Python ones."""
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def provenance_headers(provenance: dict[str, Any]) -> dict[str, str]:
    """Provenance as HTTP response headers (for CSV, which has no place for metadata)."""
    headers = {
        "X-Wxshock-Dataset": str(provenance["dataset"]),
        "X-Wxshock-Fingerprint": str(provenance["fingerprint"]),
        "X-Wxshock-Request-Hash": str(provenance["request_hash"]),
        "X-Wxshock-Software": str(provenance["software"]),
    }
    if provenance.get(
        "variants"
    ):  # a sweep: each variant's dataset and fingerprint ("name=dataset@sha256:...")
        headers["X-Wxshock-Variants"] = ", ".join(
            f"{v['name']}={v['dataset']}@{v['fingerprint']}" for v in provenance["variants"]
        )
    return headers
