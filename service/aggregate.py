"""Weights x chunks -> (feature, time) daily community series, as dask tasks (nothing is computed here).

For every time block (one store chunk along time) and every spatial chunk that some feature touches, the
chunk's stored integers are read (``Store.read_raw``) and the chunk's sparse weight sub-matrix (features
touching it x its cells, int16 scale factor folded in) multiplied with the (cells x days) block. One task does
this for all the chunks a batch touches in one stored object (a shard of chunks, or a lone chunk), one after the
other: a shard's four inner chunks cost one task, not four (dask's own cost per task, about 0.1 ms on local
threads and more on a cluster's scheduler, is paid once per shard).
Partial sums (weighted sum and the weight of the cells with data) are added into each feature's series in
grid order of the chunks, whatever else the batch holds, so a feature's means are the same bits in any batch
(alone, in a job's small batches, on a cluster); the mean is their ratio plus the add_offset, NaN where no
weight is left. Only chunks that some feature
touches are read, each once per variable; a task holds one chunk at a time, so memory is bounded by a few
chunks per thread, not by the store.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import dask
import dask.array as da
import numpy as np
import xarray as xr
from dask.highlevelgraph import HighLevelGraph
from scipy import sparse

from service.buffers import series_pool
from service.errors import RequestError
from service.weighted_sums import chunk_weighted_sums, put_rows, scale_rows

if TYPE_CHECKING:
    from service.geometry import Weights
    from service.store import Store

VARIABLE_UNITS = {"tmax": "degC", "tmin": "degC", "prcp": "mm/day", "tmean": "degC"}
# A day's mean is missing when the weight of its cells with data is below this share of the feature's
# total weight (guards a denominator that is zero up to rounding).
MIN_WEIGHT_SHARE = 1e-9


@dataclass(frozen=True)
class ChunkWeights:
    """The weights of the features touching one spatial chunk of the store.

    ``y``/``x`` the chunk's index slices; ``rows`` the feature rows touching it (ascending); ``matrix``
    (len(rows), cells of the chunk) CSR with local cell = (iy - y.start) * width + (ix - x.start); ``total``
    each row's weight in the chunk (:func:`row_sums`; None: computed by each task that needs it).
    """

    y: slice
    x: slice
    rows: np.ndarray
    matrix: sparse.csr_matrix
    total: np.ndarray | None = None


@dataclass(frozen=True, eq=False)
class ReadUnit:
    """The chunks of one stored object (a shard, or a lone chunk) that a batch touches, summed by one task.

    ``chunks`` in grid order; ``nexts`` the next batch's weights on each of them (None: it does not touch it, or
    there is no next batch). Compared by identity, so that dask passes it to the task as it is.
    """

    chunks: tuple[ChunkWeights, ...]
    nexts: tuple[ChunkWeights | None, ...]


@dataclass(frozen=True)
class Partial:
    """Partial sums over some chunks for the features ``rows``: (rows, days) weighted sum and weights.

    The weight of cells with data is ``total[:, None] + correction`` (``correction`` None when every
    cell had data on every day, which is the usual case and saves a (rows, days) array).
    """

    rows: np.ndarray
    weighted_sum: np.ndarray
    total: np.ndarray
    correction: np.ndarray | None


@dataclass(frozen=True)
class GridWeights:
    """The weights of the same features on several grids of one dataset: grid name -> Weights, the first grid
    (where features are batched by their cells) first.

    It reads as the first grid's Weights for what is per feature (feature_ids, area_km2, latitude, matrix, ...),
    so code written for one grid runs unchanged; :func:`aggregate` takes each variable's grid's weights, and
    ``per_grid_columns`` (the dataset has several grids) names coverage and cells per grid in the results.
    """

    by_grid: dict[str, Weights]
    per_grid_columns: bool = True

    def __getattr__(self, name: str) -> Any:
        if name.startswith("__") or name in ("by_grid", "per_grid_columns"):
            raise AttributeError(name)
        return getattr(next(iter(self.by_grid.values())), name)

    @property
    def first(self) -> Weights:
        """The weights on the first grid."""
        return next(iter(self.by_grid.values()))

    @property
    def key(self) -> str:
        """A key of every grid's weights (their cache keys, by grid)."""
        return "|".join(f"{grid}={w.key}" for grid, w in self.by_grid.items())

    @property
    def skipped(self) -> list[Any]:
        """The features service.geometry skipped on any grid (each once, in the order reported)."""
        seen: dict[Any, Any] = {}
        for w in self.by_grid.values():
            for entry in getattr(w, "skipped", None) or ():
                index = entry[0] if isinstance(entry, tuple | list) else getattr(entry, "index", id(entry))
                seen.setdefault(index, entry)
        return list(seen.values())


def weights_on(weights: Weights | GridWeights, grid: str) -> Weights:
    """The weights on ``grid`` (plain Weights are taken to be on it)."""
    if isinstance(weights, GridWeights):
        try:
            return weights.by_grid[grid]
        except KeyError:
            raise ValueError(
                f"no weights on grid {grid!r}; weights were computed on {list(weights.by_grid)!r}"
            ) from None
    return weights


def chunk_weights(weights: Weights, shape: tuple[int, int], chunk: tuple[int, int]) -> list[ChunkWeights]:
    """The weight matrix split by the store's spatial chunks, only chunks with some weight, in grid order."""
    ny, nx = shape
    cy, cx = chunk
    coo = weights.matrix.tocoo()
    keep = coo.data != 0
    row, col, value = coo.row[keep], coo.col[keep], coo.data[keep]
    iy, ix = np.divmod(col.astype(np.int64), nx)
    chunks_x = -(-nx // cx)
    chunk_id = (iy // cy) * chunks_x + ix // cx
    order = np.argsort(chunk_id, kind="stable")
    row, iy, ix, value, chunk_id = row[order], iy[order], ix[order], value[order], chunk_id[order]
    starts = np.flatnonzero(np.r_[True, np.diff(chunk_id) != 0])
    ends = np.r_[starts[1:], len(chunk_id)]
    plan = []
    for s, e in zip(starts, ends, strict=True):
        cid = int(chunk_id[s])
        by, bx = divmod(cid, chunks_x)
        y = slice(by * cy, min((by + 1) * cy, ny))
        x = slice(bx * cx, min((bx + 1) * cx, nx))
        width = x.stop - x.start
        rows, local_row = np.unique(row[s:e], return_inverse=True)
        local_cell = (iy[s:e] - y.start) * width + (ix[s:e] - x.start)
        matrix = sparse.csr_matrix(
            (value[s:e], (local_row, local_cell)), shape=(len(rows), (y.stop - y.start) * width)
        )
        matrix.sum_duplicates()
        # the rows' weights once here, not in each of the chunk's tasks (one per variable and time block)
        plan.append(ChunkWeights(y=y, x=x, rows=rows, matrix=matrix, total=row_sums(matrix)))
    return plan


def chunk_sums(
    store: Store,
    var: str,
    chunk: ChunkWeights,
    t: slice,
    scale_factor: float,
    fill_value: int,
    cached: bool = True,
) -> Partial:
    """One task: read one chunk's stored integers and return its features' partial sums (scaled units);
    ``cached`` False reads around the decoded-tile cache (Store.read_raw)."""
    # the thread's scratch memory: the sums are all this task keeps of the chunk
    block = store.read_raw(var, chunk.y, chunk.x, t, cached=cached, scratch=True)
    return block_sums(block, chunk, scale_factor, fill_value)


class Handover:
    """Partial sums that one feature batch computed for the next from the chunks both touch, until the next
    batch's chunk tasks take them (:func:`unit_sums`; local threads, one batch before its table at a time, so
    that every chunk task of a batch has run when the next batch's chunk tasks begin). Keys: (the receiving
    batch's weights key, variable, first day, end day, chunk's first row, chunk's first column), so that no other
    batch can take them."""

    def __init__(self) -> None:
        self._partials: dict[tuple[Any, ...], Partial] = {}
        self._lock = threading.Lock()

    def put(self, key: tuple[Any, ...], partial: Partial) -> None:
        """Keep ``partial`` for the next batch."""
        with self._lock:
            self._partials[key] = partial

    def take(self, key: tuple[Any, ...]) -> Partial | None:
        """The partial kept under ``key`` (removed), or None."""
        with self._lock:
            return self._partials.pop(key, None)

    def __len__(self) -> int:
        with self._lock:
            return len(self._partials)


def chunk_sums_for_two(
    store: Store,
    var: str,
    chunk: ChunkWeights,
    next_chunk: ChunkWeights,
    t: slice,
    scale_factor: float,
    fill_value: int,
    cached: bool,
    handover: Handover,
    key: tuple[Any, ...],
) -> Partial:
    """One task: :func:`chunk_sums` of this batch's features, and of the next batch's (``next_chunk``, the same
    chunk in its weights) from the same read, kept in ``handover`` under ``key``. Each feature's sums are made
    row by row as its own batch would make them, so the next batch's values are the same bits."""
    block = store.read_raw(var, chunk.y, chunk.x, t, cached=cached, scratch=True)
    handover.put(key, block_sums(block, next_chunk, scale_factor, fill_value))
    return block_sums(block, chunk, scale_factor, fill_value)


def unit_sums(
    store: Store,
    var: str,
    unit: ReadUnit,
    t: slice,
    scale_factor: float,
    fill_value: int,
    cached: bool,
    handover: Handover | None,
    weights_key: str,
    next_key: str | None,
) -> list[Partial]:
    """One task: the partial sums of each chunk of ``unit`` (in its order), chunk after chunk.

    With a ``handover``, a chunk's sums that the batch before made from its own read are taken instead of reading
    it (the same bits), and a chunk the next batch also touches is read once for both
    (:func:`chunk_sums_for_two`). The batch before has run every chunk task by then: compute_each starts a batch
    on local threads once the one before has reached its table, which needs all of them; they are looked for
    when the task runs, so that this batch's graph can be made while that batch still runs."""
    t0, t1 = t.start, t.stop
    sums = []
    for chunk, next_chunk in zip(unit.chunks, unit.nexts, strict=True):
        where = (var, t0, t1, chunk.y.start, chunk.x.start)
        given = handover.take((weights_key, *where)) if handover is not None else None
        if given is not None:
            sums.append(given)
        elif next_chunk is not None and handover is not None:
            pair = (chunk, next_chunk, t, scale_factor, fill_value, cached, handover, (next_key, *where))
            sums.append(chunk_sums_for_two(store, var, *pair))
        else:
            sums.append(chunk_sums(store, var, chunk, t, scale_factor, fill_value, cached))
    return sums


def read_units(
    plan: Sequence[ChunkWeights], unit_shape: tuple[int, int], shared: dict[tuple[int, int], ChunkWeights]
) -> tuple[list[ReadUnit], np.ndarray]:
    """The plan's chunks grouped by the stored object ((sy, sx) cells: a shard, or the chunk itself) that holds
    them, units in the order of their first chunk; and, for each chunk of the plan in grid order, its place in
    the units' chunks laid end to end (:func:`in_grid_order`)."""
    sy, sx = unit_shape
    members: dict[tuple[int, int], list[int]] = {}
    for k, chunk in enumerate(plan):
        members.setdefault((chunk.y.start // sy, chunk.x.start // sx), []).append(k)
    units, laid = [], []
    for ks in members.values():
        chunks = tuple(plan[k] for k in ks)
        nexts = tuple(shared.get((c.y.start, c.x.start)) for c in chunks)
        units.append(ReadUnit(chunks, nexts))
        laid.extend(ks)
    place = np.empty(len(plan), dtype=np.int64)
    place[np.asarray(laid, dtype=np.int64)] = np.arange(len(plan))
    return units, place


def in_grid_order(units: Sequence[Sequence[Partial]], place: np.ndarray) -> list[Partial]:
    """The partial sums of the units' tasks (each a list, in unit order) in grid order of their chunks: ``place``
    from :func:`read_units`."""
    laid = [p for unit in units for p in unit]
    return [laid[i] for i in place]


def block_sums(block: np.ndarray, chunk: ChunkWeights, scale_factor: float, fill_value: int) -> Partial:
    """A chunk's partial sums from its stored integers: (ny, nx, days) or (cells, days), any strides, may be
    read-only (a view of a cached chunk).

    The compiled kernel (service.weighted_sums) reads the integers once, without a float64 copy, and adds the
    terms in the order of ``(weights * scale_factor) @ float64(block)`` with scipy, so the sums are those bit
    for bit; a cell holding the fill value on a day adds nothing and its weight comes off that day's total.
    """
    matrix = chunk.matrix
    total = row_sums(matrix) if chunk.total is None else chunk.total
    weighted_sum, correction = chunk_weighted_sums(
        matrix.data, matrix.indices, matrix.indptr, scale_factor, block, fill_value
    )
    return Partial(chunk.rows, weighted_sum, total, correction)


def row_sums(matrix: sparse.csr_matrix) -> np.ndarray:
    """Each row's sum of a CSR matrix's stored values (float64): scipy's ``matrix.sum(axis=1)``, bit for bit.

    The same reduction scipy makes (np.add.reduceat over the non-empty rows' values), without its numpy-matrix
    wrapping: a few numpy calls instead of about thirty Python-level steps, each of which waits for the GIL while
    another thread of a busy batch holds it (15 us against 8 us alone, one 300-row chunk)."""
    total = np.zeros(matrix.shape[0], dtype=np.float64)
    nonempty = np.flatnonzero(np.diff(matrix.indptr))
    if nonempty.size:
        total[nonempty] = np.add.reduceat(matrix.data, matrix.indptr[nonempty])
    return total


def finish(
    partials: Sequence[Partial], n_features: int, days: int, add_offset: float, out: np.ndarray | None = None
) -> np.ndarray:
    """(feature, day) means in the variable's units from the last partial sums; NaN where no weight.

    ``out``, when given, is the array to finish into (it may be a view, e.g. one time block of a longer series);
    whatever it holds is overwritten. Each element gets the bits of adding the partials into zeros and dividing,
    as numpy makes them, in two compiled passes over memory (service.weighted_sums.put_rows, scale_rows).
    """
    if out is None:
        out = np.empty((n_features, days))
    total = np.zeros(n_features)
    started = np.zeros(n_features, dtype=np.bool_)
    correction = None
    for p in partials:
        put_rows(out, p.rows, p.weighted_sum, started)
        total[p.rows] += p.total
        if p.correction is not None:
            if correction is None:
                correction = np.zeros((n_features, days))
            correction[p.rows] += p.correction
    if not started.all():
        out[~started] = 0.0  # features no partial reached: no weight, NaN below
    no_weight = total <= 0
    with np.errstate(divide="ignore"):
        factor = np.where(no_weight, np.nan, 1.0 / np.where(no_weight, 1.0, total))
    if correction is None:
        # Every cell had data on every day: one reciprocal per feature.
        scale_rows(out, factor, add_offset)
        return out
    # A day on which all of a feature's cells had data is scaled by the reciprocal as above, whatever other
    # features of the batch lacked: its value must not depend on the batch it was computed in. Only the days
    # with cells missing are divided by the weight of the cells that had data.
    missing = correction != 0.0
    weight = correction
    weight += total[:, None]
    enough = weight > total[:, None] * MIN_WEIGHT_SHARE
    with np.errstate(invalid="ignore", divide="ignore"):
        divided = out / weight
    scale_rows(out, factor, add_offset)
    if add_offset:
        divided += add_offset
    np.copyto(out, divided, where=missing)
    out[~enough] = np.nan
    return out


def _time_range(time: slice, n_times: int) -> tuple[int, int]:
    """[start, stop) day indices of a slice of the store's days (step 1)."""
    if time.step not in (None, 1):
        raise RequestError(f"time slice step {time.step!r} is not supported; aggregate contiguous days")
    start, stop, _ = time.indices(n_times)
    return start, max(start, stop)


def aggregate(
    store: Store,
    weights: Weights | GridWeights,
    *,
    variables: Sequence[str] = ("tmax", "tmin", "prcp"),
    time: slice = slice(None),
) -> xr.Dataset:
    """Lazy daily weighted means per feature: Dataset (feature, time) of float64, dask-backed.

    One variable per requested name (tmax, tmin in degC, prcp in mm/day; tmean = (tmax + tmin) / 2 is
    added when both temperatures are there). Each variable is aggregated on its own grid with that grid's
    weights: ``weights`` is a GridWeights of every grid read, or, for a variable set on one grid, plain
    Weights on that grid. A cell missing on a day drops out of that day's mean and the remaining weights
    renormalise; a day with no cell left is NaN (so is a day outside the days a variable was given).
    ``time`` selects store days by index. Per-feature coverage, n_cells, area_km2, latitude and longitude
    (of the first grid's weights) ride along as coordinates.
    """
    first = weights.first if isinstance(weights, GridWeights) else weights
    weights_key = weights.key
    n_features = len(first.feature_ids)
    start, stop = _time_range(time, store.n_times)
    graphs = _partial_graphs(store, weights, variables, start, stop)
    arrays: dict[str, da.Array] = {}
    for var in variables:
        dsk, name, blocks, lasts, place = graphs[var]
        enc = store.encoding(var)
        for b, ((t0, t1), last) in enumerate(zip(blocks, lasts, strict=True)):
            dsk[(name, 0, b)] = (finish_units, last, place, n_features, t1 - t0, enc.add_offset)
        if blocks:
            graph = HighLevelGraph.from_collections(name, dsk, dependencies=())
            chunks = ((n_features,), tuple(t1 - t0 for t0, t1 in blocks))
            arrays[var] = da.Array(graph, name, chunks=chunks, dtype=np.float64)
        else:
            arrays[var] = da.zeros((n_features, 0), dtype=np.float64)
    if "tmax" in arrays and "tmin" in arrays:
        arrays["tmean"] = (arrays["tmax"] + arrays["tmin"]) / 2.0
    weights = first
    coords = {
        "feature": np.asarray(weights.feature_ids, dtype=object),
        "time": store.times[start:stop],
        "coverage": ("feature", np.asarray(weights.coverage, dtype=np.float64)),
        "n_cells": ("feature", np.asarray(weights.n_cells, dtype=np.int64)),
        "area_km2": ("feature", np.asarray(weights.area_km2, dtype=np.float64)),
        "latitude": ("feature", np.asarray(weights.latitude, dtype=np.float64)),
        "longitude": ("feature", np.asarray(weights.longitude, dtype=np.float64)),
    }
    data_vars = {
        var: (
            ("feature", "time"),
            array,
            {"units": VARIABLE_UNITS.get(var, ""), "cell_methods": "area: mean"},
        )
        for var, array in arrays.items()
    }
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs.update(
        {
            "dataset": store.name,
            "fingerprint": store.fingerprint,
            "weights_key": weights_key,
            "weighting": weights.weighting,
        }
    )
    return ds


def _partial_graphs(
    store: Store,
    weights: Weights | GridWeights,
    variables: Sequence[str],
    start: int,
    stop: int,
    cached: bool = True,
    handover: Handover | None = None,
    next_weights: Weights | GridWeights | None = None,
) -> dict[str, tuple[dict[Any, Any], str, list[tuple[int, int]], list[list[Any]], np.ndarray]]:
    """The chunk tasks of each variable, on its own grid: {var: (graph, name, time blocks, each block's unit
    task keys, place)}; a block's tasks give the partial sums of its chunks, which ``finish`` adds in grid order
    (:func:`in_grid_order` with ``place``). No reduction tree: grouping a feature's partials by their place in
    the batch's list made its sums depend on the batch.

    With a ``handover``, a chunk whose partial sums the previous batch left there is not read again, and a chunk
    that ``next_weights`` (the next batch's) also touch is read once for both (:func:`chunk_sums_for_two`).
    """
    first = weights.first if isinstance(weights, GridWeights) else weights
    n_features = len(first.feature_ids)
    unknown = [v for v in variables if v not in store.variables]
    if unknown:
        raise RequestError(
            f"dataset {store.name!r} has no variable {unknown[0]!r}; it has {list(store.variables)!r}",
            field="variables",
        )
    if not isinstance(weights, GridWeights):
        names = list(dict.fromkeys(store.grid_of(v) for v in variables))
        if len(names) > 1:
            raise ValueError(
                f"variables {list(variables)!r} lie on grids {names!r} of dataset {store.name!r}; give "
                "GridWeights with the weights of each grid"
            )
    token = dask.base.tokenize(weights.key, store.location, store.fingerprint, start, stop)
    plans: dict[tuple[Any, ...], list[ChunkWeights]] = {}
    graphs = {}
    for var in variables:
        grid = store.grid_of(var)
        on_grid = weights_on(weights, grid)
        ny, nx = store.grids[grid].shape
        if on_grid.matrix.shape != (n_features, ny * nx):
            raise ValueError(
                f"weights of shape {on_grid.matrix.shape} do not fit store {store.name!r}: its grid {grid!r} has "
                f"{ny} x {nx} cells"
            )
        cy, cx, ct = store.chunk_shape_of(var)
        plan = plans.get((grid, cy, cx))
        if plan is None:
            plan = plans[(grid, cy, cx)] = chunk_weights(on_grid, (ny, nx), (cy, cx))
        shared: dict[tuple[int, int], ChunkWeights] = {}
        if handover is not None and next_weights is not None:
            next_plan = plans.get(("next", grid, cy, cx))
            if next_plan is None:
                next_on_grid = weights_on(next_weights, grid)
                next_plan = plans[("next", grid, cy, cx)] = chunk_weights(next_on_grid, (ny, nx), (cy, cx))
            shared = {(c.y.start, c.x.start): c for c in next_plan}
        blocks = [(b, min(stop, (b // ct + 1) * ct)) for b in _block_starts(start, stop, ct)]
        enc = store.encoding(var)
        name = f"wxshock-{var}-{token}"
        units, place = read_units(plan, store.storage_shape_of(var)[:2], shared)
        next_key = next_weights.key if next_weights is not None else None
        # A hand-built graph: dask.delayed would walk every argument (the weights) for each of the tasks.
        dsk: dict[Any, Any] = {}
        lasts = []
        for b, (t0, t1) in enumerate(blocks):
            leaves = []
            for k, unit in enumerate(units):
                key = (f"{name}-chunk", b, k)
                dsk[key] = (unit_sums, store, var, unit, slice(t0, t1), enc.scale_factor, enc.fill_value, cached,
                            handover, weights.key, next_key)  # fmt: skip
                leaves.append(key)
            lasts.append(leaves)
        graphs[var] = (dsk, name, blocks, lasts, place)
    return graphs


def finish_units(
    units: Sequence[Sequence[Partial]], place: np.ndarray, n_features: int, days: int, add_offset: float
) -> np.ndarray:
    """:func:`finish` of one time block from its unit tasks' partial sums, added in grid order."""
    return finish(in_grid_order(units, place), n_features, days, add_offset)


def finish_series(
    lasts: Sequence[Sequence[Sequence[Partial]]],
    place: np.ndarray,
    blocks: Sequence[tuple[int, int]],
    n_features: int,
    add_offset: float,
) -> np.ndarray:
    """(feature, day) means over all the time blocks at once, from each block's unit tasks' partial sums.

    One array for the whole series (lent by service.buffers), each block finished into its own columns: the same
    values as ``finish`` per block joined along time, without an array per block and the copy that joins them.
    """
    start = blocks[0][0] if blocks else 0
    # memory of an earlier batch when there is some: fresh memory costs more than the arithmetic (service.buffers)
    out = series_pool().empty((n_features, (blocks[-1][1] - start) if blocks else 0))
    for partials, (t0, t1) in zip(lasts, blocks, strict=True):
        block = out[:, t0 - start : t1 - start]
        finish(in_grid_order(partials, place), n_features, t1 - t0, add_offset, out=block)
    return out


def lazy_series(
    store: Store,
    weights: Weights | GridWeights,
    *,
    variables: Sequence[str],
    time: slice = slice(None),
    cached: bool = True,
    handover: Handover | None = None,
    next_weights: Weights | GridWeights | None = None,
) -> dict[str, Any]:
    """Lazy daily weighted means per feature as one dask Delayed per variable: (feature, day) float64.

    The values of :func:`aggregate`, bit for bit (same chunk tasks, same reduction), each variable's whole
    series made by one task into one array: for a caller that wants the arrays, not an xarray Dataset.
    ``cached`` False reads the chunks around the decoded-tile cache (the same values). ``handover`` and
    ``next_weights`` let consecutive batches read the chunks both touch once (:func:`_partial_graphs`); a batch's
    chunk tasks must then start after every chunk task of the batch before it has run (its graph may be made
    earlier).
    """
    from dask.delayed import Delayed

    first = weights.first if isinstance(weights, GridWeights) else weights
    n_features = len(first.feature_ids)
    start, stop = _time_range(time, store.n_times)
    graphs = _partial_graphs(store, weights, variables, start, stop, cached, handover, next_weights)
    series = {}
    for var in variables:
        dsk, name, blocks, lasts, place = graphs[var]
        key = f"{name}-series"
        if blocks:
            dsk[key] = (finish_series, lasts, place, blocks, n_features, store.encoding(var).add_offset)
        else:
            dsk[key] = (np.zeros, (n_features, 0))
        series[var] = Delayed(key, HighLevelGraph.from_collections(key, dsk, dependencies=()))
    return series


def _block_starts(start: int, stop: int, ct: int) -> list[int]:
    """First day of every time block: the store's time chunks, cut to [start, stop)."""
    if stop <= start:
        return []
    first = [start] + [b for b in range((start // ct + 1) * ct, stop, ct)]
    return first
