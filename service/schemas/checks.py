"""Shared field types and checks of every request: text and number limits, non-finite numbers and over-long
texts refused in one place (value_problems), the strict base model, and validation with located errors."""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Annotated, Any, TypeVar

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    StrictInt,
    ValidationError,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

# Ids and every other free text of a request are at most this many characters (CONTRACTS.md): an id is
# repeated on every output row, so a 1 MB id made a 1 MB request cost gigabytes.
MAX_TEXT = 200
# Class edges and spell z bounds lie within +-MAX_Z standard deviations. A season 10 sd from its normal has a
# probability below 1e-23 under a normal law, so no edge beyond it can separate seasons; the bound also keeps
# the class axis of the pictures drawable (edges of +-1e308 broke matplotlib).
MAX_Z = 10.0

Text = Annotated[str, Field(max_length=MAX_TEXT)]
Year = Annotated[StrictInt, Field(ge=1, le=9999)]
# Numbers refuse true/false and numbers written as text ("1.5"): leniency there hides a mistake.
Number = Annotated[float, Field(strict=True)]
ZValue = Annotated[float, Field(strict=True, ge=-MAX_Z, le=MAX_Z)]

# --- checks that apply to the whole request ---------------------------------------------------------------


def _problem(kind: str, message: str, loc: tuple[int | str, ...], value: Any) -> InitErrorDetails:
    """One validation problem at ``loc`` (a path into the request), for ValidationError.from_exception_data."""
    return InitErrorDetails(type=PydanticCustomError(kind, message), loc=loc, input=value)


def _preview(text: str) -> str:
    """The start of a long text, for messages that must not echo all of it."""
    return text[:40] + f"... ({len(text)} characters)"


def _walk(value: Any, loc: tuple[int | str, ...]) -> Iterator[InitErrorDetails]:
    """Non-finite numbers and texts longer than MAX_TEXT in a JSON-like value, keys included."""
    if isinstance(value, float):
        if not math.isfinite(value):
            yield _problem(
                "finite_number",
                f"{value!r} is not a finite number; JSON has no NaN or Infinity: send a number, or leave the "
                "field out for its default",
                loc,
                repr(value),
            )
    elif isinstance(value, str):
        if len(value) > MAX_TEXT:
            yield _problem(
                "text_too_long",
                f"this text has {len(value)} characters, more than the {MAX_TEXT} allowed",
                loc,
                _preview(value),
            )
    elif isinstance(value, dict):
        for key, item in value.items():
            if isinstance(key, str) and len(key) > MAX_TEXT:
                yield _problem(
                    "text_too_long",
                    f"this name has {len(key)} characters, more than the {MAX_TEXT} allowed",
                    (*loc, key[:40] + "..."),
                    _preview(key),
                )
                continue
            yield from _walk(item, (*loc, key))
    elif isinstance(value, list | tuple):
        for index, item in enumerate(value):
            yield from _walk(item, (*loc, index))


def _id_problems(features: Any, id_property: Any) -> Iterator[InitErrorDetails]:
    """Feature ids (the Feature id, or the property named by id_property) longer than MAX_TEXT."""
    if not isinstance(features, dict):
        return
    if features.get("type") == "FeatureCollection" and isinstance(features.get("features"), list):
        items = [(("features", "features", i), f) for i, f in enumerate(features["features"])]
    else:
        items = [(("features",), features)]
    for loc, feature in items:
        if not isinstance(feature, dict):
            continue
        if isinstance(id_property, str):
            properties = feature.get("properties")
            value = properties.get(id_property) if isinstance(properties, dict) else None
            where: tuple[int | str, ...] = (*loc, "properties", id_property)
        else:
            value, where = feature.get("id"), (*loc, "id")
        if isinstance(value, float) and not math.isfinite(value):
            yield _problem(
                "finite_number",
                f"feature id {value!r} is not a finite number; give every feature a usable id",
                where,
                repr(value),
            )
            continue
        text = str(value) if isinstance(value, str | int) and not isinstance(value, bool) else ""
        if len(text) > MAX_TEXT:
            yield _problem(
                "id_too_long",
                f"this feature id has {len(text)} characters, more than the {MAX_TEXT} allowed; ids are "
                "repeated on every output row: use a short code and keep names in your own table",
                where,
                _preview(text),
            )


def value_problems(data: dict[str, Any]) -> Iterator[InitErrorDetails]:
    """Every non-finite number and over-long text of a raw request (a JSON object), by location.

    This is the one place where they are refused. Inside ``features`` only the ids are looked at: coordinates
    and buffers are checked per feature by service.geometry (a bad one is a per-feature fault, which a job
    may skip), and other properties are not used.
    """
    for key, value in data.items():
        if key == "features":
            yield from _id_problems(value, data.get("id_property"))
        elif isinstance(key, str) and len(key) > MAX_TEXT:
            yield from _walk({key: value}, ())
        else:
            yield from _walk(value, (key,))


_M = TypeVar("_M", bound=BaseModel)


class _Model(BaseModel):
    """Strict about unknown fields, so a misspelt option is an error rather than silently ignored."""

    model_config = ConfigDict(extra="forbid")


def _by_keys(**tags: str):  # noqa: ANN202 - a pydantic discriminator callable
    """A discriminator choosing a union member by which key a dict carries (strings are tagged 'name')."""

    def choose(value: object) -> str | None:
        if isinstance(value, str):
            return "Name"
        keys = (
            value.keys()
            if isinstance(value, dict)
            else vars(value).keys()
            if hasattr(value, "__dict__")
            else ()
        )
        for key, tag in tags.items():
            if key in keys:
                return tag
        return None

    return choose


def _field_error(model: str, loc: tuple[str | int, ...], message: str, value: Any = None) -> ValidationError:
    """A validation error located at ``loc`` (so the problem document points at that field)."""
    return ValidationError.from_exception_data(
        model,
        [InitErrorDetails(type=PydanticCustomError("value_error", message), loc=loc, input=value)],
    )


def validate_request(model: type[_M], data: object) -> _M:
    """``data`` as a ``model`` instance, or RequestValidationFailed listing every failing field by pointer."""
    from pydantic import ValidationError

    from service.errors import RequestValidationFailed, validation_items

    try:
        return model.model_validate(data)
    except ValidationError as exc:
        items = validation_items(exc.errors(include_url=False))
        first = items[0]
        where = first["pointer"] or "the request"
        raise RequestValidationFailed(
            f"{len(items)} field(s) failed validation; first: {where}: {first['message']}",
            errors=items,
            pointer=first["pointer"] or None,
        ) from None
