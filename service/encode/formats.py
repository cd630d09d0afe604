"""The formats on offer, how a request names one (format parameter, Accept header, file suffix), and the
one entry point that encodes a RunResult in any of them."""

from __future__ import annotations

from typing import Literal

from service.encode.result import RunResult, provenance_headers, stable_frame
from service.encode.tables import to_csv, to_json, to_parquet
from service.errors import NotAcceptableError

FORMATS: dict[str, str] = {
    "json": "application/json",
    "csv": "text/csv",
    "parquet": "application/vnd.apache.parquet",
    "dta": "application/x-stata-dta",
    "bundle": "application/zip",
}
# The formats of an indicator table (routes declare their ?format= with these), and of a daily series
# (no bundle: its codebook and methods describe indicators).
TableFormat = Literal["json", "csv", "parquet", "dta", "bundle"]
SeriesFormat = Literal["json", "csv", "parquet", "dta"]
SERIES_FORMATS = ("json", "csv", "parquet", "dta")
# The file suffix of each format (the bundle is a zip).
SUFFIXES: dict[str, str] = {"json": "json", "csv": "csv", "parquet": "parquet", "dta": "dta", "bundle": "zip"}
_SUFFIX_TO_FORMAT = {suffix: fmt for fmt, suffix in SUFFIXES.items()} | {"pq": "parquet"}
_MEDIA_TO_FORMAT = {media: fmt for fmt, media in FORMATS.items()} | {
    "application/x-parquet": "parquet",
    "application/x-stata": "dta",
}


def format_from(
    accept: str | None,
    format_param: str | None,
    default: str = "json",
    offered: tuple[str, ...] | None = None,
) -> str:
    """The output format named by a ``format`` parameter, else by the Accept header, else ``default``.

    ``offered`` narrows the formats a route offers (all of FORMATS when None).
    """
    offered = tuple(FORMATS) if offered is None else offered
    if format_param:
        if format_param not in offered:
            raise NotAcceptableError(
                f"format {format_param!r} is not offered; choose one of {', '.join(offered)}", field="format"
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
        if _MEDIA_TO_FORMAT.get(media) in offered:
            return _MEDIA_TO_FORMAT[media]
        if media in ("*/*", "application/*", "text/*"):
            return default if media != "text/*" else "csv"
    raise NotAcceptableError(
        f"none of the media types in Accept {accept!r} is offered; offered: "
        f"{', '.join(FORMATS[f] for f in offered)}",
        field="Accept",
    )


def format_from_suffix(path_suffix: str) -> str:
    """The output format of a file name's suffix (.json, .csv, .parquet or .pq, .dta, .zip for a bundle)."""
    fmt = _SUFFIX_TO_FORMAT.get(path_suffix.lower().lstrip("."))
    if fmt is None:
        raise NotAcceptableError(
            f"cannot tell the output format from the suffix {path_suffix!r}; use .parquet, .csv, .json, .dta "
            "(Stata) or .zip (a replication bundle)",
            field="out",
        )
    return fmt


def download_name(provenance: dict, fmt: str) -> str:
    """A file name for a download: 'wxshock-<first 12 hex of the request hash>.<suffix>'."""
    digest = str(provenance.get("request_hash", "")).removeprefix("sha256:")[:12] or "result"
    return f"wxshock-{digest}.{SUFFIXES[fmt]}"


def encode(result: RunResult, fmt: str) -> tuple[bytes, str, dict[str, str]]:
    """Bytes, media type and headers of a RunResult in the format ``fmt`` (one of FORMATS)."""
    from service.encode.bundle import to_bundle
    from service.encode.stata import to_stata

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
    elif fmt == "parquet":
        body = to_parquet(frame, result.provenance, result.warnings)
    elif fmt == "dta":
        body = to_stata(frame, result.provenance, result.warnings)
    else:
        body = to_bundle(frame, result.provenance, result.warnings)
    if fmt in ("dta", "bundle"):  # files a browser should save rather than show
        headers["Content-Disposition"] = f'attachment; filename="{download_name(result.provenance, fmt)}"'
    return body, FORMATS[fmt], headers
