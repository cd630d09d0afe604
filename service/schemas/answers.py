"""The answers: an indicator table as JSON, with its provenance and warnings."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, Field


class Provenance(BaseModel):
    """What produced a result: enough to reproduce it byte for byte."""

    dataset: str
    fingerprint: str
    software: str
    request_hash: str
    request: dict[str, Any]
    variants: list[dict[str, Any]] | None = Field(
        default=None,
        description="With variants: each variant's name, dataset, fingerprint, request hash and resolved "
        "request (features and events as in the request).",
    )
    methods: dict[str, Any] | None = Field(
        default=None,
        description="What was computed, in words: daily values, aggregation, seasons, baseline, anomalies, "
        "classes, and per indicator its definition, source, parameters and method details (biases included).",
    )


class ResultWarning(BaseModel):
    """A value left null or flagged for a stated reason; ``code`` is listed in service/warning_codes.py."""

    code: str = Field(description="Stable lower_snake_case code, e.g. partial_season, no_spread, at_clip.")
    feature_id: str | None = None
    indicator: str | None = None
    year: int | None = None
    reason: str


class IndicatorResult(BaseModel):
    """The JSON form of an indicator table: rows as records, with provenance and warnings."""

    provenance: Provenance
    columns: list[str]
    rows: list[dict[str, Any]]
    warnings: list[ResultWarning] = Field(default_factory=list)
