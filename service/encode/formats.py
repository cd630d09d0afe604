"""The formats on offer, how a request names one (format parameter, Accept header, file suffix), and the
one entry point that encodes a RunResult in any of them."""

from __future__ import annotations

from service.encode.result import RunResult, provenance_headers, stable_frame
from service.encode.tables import to_csv, to_json, to_parquet
from service.errors import NotAcceptableError

FORMATS: dict[str, str] = {
    "json": "application/json",
    "csv": "text/csv",
    "parquet": "application/vnd.apache.parquet",
}
_MEDIA_TO_FORMAT = {media: fmt for fmt, media in FORMATS.items()} | {"application/x-parquet": "parquet"}


def format_from(accept: str | None, format_param: str | None, default: str = "json") -> str:
    """The output format named by a ``format`` parameter, else by the Accept header, else ``default``."""
    if format_param:
        if format_param not in FORMATS:
            raise NotAcceptableError(
                f"format {format_param!r} is not offered; choose one of {', '.join(FORMATS)}", field="format"
            )
        return format_param
    if not accept:
        return default
    # Honour q-values; ties keep the client's order.
    choices: list[tuple[float, int, str]] = []
    for position, part in enumerate(accept.split(",")):
        media, *params = (p.strip() for p in part.split(";"))
        quality = 1.0
        for param in params:
            key, _, value = param.partition("=")
            if key.strip() == "q":
                try:
                    quality = float(value)
                except ValueError:
                    quality = 0.0
        if quality > 0:
            choices.append((-quality, position, media.lower()))
    for _, _, media in sorted(choices):
        if media in _MEDIA_TO_FORMAT:
            return _MEDIA_TO_FORMAT[media]
        if media in ("*/*", "application/*", "text/*"):
            return default if media != "text/*" else "csv"
    raise NotAcceptableError(
        f"none of the media types in Accept {accept!r} is offered; offered: {', '.join(FORMATS.values())}",
        field="Accept",
    )


def format_from_suffix(path_suffix: str) -> str:
    """The output format of a file name's suffix (.json, .csv, .parquet or .pq)."""
    suffix = path_suffix.lower().lstrip(".")
    fmt = {"pq": "parquet"}.get(suffix, suffix)
    if fmt not in FORMATS:
        raise NotAcceptableError(
            f"cannot tell the output format from the suffix {path_suffix!r}; use .parquet, .csv or .json",
            field="out",
        )
    return fmt


def encode(result: RunResult, fmt: str) -> tuple[bytes, str, dict[str, str]]:
    """Bytes, media type and headers of a RunResult in the format ``fmt`` (json, csv or parquet)."""
    if fmt not in FORMATS:
        raise NotAcceptableError(
            f"format {fmt!r} is not offered; choose one of {', '.join(FORMATS)}", field="format"
        )
    frame = stable_frame(result.frame)
    headers = provenance_headers(result.provenance)
    if fmt == "json":
        body = to_json(frame, result.provenance, result.warnings)
    elif fmt == "csv":
        body = to_csv(frame)
    else:
        body = to_parquet(frame, result.provenance, result.warnings)
    return body, FORMATS[fmt], headers
