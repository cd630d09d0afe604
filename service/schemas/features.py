"""The communities a request sends: GeoJSON Features and FeatureCollections (validated a slice at a time), and
the fields shared by every request that sends them."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    StrictBool,
    Tag,
    ValidationError,
    ValidatorFunctionWrapHandler,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails

from service.schemas.checks import Text, _Model, _problem, value_problems
from service.schemas.options import Weighting


class GeoJSONFeature(BaseModel):
    """One RFC 7946 Feature; its geometry is checked in service.geometry, which names the feature on failure."""

    model_config = ConfigDict(extra="allow")
    type: Literal["Feature"]
    id: str | int | None = None
    geometry: dict[str, Any] | None
    properties: dict[str, Any] | None = None


# Features validated at a time: a single pydantic call over 100,000 features holds the interpreter for a
# second, and every other thread of the server with it; between slices the others run.
_FEATURE_SLICE = 2000


class GeoJSONFeatureCollection(BaseModel):
    """An RFC 7946 FeatureCollection of communities."""

    model_config = ConfigDict(extra="allow")
    type: Literal["FeatureCollection"]
    features: list[GeoJSONFeature] = Field(min_length=1)

    @field_validator("features", mode="wrap")
    @classmethod
    def _in_slices(cls, value: Any, handler: ValidatorFunctionWrapHandler) -> list[GeoJSONFeature]:
        """Long lists validated a slice at a time, errors kept at their own positions."""
        if not isinstance(value, list) or len(value) <= _FEATURE_SLICE:
            return handler(value)
        validated: list[GeoJSONFeature] = []
        problems: list[InitErrorDetails] = []
        for start in range(0, len(value), _FEATURE_SLICE):
            try:
                validated.extend(handler(value[start : start + _FEATURE_SLICE]))
            except ValidationError as exc:
                for error in exc.errors(include_url=False):
                    loc = tuple(error["loc"])
                    if loc and isinstance(loc[0], int):
                        loc = (loc[0] + start, *loc[1:])
                    message = str(error["msg"]).replace("{", "{{").replace("}", "}}")
                    problems.append(_problem(error["type"], message, loc, error.get("input")))
        if problems:
            raise ValidationError.from_exception_data(cls.__name__, problems)
        return validated


class _FeatureRequest(_Model):
    """Fields shared by every request that sends communities."""

    dataset: Text | None = Field(default=None, description="Dataset name; default: the first served dataset.")
    features: Annotated[
        Annotated[GeoJSONFeatureCollection, Tag("FeatureCollection")]
        | Annotated[GeoJSONFeature, Tag("Feature")],
        Discriminator(
            lambda v: (
                (v.get("type") if isinstance(v, dict) else getattr(v, "type", None))
                if (v.get("type") if isinstance(v, dict) else getattr(v, "type", None))
                in ("Feature", "FeatureCollection")
                else None
            ),
            custom_error_type="features",
            custom_error_message="features must be a GeoJSON FeatureCollection or Feature (RFC 7946)",
        ),
    ]
    id_property: Text | None = Field(
        default=None,
        description="Feature property that holds the community id; default: the Feature's own id.",
    )
    crs: Text | None = Field(
        default=None,
        description="CRS of the coordinates (any pyproj-readable string); default: WGS84 lon/lat.",
    )
    weighting: Weighting = "area"
    repair: StrictBool = Field(
        default=False, description="Make invalid polygons valid (and report it) instead of failing."
    )
    invalid_features: Literal["fail", "skip"] | None = Field(
        default=None,
        description="A feature that cannot be computed (invalid geometry, outside the grid or without data, "
        "swapped coordinates): 'fail' refuses the request with one 422 listing every such feature; 'skip' "
        "keeps its rows with null values and a feature_skipped warning. Default: 'fail' on demand, 'skip' "
        "for batch jobs.",
    )

    @model_validator(mode="before")
    @classmethod
    def _finite_and_short(cls, data: Any) -> Any:
        """Refuse, in one place, non-finite numbers and over-long text anywhere in the request (see checks)."""
        if isinstance(data, dict):
            problems = list(value_problems(data))
            if problems:
                raise ValidationError.from_exception_data(cls.__name__, problems)
        return data
