"""SeriesRequest: a request for the daily area-weighted series themselves."""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from service.schemas.features import _FeatureRequest
from service.schemas.seasons import YearSpan


class SeriesRequest(_FeatureRequest):
    """A request for the daily area-weighted series themselves: POST /v1/series."""

    years: YearSpan | None = Field(default=None, description="Default: all years of the dataset.")
    variables: list[Literal["tmax", "tmin", "tmean", "prcp"]] = Field(
        default_factory=lambda: ["tmax", "tmin", "tmean", "prcp"], min_length=1
    )
