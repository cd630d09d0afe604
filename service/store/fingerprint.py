"""The store's fingerprint: a hash over its metadata and decoded contents, and its verification."""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from itertools import product
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from service.store.layout import FILL_VALUE, FINGERPRINT_ATTR, _check_layout
from service.store.location import _normalise_location, _open_group


@dataclass(frozen=True)
class VerifyResult:
    """The fingerprint recorded at write time against the one recomputed from the store's contents now."""

    recorded: str | None
    computed: str
    ok: bool


def _read_units(array: zarr.Array) -> Iterator[tuple[slice, ...]]:
    """Slices of every read unit (shard when sharded, else chunk) of an array, in C order."""
    unit = array.shards or array.chunks
    if not array.shape:
        yield ()
        return
    ranges = [range(0, n, c) for n, c in zip(array.shape, unit, strict=True)]
    for starts in product(*ranges):
        yield tuple(slice(s, min(s + c, n)) for s, c, n in zip(starts, unit, array.shape, strict=True))


def _hash_array(array: zarr.Array, on_unit: Any = None) -> str:
    """sha256 over the sha256 of each read unit's decoded bytes (C order, little-endian), units in C order."""

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


def _metadata_text(group: zarr.Group) -> str:
    """Canonical JSON of what the store says about itself (root attrs without the fingerprint, every array's
    shape, dtype, dims, chunking and attributes); codec settings are left out so that the fingerprint names the
    data, not how it was compressed."""
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


def compute_fingerprint(
    group: zarr.Group, progress: bool = False, digests: dict[str, str] | None = None
) -> str:
    """'sha256:<hex>' over the canonical metadata and the decoded contents of every array of a store.

    ``digests`` may hold array digests already computed (by :func:`_hash_array`) in the same write.
    """
    known = dict(digests or {})
    total = hashlib.sha256()
    total.update(_metadata_text(group).encode())
    names = sorted(name for name, _ in group.arrays())
    bar = _bar(progress, sum(_count_units(group[n]) for n in names if n not in known), "fingerprint")
    for name in names:
        digest = known.get(name)
        if digest is None:
            digest = _hash_array(
                group[name], on_unit=(lambda s, v: bar.update(1)) if bar is not None else None
            )
        total.update(f"{name}:{digest};".encode())
    if bar is not None:
        bar.close()
    return "sha256:" + total.hexdigest()


def _count_units(array: zarr.Array) -> int:
    """Number of read units of an array."""
    return sum(1 for _ in _read_units(array))


def _bar(progress: bool, total: int, desc: str) -> Any:
    """A tqdm bar, or None when progress is off."""
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=desc, unit="chunk")


def _data_mask_and_digests(
    group: zarr.Group, variables: tuple[str, ...], progress: bool
) -> tuple[np.ndarray, dict[str, str]]:
    """(ny, nx) int8 mask (1 where any daily variable has a value on any day) and each variable's digest, from
    one pass over the chunks."""
    first = group[variables[0]]
    mask = np.zeros(first.shape[:2], dtype=bool)
    bar = _bar(progress, sum(_count_units(group[v]) for v in variables), "checking chunks")

    def on_unit(slices: tuple[slice, ...], values: np.ndarray) -> None:
        mask[slices[0], slices[1]] |= (values != FILL_VALUE).any(axis=2)
        if bar is not None:
            bar.update(1)

    digests = {v: _hash_array(group[v], on_unit=on_unit) for v in variables}
    if bar is not None:
        bar.close()
    return mask.astype(np.int8), digests


def verify_store(
    location: str | Path, storage_options: dict | None = None, progress: bool = False
) -> VerifyResult:
    """Recompute a store's fingerprint from its contents and compare it with the one recorded at write time."""
    target = _normalise_location(location)
    group = _open_group(target, storage_options, mode="r")
    _check_layout(group, target)
    recorded = group.attrs.get(FINGERPRINT_ATTR)
    computed = compute_fingerprint(group, progress=progress)
    return VerifyResult(
        recorded=str(recorded) if recorded else None, computed=computed, ok=recorded == computed
    )
