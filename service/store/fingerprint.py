"""The store's fingerprint: a hash over its metadata and decoded contents, and its verification.

Layout 2 (today's): the fingerprint is taken over the values as zarr decodes them (after every codec: the stored
int16 of a daily variable, the float32 of a layer), cut into a fixed canonical tiling (CANONICAL_TILE, by
dimension name) that has nothing to do with how the store is chunked, sharded or compressed:

    tile digest   = sha256(tile values, C order over the dims in CANONICAL_ORDER, little-endian, one NaN)
    array digest  = sha256(tile digests in C order of the tiles)
    fingerprint   = sha256(canonical metadata JSON, then "<path>:<array digest>;" for each array by path)

The canonical metadata holds the root attributes (without the fingerprint itself, the migration record and the
layout version) and, for every array, its dims, shape, dtype, fill value and attributes (scale_factor,
add_offset, units, calendar, crs_wkt, the days a variable covers...): everything that changes what the values
mean. Chunks, shards and codecs are left out, so a relayout or a change of codec leaves the fingerprint as it
was. Layout 1 stores keep their own fingerprint (:func:`fingerprint_v1`), verified as it was written.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from itertools import product
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from service.store.layout import (
    DIGESTS_ATTR,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    MIGRATED_ATTR,
    VERSION_ATTR,
    StoreLayout,
    read_layout,
)
from service.store.location import _normalise_location, _open_group

# The canonical tiling, by dimension name (any other dimension is taken whole). Never change these numbers:
# every layout-2 fingerprint ever recorded depends on them. They equal the default chunks (32 x 32 cells, ten
# years), so a store in the default layout is read once, one chunk per tile.
CANONICAL_TILE = {"y": 32, "x": 32, "time": 3653}
CANONICAL_ORDER = ("y", "x", "time")
# Root attributes that say how or when a store was written, not what it holds.
_NOT_HASHED_ROOT_ATTRS = (FINGERPRINT_ATTR, MIGRATED_ATTR, VERSION_ATTR, DIGESTS_ATTR)

# (tile index, values) of every canonical tile, as it is hashed
OnTile = Callable[[tuple[slice, ...], np.ndarray], None]


@dataclass(frozen=True)
class VerifyResult:
    """The fingerprint recorded at write time against the one recomputed from the store's contents now."""

    recorded: str | None
    computed: str
    ok: bool


# --- layout 2 ----------------------------------------------------------------------------------------------


def array_paths(group: zarr.Group, layout: StoreLayout) -> list[str]:
    """Paths of every array of a store (root arrays, then each grid's), sorted."""
    paths = [name for name in group.array_keys()] if layout.version == 2 else []
    for grid in layout.grids:
        member = group[layout.grids[grid]] if layout.grids[grid] else group
        paths.extend(layout.path(grid, name) for name in member.array_keys())
    return sorted(set(paths))


def _canonical_permutation(array: zarr.Array) -> tuple[tuple[str, ...], tuple[int, ...]]:
    """(dims in canonical order, the axes of the stored array in that order)."""
    dims = tuple(array.metadata.dimension_names or (f"dim_{i}" for i in range(array.ndim)))
    rank = {d: i for i, d in enumerate(CANONICAL_ORDER)}
    order = sorted(range(len(dims)), key=lambda i: (rank.get(dims[i], len(rank)), dims[i]))
    return tuple(dims[i] for i in order), tuple(order)


def _canonical_values(values: np.ndarray, order: tuple[int, ...]) -> np.ndarray:
    """Values in canonical axis order, C-contiguous, little-endian, with one NaN bit pattern."""
    out = np.transpose(np.asarray(values), order).copy(order="C")  # (ascontiguousarray makes 0-d arrays 1-d)
    out = out.astype(out.dtype.newbyteorder("<"), copy=False)
    if out.dtype.kind == "f":
        out = np.where(np.isnan(out), np.nan, out).astype(out.dtype, copy=False)
    return out


def _blocks(array: zarr.Array, tile: tuple[int, ...]) -> list[tuple[slice, ...]]:
    """Read blocks (stored axis order) that each hold whole canonical tiles: the store's read unit when it is a
    multiple of the tile, else the tile (so any chunking works; an unaligned one decodes some chunks twice)."""
    if not array.shape:
        return [()]
    unit = array.shards or array.chunks
    sizes = []
    for u, c in zip(unit, tile, strict=True):
        sizes.append(u if u % c == 0 else c)
    ranges = [range(0, n, s) for n, s in zip(array.shape, sizes, strict=True)]
    return [
        tuple(slice(s, min(s + z, n)) for s, z, n in zip(starts, sizes, array.shape, strict=True))
        for starts in product(*ranges)
    ]


def array_digest(
    array: zarr.Array,
    reduce: Callable[[tuple[slice, ...], np.ndarray], Any] | None = None,
    collect: Callable[[tuple[slice, ...], Any], None] | None = None,
) -> str:
    """The array's digest over its canonical tiles (see the module docstring).

    ``reduce(block, values)`` runs on each read block (stored axis order) in the reading thread and returns
    something small; ``collect(block, result)`` receives it in the calling thread, block after block, so that
    one pass can also build the data mask without two threads changing the same cells.
    """
    dims, order = _canonical_permutation(array)
    tile_stored = _tile_of(array)
    tile_canonical = tuple(tile_stored[i] for i in order)

    def one(block: tuple[slice, ...]) -> tuple[tuple[slice, ...], list[tuple[tuple[int, ...], bytes]], Any]:
        raw = np.asarray(array[block])
        reduced = reduce(block, raw) if reduce is not None else None
        values = _canonical_values(raw, order)
        starts = tuple(block[i].start for i in order) if block else ()
        out = []
        ranges = [range(0, n, t) for n, t in zip(values.shape, tile_canonical, strict=True)]
        for offsets in product(*ranges):
            piece = values[tuple(slice(o, o + t) for o, t in zip(offsets, tile_canonical, strict=True))]
            index = tuple((s + o) // t for s, o, t in zip(starts, offsets, tile_canonical, strict=True))
            out.append((index, hashlib.sha256(piece.copy(order="C").tobytes()).digest()))
        return block, out, reduced

    digests: dict[tuple[int, ...], bytes] = {}
    for block, pieces, reduced in _bounded_map(one, _blocks(array, tile_stored)):
        digests.update(pieces)
        if collect is not None:
            collect(block, reduced)
    outer = hashlib.sha256()
    outer.update(json.dumps({"dims": list(dims)}).encode())
    for index in sorted(digests):
        outer.update(digests[index])
    return outer.hexdigest()


def _bounded_map(fn: Callable[[Any], Any], items: list[Any]) -> Iterator[Any]:
    """fn over items on a few threads, results in order, with at most two per thread in flight (bounded memory
    however large the array)."""
    workers = max(1, min(4, os.cpu_count() or 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        pending: list[Any] = []
        for item in items:
            pending.append(pool.submit(fn, item))
            if len(pending) >= 2 * workers:
                yield pending.pop(0).result()
        for future in pending:
            yield future.result()


def metadata_text(group: zarr.Group, layout: StoreLayout) -> str:
    """Canonical JSON of what the store says about itself: root attributes (less the fingerprint, migration
    record and layout version) and every array's dims, shape, dtype, fill value and attributes, in canonical
    axis order; chunks, shards and codecs are left out."""
    root = {k: _jsonable(v) for k, v in group.attrs.asdict().items() if k not in _NOT_HASHED_ROOT_ATTRS}
    groups = {}
    for grid, prefix in layout.grids.items():
        if prefix:
            groups[grid] = {k: _jsonable(v) for k, v in group[prefix].attrs.asdict().items()}
    arrays = {}
    for path in array_paths(group, layout):
        array = group[path]
        dims, order = _canonical_permutation(array)
        arrays[path] = {
            "dims": list(dims),
            "shape": [int(array.shape[i]) for i in order],
            "dtype": str(array.dtype),
            "fill_value": _jsonable(array.fill_value),
            "attrs": {k: _jsonable(v) for k, v in array.attrs.asdict().items()},
        }
    return json.dumps(
        {"root": root, "groups": groups, "arrays": arrays},
        sort_keys=True,
        separators=(",", ":"),
        allow_nan=True,
    )


def compute_fingerprint(
    group: zarr.Group,
    progress: bool = False,
    digests: dict[str, str] | None = None,
    *,
    location: str = "store",
) -> str:
    """'sha256:<hex>' of a store (layout 2 as in the module docstring; layout 1 by :func:`fingerprint_v1`).

    ``digests`` may hold array digests (by path) already computed in the same write.
    """
    layout = read_layout(group, location)
    if layout.version == 1:
        return fingerprint_v1(group, progress=progress)
    known = dict(digests or {})
    paths = array_paths(group, layout)
    total = hashlib.sha256()
    total.update(metadata_text(group, layout).encode())
    todo = [p for p in paths if p not in known]
    bar = _bar(progress, sum(len(_blocks(group[p], _tile_of(group[p]))) for p in todo), "fingerprint")
    for path in paths:
        digest = known.get(path)
        if digest is None:
            digest = array_digest(
                group[path], collect=(lambda s, r: bar.update(1)) if bar is not None else None
            )
        total.update(f"{path}:{digest};".encode())
    if bar is not None:
        bar.close()
    return "sha256:" + total.hexdigest()


def _tile_of(array: zarr.Array) -> tuple[int, ...]:
    """The canonical tile of an array in stored axis order."""
    dims = tuple(array.metadata.dimension_names or (f"dim_{i}" for i in range(array.ndim)))
    return tuple(CANONICAL_TILE.get(d, max(1, n)) for d, n in zip(dims, array.shape, strict=True))


def scan_daily(
    group: zarr.Group, layout: StoreLayout, progress: bool
) -> tuple[dict[str, np.ndarray], dict[str, str]]:
    """One pass over every daily variable: each grid's (ny, nx) int8 data mask (1 where some variable of the
    grid has a value on some day) and each variable's array digest (by path)."""
    masks: dict[str, np.ndarray] = {}
    digests: dict[str, str] = {}
    paths = {v: layout.path(g, v) for v, g in layout.variables.items()}
    bar = _bar(
        progress, sum(len(_blocks(group[p], _tile_of(group[p]))) for p in paths.values()), "checking chunks"
    )
    for var, grid in layout.variables.items():
        array = group[paths[var]]
        mask = masks.setdefault(grid, np.zeros(array.shape[:2], dtype=bool))
        fill = array.fill_value

        def reduce(block: tuple[slice, ...], values: np.ndarray, fill: Any = fill) -> np.ndarray:
            return (values != fill).any(axis=2)

        def collect(block: tuple[slice, ...], has_data: np.ndarray, mask: np.ndarray = mask) -> None:
            mask[block[0], block[1]] |= has_data
            if bar is not None:
                bar.update(1)

        digests[paths[var]] = array_digest(array, reduce=reduce, collect=collect)
    if bar is not None:
        bar.close()
    return {g: m.astype(np.int8) for g, m in masks.items()}, digests


def verify_store(
    location: str | Path, storage_options: dict | None = None, progress: bool = False
) -> VerifyResult:
    """Recompute a store's fingerprint from its contents and compare it with the one recorded at write time."""
    target = _normalise_location(location)
    from service.store.swap import recover

    recover(target, storage_options)
    group = _open_group(target, storage_options, mode="r")
    read_layout(group, target)
    recorded = group.attrs.get(FINGERPRINT_ATTR)
    computed = compute_fingerprint(group, progress=progress, location=target)
    return VerifyResult(
        recorded=str(recorded) if recorded else None, computed=computed, ok=recorded == computed
    )


# --- layout 1 (kept to verify and migrate stores written before layout 2) ------------------------------------


def _read_units(array: zarr.Array) -> Iterator[tuple[slice, ...]]:
    """Slices of every read unit (shard when sharded, else chunk) of an array, in C order."""
    unit = array.shards or array.chunks
    if not array.shape:
        yield ()
        return
    ranges = [range(0, n, c) for n, c in zip(array.shape, unit, strict=True)]
    for starts in product(*ranges):
        yield tuple(slice(s, min(s + c, n)) for s, c, n in zip(starts, unit, array.shape, strict=True))


def _hash_array_v1(array: zarr.Array, on_unit: Any = None) -> str:
    """Layout 1: sha256 over the sha256 of each read unit's decoded bytes (C order, little-endian), units in C
    order."""

    def one(slices: tuple[slice, ...]) -> tuple[tuple[slice, ...], bytes, np.ndarray]:
        values = np.ascontiguousarray(np.asarray(array[slices]))
        values = values.astype(values.dtype.newbyteorder("<"), copy=False)
        if values.dtype.kind == "f":
            values = np.where(np.isnan(values), np.nan, values)  # one NaN bit pattern
        return slices, hashlib.sha256(values.tobytes()).digest(), values

    outer = hashlib.sha256()
    with ThreadPoolExecutor(max_workers=max(1, min(4, os.cpu_count() or 1))) as pool:
        for slices, digest, values in pool.map(one, _read_units(array)):
            outer.update(digest)
            if on_unit is not None:
                on_unit(slices, values)
    return outer.hexdigest()


def _metadata_text_v1(group: zarr.Group) -> str:
    """Layout 1: canonical JSON of the root attrs (without the fingerprint) and every array's shape, dtype,
    dims, chunking, fill value and attributes."""
    root = {k: v for k, v in group.attrs.asdict().items() if k != FINGERPRINT_ATTR}
    arrays = {}
    for name, array in sorted(group.arrays()):
        arrays[name] = {
            "shape": list(array.shape),
            "dtype": str(array.dtype),
            "dims": list(array.metadata.dimension_names or ()),
            "chunks": list(array.chunks),
            "shards": list(array.shards) if array.shards else None,
            "fill_value": _jsonable(array.fill_value),
            "attrs": {k: _jsonable(v) for k, v in array.attrs.asdict().items()},
        }
    return json.dumps({"root": root, "arrays": arrays}, sort_keys=True, separators=(",", ":"), allow_nan=True)


def fingerprint_v1(group: zarr.Group, progress: bool = False) -> str:
    """'sha256:<hex>' of a layout-1 store as layout 1 defined it (metadata with chunking, then each array's
    digest over its read units)."""
    total = hashlib.sha256()
    total.update(_metadata_text_v1(group).encode())
    names = sorted(name for name, _ in group.arrays())
    bar = _bar(progress, sum(sum(1 for _ in _read_units(group[n])) for n in names), "fingerprint (layout 1)")
    for name in names:
        digest = _hash_array_v1(
            group[name], on_unit=(lambda s, v: bar.update(1)) if bar is not None else None
        )
        total.update(f"{name}:{digest};".encode())
    if bar is not None:
        bar.close()
    return "sha256:" + total.hexdigest()


# --- shared ------------------------------------------------------------------------------------------------


def _jsonable(value: Any) -> Any:
    """numpy scalars to plain Python values for canonical JSON."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not np.isfinite(value):
        return repr(value)
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    return value


def _bar(progress: bool, total: int, desc: str) -> Any:
    """A tqdm bar, or None when progress is off."""
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="block")


__all__ = [
    "CANONICAL_TILE",
    "FILL_VALUE",
    "VerifyResult",
    "array_digest",
    "compute_fingerprint",
    "fingerprint_v1",
    "metadata_text",
    "scan_daily",
    "verify_store",
]
