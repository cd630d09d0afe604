"""A request's JSON text, read and written in pieces: one feature at a time.

A single ``json.loads`` or pydantic call over a 50 MB body holds the interpreter for seconds, and every other
thread of the server (the event loop answering /health among them) waits for it. Here the outer objects of a
request are walked by hand and each feature is parsed, checked and written on its own, so that no single
step holds the interpreter for longer than one feature takes. Errors carry the position of the fault.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Iterator
from typing import Any, TypeVar

from pydantic import BaseModel

from service.errors import RequestError, RequestValidationFailed

# Objects that are walked by hand (their keys are checked for repeats); every other value is parsed whole.
_WALKED_OBJECTS = frozenset({(), ("features",)})
# The array whose items (the features) are parsed one by one.
_ITEM_ARRAY = ("features", "features")
_SPACE = re.compile(r"[ \t\n\r]*")
# A \u escape of a UTF-16 surrogate: the only way a JSON text can carry text that UTF-8 cannot encode.
_SURROGATE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F][0-9a-fA-F]{2}")
# A request nests about 10 levels deep (a MultiPolygon's coordinates inside the request). Nesting that the
# parser cannot follow (about 1,000 levels) is refused with the position where it first passed this depth.
MAX_DEPTH = 64
_DECODER = json.JSONDecoder()
_LONG_NUMBER = re.compile(r"\d{4301,}")


class _Depth(Exception):
    """Raised inside the parser when nesting goes deeper than MAX_DEPTH."""


def _malformed(message: str, text: str, position: int) -> RequestValidationFailed:
    """The 400 problem of a body that is not JSON, with the line, column and character of the fault."""
    line = text.count("\n", 0, position) + 1
    column = position - (text.rfind("\n", 0, position) + 1) + 1
    where = f"line {line}, column {column} (character {position})"
    failure = RequestValidationFailed(
        f"the request body is not valid JSON: {message} at {where}; send one JSON object",
        errors=[{"pointer": "", "message": f"{message} at {where}", "position": position}],
        pointer="",
    )
    failure.status = 400
    return failure


def decode_body(raw: bytes) -> str:
    """The body as text: UTF-8 (RFC 8259), a leading byte-order mark dropped; else a 400 naming the byte."""
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        bad = raw[exc.start : exc.start + 1].hex()
        failure = RequestValidationFailed(
            f"the request body is not UTF-8 text: byte 0x{bad} at byte offset {exc.start} cannot be decoded "
            f"({exc.reason}); send JSON encoded as UTF-8",
            errors=[
                {"pointer": "", "message": f"byte 0x{bad} at byte offset {exc.start}", "position": exc.start}
            ],
            pointer="",
        )
        failure.status = 400
        raise failure from None
    return text.removeprefix("\ufeff")


def loads(text: str) -> Any:
    """The JSON value of a request text, parsed feature by feature; RequestValidationFailed (400) on a fault.

    Repeated keys in the request object or in its FeatureCollection are refused (422, with a pointer): JSON
    leaves their meaning open, and the last one silently winning hides a mistake.
    """
    position = _SPACE.match(text, 0).end()  # type: ignore[union-attr]
    if position == len(text):
        raise _malformed("the body is empty", text, position)
    value, position = _value(text, position, (), 0)
    position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
    if position != len(text):
        raise _malformed("extra data after the JSON value", text, position)
    if _SURROGATE_ESCAPE.search(text):
        check_encodable(value)
    return value


def _value(text: str, position: int, path: tuple[str, ...], depth: int) -> tuple[Any, int]:
    """The value starting at ``position`` and the position after it."""
    if path in _WALKED_OBJECTS and text.startswith("{", position):
        return _object(text, position, path, depth)
    if path == _ITEM_ARRAY and text.startswith("[", position):
        return _array(text, position, path, depth)
    return _parsed_whole(text, position, depth)


def _parsed_whole(text: str, position: int, depth: int) -> tuple[Any, int]:
    """One value parsed by the json module, with the position of any fault."""
    try:
        return _DECODER.raw_decode(text, position)
    except json.JSONDecodeError as exc:
        raise _malformed(exc.msg, text, exc.pos) from None
    except RecursionError:
        raise _malformed(
            f"arrays or objects nest too deeply (here deeper than {MAX_DEPTH} levels; a request needs about 10)",
            text,
            _too_deep_at(text, position, depth),
        ) from None
    except ValueError:
        # Python refuses to read integers of more than 4,300 digits (sys.get_int_max_str_digits()).
        found = _LONG_NUMBER.search(text, position)
        raise _malformed(
            "a number has more digits than can be read", text, found.start() if found else position
        ) from None


def _too_deep_at(text: str, position: int, depth: int) -> int:
    """The position where nesting first goes deeper than MAX_DEPTH (scanning from ``position``)."""
    in_string = escaped = False
    for index in range(position, len(text)):
        char = text[index]
        if in_string:
            if escaped:
                escaped = False
            elif char == "\\":
                escaped = True
            elif char == '"':
                in_string = False
        elif char == '"':
            in_string = True
        elif char in "[{":
            depth += 1
            if depth > MAX_DEPTH:
                return index
        elif char in "]}":
            depth -= 1
    return position


def _expect(text: str, position: int, char: str, what: str) -> int:
    """The position after ``char`` (after optional white space), or a 400 saying what was expected."""
    position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
    if not text.startswith(char, position):
        raise _malformed(f"expected {what}", text, position)
    return position + 1


def _object(text: str, position: int, path: tuple[str, ...], depth: int) -> tuple[dict[str, Any], int]:
    """An object whose keys are checked for repeats; its values parsed by _value."""
    if depth + 1 > MAX_DEPTH:
        raise _malformed(
            f"arrays or objects nest too deeply (here deeper than {MAX_DEPTH} levels; a request needs about 10)",
            text,
            position,
        )
    result: dict[str, Any] = {}
    position = _SPACE.match(text, position + 1).end()  # type: ignore[union-attr]
    if text.startswith("}", position):
        return result, position + 1
    while True:
        if not text.startswith('"', position):
            raise _malformed("expected a property name in double quotes", text, position)
        key_at = position
        key, position = _parsed_whole(text, position, depth)
        position = _expect(text, position, ":", "':' after a property name")
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
        if key in result:
            pointer = "".join("/" + p for p in (*path, key))
            raise RequestValidationFailed(
                f"{pointer}: the key {key!r} appears twice in the same object (again at character {key_at}); "
                "JSON leaves the meaning of a repeated key open: send each key once",
                errors=[
                    {"pointer": pointer, "message": f"the key {key!r} appears twice", "position": key_at}
                ],
                pointer=pointer,
            )
        result[key], position = _value(text, position, (*path, key), depth + 1)
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
        if text.startswith("}", position):
            return result, position + 1
        position = _expect(text, position, ",", "',' or '}' after a property value")
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]


def _array(text: str, position: int, path: tuple[str, ...], depth: int) -> tuple[list[Any], int]:
    """An array whose items are parsed one at a time."""
    items: list[Any] = []
    position = _SPACE.match(text, position + 1).end()  # type: ignore[union-attr]
    if text.startswith("]", position):
        return items, position + 1
    while True:
        item, position = _parsed_whole(text, position, depth + 1)
        items.append(item)
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
        if text.startswith("]", position):
            return items, position + 1
        position = _expect(text, position, ",", "',' or ']' after an array item")
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]


def check_encodable(value: Any) -> None:
    """Refuse text that UTF-8 cannot encode (a lone surrogate escape such as "\\udcff"), with its pointer."""
    pointer = first_unencodable(value, "")
    if pointer is not None:
        raise RequestError(
            f"the request holds text that is not valid Unicode at {pointer or 'the body'} (a lone surrogate "
            "such as \\udcff); send the text as UTF-8",
            pointer=pointer,
        )


def first_unencodable(value: Any, pointer: str) -> str | None:
    """The JSON pointer of the first string (key or value) that UTF-8 cannot encode, or None."""
    if isinstance(value, str):
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            return pointer
        return None
    items: Any = (
        value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
    )
    for key, item in items:
        where = f"{pointer}/{str(key).replace('~', '~0').replace('/', '~1')}"
        if isinstance(key, str) and first_unencodable(key, where) is not None:
            return where
        found = first_unencodable(item, where)
        if found is not None:
            return found
    return None


# --- writing ----------------------------------------------------------------------------------------------

# Stands for the features in a JSON text written around them (a NUL cannot occur in a dumped key).
_SLOT = "\x00wxshock-features\x00"
_Piece = TypeVar("_Piece")


def _canonical(data: Any) -> str:
    """Canonical JSON: sorted keys, no spaces, UTF-8 kept."""
    return json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=False)


def _around(head: str, pieces: Iterator[_Piece], key: str = "features") -> Iterator[str | _Piece]:
    """``head`` (canonical JSON holding the slot as the value of ``key``) with ``pieces`` in the slot's place.

    The key and the slot are searched together: unescaped quotes around them cannot occur inside a string.
    """
    marker = json.dumps(key) + ":"
    before, after = head.split(marker + json.dumps(_SLOT), 1)
    yield before + marker
    yield from pieces
    yield after


def _features_of(model: BaseModel) -> tuple[list[BaseModel], BaseModel | None]:
    """The request's features in order, and its FeatureCollection (None when it sent a single Feature)."""
    features = model.features  # type: ignore[attr-defined]
    inner = getattr(features, "features", None)
    if isinstance(inner, list):
        return inner, features
    return [features], None


def _dump(model: BaseModel, exclude_unset: bool, exclude: set[str] | None = None) -> dict[str, Any]:
    """model_dump in JSON mode."""
    return model.model_dump(mode="json", exclude=exclude, exclude_unset=exclude_unset)


def _feature_pieces(model: BaseModel, exclude_unset: bool) -> Iterator[str]:
    """The request's features as canonical JSON: a FeatureCollection's members around its features, one by one."""
    features, collection = _features_of(model)
    if collection is None:
        yield _canonical(_dump(features[0], exclude_unset))
        return
    head = _canonical({**_dump(collection, exclude_unset, {"features"}), "features": _SLOT})
    items = (("," if i else "") + _canonical(_dump(f, exclude_unset)) for i, f in enumerate(features))
    yield from _around(head, _bracketed(items))


def _bracketed(items: Iterator[str]) -> Iterator[str]:
    """'[' items ']'."""
    yield "["
    yield from items
    yield "]"


def canonical_chunks(model: BaseModel, *, exclude_unset: bool = False) -> Iterator[str]:
    """The request as canonical JSON, equal to ``_canonical(model.model_dump(mode="json"))``, in pieces.

    Written feature by feature. With ``exclude_unset`` only the fields the sender gave are written (what a
    stored job re-validates from, so that it resolves exactly as the request sent).
    """
    yield from _request_pieces(model, _feature_pieces(model, exclude_unset), exclude_unset=exclude_unset)


def _request_pieces(
    model: BaseModel,
    features: Iterator[str | bytes],
    around: dict[str, Any] | None = None,
    key: str = "request",
    *,
    exclude_unset: bool = False,
) -> Iterator[Any]:
    """The request's canonical JSON in pieces, ``features`` (its features' pieces) in their place; held by
    ``around`` under ``key`` when given."""
    head = _canonical({**_dump(model, exclude_unset, {"features"}), "features": _SLOT})
    pieces = _around(head, features)
    return pieces if around is None else _around(_canonical({**around, key: _SLOT}), pieces, key)


def canonical_text(model: BaseModel, *, exclude_unset: bool = False) -> str:
    """canonical_chunks joined into one text."""
    return "".join(canonical_chunks(model, exclude_unset=exclude_unset))


def _sha256(pieces: Iterator[str | bytes]) -> str:
    """SHA-256 (hex) of the pieces joined (text as UTF-8)."""
    digest = hashlib.sha256()
    for piece in pieces:
        digest.update(piece if isinstance(piece, bytes) else piece.encode("utf-8"))
    return digest.hexdigest()


def features_sha256(model: BaseModel) -> str:
    """SHA-256 (hex) of the request's features as canonical JSON."""
    return _sha256(_feature_pieces(model, False))


def canonical_sha256(model: BaseModel, around: dict[str, Any] | None = None, key: str = "request") -> str:
    """SHA-256 (hex) of the request's canonical JSON, or of ``around`` holding it under ``key``."""
    return _sha256(_request_pieces(model, _feature_pieces(model, False), around, key))


def request_digests(
    model: BaseModel, around: dict[str, Any] | None = None, key: str = "request"
) -> tuple[str, str]:
    """(features_sha256(model), canonical_sha256(model, around, key)) from one pass over the features.

    Each feature's canonical JSON is written once and its UTF-8 fed to both digests: the features' text is
    the part of the request's text that holds them (provenance hashes both; writing the features is the
    costly part, about 60 us a village).
    """
    features = hashlib.sha256()

    def feature_pieces() -> Iterator[str | bytes]:
        for piece in _feature_pieces(model, False):
            data = piece.encode("utf-8")
            features.update(data)
            yield data

    request = _sha256(_request_pieces(model, feature_pieces(), around, key))
    return features.hexdigest(), request


def features_as_dict(model: BaseModel) -> dict[str, Any]:
    """The request's features as plain GeoJSON dicts that share the coordinates (no deep copy)."""
    features, collection = _features_of(model)

    def plain(feature: BaseModel) -> dict[str, Any]:
        return {
            "type": getattr(feature, "type", "Feature"),
            "id": getattr(feature, "id", None),
            "geometry": getattr(feature, "geometry", None),
            "properties": getattr(feature, "properties", None),
            **(feature.model_extra or {}),
        }

    if collection is None:
        return plain(features[0])
    return {
        "type": "FeatureCollection",
        "features": [plain(f) for f in features],
        **(collection.model_extra or {}),
    }
