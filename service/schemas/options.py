"""What to compute and how: indicators by name with parameters, class edges, spells, weighting."""

from __future__ import annotations

import re
from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Discriminator,
    Field,
    StrictInt,
    Tag,
    field_validator,
    model_validator,
)

from service.schemas.checks import MAX_Z, Text, ZValue, _by_keys, _Model

_NAME = re.compile(r"^[a-z][a-z0-9_]{0,39}$")


class IndicatorSpec(BaseModel):
    """An indicator by name with parameters; parameters are checked against the catalog."""

    model_config = ConfigDict(extra="allow")
    name: Text = Field(min_length=1)

    def params(self) -> dict[str, Any]:
        """The parameters given beside the name."""
        return dict(self.model_extra or {})


class Classes(_Model):
    """Class edges in standard-deviation units; n edges make n + 1 classes numbered around 0."""

    edges: list[ZValue] = Field(
        default_factory=lambda: [-2.0, -1.0, 1.0, 2.0],
        min_length=1,
        max_length=12,
        description=f"Standard deviations, strictly increasing, each within +-{MAX_Z:g}.",
    )

    @field_validator("edges")
    @classmethod
    def _increasing(cls, edges: list[float]) -> list[float]:
        """Edges must be strictly increasing (finite and within +-MAX_Z by their type)."""
        if any(b <= a for a, b in zip(edges, edges[1:], strict=False)):
            raise ValueError(f"edges {edges!r} are not strictly increasing")
        return edges


class SpellCondition(_Model):
    """One condition of a spell: bounds on an indicator's class and/or z (all given bounds must hold)."""

    indicator: Text
    class_min: StrictInt | None = Field(default=None, ge=-12, le=12)
    class_max: StrictInt | None = Field(default=None, ge=-12, le=12)
    z_min: ZValue | None = None
    z_max: ZValue | None = None

    @model_validator(mode="after")
    def _some_bound(self) -> SpellCondition:
        """A condition without a bound would always hold."""
        if all(v is None for v in (self.class_min, self.class_max, self.z_min, self.z_max)):
            raise ValueError(
                f"condition on {self.indicator!r} gives none of class_min, class_max, z_min, z_max"
            )
        return self


class Spell(_Model):
    """A named condition over seasons; yields <name>_run and <name>_count over the last `window` seasons."""

    name: Text
    window: StrictInt = Field(default=5, ge=1, le=100)
    when: list[SpellCondition] = Field(min_length=1)

    @field_validator("name")
    @classmethod
    def _column_name(cls, name: str) -> str:
        """The name becomes a column prefix: lower-case letters, digits and underscores."""
        if not _NAME.match(name):
            raise ValueError(
                f"spell name {name!r} must be lower-case letters, digits and '_', starting with a letter"
            )
        return name


class LayerWeighting(_Model):
    """Area weights times a static weight layer of the store (population, cropland, ...)."""

    layer: Text = Field(min_length=1)


Weighting = Annotated[
    Annotated[Literal["area", "centers"], Tag("Name")] | Annotated[LayerWeighting, Tag("Layer")],
    Discriminator(
        _by_keys(layer="Layer"),
        custom_error_type="weighting",
        custom_error_message='weighting must be "area", "centers" or {"layer": NAME}',
    ),
]


IndicatorChoice = Annotated[
    Annotated[Text, Tag("Name")] | Annotated[IndicatorSpec, Tag("Spec")],
    Discriminator(
        _by_keys(name="Spec"),
        custom_error_type="indicator",
        custom_error_message='an indicator is a name or {"name": NAME, PARAMETER: VALUE, ...}',
    ),
]
