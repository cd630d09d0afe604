"""Writing a store: check and lay out a Dataset, write it aside, then swap it into place; append days."""

from __future__ import annotations

import os
import shutil
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
import zarr

from service.errors import StoreFormatError
from service.store.fingerprint import _data_mask_and_digests, compute_fingerprint
from service.store.grids import _find_crs
from service.store.layout import (
    _STATIC_NAMES,
    ADD_OFFSET,
    DEFAULT_LAYOUT,
    ELEVATION_LAYER,
    FILL_VALUE,
    FINGERPRINT_ATTR,
    GRID_MAPPING,
    LAYOUT_VERSION,
    MASK_LAYER,
    SCALE_FACTOR,
    TIME_COORD_CHUNK,
    TIME_UNITS,
    VARIABLE_ATTRS,
    VARIABLES,
    Layout,
    _encode_block,
    _json_scalar,
)
from service.store.location import (
    _aside_location,
    _filesystem,
    _is_url,
    _normalise_location,
    _open_group,
    _remove,
    _zarr_store,
)
from service.store.read import open_store
from service.store.timeaxis import _daily_numbers, _date_table, _iso


def write_store(
    ds: xr.Dataset,
    location: str | Path,
    *,
    storage_options: dict | None = None,
    progress: bool = False,
    layout: Layout = DEFAULT_LAYOUT,
) -> str:
    """Write a Dataset as a wxshock store, aside then swapped into place; returns the fingerprint.

    ``ds`` holds any of tmax, tmin (degC) and prcp (mm/day) as float arrays on dims time, y, x (any order;
    numpy- or dask-backed; NaN missing), 1-D coordinates time (daily, contiguous, datetime64 or cftime), y, x,
    optional 2-D layers on (y, x) (``elevation`` in m, weight layers), and its CRS as a grid_mapping variable with
    ``crs_wkt`` (or ``ds.attrs['crs_wkt']``). An existing store at ``location`` is replaced only once the new one
    is complete, so a failure leaves it as it was.
    """
    target = _normalise_location(location)
    prepared = _prepare(ds, layout)
    if not _is_url(target):
        Path(target).parent.mkdir(parents=True, exist_ok=True)
    aside = _aside_location(target, "writing")
    try:
        _write_prepared(prepared, aside, storage_options, progress, layout)
        fingerprint = _finish(aside, storage_options, progress)
        _swap_into_place(aside, target, storage_options)
    except BaseException:
        _remove(aside, storage_options)
        raise
    return fingerprint


def append_store(
    ds: xr.Dataset,
    location: str | Path,
    *,
    storage_options: dict | None = None,
    progress: bool = False,
) -> str:
    """Append days that directly follow a store's last day; returns the new fingerprint.

    ``ds`` is laid out as for :func:`write_store` (its static layers are ignored: the store keeps its own) and
    must hold the store's variables on the store's grid and calendar. A local store is copied aside as hard
    links (nothing is copied), the new days are written into the copy (zarr replaces a file rather than
    changing it, so the links the old store still uses are untouched), the data mask and fingerprint are
    recomputed, and the copy is swapped into place: only the chunks that hold new days are written. An object
    store cannot hard-link, so there the whole store is rewritten aside instead.
    """
    target = _normalise_location(location)
    store = open_store(target, storage_options=storage_options)
    variables = store.variables
    daily = ds[[v for v in variables if v in ds.data_vars]]
    missing = [v for v in variables if v not in ds.data_vars]
    if missing:
        raise StoreFormatError(f"appending to store {store.name!r}: the new days lack {missing!r}")
    extra = [v for v in VARIABLES if v in ds.data_vars and v not in variables]
    if extra:
        raise StoreFormatError(
            f"appending to store {store.name!r}: it has no {extra!r}; append its variables only"
        )
    crs = _find_crs(ds)
    if crs != store.grid.crs():
        raise StoreFormatError(
            f"appending to store {store.name!r}: the new days are in another CRS ({crs.name!r})"
        )
    daily = daily.assign_coords(crs=((), np.int32(0), {"crs_wkt": crs.to_wkt()}))
    days, calendar = _daily_numbers(ds["time"])
    last = int(store._time_numbers[-1]) if store.n_times else None
    if calendar != store.calendar or last is None or int(days[0]) != last + 1:
        raise StoreFormatError(
            f"appending to store {store.name!r}: the new days must start the day after its last day "
            f"({_iso(store.dates, store.n_times - 1)}, calendar {store.calendar!r}); they start "
            f"{_iso(_date_table(days[:1], calendar), 0)} (calendar {calendar!r})"
        )
    if _is_url(target):
        old = store.to_xarray()
        combined = xr.concat(
            [old[list(variables)].transpose("time", "y", "x"), daily.transpose("time", "y", "x")],
            dim="time",
            join="override",
            coords="minimal",
            compat="override",
        )
        for name in store.layers + ((ELEVATION_LAYER,) if store.has_elevation else ()):
            combined[name] = old[name].load()
        combined["crs"] = ((), np.int32(0), {"crs_wkt": crs.to_wkt()})
        combined.attrs = {k: v for k, v in store._group.attrs.asdict().items() if k != FINGERPRINT_ATTR}
        return write_store(combined, target, storage_options=storage_options, progress=progress)
    cy, cx, ct = store.inner_chunk_shape
    prepared = _prepare(daily, Layout(tile=max(cy, cx), time_chunk=ct))
    aside = _aside_location(target, "appending")
    try:
        shutil.copytree(target, aside, copy_function=os.link)
        _write_appended(aside, prepared, days, progress)
        fingerprint = _finish(aside, storage_options, progress)
        _swap_into_place(aside, target, storage_options)
    except BaseException:
        _remove(aside, storage_options)
        raise
    return fingerprint


def _write_appended(location: str, prepared: _Prepared, days: np.ndarray, progress: bool) -> None:
    """Grow the time axis of a store copy and write the new days into it."""
    import dask.array as da

    group = zarr.open_group(_zarr_store(location, None, read_only=False), mode="r+", zarr_format=3,
                            use_consolidated=False)  # fmt: skip
    time_array = group["time"]
    old = int(time_array.shape[0])
    time_array.resize((old + days.size,))
    time_array[old:] = days.astype(np.int32)
    sources, targets, regions = [], [], []
    for v in prepared.variables:
        array = group[v]
        ny, nx, _ = array.shape
        array.resize((ny, nx, old + days.size))
        sources.append(prepared.dataset[v].data)
        targets.append(array)
        regions.append((slice(None), slice(None), slice(old, old + days.size)))
    # a lock: new days share the last old chunk of each tile, which zarr reads, changes and writes back
    stored = da.store(sources, targets, regions=regions, lock=True, compute=False)
    _compute_settled(stored, "appending days" if progress else None)


@dataclass
class _Prepared:
    """A Dataset checked and laid out for writing (dims y, x, time; int16 encoded lazily)."""

    dataset: xr.Dataset
    encoding: dict[str, dict[str, Any]]
    variables: tuple[str, ...]
    shape: tuple[int, int, int]
    attrs: dict[str, Any] = field(default_factory=dict)


def _prepare(ds: xr.Dataset, layout: Layout) -> _Prepared:
    """Check a Dataset against the store contract and build the Dataset that is written."""
    import dask.array as da

    variables = tuple(v for v in VARIABLES if v in ds.data_vars)
    if not variables:
        raise StoreFormatError(
            f"dataset has none of the variables {list(VARIABLES)!r} (it has {sorted(map(str, ds.data_vars))!r})"
        )
    for v in variables:
        if set(ds[v].dims) != {"time", "y", "x"}:
            raise StoreFormatError(f"variable {v!r} has dims {ds[v].dims!r}; expected time, y and x")
    for name in ("x", "y", "time"):
        if name not in ds.coords or ds[name].ndim != 1:
            raise StoreFormatError(f"dataset needs a 1-D coordinate {name!r}")
    x = np.asarray(ds["x"].values, dtype=np.float64)
    y = np.asarray(ds["y"].values, dtype=np.float64)
    for name, c in (("x", x), ("y", y)):
        if not np.all(np.isfinite(c)):
            raise StoreFormatError(f"coordinate {name!r} has non-finite values")
        steps = np.diff(c)
        if c.size > 1 and not (np.all(steps > 0) or np.all(steps < 0)):
            raise StoreFormatError(f"coordinate {name!r} is not strictly monotonic")
    crs = _find_crs(ds)
    days, calendar = _daily_numbers(ds["time"])
    if days.size == 0:
        raise StoreFormatError("dataset has no time steps")
    steps = np.diff(days)
    bad = np.flatnonzero(steps != 1)
    if bad.size:
        i = int(bad[0])
        dates = _date_table(days[i : i + 2], calendar)
        raise StoreFormatError(
            f"time is not daily and contiguous: {_iso(dates, 0)} is followed by {_iso(dates, 1)} "
            f"(step {int(steps[i])} days, calendar {calendar!r}); give one step per day without gaps or repeats"
        )
    ny, nx, nt = y.size, x.size, days.size
    chunks = layout.chunks(ny, nx, nt)
    shards = layout.shards(ny, nx, nt)
    dask_chunks = shards or chunks

    data_vars: dict[str, Any] = {}
    encoding: dict[str, dict[str, Any]] = {}
    for v in variables:
        source = ds[v].transpose("y", "x", "time").data
        if not isinstance(source, da.Array):
            source = da.from_array(np.asarray(source), chunks=dask_chunks)
        else:
            source = source.rechunk(dask_chunks)
        encoded = source.map_blocks(_encode_block, v, dtype=np.int16)
        attrs = dict(VARIABLE_ATTRS[v])
        attrs.update({"scale_factor": SCALE_FACTOR, "add_offset": ADD_OFFSET, "grid_mapping": GRID_MAPPING})
        data_vars[v] = (("y", "x", "time"), encoded, attrs)
        enc: dict[str, Any] = {
            "dtype": "int16",
            "_FillValue": np.int16(FILL_VALUE),
            "fill_value": np.int16(FILL_VALUE),
            "chunks": chunks,
            "compressors": [layout.codec()],
        }
        if shards is not None:
            enc["shards"] = shards
        encoding[v] = enc

    for name, var in ds.data_vars.items():
        name = str(name)
        if name in VARIABLES or name in _STATIC_NAMES:
            continue
        if set(var.dims) != {"y", "x"}:
            continue  # only static 2-D layers travel with the grid; other variables are not part of a store
        attrs = {
            k: val
            for k, val in var.attrs.items()
            if _json_scalar(val) and k not in ("_FillValue", "grid_mapping")
        }
        if name == ELEVATION_LAYER:
            attrs.setdefault("units", "m")
            attrs.setdefault("standard_name", "surface_altitude")
        attrs["grid_mapping"] = GRID_MAPPING
        layer = np.asarray(var.transpose("y", "x").values, dtype=np.float32)
        data_vars[name] = (("y", "x"), layer, attrs)
        encoding[name] = {"dtype": "float32", "_FillValue": np.float32(np.nan), "chunks": (ny, nx)}

    crs_attrs = {k: val for k, val in crs.to_cf().items() if _json_scalar(val)}
    crs_attrs["crs_wkt"] = crs.to_wkt()
    crs_attrs["spatial_ref"] = crs.to_wkt()
    data_vars[GRID_MAPPING] = ((), np.int32(0), crs_attrs)

    geographic = bool(crs.is_geographic)
    coords = {
        "y": (
            ("y",),
            y,
            {"standard_name": "latitude", "units": "degrees_north", "axis": "Y"}
            if geographic
            else {"standard_name": "projection_y_coordinate", "units": "m", "axis": "Y"},
        ),
        "x": (
            ("x",),
            x,
            {"standard_name": "longitude", "units": "degrees_east", "axis": "X"}
            if geographic
            else {"standard_name": "projection_x_coordinate", "units": "m", "axis": "X"},
        ),
        "time": (
            ("time",),
            days.astype(np.int32),
            {"standard_name": "time", "axis": "T", "units": TIME_UNITS, "calendar": calendar},
        ),
    }
    encoding["time"] = {"chunks": (TIME_COORD_CHUNK,)}
    encoding["x"] = {"chunks": (nx,)}
    encoding["y"] = {"chunks": (ny,)}
    attrs = {
        k: val for k, val in ds.attrs.items() if _json_scalar(val) and k not in ("crs_wkt", FINGERPRINT_ATTR)
    }
    attrs.update({"Conventions": "CF-1.10", "wxshock_layout_version": LAYOUT_VERSION})
    out = xr.Dataset(data_vars, coords=coords, attrs=attrs)
    return _Prepared(dataset=out, encoding=encoding, variables=variables, shape=(ny, nx, nt), attrs=attrs)


def _write_prepared(
    prepared: _Prepared, location: str, storage_options: dict | None, progress: bool, layout: Layout
) -> None:
    """Write the prepared Dataset (daily variables chunk by chunk, with a progress bar when asked)."""
    store = _zarr_store(location, storage_options, read_only=False)
    delayed = prepared.dataset.to_zarr(
        store, mode="w", encoding=prepared.encoding, zarr_format=3, consolidated=False, compute=False
    )
    _compute_settled(delayed, "writing store" if progress else None)


def _compute_settled(collection: Any, desc: str | None) -> None:
    """Compute a dask write on threads of our own pool, and wait for every task to stop before returning.

    dask's threaded scheduler raises as soon as one task fails, while other tasks may still be writing
    chunks: the caller's clean-up could then remove the aside directory before those writes land (and
    they recreate it). Joining the pool first makes the clean-up final. ``desc`` shows a progress bar.
    """
    import dask

    pool = ThreadPoolExecutor(max_workers=max(1, os.cpu_count() or 1))
    try:
        if desc is not None:
            with _TqdmCallback(desc):
                dask.compute(collection, scheduler="threads", pool=pool)
        else:
            dask.compute(collection, scheduler="threads", pool=pool)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


class _TqdmCallback:
    """A dask callback that shows a tqdm bar over the tasks of one compute."""

    def __init__(self, desc: str) -> None:
        from dask.callbacks import Callback
        from tqdm.auto import tqdm

        bar: dict[str, Any] = {}

        def start_state(dsk: Any, state: dict) -> None:
            total = sum(len(state[k]) for k in ("ready", "waiting", "running", "finished") if k in state)
            bar["bar"] = tqdm(total=total, desc=desc, unit="task")

        def posttask(key: Any, result: Any, dsk: Any, state: Any, worker_id: Any) -> None:
            bar["bar"].update(1)

        def finish(dsk: Any, state: Any, errored: bool) -> None:
            bar["bar"].close()

        self._callback = Callback(start_state=start_state, posttask=posttask, finish=finish)

    def __enter__(self) -> _TqdmCallback:
        self._callback.__enter__()
        return self

    def __exit__(self, *exc: object) -> None:
        self._callback.__exit__(*exc)


def _finish(location: str, storage_options: dict | None, progress: bool) -> str:
    """Write the data mask, then the fingerprint, then consolidate the metadata; returns the fingerprint."""
    group = _open_group(location, storage_options, mode="r+")
    variables = tuple(v for v in VARIABLES if v in group.array_keys())
    mask, digests = _data_mask_and_digests(group, variables, progress)
    array = group.create_array(
        MASK_LAYER,
        shape=mask.shape,
        dtype="int8",
        chunks=mask.shape,
        fill_value=0,
        dimension_names=("y", "x"),
        attributes={
            "long_name": "cell has data on at least one day",
            "flag_values": [0, 1],
            "flag_meanings": "no_data has_data",
            "grid_mapping": GRID_MAPPING,
        },
        overwrite=True,
    )
    array[...] = mask
    fingerprint = compute_fingerprint(group, progress=progress, digests=digests)
    group.attrs[FINGERPRINT_ATTR] = fingerprint
    with warnings.catch_warnings():
        # zarr notes that consolidated metadata is not yet in the v3 spec; xarray and zarr-python read it.
        warnings.simplefilter("ignore", category=UserWarning)
        zarr.consolidate_metadata(group.store)
    return fingerprint


def _swap_into_place(aside: str, target: str, storage_options: dict | None) -> None:
    """Move a completely written store to its target, replacing what was there.

    Local directories: two renames on the same file system, so the target is either the old or the new store
    (a reader that opens it between the renames finds nothing for that instant). Object stores cannot rename a
    prefix: the old objects are deleted and the new ones copied in; a failure before this step leaves the old
    store untouched.
    """
    if _is_url(target):
        fs, target_key = _filesystem(target, storage_options)
        _, aside_key = _filesystem(aside, storage_options)
        if fs.exists(target_key):
            fs.rm(target_key, recursive=True)
        fs.copy(aside_key, target_key, recursive=True)
        fs.rm(aside_key, recursive=True)
        return
    target_path = Path(target)
    target_path.parent.mkdir(parents=True, exist_ok=True)
    if target_path.exists():
        old = Path(_aside_location(target, "old"))
        os.replace(target_path, old)
        try:
            os.replace(aside, target_path)
        except OSError:
            os.replace(old, target_path)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(aside, target_path)
