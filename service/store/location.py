"""Where a store lives: local directories and fsspec URLs, opening the zarr group."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Literal

import zarr

from service.errors import StoreError, StoreFormatError


def _is_url(location: str) -> bool:
    """True for fsspec URLs such as s3://bucket/path (anything with a scheme other than file)."""
    return "://" in location and not location.startswith("file://")


def _normalise_location(location: str | Path) -> str:
    """A location as a string: URLs unchanged (trailing slash dropped), local paths absolute."""
    text = str(location)
    if _is_url(text):
        return text.rstrip("/")
    if text.startswith("file://"):
        text = text[len("file://") :]
    return str(Path(text).expanduser().absolute())


def _zarr_store(location: str, storage_options: dict | None, *, read_only: bool) -> Any:
    """The zarr store object behind a location (LocalStore or FsspecStore)."""
    if _is_url(location):
        from zarr.storage import FsspecStore

        return FsspecStore.from_url(
            location, storage_options=dict(storage_options or {}), read_only=read_only
        )
    from zarr.storage import LocalStore

    return LocalStore(location, read_only=read_only)


def _store_name(location: str) -> str:
    """The dataset name of a location: the last path component without its suffix (demo.zarr -> demo)."""
    last = location.rstrip("/").rsplit("/", 1)[-1]
    return Path(last).stem or last


def _open_group(location: str, storage_options: dict | None, *, mode: Literal["r", "r+"] = "r") -> zarr.Group:
    """Open the store's root group, turning "not there" and "not zarr" into a StoreError that says which."""
    if not _is_url(location) and not (Path(location) / "zarr.json").is_file():
        if not Path(location).exists():
            raise StoreError(
                f"store {location!r} does not exist; build one with 'wxshock demo PATH' or "
                "'wxshock ingest FILES... --out PATH'"
            )
        raise StoreFormatError(
            f"store {location!r} has no zarr.json: it is not a zarr v3 store written by wxshock; "
            "convert the data with 'wxshock ingest'"
        )
    try:
        store = _zarr_store(location, storage_options, read_only=(mode == "r"))
        try:
            # consolidated metadata speeds reading; a store opened for writing must see the arrays themselves
            return zarr.open_group(store, mode=mode, zarr_format=3, use_consolidated=(mode == "r"))
        except (ValueError, KeyError):
            return zarr.open_group(store, mode=mode, zarr_format=3, use_consolidated=False)
    except FileNotFoundError as exc:
        raise StoreError(f"store {location!r} does not exist ({exc}); check the location") from exc
    except (OSError, ValueError, KeyError) as exc:
        if isinstance(exc, StoreError):
            raise
        raise StoreError(f"store {location!r} cannot be opened: {type(exc).__name__}: {exc}") from exc


def _filesystem(location: str, storage_options: dict | None) -> tuple[Any, str]:
    """(fsspec filesystem, path in it) of a URL."""
    import fsspec

    fs, path = fsspec.core.url_to_fs(location, **dict(storage_options or {}))
    return fs, path


def _exists(location: str, storage_options: dict | None) -> bool:
    """True when something is stored at a location."""
    if _is_url(location):
        fs, path = _filesystem(location, storage_options)
        return bool(fs.exists(path))
    return Path(location).exists()
